"""A scan run as a scan: readings of every port against the scanned angle, the calibration model fitted to them.

A run of a scan protocol (waveplate-calibration-hwp/qwp, calibration-rotator, calibration-converter,
or any protocol with `measure: scan:`) determines no state: it is reported as the readings of each
port against the scanned element's angle, the fit of the calibration model
(sequencer.analysis.calibration: the optics model with the element's offset, retardance,
visibility and port gains as unknowns, for the calibration input |H,h>) with every fitted
parameter's std and 95% interval, the model curve and the residuals. Pure: arrays in, results out.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from lightloom.sequencer.analysis import calibration
from lightloom.sequencer.analysis.intervals import normal_interval
from lightloom.sequencer.errors import InputError
from lightloom.sequencer.optics.analyzer import ELEMENT_NAMES, AnalyzerModel, PortModel

GRID_POINTS = 361
# Residuals more than this many times the scatter of repeated readings: the model does not describe
# the readings (for a calibration scan, most often an input that is not |H,h>).
LACK_OF_FIT_RATIO = 3.0
# Beyond this, `calibrate` refuses to write an overlay from the scan: its values would be nonsense.
REFUSE_RATIO = 10.0


def scan_readings(label: str, element: str, readings: Any) -> calibration.ScanReadings:
    """The readings of a run (a ReadingTable) as a calibration scan of ``element``, columns in ELEMENT_NAMES order."""
    names = tuple(readings.element_names)

    def columns(a: np.ndarray) -> np.ndarray:
        a = np.asarray(a, dtype=float)
        return np.stack([a[:, names.index(n)] if n in names else np.full(len(a), np.nan) for n in ELEMENT_NAMES], 1)

    return calibration.prepare_scan(label, element, readings.kind, columns(readings.commanded),
                                    columns(readings.readback), readings.values, readings.reference_w)


@dataclass(frozen=True)
class ScanReport:
    """One scan, fitted: readings and model against the scanned angle (deg), per port.

    ``angle_deg`` (n,) and ``values`` (n, n_ports) are the shutter-open readings (drift-normalised
    as the fit sees them); ``model`` (n, n_ports) the fit at the same settings (NaN on a port the
    scan sends no light to); ``grid_deg``, ``grid_model`` the model on a fine grid; ``background``
    (n_ports,) the mean shutter-closed reading; ``fit`` the calibration fit. ``repeat_scatter``
    (unit) is the pooled std of repeated readings about their setting's mean on the fitted ports
    (NaN without repeats); ``misfit`` the residual rms over it (about 1 when the model describes
    the readings, NaN without repeats).
    """

    label: str
    scanned: str
    port_names: tuple[str, ...]
    unit: str
    angle_deg: np.ndarray
    values: np.ndarray
    model: np.ndarray
    grid_deg: np.ndarray
    grid_model: np.ndarray
    background: np.ndarray
    fit: calibration.CalibrationFit
    repeat_scatter: float = float("nan")
    misfit: float = float("nan")
    state: "StateCurve | None" = None

    @property
    def model_fails(self) -> bool:
        """True when the residuals exceed LACK_OF_FIT_RATIO times the scatter of repeated readings."""
        return bool(np.isfinite(self.misfit) and self.misfit > LACK_OF_FIT_RATIO)

    def misfit_note(self) -> str | None:
        """One plain sentence when the model does not describe the readings, else None."""
        if not self.model_fails:
            return None
        return (f"the calibration model does not describe these readings: its residuals are {self.misfit:.0f} times "
                f"the scatter of repeated readings ({self.repeat_scatter:.3g} {self.unit}); it assumes the "
                "input |H,h> (a polarizer at H and the h mode before the analyzer), so its parameters mean "
                "nothing here")

    @property
    def residuals(self) -> np.ndarray:
        """Readings minus model (n, n_ports), NaN where the port has no model."""
        return self.values - self.model


def scan_report(scan: calibration.ScanReadings, model: AnalyzerModel, ports: Sequence[PortModel],
                *, unit: str = "W", fit: calibration.CalibrationFit | None = None) -> ScanReport:
    """Fit the calibration model to ``scan`` (every parameter it determines) and lay it out per port.

    ``fit`` may be given instead: a joint fit of several scans, this one among them (``calibrate``).

    Raises InputError when the scan has no shutter-open readings or the model cannot be fitted.
    """
    column = ELEMENT_NAMES.index(scan.scanned)
    light = ~scan.dark
    if not light.any():
        raise InputError(f"scan {scan.label} has no shutter-open readings yet")
    if fit is None:
        fit = calibration.fit_calibration([scan], model, ports)
    settings = np.nan_to_num(scan.settings, nan=0.0)
    angle = settings[light, column]
    predicted = calibration.model_readings(fit, scan, model, ports, settings[light])
    grid = np.linspace(float(angle.min()), float(angle.max()), GRID_POINTS)
    grid_settings = np.repeat(settings[light][:1], GRID_POINTS, axis=0)
    grid_settings[:, column] = grid
    grid_model = calibration.model_readings(fit, scan, model, ports, grid_settings)
    background = scan.values[scan.dark].mean(axis=0) if scan.dark.any() else np.full(scan.values.shape[1], np.nan)
    order = np.argsort(angle, kind="stable")
    scatter = repeat_scatter(settings[light], scan.values[light][:, np.isfinite(predicted).any(axis=0)])
    resid = (scan.values[light] - predicted)[np.isfinite(predicted)]
    misfit = float(np.sqrt(np.mean(resid**2)) / scatter) if np.isfinite(scatter) and scatter > 0 and resid.size else float("nan")
    return ScanReport(
        label=scan.label, scanned=scan.scanned, port_names=tuple(p.name for p in ports), unit=unit,
        angle_deg=angle[order], values=scan.values[light][order], model=predicted[order],
        grid_deg=grid, grid_model=grid_model, background=background, fit=fit,
        repeat_scatter=scatter, misfit=misfit,
    )


def repeat_scatter(settings: np.ndarray, values: np.ndarray, decimals: int = 3) -> float:
    """Pooled std of readings about the mean of their setting (same unit as ``values``).

    ``settings`` (n, k) element positions (deg; equal to ``decimals`` places = one setting),
    ``values`` (n, m) readings. The pure-error estimate of the reading noise, free of any model
    (common practice in regression, no source). NaN when no setting is read twice.
    """
    v = np.asarray(values, dtype=float)
    if v.size == 0:
        return float("nan")
    _, group = np.unique(np.round(np.asarray(settings, dtype=float), decimals), axis=0, return_inverse=True)
    group = np.asarray(group).reshape(-1)
    counts = np.bincount(group)
    dof = int(np.sum(counts - 1)) * v.shape[1]
    if dof < 1:
        return float("nan")
    means = np.stack([np.bincount(group, weights=v[:, j]) / counts for j in range(v.shape[1])], 1)
    return float(np.sqrt(np.sum((v - means[group]) ** 2) / dof))


def _finite(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None


def scan_json(report: ScanReport) -> dict[str, Any]:
    """The ``scan`` section of the analysis document."""
    fit = report.fit
    params = {}
    for name, value, std in zip(fit.names, fit.values, fit.std):
        entry: dict[str, Any] = {"value": float(value), "std": _finite(std)}
        entry["interval"] = list(normal_interval(value, std)) if np.isfinite(std) else None
        params[name] = entry
    ports = {}
    for j, name in enumerate(report.port_names):
        ports[name] = {
            "readings": report.values[:, j].tolist(),
            "model": [_finite(x) for x in report.model[:, j]],
            "residuals": [_finite(x) for x in report.residuals[:, j]],
            "background": _finite(report.background[j]),
        }
    return {
        "scanned_element": report.scanned,
        "angle_deg": report.angle_deg.tolist(),
        "unit": report.unit,
        "ports": ports,
        "fit": {
            "model": "optics model of the analyzer for the calibration input |H,h> (a polarizer at H, the h mode), "
                     "scale and background per port (sequencer.analysis.calibration)",
            "parameters": params,
            "residual_rms": fit.residual_rms_w,
            "reduced_chi2": fit.reduced_chi2,
            "repeat_scatter": _finite(report.repeat_scatter),
            "residuals_over_repeat_scatter": _finite(report.misfit),
            "describes_readings": None if not np.isfinite(report.misfit) else not report.model_fails,
            "readings": fit.n_readings,
            "notes": list(fit.notes) + ([report.misfit_note()] if report.model_fails else []),
        },
    }


def scanned_element(run: Any) -> str | None:
    """The element a run's protocol scans (e.g. "half_wave_plate"), or None for a run that is no scan."""
    from lightloom.sequencer.lang.protocol import parse_protocol

    h = run.header
    try:
        protocol = parse_protocol(h.protocol_text, f"<protocol stored in the run file>")
    except InputError:
        return None
    return protocol.scan.element if protocol.scan is not None else None


