"""Calibration fits: analyzer element offsets, retardances, port gains and sorter visibility from scans.

Every reading of a calibration scan is modelled with the optics model itself (``port_operators`` of an
``AnalyzerModel`` holding the trial parameters), so the physics exists once:

    reading = scale * tr(rho_in E_port(settings; parameters)) + background_port     (shutter open)
    reading = background_port                                                         (shutter closed)

with a known input rho_in (a polarizer at H and the h mode before the analyzer: |H,h>). The fit is a
weighted nonlinear least-squares problem solved with scipy; the weights come from a noise model
sigma^2 = a^2 + (r * mean)^2 (an absolute floor and a relative part, the form of a power meter's noise)
estimated from the residuals (feasible generalised least squares), and the covariance is
(J^T W J)^-1 scaled by the reduced chi-square (Press et al., Numerical Recipes, 3rd ed., sec. 15.4-15.5).

What each scan determines (input H, analysis at the ports of the polarizing splitter):

* half-wave plate scan (quarter-wave plate parked): the phase of cos^2(2 theta) gives h - q/2 (the
  parked quarter-wave plate at offset q turns the light's azimuth by about q); the retardance only
  through the depth of the extinction minima, i.e. |delta - 180|, which needs the background pinned
  by the shutter-closed readings and the splitter extinction known (optics.polarizing_splitter.
  extinction is taken from the bench, never fitted: these scans cannot tell it from the retardance
  error); the sign of delta - 180 shows only through the slight ellipticity the parked quarter-wave
  plate gives the light, and is reported as ambiguous (std covering both signs) when it does not.
* quarter-wave plate scan (half-wave plate parked): the retardance from the modulation depth
  (1 - cos delta) / 2, and from the phase of cos 4(theta + q - h) the difference q - h with the
  parked half-wave plate's offset h. Fitted together, the two scans separate q and h.
* image rotator scan, converter out: the rotator's axis offset and the sorter visibility (the depth of
  the h <-> v exchange); with the converter in: the converter's axis offset and retardance relative to
  the rotator's axis.
* port gains, relative to the first port: from any scan that sends the same light to ports in turn
  (plate scans move it between splitter outputs, converter-out rotator scans between sorter outputs).

Parameters of parked elements that no scan in the set determines stay at the bench's values, and the
fitted ones are relative to them. Scans between linear polarizers cannot tell a plate's fast axis from
its slow one (conjugating every Jones matrix leaves every reading unchanged), so every fit starts from
the bench's values and keeps the fast axis within 45 deg of the marked one.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import least_squares, minimize

from lightloom.sequencer.errors import InputError
from lightloom.sequencer.model.vocabulary import STAGE_ELEMENTS
from lightloom.sequencer.optics.analyzer import (
    CONVERTER, ELEMENT_NAMES, AnalyzerModel, PlateModel, PortModel,
    RotatorModel, port_operators, probabilities,
)

QWP_OFFSET = "calibration.quarter_wave_plate.fast_axis_offset_deg"
QWP_RETARDANCE = "calibration.quarter_wave_plate.retardance_deg"
HWP_OFFSET = "calibration.half_wave_plate.fast_axis_offset_deg"
HWP_RETARDANCE = "calibration.half_wave_plate.retardance_deg"
CONVERTER_OFFSET = "calibration.mode_converter.axis_offset_deg"
CONVERTER_RETARDANCE = "calibration.mode_converter.retardance_deg"
ROTATOR_OFFSET = "calibration.image_rotator.axis_offset_deg"
SORTER_VISIBILITY = "optics.parity_sorter.visibility"
GAIN_PREFIX = "calibration.port_gain."

PHYSICAL_PARAMETERS: tuple[str, ...] = (
    QWP_OFFSET, QWP_RETARDANCE, HWP_OFFSET, HWP_RETARDANCE,
    CONVERTER_OFFSET, CONVERTER_RETARDANCE, ROTATOR_OFFSET, SORTER_VISIBILITY,
)
"""Names of the physical parameters, as dotted bench keys (what an overlay overrides)."""

ANGLE_PARAMETERS: frozenset[str] = frozenset({QWP_OFFSET, HWP_OFFSET, CONVERTER_OFFSET, ROTATOR_OFFSET})

CALIBRATION_INPUT: NDArray[np.complex128] = np.array([1, 0, 0, 0], dtype=np.complex128)
"""The input the scans assume: |H,h> (a polarizer at H before the analyzer, the h mode)."""
CALIBRATION_INPUT.setflags(write=False)


# The start of a half-wave-like retardance is moved off 180 deg: there the readings depend on it
# only quadratically, so a gradient step from exactly 180 would never move it.
_HALF_WAVE_NUDGE_DEG = 2.0
_OFFSET_GRID_DEG = np.arange(-45.0, 45.0, 7.5)
# Two starts whose chi-square differ by less than this fit the data equally well.
_AMBIGUOUS_CHI2 = 4.0
# Singular values below this fraction of the largest mark directions the data do not constrain.
_UNDETERMINED = 1e-9
# A port whose modelled probability never exceeds this in a scan is left out of that scan.
_DARK_PORT = 1e-6


@dataclass(frozen=True)
class ScanReadings:
    """The readings of one calibration scan, ready for a fit.

    ``settings`` (n, 5) are the element positions of each reading in ELEMENT_NAMES order (deg; the
    converter 1 = in, 0 = out; NaN = absent, treated as 0 / out); ``values`` (n, n_ports) the port
    readings, W; ``dark`` (n,) marks shutter-closed readings; ``scanned`` names the scanned element.
    """

    label: str
    scanned: str
    settings: NDArray[np.float64]
    values: NDArray[np.float64]
    dark: NDArray[np.bool_]

    def __post_init__(self) -> None:
        if self.scanned not in STAGE_ELEMENTS:
            raise ValueError(f"scanned element {self.scanned!r}; expected one of {STAGE_ELEMENTS}")
        s = np.array(self.settings, dtype=float)
        v = np.array(self.values, dtype=float)
        d = np.array(self.dark, dtype=bool)
        if s.ndim != 2 or s.shape[1] != len(ELEMENT_NAMES) or v.ndim != 2 or len(v) != len(s) or d.shape != (len(s),):
            raise ValueError(f"scan {self.label}: settings (n, 5), values (n, n_ports) and dark (n,) do not fit")
        for a in (s, v, d):
            a.setflags(write=False)
        object.__setattr__(self, "settings", s)
        object.__setattr__(self, "values", v)
        object.__setattr__(self, "dark", d)

    @property
    def converter_in(self) -> bool:
        """True when the converter is in for most light readings."""
        light = ~self.dark
        conv = np.nan_to_num(self.settings[light, CONVERTER]) > 0.5
        return bool(light.any() and conv.mean() > 0.5)


@dataclass(frozen=True)
class CalibrationFit:
    """A calibration fit: parameter names (dotted bench keys, then nuisance parameters), values, 1-sigma.

    ``std`` is inf for a parameter the data do not determine. ``residual_rms_w`` is the rms of the
    unweighted residuals (W), ``n_readings`` the readings used (shutter open and closed), ``notes``
    what the user should know (ambiguities).
    """

    names: tuple[str, ...]
    values: tuple[float, ...]
    std: tuple[float, ...]
    covariance: NDArray[np.float64]
    residual_rms_w: float
    n_readings: int
    reduced_chi2: float
    notes: tuple[str, ...] = ()

    def value(self, name: str) -> float:
        """Fitted value of ``name``."""
        return self.values[self._index(name)]

    def std_of(self, name: str) -> float:
        """Standard deviation of ``name``."""
        return self.std[self._index(name)]

    def fitted(self) -> dict[str, tuple[float, float]]:
        """Physical parameters and port gains: name -> (value, std), in fit order."""
        return {
            n: (v, s) for n, v, s in zip(self.names, self.values, self.std)
            if n in PHYSICAL_PARAMETERS or n.startswith(GAIN_PREFIX)
        }

    def _index(self, name: str) -> int:
        try:
            return self.names.index(name)
        except ValueError:
            raise KeyError(f"{name!r} was not fitted; fitted: {', '.join(self.names)}") from None


def prepare_scan(
    label: str,
    scanned: str,
    kind: ArrayLike,
    commanded: ArrayLike,
    readback: ArrayLike,
    values: ArrayLike,
    reference_w: ArrayLike,
) -> ScanReadings:
    """Turn the columns of a run's readings into a :class:`ScanReadings`.

    Read-back positions are used where they exist (commanded ones otherwise). Measure readings are
    divided by the reference reading relative to its median (cancelling laser drift) when every one
    has a positive reference; "reference"-kind readings are left out.
    """
    kinds = np.asarray(kind).astype(str)
    keep = (kinds == "measure") | (kinds == "background")
    cmd = np.asarray(commanded, dtype=float)[keep]
    rb = np.asarray(readback, dtype=float)[keep]
    vals = np.array(values, dtype=float)[keep]
    ref = np.asarray(reference_w, dtype=float)[keep]
    dark = kinds[keep] == "background"
    settings = np.where(np.isfinite(rb), rb, cmd)
    light = ~dark
    if light.any() and np.all(np.isfinite(ref[light])) and np.all(ref[light] > 0):
        vals[light] *= (np.median(ref[light]) / ref[light])[:, None]
    return ScanReadings(label, scanned, settings, vals, dark)


def scan_parameters(scan: ScanReadings, model: AnalyzerModel) -> tuple[str, ...]:
    """The physical parameters a scan determines on an analyzer like ``model``.

    Raises
    ------
    InputError
        When the scanned element, or what its scan needs, is not on the table.
    """
    def need(present: object, what: str) -> None:
        if present is None:
            raise InputError(f"scan {scan.label}: it scans {scan.scanned}, but the bench has no {what}")

    if scan.scanned in ("quarter_wave_plate", "half_wave_plate"):
        need(getattr(model, scan.scanned), scan.scanned.replace("_", " "))
        need(model.splitter_extinction, "polarizing splitter to analyse the plate scan")
        return (QWP_OFFSET, QWP_RETARDANCE) if scan.scanned == "quarter_wave_plate" else (HWP_OFFSET, HWP_RETARDANCE)
    need(model.sorter_visibility, "parity sorter to analyse the spatial scan")
    if scan.scanned == "converter_angle" or scan.converter_in:
        need(model.mode_converter, "mode converter")
        return (CONVERTER_OFFSET, CONVERTER_RETARDANCE)
    need(model.image_rotator, "image rotator")
    return (ROTATOR_OFFSET, SORTER_VISIBILITY)


def _moves_light(scan: ScanReadings) -> str | None:
    """Which output the scan sends light between: 'splitter', 'sorter' or None."""
    if scan.scanned in ("quarter_wave_plate", "half_wave_plate"):
        return "splitter"
    if scan.scanned == "image_rotator" and not scan.converter_in:
        return "sorter"
    return None


def gain_ports(scans: Sequence[ScanReadings], ports: Sequence[PortModel]) -> tuple[int, ...]:
    """Indices of the ports whose gain relative to the first port the scans determine (first port excluded).

    Two ports are linked when a scan sends the same light to both in turn: ports differing only in
    their splitter output by a plate scan, ports differing only in their sorter output by a rotator
    scan with the converter out; a gain is determined when its port is linked to the first port.
    """
    moves = {_moves_light(s) for s in scans}
    parent = list(range(len(ports)))

    def root(i: int) -> int:
        while parent[i] != i:
            i = parent[i]
        return i

    for j, a in enumerate(ports):
        for k, b in enumerate(ports[:j]):
            splitter_step = a.sorter_port == b.sorter_port and a.splitter_port != b.splitter_port
            sorter_step = a.splitter_port == b.splitter_port and a.sorter_port != b.sorter_port
            if (splitter_step and "splitter" in moves) or (sorter_step and "sorter" in moves):
                parent[root(j)] = root(k)
    return tuple(j for j in range(1, len(ports)) if root(j) == root(0))


def _with_parameters(
    model: AnalyzerModel, ports: tuple[PortModel, ...], values: Mapping[str, float]
) -> tuple[AnalyzerModel, tuple[PortModel, ...]]:
    """The analyzer and ports with ``values`` (dotted names) replacing their calibration."""
    rep = dataclasses.replace
    q, h, c, r = model.quarter_wave_plate, model.half_wave_plate, model.mode_converter, model.image_rotator
    if q is not None and (QWP_OFFSET in values or QWP_RETARDANCE in values):
        q = PlateModel(values.get(QWP_RETARDANCE, q.retardance_deg), values.get(QWP_OFFSET, q.fast_axis_offset_deg))
    if h is not None and (HWP_OFFSET in values or HWP_RETARDANCE in values):
        h = PlateModel(values.get(HWP_RETARDANCE, h.retardance_deg), values.get(HWP_OFFSET, h.fast_axis_offset_deg))
    if c is not None and (CONVERTER_OFFSET in values or CONVERTER_RETARDANCE in values):
        c = rep(c, axis_offset_deg=values.get(CONVERTER_OFFSET, c.axis_offset_deg),
                retardance_deg=values.get(CONVERTER_RETARDANCE, c.retardance_deg))
    if r is not None and ROTATOR_OFFSET in values:
        r = RotatorModel(values[ROTATOR_OFFSET])
    out = rep(model, quarter_wave_plate=q, half_wave_plate=h, mode_converter=c, image_rotator=r,
              sorter_visibility=values.get(SORTER_VISIBILITY, model.sorter_visibility))
    new_ports = tuple(
        rep(p, gain=values.get(GAIN_PREFIX + p.name, p.gain)) for p in ports
    )
    return out, new_ports


def _start_value(name: str, model: AnalyzerModel) -> float:
    """The value ``model`` holds for a physical parameter (its fields carry the bench key names)."""
    if name == SORTER_VISIBILITY:
        if model.sorter_visibility is None:
            raise InputError(f"cannot fit {name}: the bench has no parity sorter")
        return float(model.sorter_visibility)
    _, element, field = name.split(".")
    part = getattr(model, element)
    if part is None:
        raise InputError(f"cannot fit {name}: the bench has no {element.replace('_', ' ')}")
    return float(getattr(part, field))


class _Problem:
    """The weighted residuals of several scans, with scales and backgrounds solved linearly.

    The physical parameters and gains are the nonlinear unknowns; for given values the scales and
    backgrounds follow by weighted linear least squares (variable projection, Golub and Pereyra,
    SIAM J. Numer. Anal. 10, 413 (1973)), so the solver only sees the few nonlinear ones.
    """

    def __init__(self, scans: Sequence[ScanReadings], model: AnalyzerModel, ports: tuple[PortModel, ...],
                 free: tuple[str, ...], gains: tuple[int, ...], input_state: NDArray[np.complex128],
                 start: Mapping[str, float]) -> None:
        self.scans, self.model, self.input_state = tuple(scans), model, input_state
        # Gains are relative to the first port, whose gain is folded into the scale.
        self.ports = tuple(dataclasses.replace(p, gain=1.0) for p in ports)
        self.phys_names = free + tuple(GAIN_PREFIX + ports[j].name for j in gains)
        shared = np.zeros(len(ports), dtype=bool)
        shared[[0, *gains]] = True
        # Readings are worked in units of each scan's brightest reading.
        self.level = [max(float(np.max(np.abs(s.values[~s.dark]))) if (~s.dark).any() else 1.0, 1e-30)
                      for s in self.scans]
        self.y = [s.values / lv for s, lv in zip(self.scans, self.level)]
        self.sigma = [np.ones_like(y) for y in self.y]
        # One optics call for all scans, each distinct setting once.
        stacked = np.concatenate([np.nan_to_num(s.settings, nan=0.0) for s in self.scans])
        self.unique_settings, inverse = np.unique(stacked, axis=0, return_inverse=True)
        bounds = np.cumsum([0] + [len(s.dark) for s in self.scans])
        self.unique_index = [inverse.reshape(-1)[a:b] for a, b in zip(bounds[:-1], bounds[1:])]
        # A port the model sends no light to in a scan tells nothing about the optics: left out.
        self.active = [np.max(p, axis=0) > _DARK_PORT for p in self.probabilities(start)]
        self.layout: list[tuple[NDArray[np.bool_], NDArray[np.intp], NDArray[np.intp]]] = []
        names: list[str] = []
        for s, act in zip(self.scans, self.active):
            sh = act & shared
            own = np.flatnonzero(act & ~shared)
            self.layout.append((sh, own, np.flatnonzero(act)))
            names += [f"scale[{s.label}]"] * bool(sh.any())
            names += [f"scale[{s.label}/{ports[j].name}]" for j in own]
            names += [f"background[{s.label}/{ports[j].name}]" for j in np.flatnonzero(act)]
        self.linear_names = tuple(names)
        self.names = self.phys_names + self.linear_names

    def probabilities(self, values: Mapping[str, float]) -> list[NDArray[np.float64]]:
        """tr(rho_in E_port) (n, n_ports) per scan; repeated settings are computed once."""
        model, ports = _with_parameters(self.model, self.ports, values)
        p = probabilities(self.input_state, port_operators(model, ports, self.unique_settings))
        return [p[index] for index in self.unique_index]

    def designs(self, theta: NDArray[np.float64]) -> list[NDArray[np.float64]]:
        """Per scan, the unweighted design matrix (n * n_active, n_linear) at ``theta``."""
        out = []
        for s, p, (sh, own, act) in zip(self.scans, self.probabilities(dict(zip(self.phys_names, theta))),
                                        self.layout):
            light = ~s.dark
            n = len(s.dark)
            cols = []
            if sh.any():
                cols.append(np.where(light[:, None] & sh[None, :], p, 0.0))
            for j in own:
                c = np.zeros_like(p)
                c[light, j] = p[light, j]
                cols.append(c)
            for j in act:
                c = np.zeros_like(p)
                c[:, j] = 1.0
                cols.append(c)
            out.append(np.stack([c[:, act].ravel() for c in cols], 1) if cols else np.zeros((n * len(act), 0)))
        return out

    def _weighted(self, k: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        act = self.layout[k][2]
        w = 1.0 / self.sigma[k][:, act].ravel()
        return self.y[k][:, act].ravel() * w, w

    def linear_solution(self, theta: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """(scales and backgrounds, weighted residuals) at the nonlinear values ``theta``."""
        coefs, res = [], []
        for k, a in enumerate(self.designs(theta)):
            yw, w = self._weighted(k)
            aw = a * w[:, None]
            c, *_ = np.linalg.lstsq(aw, yw, rcond=None)
            coefs.append(c)
            res.append(yw - aw @ c)
        return np.concatenate(coefs), np.concatenate(res)

    def reduced_residuals(self, theta: NDArray[np.float64]) -> NDArray[np.float64]:
        return self.linear_solution(theta)[1]

    def means(self, theta: NDArray[np.float64], coefs: NDArray[np.float64]) -> list[NDArray[np.float64]]:
        """Modelled readings (n, n_active) per scan, in units of the scan's level."""
        out, i = [], 0
        for s, a in zip(self.scans, self.designs(theta)):
            m = a @ coefs[i: i + a.shape[1]]
            i += a.shape[1]
            out.append(m.reshape(len(s.dark), -1))
        return out

    def full_jacobian(self, theta: NDArray[np.float64], coefs: NDArray[np.float64],
                      upper: NDArray[np.float64]) -> NDArray[np.float64]:
        """Jacobian of the weighted residuals in every parameter (central differences for ``theta``)."""
        w = np.concatenate([self._weighted(k)[1] for k in range(len(self.scans))])
        def flat_mean(t: NDArray[np.float64]) -> NDArray[np.float64]:
            return np.concatenate([m.ravel() for m in self.means(t, coefs)])
        cols = []
        for k in range(len(theta)):
            h = 1e-4 * max(1.0, abs(theta[k]))
            up, down = theta.copy(), theta.copy()
            if theta[k] + h > upper[k]:
                down[k] -= 2 * h
                cols.append(-(flat_mean(theta) - flat_mean(down)) / (2 * h) * w)
                continue
            up[k] += h
            down[k] -= h
            cols.append(-(flat_mean(up) - flat_mean(down)) / (2 * h) * w)
        blocks = self.designs(theta)
        lin = np.zeros((len(w), sum(b.shape[1] for b in blocks)))
        r = c = 0
        for b in blocks:
            lin[r: r + b.shape[0], c: c + b.shape[1]] = -b
            r += b.shape[0]
            c += b.shape[1]
        lin *= w[:, None]
        return np.concatenate([np.stack(cols, 1) if cols else np.zeros((len(w), 0)), lin], 1)

    def residuals_w(self, theta: NDArray[np.float64], coefs: NDArray[np.float64]) -> NDArray[np.float64]:
        """Unweighted residuals in W, flattened."""
        return np.concatenate([((y[:, lay[2]] - m) * lv).ravel()
                               for y, m, lay, lv in zip(self.y, self.means(theta, coefs), self.layout, self.level)])

    def update_noise_model(self, theta: NDArray[np.float64], coefs: NDArray[np.float64]) -> None:
        """Weights 1/sigma with sigma^2 = a^2 + (r * mean)^2 fitted to the squared residuals (in W)."""
        means = self.means(theta, coefs)
        mu = np.concatenate([(m * lv).ravel() for m, lv in zip(means, self.level)])
        e = self.residuals_w(theta, coefs)
        # Gaussian maximum likelihood for (a^2, r^2), in logs so both stay positive; squared residuals
        # estimate sigma^2 (1 - p/n) on average, hence the correction.
        e2 = e**2 / max(1.0 - len(self.names) / len(e), 0.1)
        mean_e2 = max(float(np.mean(e2)), 1e-300)
        mu2 = mu**2 / max(float(np.max(mu**2)), 1e-300)

        def nll(z: NDArray[np.float64]) -> float:
            var = np.exp(z[0]) + np.exp(z[1]) * mu2
            return float(np.sum(np.log(var) + e2 / mean_e2 / var))

        best = min((minimize(nll, np.log([f0, f1]), method="Nelder-Mead",
                             options={"xatol": 1e-6, "fatol": 1e-9, "maxiter": 2000})
                    for f0, f1 in ((0.5, 0.5), (1e-4, 1.0), (1.0, 1e-4))), key=lambda r: r.fun)
        a2 = float(np.exp(best.x[0])) * mean_e2
        r2 = float(np.exp(best.x[1])) * mean_e2 / max(float(np.max(mu**2)), 1e-300)
        new = []
        for s, m, (_, _, act), lv in zip(self.scans, means, self.layout, self.level):
            sg = np.ones_like(s.values)
            sg[:, act] = np.sqrt(a2 + r2 * (m * lv) ** 2) / lv
            new.append(sg)
        self.sigma = new


