"""Figures over the time of a run: source power per detector, and results per pass or window.

The power figure is a time series, one line per detector (the pick-off reference meter, and each
port during reference steps), in % of that line's median so that detectors of any scale share one
axis; the line breaks wherever the shutter was closed between two of its points (a background
reading, or a wait between passes), instead of joining them. The results figure shows each pass's
(or window's) concurrence, purity, fidelity and reduced Stokes parameters at its mid-time, with
95% error bars (the document's ``interval`` where given, else +-1.96 std).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from lightloom.sequencer.model.records import RunData
from lightloom.sequencer.present.plots import DPI, _apply_time_axis, _draw_events, _mpl, _new_figure, save_png

# Lines longer than this are drawn as means of consecutive points (a bin holding a gap stays a gap).
MAX_POINTS_PER_LINE = 20000
MARKED_EVENTS = ("beam_lost", "beam_back", "drift", "fault", "interrupted", "resume")
# A pause with no reading longer than this many typical spacings of the run is drawn as a gap.
GAP_SPACINGS = 20.0


@dataclass(frozen=True)
class Line:
    """One detector's readings over time: t (UNIX s) and value, NaN where the line breaks."""

    name: str
    t: np.ndarray
    value: np.ndarray
    units: str


@dataclass(frozen=True)
class PowerSeries:
    """The lines of the power figure and the start of the run (UNIX s)."""

    lines: tuple[Line, ...]
    t0: float
    events: tuple[tuple[float, str], ...] = ()  # (UNIX s, kind) of beam losses, faults, resumes


