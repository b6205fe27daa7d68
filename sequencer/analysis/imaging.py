"""Stokes imaging: per-pixel Stokes maps from camera frames, their derived maps, the spatially
integrated Stokes parameters and the degree of non-separability, with bootstrap error bars.

Every function is pure numpy on arrays (frames as (n, rows, cols)); storage.frames reads them from
a run file and analysis.imaging_dask does the same out of core.

A frame taken behind an analyzer setting with polarization POVM element E_k (2x2) has, at every
pixel, the mean value I_k = tr(E_k J) = (1/2) sum_j S_j tr(E_k sigma_j) with J the local coherency
matrix and S_j the local Stokes parameters (sigma_0 = identity, S1 = H - V, S2 = D - A, S3 = R - L),
so S = A^+ (I - dark) pixel by pixel with A_kj = tr(E_k sigma_j)/2: linear inversion (James, Kwiat,
Munro, White, PRA 64, 052312 (2001)) applied to every pixel, with the operators the run file stores
(the calibrated, imperfect analyzer) rather than ideal projectors.

Non-separability. For a beam whose field is a superposition of orthonormal spatial modes in two
polarizations, integrating the local coherency matrix over the plane gives the reduced polarization
state tr_spatial(rho) times the power; its normalised Stokes vector s = (S1, S2, S3)/S0 of the
spatially integrated Stokes parameters gives

    V = sqrt(1 - |s|^2)

the vector quality factor of Ndagano et al., Opt. Lett. 41, 3407 (2016), and the degree of
non-separability of McLaren, Konrad and Forbes, PRA 92, 023833 (2015); Selyem et al., PRA 100,
063842 (2019) (arXiv:1902.07988) relate the concurrence to spatially resolved Stokes projections.
(Cited from memory; the public abstracts we could consult confirm the relation to concurrence but
not the printed equations.) For a pure state V equals the concurrence sqrt(1 - |r_A|^2) of
Wootters, PRL 80, 2245 (1998) (r_A the Bloch vector of either reduced state); the tests check that
identity against qutip's concurrence. For a mixed state V also counts mixedness: it is then an upper
bound of the entanglement-like part, not the concurrence.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from lightloom.sequencer.optics.stokes import PAULI
from lightloom.sequencer.optics.transverse import degree_of_polarization, ellipticity_deg, orientation_deg

Real = NDArray[np.float64]
BOOTSTRAP_REPLICATES = 400


def polarization_povms(operators: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """The 2x2 polarization POVM elements (n, 2, 2) of 4x4 port operators (n, 4, 4) of an analyzer
    without spatial elements: the trace over the spatial factor, divided by 2."""
    e = np.asarray(operators, dtype=np.complex128).reshape(-1, 2, 2, 2, 2)
    return np.einsum("npmqm->npq", e) / 2.0


def design_matrix(povms: NDArray[np.complex128]) -> Real:
    """A (n, 4) with A_kj = tr(E_k sigma_j)/2: frame k's mean value is A_k . S."""
    return 0.5 * np.einsum("kpq,jqp->kj", np.asarray(povms), PAULI).real


def inversion_matrix(povms: NDArray[np.complex128]) -> Real:
    """The least-squares inverse (4, n) of the design matrix; raises ValueError when the settings
    do not determine all four Stokes parameters."""
    a = design_matrix(povms)
    if np.linalg.matrix_rank(a, tol=1e-6 * max(1.0, float(np.abs(a).max()))) < 4:
        raise ValueError(
            "the polarization settings of these frames do not determine S0..S3; image at least "
            "four settings that span the Poincare sphere (e.g. H, V, D, R)"
        )
    return np.linalg.pinv(a)


@dataclass(frozen=True, eq=False)
class StokesMaps:
    """Per-pixel Stokes maps (4, rows, cols) in ADU (NaN where masked), the mask of saturated
    pixels (True: some frame saturated there), and the derived maps."""

    stokes: Real
    saturated: NDArray[np.bool_]

    @property
    def dop(self) -> Real:
        """Degree of polarization (NaN where dark or masked)."""
        s = np.moveaxis(self.stokes, 0, -1)
        floor = 0.0 if not np.isfinite(s[..., 0]).any() else 1e-9 * np.nanmax(np.abs(s[..., 0]))
        return degree_of_polarization(s, floor)

    @property
    def orientation_deg(self) -> Real:
        """Orientation of the polarization ellipse, deg in (-90, 90]."""
        return orientation_deg(np.moveaxis(self.stokes, 0, -1))

    @property
    def ellipticity_deg(self) -> Real:
        """Ellipticity angle, deg in [-45, 45], positive right-handed (S3 > 0)."""
        return ellipticity_deg(np.moveaxis(self.stokes, 0, -1))


def mean_dark(dark_frames: Real | None, shape: tuple[int, int]) -> Real:
    """The mean dark frame (zeros when no dark frame was taken)."""
    if dark_frames is None or len(dark_frames) == 0:
        return np.zeros(shape)
    return np.asarray(dark_frames, dtype=np.float64).mean(axis=0)


