"""The polarization portrait of a joint state: maps of intensity, local Stokes parameters, degree of
polarization, ellipse orientation and ellipticity, and the patterns behind a polarizer, on a grid in
waist units (pure; the figure is drawn by sequencer.present.portrait)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from lightloom.sequencer.optics import transverse

Real = NDArray[np.float64]

DEFAULT_HALF_WIDTH = 2.5  # waist radii: the first-order modes carry < 1e-4 of their power beyond
DEFAULT_POINTS = 41
# Below this fraction of the peak intensity a point counts as dark: no orientation or DOP is shown.
DARK_FRACTION = 1e-3


@dataclass(frozen=True)
class Portrait:
    """Maps of one joint state on a square grid (arrays (points, points), x along the second axis).

    ``stokes`` (points, points, 4) is per w0^2 with the beam power as the unit (it integrates to the
    reduced polarization Stokes vector); ``dop``, ``orientation_deg`` and ``ellipticity_deg`` are
    NaN at dark points (intensity below DARK_FRACTION of the peak); ``polarizer`` maps angle (deg)
    to the intensity behind an ideal polarizer at that angle.
    """

    x: Real
    y: Real
    stokes: Real
    dop: Real
    orientation_deg: Real
    ellipticity_deg: Real
    handedness: NDArray[np.int8]
    polarizer: dict[float, Real]

    @property
    def intensity(self) -> Real:
        return self.stokes[..., 0]


def portrait(rho: ArrayLike, half_width: float = DEFAULT_HALF_WIDTH, points: int = DEFAULT_POINTS) -> Portrait:
    """The portrait of a 4x4 density matrix (or 4-ket) in the basis |H,h>, |H,v>, |V,h>, |V,v>."""
    x, y = transverse.grid(half_width, points)
    s = transverse.local_stokes(rho, x, y)
    peak = float(s[..., 0].max())
    dark = s[..., 0] <= DARK_FRACTION * peak
    dop = transverse.degree_of_polarization(s, floor=DARK_FRACTION * peak)
    orient = np.where(dark, np.nan, transverse.orientation_deg(s))
    ellip = np.where(dark, np.nan, transverse.ellipticity_deg(s))
    hand = np.where(dark, 0, transverse.handedness(s)).astype(np.int8)
    pol = {a: transverse.polarizer_intensity(s, a) for a in transverse.POLARIZER_ANGLES_DEG}
    return Portrait(x, y, s, dop, orient, ellip, hand, pol)


def _rows(a: Real, digits: int = 6) -> list:
    """A map as nested lists with NaN written as null (JSON has no NaN)."""
    r = np.round(np.asarray(a, dtype=float), digits)
    return [[None if not np.isfinite(v) else float(v) for v in row] for row in r]


def portrait_json(p: Portrait) -> dict:
    """The maps as a JSON-ready document (the ``field_maps`` key of ``analyze --json --field-maps``)."""
    axis = p.x[0, :]
    return {
        "grid": {
            "unit": "waist radius w0",
            "x": [float(v) for v in np.round(axis, 6)],
            "y": [float(v) for v in np.round(p.y[:, 0], 6)],
            "rows": "y (first index), x (second index)",
        },
        "intensity_unit": "fraction of the beam power per w0^2",
        "S0": _rows(p.stokes[..., 0]),
        "S1": _rows(p.stokes[..., 1]),
        "S2": _rows(p.stokes[..., 2]),
        "S3": _rows(p.stokes[..., 3]),
        "dop": _rows(p.dop),
        "orientation_deg": _rows(p.orientation_deg, 3),
        "ellipticity_deg": _rows(p.ellipticity_deg, 3),
        "polarizer": {f"{a:g}": _rows(m) for a, m in p.polarizer.items()},
        "dark_fraction": DARK_FRACTION,
    }
