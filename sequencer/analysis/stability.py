"""Stability of the source and of every detector port over a run: mean, drift per hour, Allan deviation.

For each series (the reference meter, every detector port) the readings are taken in time order,
each divided by the mean of the readings of its own analyzer setting (so runs that visit several
settings give one relative series per port), and summarised by

- the mean (the series' unit) with its standard error, and a 95% interval;
- the relative drift per hour: the slope of a straight line fitted by least squares to the relative
  readings against time, with its standard error from the residual scatter (which assumes white
  residuals: with slow correlated noise it is too small, which the Allan deviation shows);
- the overlapping Allan deviation of the relative readings against averaging time tau
  (allantools.oadev, NIST Special Publication 1065, W. J. Riley, Handbook of Frequency Stability
  Analysis (2008), sec. 5.2.4), the readings treated as equally spaced at their median interval:
  waits between passes are not bridged, so tau counts readings times that interval. White noise
  gives sigma(tau) falling as tau^-1/2, drift makes it rise again at long tau.

Pure: arrays in, plain results out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from lightloom.sequencer.analysis.intervals import normal_interval

SECONDS_PER_HOUR = 3600.0
MIN_READINGS = 4


@dataclass(frozen=True)
class SeriesStability:
    """Stability figures of one series (reference or port)."""

    name: str
    unit: str
    readings: int
    span_s: float
    mean: float
    mean_std: float
    drift_per_hour: float
    drift_per_hour_std: float
    tau0_s: float
    gaps: int
    tau_s: np.ndarray
    allan_deviation: np.ndarray
    allan_deviation_error: np.ndarray
    times_s: np.ndarray
    relative: np.ndarray

    def as_json(self) -> dict[str, Any]:
        """The document entry: scalars as {value, std, interval}, the Allan curve as lists."""
        return {
            "unit": self.unit,
            "readings": self.readings,
            "span_s": self.span_s,
            "mean": {"value": self.mean, "std": self.mean_std,
                     "interval": list(normal_interval(self.mean, self.mean_std))},
            "drift_per_hour": {"value": self.drift_per_hour, "std": self.drift_per_hour_std,
                               "interval": list(normal_interval(self.drift_per_hour, self.drift_per_hour_std))},
            "allan": {
                "tau0_s": self.tau0_s,
                "gaps": self.gaps,
                "tau_s": self.tau_s.tolist(),
                "deviation": self.allan_deviation.tolist(),
                "error": self.allan_deviation_error.tolist(),
            },
        }


def overlapping_allan(relative: np.ndarray, tau0_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(tau s, overlapping Allan deviation, its error) of equally spaced relative readings, octave taus.

    The readings are treated as fractional values (allantools data_type "freq", rate 1/tau0).
    """
    import allantools

    y = np.asarray(relative, dtype=float)
    if y.size < 3:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    taus, dev, err, _ = allantools.oadev(y, rate=1.0 / tau0_s, data_type="freq", taus="octave")
    keep = np.isfinite(dev) & (dev > 0)
    return np.asarray(taus)[keep], np.asarray(dev)[keep], np.asarray(err)[keep]