def _canonical_offset(angle_deg: float) -> float:
    """Plates and the rotator repeat every 180 deg: map to (-90, 90]."""
    a = (angle_deg + 90.0) % 180.0 - 90.0
    return 90.0 if a == -90.0 else a


def fit_calibration(
    scans: Sequence[ScanReadings],
    model: AnalyzerModel,
    ports: Sequence[PortModel],
    *,
    free: Sequence[str] | None = None,
    fit_gains: bool = True,
    input_state: ArrayLike = CALIBRATION_INPUT,
) -> CalibrationFit:
    """Fit the calibration of the analyzer to one or more scans, jointly.

    Parameters
    ----------
    scans : the scans, each with its scanned element.
    model, ports : the analyzer and detector ports as the bench believes them; their values are the
        start of the fit and stay fixed for every parameter not fitted.
    free : physical parameters to fit (dotted bench keys); default every parameter the scans determine.
    fit_gains : also fit the port gains the scans determine (relative to the first port).
    input_state : the known input ket (4,), default |H,h>.

    Raises
    ------
    InputError
        No scans, too few readings for the parameters, or a scan the table cannot analyse.
    """
    scans = tuple(scans)
    ports = tuple(ports)
    if not scans:
        raise InputError("no calibration scans to fit")
    determined: list[str] = []
    for s in scans:
        if s.values.shape[1] != len(ports):
            raise InputError(f"scan {s.label}: {s.values.shape[1]} ports in the readings, {len(ports)} on the bench")
        for name in scan_parameters(s, model):
            if name not in determined:
                determined.append(name)
    chosen = tuple(n for n in PHYSICAL_PARAMETERS if n in (determined if free is None else free))
    gains = gain_ports(scans, ports) if fit_gains else ()
    ket = np.asarray(input_state, dtype=np.complex128)
    ket = ket / np.linalg.norm(ket)
    start = {n: _start_value(n, model) for n in chosen}
    start.update({GAIN_PREFIX + ports[j].name: ports[j].gain / ports[0].gain for j in gains})
    problem = _Problem(scans, model, ports, chosen, gains, ket, start)
    n_values = sum(len(s.dark) * len(lay[2]) for s, lay in zip(scans, problem.layout))
    if n_values <= len(problem.names):
        raise InputError(
            f"{n_values} readings cannot determine {len(problem.names)} parameters; scan more points"
        )
    notes: list[str] = []
    lower = np.array([1e-6 if (n == SORTER_VISIBILITY or n.startswith(GAIN_PREFIX)) else -np.inf
                      for n in problem.phys_names])
    upper = np.array([1.0 if n == SORTER_VISIBILITY else np.inf for n in problem.phys_names])

    # Equal weights first, then weights from the noise model of the residuals, twice (once leaves
    # the weights visibly short of converged: offset stds about 10 % too small). The runner-up
    # of the first pass (the other sign of a half-wave retardance error) is polished in the last.
    first = _solve(problem, [np.array([st[n] for n in problem.phys_names]) for st in _starts(problem, start)],
                   lower, upper)
    theta = first[0][1]
    problem.update_noise_model(theta, problem.linear_solution(theta)[0])
    theta = _solve(problem, [theta], lower, upper)[0][1]
    problem.update_noise_model(theta, problem.linear_solution(theta)[0])
    final = _solve(problem, [theta] + [x for _, x in first[1:]], lower, upper)
    theta = final[0][1]
    ambiguous_deg = 0.0
    if len(final) > 1 and HWP_RETARDANCE in problem.phys_names:
        k = problem.phys_names.index(HWP_RETARDANCE)
        (c0, x0), (c1, x1) = final[0], final[1]
        if c1 - c0 < _AMBIGUOUS_CHI2 and abs(x0[k] - x1[k]) > 1e-3:
            ambiguous_deg = abs(x0[k] - x1[k]) / 2.0
            notes.append(
                f"half-wave retardance: {x0[k]:.3f} and {x1[k]:.3f} deg fit the scans about equally well "
                f"(chi-square {c0:.1f} and {c1:.1f}); these scans barely tell the sign of its error from "
                "180 deg; kept the better one, its std covers both"
            )

    coefs, res = problem.linear_solution(theta)
    x = np.concatenate([theta, coefs])
    dof = max(len(res) - len(x), 1)
    chi2 = float(np.sum(res**2))
    cov = _covariance(problem.full_jacobian(theta, coefs, upper)) * (chi2 / dof)
    diag = np.diag(cov)
    std = np.where(np.isfinite(diag), np.sqrt(np.clip(diag, 0.0, None)), np.inf)
    if ambiguous_deg:
        k = problem.phys_names.index(HWP_RETARDANCE)
        std[k] = max(std[k], ambiguous_deg)
    # Back to physical units: nuisance scales and backgrounds in W.
    unit = np.ones(len(x))
    i = len(theta)
    for s, (sh, own, act), lv in zip(scans, problem.layout, problem.level):
        n_lin = int(sh.any()) + len(own) + len(act)
        unit[i: i + n_lin] = lv
        i += n_lin
    values = x * unit
    std = std * unit
    cov = cov * np.outer(unit, unit)
    for k, name in enumerate(problem.names):
        if name in ANGLE_PARAMETERS:
            values[k] = _canonical_offset(values[k])
    resid_w = problem.residuals_w(theta, coefs)
    cov.setflags(write=False)
    return CalibrationFit(
        names=problem.names,
        values=tuple(float(v) for v in values),
        std=tuple(float(s) for s in std),
        covariance=cov,
        residual_rms_w=float(np.sqrt(np.mean(resid_w**2))),
        n_readings=int(sum(len(s.dark) for s in scans)),
        reduced_chi2=chi2 / dof,
        notes=tuple(dict.fromkeys(notes)),
    )