def run_scan_report(run: Any, element: str, label: str, bench: Any | None = None) -> ScanReport:
    """Fit the scan of a run (RunData) on the run's own bench, or on ``bench`` (e.g. a calibration overlay)."""
    from lightloom.sequencer.lang.bench import parse_bench
    from lightloom.sequencer.plan.tablemodel import analyzer_model, port_models

    h = run.header
    if bench is None:
        bench = parse_bench(h.bench_text, "<bench stored in the run file>")
    if not (np.asarray(run.readings.kind).astype(str) == "measure").any():
        raise InputError("the scan has no measure readings yet")
    scan = scan_readings(label, element, run.readings)
    unit = "counts" if h.port_units == "counts" else "W"
    return scan_report(scan, analyzer_model(bench), port_models(bench), unit=unit)


@dataclass(frozen=True)
class StateCurve:
    """The readings of a scan that also determines a state, against the model of that state.

    The ports whose operators share one projector on the analysed ``factor`` are summed (with the
    reduction's weights, sequencer.analysis.reduction: e.g. the two sorter outputs behind one
    splitter port), since only such sums are predicted by the factor's state alone. ``outputs``
    names each sum ("pm_hH+pm_vH"); ``values`` (n, k) are the summed readings minus background and
    ``model`` (n, k) the state's prediction, ``intensity`` x tr(rho A); ``grid_deg``, ``grid_model``
    the prediction on a fine grid of the scanned angle (NaN where the bench's model is not given).
    """

    factor: str
    outputs: tuple[str, ...]
    angle_deg: np.ndarray
    values: np.ndarray
    model: np.ndarray
    grid_deg: np.ndarray
    grid_model: np.ndarray

    @property
    def residuals(self) -> np.ndarray:
        return self.values - self.model