def series_stability(name: str, unit: str, times_s: np.ndarray, values: np.ndarray,
                     groups: np.ndarray | None = None) -> SeriesStability | None:
    """Stability figures of one series; None when it has fewer than MIN_READINGS finite readings.

    Parameters
    ----------
    times_s : (n,) reading times, UNIX s.
    values : (n,) readings (W or counts), background already subtracted where known.
    groups : (n,) setting of each reading; readings are made relative per setting (default one setting).
    """
    t = np.asarray(times_s, dtype=float)
    v = np.asarray(values, dtype=float)
    g = np.zeros(t.size, dtype=int) if groups is None else np.asarray(groups)
    ok = np.isfinite(t) & np.isfinite(v)
    t, v, g = t[ok], v[ok], g[ok]
    if t.size < MIN_READINGS:
        return None
    order = np.argsort(t, kind="stable")
    t, v, g = t[order], v[order], g[order]
    _, inverse = np.unique(g, return_inverse=True)
    means = np.bincount(inverse, weights=v) / np.bincount(inverse)
    if np.any(means == 0):
        return None
    rel = v / means[inverse]
    mean = float(v.mean())
    mean_std = float(v.std(ddof=1) / math.sqrt(v.size))
    hours = (t - t[0]) / SECONDS_PER_HOUR
    if hours[-1] > 0:
        design = np.column_stack([np.ones_like(hours), hours])
        coef, *_ = np.linalg.lstsq(design, rel, rcond=None)
        resid = rel - design @ coef
        s2 = float(resid @ resid) / max(rel.size - 2, 1)
        cov = s2 * np.linalg.inv(design.T @ design)
        slope, slope_std = float(coef[1]), float(math.sqrt(cov[1, 1]))
    else:
        slope, slope_std = 0.0, math.inf
    dt = np.diff(t)
    tau0 = float(np.median(dt)) if dt.size else 0.0
    gaps = int(np.sum(dt > 3.0 * tau0)) if tau0 > 0 else 0
    if tau0 > 0:
        taus, dev, err = overlapping_allan(rel, tau0)
    else:
        taus, dev, err = np.zeros(0), np.zeros(0), np.zeros(0)
    return SeriesStability(
        name=name, unit=unit, readings=int(v.size), span_s=float(t[-1] - t[0]), mean=mean, mean_std=mean_std,
        drift_per_hour=slope, drift_per_hour_std=slope_std, tau0_s=tau0, gaps=gaps,
        tau_s=taus, allan_deviation=dev, allan_deviation_error=err, times_s=t, relative=rel,
    )


def run_stability(
    *,
    kind: np.ndarray,
    t_start: np.ndarray,
    t_end: np.ndarray,
    values: np.ndarray,
    reference_w: np.ndarray,
    point_index: np.ndarray,
    port_names: tuple[str, ...],
    port_unit: str,
) -> dict[str, SeriesStability]:
    """Stability of the reference meter (every lit reading) and of each port (measure readings).

    The mean background (shutter-closed readings) of each port is subtracted first.
    """
    kinds = np.asarray(kind).astype(str)
    t_mid = 0.5 * (np.asarray(t_start, dtype=float) + np.asarray(t_end, dtype=float))
    vals = np.asarray(values, dtype=float)
    ref = np.asarray(reference_w, dtype=float)
    dark = kinds == "background"
    lit = ~dark
    meas = kinds == "measure"
    bg_ports = vals[dark].mean(axis=0) if dark.any() else np.zeros(vals.shape[1])
    bg_ref = float(np.nanmean(ref[dark])) if dark.any() and np.isfinite(ref[dark]).any() else 0.0
    out: dict[str, SeriesStability] = {}
    if np.isfinite(ref[lit]).any():
        s = series_stability("reference", "W", t_mid[lit], ref[lit] - bg_ref)
        if s is not None:
            out["reference"] = s
    for j, name in enumerate(port_names):
        s = series_stability(name, port_unit, t_mid[meas], vals[meas, j] - bg_ports[j], np.asarray(point_index)[meas])
        if s is not None:
            out[name] = s
    return out


def stability_json(series: dict[str, SeriesStability]) -> dict[str, Any]:
    """``stability`` section of the analysis document: reference and ports, each as SeriesStability.as_json."""
    return {
        "method": "overlapping Allan deviation (allantools.oadev) of readings relative to their setting's mean; "
                  "drift: straight-line least squares, per hour relative to the mean",
        "reference": series["reference"].as_json() if "reference" in series else None,
        "ports": {k: v.as_json() for k, v in series.items() if k != "reference"},
    }


def stability_of_run(run: Any) -> dict[str, SeriesStability]:
    """:func:`run_stability` of a run (RunData)."""
    r = run.readings
    return run_stability(
        kind=r.kind, t_start=r.t_start, t_end=r.t_end, values=r.values, reference_w=r.reference_w,
        point_index=r.point_index, port_names=tuple(run.header.port_names),
        port_unit="counts" if run.header.port_units == "counts" else "W",
    )