def _with_gaps(t: np.ndarray, v: np.ndarray, closed_between: np.ndarray, typical_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Insert NaN between consecutive points where ``closed_between`` (len n-1) says so, or where
    nothing at all was read for more than GAP_SPACINGS x ``typical_s`` (the run's usual spacing)."""
    if t.size < 2:
        return t, v
    dt = np.diff(t)
    pause = dt > GAP_SPACINGS * typical_s if typical_s > 0 else np.zeros_like(dt, dtype=bool)
    breaks = np.flatnonzero(closed_between | pause) + 1
    t_out = np.insert(t, breaks, 0.5 * (t[breaks - 1] + t[breaks]))
    v_out = np.insert(v, breaks, np.nan)
    return t_out, v_out


def _thinned(t: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    if t.size <= MAX_POINTS_PER_LINE:
        return t, v
    k = int(np.ceil(t.size / MAX_POINTS_PER_LINE))
    n = (t.size // k) * k
    return t[:n].reshape(-1, k).mean(axis=1), v[:n].reshape(-1, k).mean(axis=1)


def reference_series(run: RunData) -> PowerSeries:
    """The power lines of a run: the pick-off meter, and each port's reference-step readings."""
    r = run.readings
    t = 0.5 * (np.asarray(r.t_start) + np.asarray(r.t_end))
    if t.size == 0:
        return PowerSeries((), 0.0)
    order = np.argsort(t, kind="stable")
    ts = t[order]
    kind = np.asarray(r.kind)[order]
    # the shutter closes for background readings and for the waits between passes
    closed = np.cumsum(kind == "background") + np.asarray(r.pass_index)[order]
    spacing = np.diff(ts)
    typical = float(np.median(spacing[spacing > 0])) if np.any(spacing > 0) else 0.0
    # a wait with no reading at all (longer than any reading's spacing) also breaks the line
    idle = np.concatenate([[0], np.cumsum(spacing > GAP_SPACINGS * typical)]) if typical > 0 else np.zeros(ts.size)
    lines: list[Line] = []

    def add(name: str, rows: np.ndarray, values: np.ndarray, units: str) -> None:
        if rows.size == 0:
            return
        between = (np.diff(closed[rows]) > 0) | (np.diff(idle[rows]) > 0)
        tt, vv = _with_gaps(ts[rows], values, between, 0.0)
        tt, vv = _thinned(tt, vv)
        lines.append(Line(name, tt, vv, units))

    ref = np.asarray(r.reference_w)[order]
    lit = np.flatnonzero((kind != "background") & np.isfinite(ref))
    add("pick-off reference", lit, ref[lit], "W")
    refsteps = np.flatnonzero(kind == "reference")
    if refsteps.size:
        values = np.asarray(r.values)[order][refsteps]
        for j, port in enumerate(run.header.port_names):
            add(f"{port} (reference steps)", refsteps, values[:, j], run.header.port_units)
    events = tuple((e.t, e.kind) for e in run.events if e.kind in MARKED_EVENTS)
    return PowerSeries(tuple(lines), float(ts[0]), events)


def power_figure(series: PowerSeries, title: str = ""):
    """Each line in % of its own median over elapsed time, gaps where the shutter was closed."""
    mpl = _mpl()
    fig = _new_figure(mpl, (9.0, 4.4))
    ax = fig.add_subplot(1, 1, 1)
    fig.subplots_adjust(left=0.1, right=0.97, bottom=0.14, top=0.88)
    ax.axhline(0.0, color="0.6", lw=0.8)
    t_all = []
    for line in series.lines:
        median = float(np.nanmedian(line.value)) if np.any(np.isfinite(line.value)) else 0.0
        rel = 100.0 * (line.value / median - 1.0) if median != 0 else line.value * np.nan
        t_rel = line.t - series.t0
        t_all.append(t_rel)
        # points marked while few enough to see: a point alone between two gaps has no line
        ax.plot(t_rel, rel, "-", lw=1.0, marker="." if line.t.size < 2000 else None, ms=3,
                label=f"{line.name}, median {median:.4g} {line.units}")
    shown = [np.abs(100.0 * (ln.value / np.nanmedian(ln.value) - 1.0)) for ln in series.lines
             if np.any(np.isfinite(ln.value)) and np.nanmedian(ln.value) != 0]
    peak = max((float(np.nanmax(x)) for x in shown if np.any(np.isfinite(x))), default=0.0)
    _draw_events(ax, series.events, series.t0, np.concatenate(t_all) if t_all else np.zeros(1), max(0.5, 1.15 * peak))
    _apply_time_axis(mpl, ax, np.concatenate(t_all) if t_all else np.zeros(1))
    ax.set_ylabel("change from the line's median (%)", fontsize=10)
    ax.grid(True, color="0.9", lw=0.6)
    ax.tick_params(labelsize=9)
    ax.legend(loc="best", fontsize=8, frameon=False)
    ax.set_title(title or "source power over the run", fontsize=11)
    return fig


def plot_reference_series(series: PowerSeries, path: str | os.PathLike[str], title: str = "", *, dpi: int = DPI) -> Path:
    """Write :func:`power_figure` as a PNG at ``path`` and return the path."""
    return save_png(power_figure(series, title), path, dpi)


def _value_and_bar(x: Any) -> tuple[float, float, float]:
    """(value, lower bar, upper bar) of a document scalar; NaN when absent."""
    if not isinstance(x, dict) or x.get("value") is None:
        return np.nan, np.nan, np.nan
    v = float(x["value"])
    if isinstance(x.get("interval"), (list, tuple)) and len(x["interval"]) == 2:
        lo, hi = (float(y) for y in x["interval"])
        return v, max(v - lo, 0.0), max(hi - v, 0.0)
    s = 1.96 * float(x.get("std") or 0.0)
    return v, s, s


def results_over_time_figure(passes: Sequence[dict[str, Any]], title: str = ""):
    """Concurrence, purity, fidelity and each factor's reduced Stokes parameters against time."""
    mpl = _mpl()
    docs = [p for p in passes if "t_start" in p and "t_end" in p]
    t_mid = np.array([0.5 * (p["t_start"] + p["t_end"]) for p in docs], dtype=float)
    t0 = float(min(p["t_start"] for p in docs)) if docs else 0.0
    t_rel = t_mid - t0
    factors = [f for f in ("polarization", "spatial") if any(f in p.get("stokes", {}) for p in docs)]
    fig = _new_figure(mpl, (9.0, 3.0 * (1 + len(factors))))
    axes = [fig.add_subplot(1 + len(factors), 1, i + 1) for i in range(1 + len(factors))]
    fig.subplots_adjust(left=0.1, right=0.97, bottom=0.08, top=0.93, hspace=0.35)

    def draw(ax, getter, label):
        vals = np.array([_value_and_bar(getter(p)) for p in docs]).reshape(-1, 3)
        if np.all(np.isnan(vals[:, 0])):
            return
        ax.errorbar(t_rel, vals[:, 0], yerr=[vals[:, 1], vals[:, 2]], fmt="o-", ms=3, lw=1.0, capsize=2,
                    label=label)

    for key in ("concurrence", "purity", "fidelity"):
        draw(axes[0], lambda p, k=key: p.get(k), key)
    axes[0].set_ylabel("figure of merit", fontsize=10)
    for ax, factor in zip(axes[1:], factors):
        for k in (1, 2, 3):
            draw(ax, lambda p, f=factor, k=k: (p.get("stokes", {}).get(f) or [None] * 4)[k], f"S{k}")
        ax.set_ylabel(f"{factor} Stokes", fontsize=10)
    for ax in axes:
        ax.grid(True, color="0.9", lw=0.6)
        ax.tick_params(labelsize=9)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(loc="best", fontsize=8, frameon=False)
        _apply_time_axis(mpl, ax, t_rel if t_rel.size else np.zeros(1))
    axes[0].set_title(title or "results over time (95% error bars)", fontsize=11)
    return fig


def plot_results_over_time(passes: Sequence[dict[str, Any]], path: str | os.PathLike[str], title: str = "",
                           *, dpi: int = DPI) -> Path:
    """Write :func:`results_over_time_figure` as a PNG at ``path`` and return the path."""
    return save_png(results_over_time_figure(passes, title), path, dpi)