def _starts(problem: _Problem, start: dict[str, float]) -> list[dict[str, float]]:
    """Starting points: a coarse grid on each offset, then both signs of a half-wave retardance error."""
    start = dict(start)
    def cost(values: Mapping[str, float]) -> float:
        return float(np.sum(problem.reduced_residuals(np.array([values[n] for n in problem.phys_names])) ** 2))

    for name in problem.phys_names:
        if name in ANGLE_PARAMETERS:
            grid = start[name] + _OFFSET_GRID_DEG
            start[name] = float(grid[int(np.argmin([cost({**start, name: g}) for g in grid]))])
    if HWP_RETARDANCE not in problem.phys_names:
        return [start]
    r = start[HWP_RETARDANCE]
    if abs(r - 180.0) < _HALF_WAVE_NUDGE_DEG / 2:
        return [{**start, HWP_RETARDANCE: 180.0 - _HALF_WAVE_NUDGE_DEG},
                {**start, HWP_RETARDANCE: 180.0 + _HALF_WAVE_NUDGE_DEG}]
    return [start, {**start, HWP_RETARDANCE: 360.0 - r}]


def _solve(problem: _Problem, starts: Sequence[NDArray[np.float64]], lower: NDArray[np.float64],
           upper: NDArray[np.float64]) -> list[tuple[float, NDArray[np.float64]]]:
    """Least squares from each start: (chi-square, solution), best first."""
    out = []
    for x0 in starts:
        res = least_squares(problem.reduced_residuals, np.clip(x0, lower, upper), jac="2-point",
                            bounds=(lower, upper), method="trf", xtol=1e-10, ftol=1e-12, gtol=1e-12,
                            max_nfev=500)
        out.append((2.0 * float(res.cost), res.x))
    return sorted(out, key=lambda t: t[0])