def _combined(ops: np.ndarray, values: np.ndarray, factor: str, port_names: Sequence[str]):
    """(names, reduced operators (k, 2, 2), combined values (k,)) of one setting's ports."""
    from lightloom.sequencer.analysis.reduction import reduce_to_factor

    red_ops, red_vals, _, _, comb = reduce_to_factor(ops, values, None, factor)
    names = tuple("+".join(p for p, w in zip(port_names, row) if w > 0) for row in comb)
    return names, red_ops, red_vals


def state_curve(factor: str, port_names: Sequence[str], angle_deg: np.ndarray, operators: np.ndarray,
                values: np.ndarray, background: np.ndarray, rho: np.ndarray, intensity: float,
                grid_deg: np.ndarray | None = None, grid_operators: np.ndarray | None = None) -> StateCurve | None:
    """Summed readings against the model of the state ``rho`` (2x2, of ``factor``) at ``intensity``.

    ``operators`` (n, n_ports, 4, 4) and ``values`` (n, n_ports) are the shutter-open readings as the
    file holds them (port gains inside both; counts per reading with the dwell folded into
    ``intensity`` by the caller); ``background`` (n_ports,) the mean shutter-closed reading. None
    when the ports do not combine the same way at every setting.
    """
    names: tuple[str, ...] | None = None
    vals, model = [], []
    rho = np.asarray(rho, dtype=np.complex128)
    for ops, v in zip(operators, values):
        n, red_ops, red_vals = _combined(ops, v - np.nan_to_num(background), factor, port_names)
        if names is None:
            names = n
        if n != names:
            return None
        vals.append(red_vals)
        model.append(intensity * np.einsum("kij,ji->k", red_ops, rho).real)
    if names is None:
        return None
    grid = np.asarray([] if grid_deg is None else grid_deg, dtype=float)
    grid_model = np.full((len(grid), len(names)), np.nan)
    if grid_operators is not None:
        for g, ops in enumerate(grid_operators):
            n, red_ops, _ = _combined(ops, np.ones(len(port_names)), factor, port_names)
            if n == names:
                grid_model[g] = intensity * np.einsum("kij,ji->k", red_ops, rho).real
    order = np.argsort(angle_deg, kind="stable")
    return StateCurve(factor, names, np.asarray(angle_deg)[order], np.asarray(vals)[order], np.asarray(model)[order],
                      grid, grid_model)


def state_curve_json(curve: StateCurve) -> dict[str, Any]:
    """The ``state_model`` section of a scan's document."""
    return {
        "factor": curve.factor,
        "how": (f"ports with one {curve.factor} projector summed (the other factor's outputs together); "
                "model: the power times tr(rho A) of the state determined by the scan"),
        "angle_deg": curve.angle_deg.tolist(),
        "outputs": {name: {"readings": curve.values[:, k].tolist(),
                           "model": curve.model[:, k].tolist(),
                           "residuals": curve.residuals[:, k].tolist()} for k, name in enumerate(curve.outputs)},
    }
