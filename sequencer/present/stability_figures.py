"""PNG figure of a stability analysis: Allan deviation against averaging time (log-log), relative readings against time."""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING, Mapping

import numpy as np

from lightloom.sequencer.present.plots import save_png
from lightloom.sequencer.present.scan_figures import new_figure

if TYPE_CHECKING:
    from matplotlib.figure import Figure

    from lightloom.sequencer.analysis.stability import SeriesStability


def stability_figure(series: Mapping[str, SeriesStability], title: str = "stability") -> Figure:
    """Left: overlapping Allan deviation vs tau (log-log, error bars, the tau^-1/2 line of white noise
    through each series' first point). Right: readings relative to their mean against time (h)."""
    fig = new_figure((11.0, 4.6))
    ax = fig.add_subplot(1, 2, 1)
    tr = fig.add_subplot(1, 2, 2)
    t0 = min((float(s.times_s[0]) for s in series.values() if s.times_s.size), default=0.0)
    for k, (name, s) in enumerate(series.items()):
        color = "k" if name == "reference" else f"C{k}"
        if s.tau_s.size:
            ax.errorbar(s.tau_s, s.allan_deviation, yerr=s.allan_deviation_error, fmt="o-", ms=3.5, lw=1.0,
                        capsize=2, color=color, label=name)
            ax.plot(s.tau_s, s.allan_deviation[0] * np.sqrt(s.tau_s[0] / s.tau_s), ":", lw=0.8, color=color)
        hours = (s.times_s - t0) / 3600.0
        tr.plot(hours, 100.0 * (s.relative - 1.0), ".", ms=2.0, color=color, alpha=0.7,
                label=f"{name}: {100 * s.drift_per_hour:+.3f} ± {100 * s.drift_per_hour_std:.3f} %/h")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("averaging time tau (s)")
    ax.set_ylabel("overlapping Allan deviation (relative)")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8, title="dotted: white noise, tau^-1/2", title_fontsize=7)
    tr.set_xlabel("time since start (h)")
    tr.set_ylabel("reading relative to its mean (%)")
    tr.grid(alpha=0.3)
    tr.legend(fontsize=7, title="drift per hour", title_fontsize=7)
    fig.suptitle(title, fontsize=10)
    return fig


def plot_stability(series: Mapping[str, SeriesStability], path: str | os.PathLike[str], title: str = "stability") -> Path:
    """Write :func:`stability_figure` as a PNG at ``path`` and return the path."""
    return save_png(stability_figure(series, title), path)