def _covariance(jac: NDArray[np.float64]) -> NDArray[np.float64]:
    """(J^T J)^-1 through the SVD; directions the data do not constrain get infinite variance."""
    _, s, vt = np.linalg.svd(jac, full_matrices=False)
    keep = s > _UNDETERMINED * s[0]
    cov = (vt[keep].T / s[keep] ** 2) @ vt[keep]
    if not keep.all():
        loose = np.any(np.abs(vt[~keep]) > 1e-6, axis=0)
        cov[loose, :] = np.inf
        cov[:, loose] = np.inf
    return cov


def fit_plate_scan(
    scan: ScanReadings, model: AnalyzerModel, ports: Sequence[PortModel], *,
    input_state: ArrayLike = CALIBRATION_INPUT,
) -> CalibrationFit:
    """Fast-axis offset and retardance (deg) of the scanned wave plate, with scale and background.

    The parked plate and everything else stay at ``model``'s values; no port gains are fitted.
    """
    if scan.scanned not in ("quarter_wave_plate", "half_wave_plate"):
        raise InputError(f"scan {scan.label} turns {scan.scanned}, not a wave plate")
    return fit_calibration([scan], model, ports, free=scan_parameters(scan, model), fit_gains=False,
                           input_state=input_state)


def fit_port_gains(
    scans: Sequence[ScanReadings], model: AnalyzerModel, ports: Sequence[PortModel], *,
    input_state: ArrayLike = CALIBRATION_INPUT,
) -> CalibrationFit:
    """Port gains relative to the first port from scans that send the same light to ports in turn.

    The element parameters the scans determine are fitted too (the gains depend on them).
    """
    fit = fit_calibration(scans, model, ports, input_state=input_state)
    if not any(n.startswith(GAIN_PREFIX) for n in fit.names):
        raise InputError(
            "these scans send no light from the first port to another; a plate scan links splitter "
            "outputs, a rotator scan with the converter out links sorter outputs"
        )
    return fit