def stokes_maps(
    frames: Real, povms: NDArray[np.complex128], dark: Real | None = None,
    saturated: NDArray[np.bool_] | None = None,
) -> StokesMaps:
    """Per-pixel Stokes maps from measurement frames (n, rows, cols), their POVM elements (n, 2, 2),
    a dark frame (rows, cols) to subtract, and saturation masks (n, rows, cols)."""
    f = np.asarray(frames, dtype=np.float64)
    d = np.zeros(f.shape[1:]) if dark is None else np.asarray(dark, dtype=np.float64)
    inverse = inversion_matrix(povms)
    s = np.tensordot(inverse, f - d, axes=(1, 0))
    mask = np.zeros(f.shape[1:], bool) if saturated is None else np.asarray(saturated, bool).any(axis=0)
    s[:, mask] = np.nan
    return StokesMaps(s, mask)


def integrated_stokes(maps: StokesMaps) -> Real:
    """The spatially integrated Stokes parameters [S0, S1, S2, S3] (ADU, saturated pixels left out)."""
    return np.nansum(maps.stokes, axis=(1, 2))


def nonseparability(stokes: Real) -> float:
    """V = sqrt(1 - (S1^2 + S2^2 + S3^2)/S0^2) of integrated Stokes parameters, clipped to [0, 1]
    (see the module docstring for its sources)."""
    s = np.asarray(stokes, dtype=float)
    if not s[0] > 0:
        return float("nan")
    r2 = float(np.sum(s[1:] ** 2) / s[0] ** 2)
    return float(np.sqrt(np.clip(1.0 - r2, 0.0, 1.0)))


@dataclass(frozen=True)
class Scalar:
    """A value with its bootstrap standard deviation and 95% interval inside the physical range."""

    value: float
    std: float
    interval: tuple[float, float]

    def to_json(self) -> dict:
        return {"value": self.value, "std": self.std, "interval": list(self.interval)}


@dataclass(frozen=True, eq=False)
class ImagingResult:
    """What an imaging run determines: the maps, the integrated Stokes vector (normalised, S0 = 1)
    with its bootstrap spread, the non-separability, and the number of masked pixels."""

    maps: StokesMaps
    integrated: Real
    integrated_std: Real
    nonseparability: Scalar
    masked_pixels: int


def bootstrap_integrated(
    totals: Real, groups: NDArray[np.int64], dark_totals: Real, povms: NDArray[np.complex128],
    rng: np.random.Generator, replicates: int = BOOTSTRAP_REPLICATES,
) -> Real:
    """Bootstrap replicates (B, 4) of the integrated Stokes parameters.

    ``totals`` are the frames' sums over the unmasked pixels, ``groups`` the setting of each frame
    (frames of one setting are resampled with replacement among themselves), ``dark_totals`` the
    dark frames' sums over the same pixels (resampled too, so the dark level's noise is counted).
    Cost O(B n): the integrated parameters are linear in the frame sums.
    """
    a = design_matrix(povms)
    labels = np.unique(groups)
    members = [np.flatnonzero(groups == g) for g in labels]
    out = np.empty((replicates, 4))
    for b in range(replicates):
        idx = np.concatenate([rng.choice(m, size=len(m), replace=True) for m in members])
        dark = rng.choice(dark_totals, size=len(dark_totals), replace=True).mean() if len(dark_totals) else 0.0
        out[b] = np.linalg.lstsq(a[idx], totals[idx] - dark, rcond=None)[0]
    return out


def analyze_frames(
    frames: Real, povms: NDArray[np.complex128], groups: NDArray[np.int64],
    dark_frames: Real | None = None, saturated: NDArray[np.bool_] | None = None,
    *, rng: np.random.Generator | None = None, replicates: int = BOOTSTRAP_REPLICATES,
) -> ImagingResult:
    """Maps, integrated Stokes parameters and non-separability of an imaging measurement.

    ``groups`` labels the setting of each measurement frame (repeats of one setting share it).
    """
    rng = np.random.default_rng(0) if rng is None else rng
    f = np.asarray(frames, dtype=np.float64)
    dark = mean_dark(dark_frames, f.shape[1:])
    maps = stokes_maps(f, povms, dark, saturated)
    keep = ~maps.saturated
    totals = f[:, keep].sum(axis=1)
    dark_totals = (np.asarray(dark_frames, dtype=np.float64)[:, keep].sum(axis=1)
                   if dark_frames is not None and len(dark_frames) else np.zeros(0))
    centre = np.linalg.lstsq(design_matrix(povms), totals - (dark_totals.mean() if len(dark_totals) else 0.0),
                             rcond=None)[0]
    reps = bootstrap_integrated(totals, np.asarray(groups), dark_totals, povms, rng, replicates)
    value = nonseparability(centre)
    v_reps = np.array([nonseparability(r) for r in reps])
    v_reps = v_reps[np.isfinite(v_reps)]
    lo, hi = (np.percentile(v_reps, [2.5, 97.5]) if len(v_reps) else (np.nan, np.nan))
    normalised = reps / reps[:, :1]
    return ImagingResult(
        maps=maps,
        integrated=centre / centre[0],
        integrated_std=normalised.std(axis=0, ddof=1) if len(reps) > 1 else np.full(4, np.nan),
        nonseparability=Scalar(value, float(v_reps.std(ddof=1)) if len(v_reps) > 1 else float("nan"),
                               (float(np.clip(lo, 0, 1)), float(np.clip(hi, 0, 1)))),
        masked_pixels=int(maps.saturated.sum()),
    )
