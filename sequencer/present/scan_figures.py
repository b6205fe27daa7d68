"""PNG figures of scans: readings of every port against the scanned angle, the fitted model, residuals.

Built on ``matplotlib.figure.Figure`` with an Agg canvas (as sequencer.present.plots), never pyplot.
"""

from __future__ import annotations

import importlib
import os
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from lightloom.sequencer.present.plots import DPI, PlotsUnavailable, save_png, si_scale

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from lightloom.sequencer.analysis.scans import ScanReport

# How many fitted parameters the text box lists before it says "and N more".
MAX_LISTED = 12


def new_figure(size_in: tuple[float, float]) -> Figure:
    """An empty Figure on an Agg canvas; PlotsUnavailable when matplotlib is missing."""
    try:
        figure = importlib.import_module("matplotlib.figure")
        agg = importlib.import_module("matplotlib.backends.backend_agg")
    except ImportError as exc:
        raise PlotsUnavailable() from exc
    fig = figure.Figure(figsize=size_in, dpi=DPI, facecolor="white")
    agg.FigureCanvasAgg(fig)
    return fig


def parameter_lines(report: ScanReport) -> list[str]:
    """'name = value ± std' for the fitted physical parameters and gains, then the nuisance ones."""
    fit = report.fit
    lines = []
    for name, value, std in zip(fit.names, fit.values, fit.std):
        short = name.removeprefix("calibration.").removeprefix("optics.")
        lines.append(f"{short} = {value:.5g} ± {std:.2g}" if np.isfinite(std) else f"{short} = {value:.5g} (not determined)")
    if len(lines) > MAX_LISTED:
        lines = lines[:MAX_LISTED] + [f"... and {len(lines) - MAX_LISTED} more (see --json)"]
    lines.append(f"residual rms {fit.residual_rms_w:.3g} {report.unit}, reduced chi2 {fit.reduced_chi2:.2f}")
    if np.isfinite(report.misfit):
        lines.append(f"residuals / scatter of repeats: {report.misfit:.2g}")
    if report.model_fails:
        lines += ["", "THE MODEL DOES NOT DESCRIBE", "THESE READINGS: it assumes the", "input |H,h> (see --json notes)"]
    return lines


def scan_figure(report: ScanReport, title: str = "") -> Figure:
    """Readings (points) and model (line) per port against the scanned angle, residuals below, parameters beside."""
    fig = new_figure((10.0, 6.4))
    grid = fig.add_gridspec(2, 2, height_ratios=(3, 1.3), width_ratios=(3, 1.25), hspace=0.08, wspace=0.05)
    ax = fig.add_subplot(grid[0, 0])
    res = fig.add_subplot(grid[1, 0], sharex=ax)
    text = fig.add_subplot(grid[:, 1])
    text.axis("off")
    finite = report.values[np.isfinite(report.values)]
    peak = float(np.max(np.abs(finite))) if finite.size else 1.0
    scale, unit = si_scale(peak, report.unit)
    colors = [f"C{j}" for j in range(len(report.port_names))]
    for j, name in enumerate(report.port_names):
        ax.plot(report.angle_deg, report.values[:, j] / scale, "o", ms=3.5, color=colors[j], alpha=0.85, label=name)
        if np.isfinite(report.grid_model[:, j]).any():
            ax.plot(report.grid_deg, report.grid_model[:, j] / scale, "-", lw=1.2, color=colors[j])
            res.plot(report.angle_deg, report.residuals[:, j] / scale, "o", ms=3.0, color=colors[j], alpha=0.85)
    res.axhline(0.0, color="0.4", lw=0.8)
    ax.set_ylabel(f"reading ({unit})")
    res.set_ylabel(f"residual ({unit})")
    res.set_xlabel(f"{report.scanned.replace('_', ' ')} angle (deg)")
    ax.tick_params(labelbottom=False)
    ax.legend(loc="best", fontsize=8, title="port (points: readings, line: fit)", title_fontsize=8)
    ax.grid(alpha=0.3)
    res.grid(alpha=0.3)
    ax.set_title(title or f"scan of the {report.scanned.replace('_', ' ')}: {report.label}", fontsize=10)
    text.text(0.02, 0.98, "fitted parameters (± 1 std)\n\n" + "\n".join(parameter_lines(report)),
              va="top", ha="left", fontsize=7.5, family="monospace", transform=text.transAxes, wrap=True)
    return fig


def plot_scan(report: ScanReport, path: str | os.PathLike[str], title: str = "") -> Path:
    """Write :func:`scan_figure` as a PNG at ``path`` and return the path."""
    return save_png(scan_figure(report, title), path)


def state_figure(report: ScanReport, title: str = "") -> Figure:
    """The scan's readings summed over the other factor's outputs (points) against the model of the
    state the scan determines (line), residuals below: ``report.state`` must be set."""
    curve = report.state
    assert curve is not None
    fig = new_figure((8.0, 6.4))
    grid = fig.add_gridspec(2, 1, height_ratios=(3, 1.3), hspace=0.08)
    ax = fig.add_subplot(grid[0])
    res = fig.add_subplot(grid[1], sharex=ax)
    finite = curve.values[np.isfinite(curve.values)]
    peak = float(np.max(np.abs(finite))) if finite.size else 1.0
    scale, unit = si_scale(peak, report.unit)
    for k, name in enumerate(curve.outputs):
        color = f"C{k}"
        ax.plot(curve.angle_deg, curve.values[:, k] / scale, "o", ms=3.5, color=color, alpha=0.85, label=name)
        if np.isfinite(curve.grid_model[:, k]).any():
            ax.plot(curve.grid_deg, curve.grid_model[:, k] / scale, "-", lw=1.2, color=color)
        res.plot(curve.angle_deg, curve.residuals[:, k] / scale, "o", ms=3.0, color=color, alpha=0.85)
    res.axhline(0.0, color="0.4", lw=0.8)
    ax.set_ylabel(f"reading, background subtracted ({unit})")
    res.set_ylabel(f"residual ({unit})")
    res.set_xlabel(f"{report.scanned.replace('_', ' ')} angle (deg)")
    ax.tick_params(labelbottom=False)
    ax.legend(loc="best", fontsize=8, title=f"outputs (points: readings; line: the {curve.factor} state)",
              title_fontsize=8)
    ax.grid(alpha=0.3)
    res.grid(alpha=0.3)
    ax.set_title(title or f"{report.label}: readings against the state they determine", fontsize=10)
    return fig


def plot_state(report: ScanReport, path: str | os.PathLike[str], title: str = "") -> Path:
    """Write :func:`state_figure` as a PNG at ``path`` and return the path."""
    return save_png(state_figure(report, title), path)