def fit_sorter_visibility(
    scan: ScanReadings, model: AnalyzerModel, ports: Sequence[PortModel], *,
    input_state: ArrayLike = CALIBRATION_INPUT,
) -> CalibrationFit:
    """Parity sorter visibility and the rotator's axis offset from a rotator scan with the converter out."""
    if scan.scanned != "image_rotator" or scan.converter_in:
        raise InputError(f"scan {scan.label}: the visibility needs a scan of the image rotator with the converter out")
    return fit_calibration([scan], model, ports, free=(ROTATOR_OFFSET, SORTER_VISIBILITY),
                           fit_gains=False, input_state=input_state)


def model_readings(
    fit: CalibrationFit, scan: ScanReadings, model: AnalyzerModel, ports: Sequence[PortModel],
    settings: ArrayLike, *, input_state: ArrayLike = CALIBRATION_INPUT,
) -> NDArray[np.float64]:
    """Readings (n, n_ports) the fit predicts for ``scan`` at element ``settings`` (n, 5), shutter open, W.

    The fitted physical parameters and relative gains set the optics, the scan's fitted scales and
    backgrounds turn probabilities into readings; a port without a fitted scale (no light on it in
    this scan) is NaN.
    """
    values = {n: v for n, v in zip(fit.names, fit.values) if n in PHYSICAL_PARAMETERS or n.startswith(GAIN_PREFIX)}
    unit_ports = tuple(dataclasses.replace(p, gain=1.0) for p in ports)
    optics, trial_ports = _with_parameters(model, unit_ports, values)
    ket = np.asarray(input_state, dtype=np.complex128)
    ket = ket / np.linalg.norm(ket)
    grid = np.nan_to_num(np.atleast_2d(np.asarray(settings, dtype=float)), nan=0.0)
    p = probabilities(ket, port_operators(optics, trial_ports, grid))
    out = np.full(p.shape, np.nan)
    for j, port in enumerate(ports):
        background = f"background[{scan.label}/{port.name}]"
        scale = next((n for n in (f"scale[{scan.label}/{port.name}]", f"scale[{scan.label}]") if n in fit.names), None)
        if background in fit.names and scale is not None:
            out[:, j] = fit.value(scale) * p[:, j] + fit.value(background)
    return out


__all__ = [
    "CALIBRATION_INPUT", "model_readings", "CalibrationFit", "ScanReadings", "PHYSICAL_PARAMETERS", "fit_calibration",
    "fit_plate_scan", "fit_port_gains", "fit_sorter_visibility", "gain_ports", "prepare_scan",
    "scan_parameters",
]
