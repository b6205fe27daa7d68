"""The polarization portrait figure of a joint state: intensity with local polarization ellipses,
maps of the normalised local Stokes parameters and the local degree of polarization, and the
patterns behind a polarizer at 0, 45, 90 and 135 deg.

Built on ``matplotlib.figure.Figure`` with an Agg canvas (never pyplot), like sequencer.present.plots;
the maps come from sequencer.analysis.portrait.
"""

from __future__ import annotations

import importlib
import os
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from lightloom.sequencer.analysis.portrait import Portrait
from lightloom.sequencer.present.plots import DPI, PlotsUnavailable, save_png

if TYPE_CHECKING:
    from matplotlib.figure import Figure

# Ellipses are drawn at every ELLIPSE_STRIDE-th grid point where the intensity exceeds
# ELLIPSE_MIN_FRACTION of the peak; at the peak the semi-major axis is ELLIPSE_SCALE of the spacing
# between drawn ellipses, so neighbours do not overlap.
ELLIPSE_STRIDE = 3
ELLIPSE_MIN_FRACTION = 0.02
ELLIPSE_SCALE = 0.46
# |ellipticity| below this (deg) is drawn as linear.
LINEAR_BELOW_DEG = 2.0
HAND_COLOURS = {1: "#e8432e", -1: "#38b6f0", 0: "#ffd23f"}
HAND_NAMES = {1: "right-handed (S3 > 0)", -1: "left-handed (S3 < 0)", 0: "linear"}


def _mpl():
    try:
        figure = importlib.import_module("matplotlib.figure")
        agg = importlib.import_module("matplotlib.backends.backend_agg")
        collections = importlib.import_module("matplotlib.collections")
        lines = importlib.import_module("matplotlib.lines")
        colormaps = importlib.import_module("matplotlib").colormaps
    except ImportError as exc:
        raise PlotsUnavailable() from exc
    return figure, agg, collections, lines, colormaps


def ellipse_marks(p: Portrait) -> dict[str, NDArray[np.float64]]:
    """Where and how the ellipses are drawn: centres, major/minor axes (waist units), angle (deg),
    handedness class (+1, -1, 0 for linear). Pure, so tests can check what the figure shows."""
    sl = (slice(ELLIPSE_STRIDE // 2, None, ELLIPSE_STRIDE),) * 2
    x, y = p.x[sl], p.y[sl]
    intensity = p.intensity[sl]
    peak = float(p.intensity.max())
    show = intensity > ELLIPSE_MIN_FRACTION * peak
    cell = float(abs(p.x[0, 1] - p.x[0, 0])) * ELLIPSE_STRIDE
    size = ELLIPSE_SCALE * cell * (intensity / peak)
    chi = np.radians(np.nan_to_num(p.ellipticity_deg[sl]))
    dop = np.nan_to_num(p.dop[sl])
    hand = np.where(np.abs(np.degrees(chi)) < LINEAR_BELOW_DEG, 0, np.sign(chi)).astype(int)
    return {
        "x": x[show], "y": y[show],
        "major": (size * np.cos(chi))[show],
        "minor": (size * np.abs(np.sin(chi)))[show],
        "angle_deg": np.nan_to_num(p.orientation_deg[sl])[show],
        "handedness": hand[show],
        "dop": dop[show],
    }


def portrait_figure(p: Portrait, title: str = "") -> Figure:
    """The portrait as a Figure (3 rows x 4 columns; the intensity panel spans two by two)."""
    figure, agg, collections, lines, colormaps = _mpl()
    fig = figure.Figure(figsize=(13.0, 10.0), dpi=DPI, facecolor="white")
    agg.FigureCanvasAgg(fig)
    gs = fig.add_gridspec(3, 4, hspace=0.38, wspace=0.32, left=0.05, right=0.96, top=0.92, bottom=0.05)
    half = float(p.x.max())
    extent = (-half, half, -half, half)
    peak = float(p.intensity.max())
    dark = ~np.isfinite(p.dop)

    ax = fig.add_subplot(gs[0:2, 0:2])
    im = ax.imshow(p.intensity / peak, origin="lower", extent=extent, cmap=colormaps["gray"], vmin=0, vmax=1)
    marks = ellipse_marks(p)
    for h, colour in HAND_COLOURS.items():
        sel = marks["handedness"] == h
        if not sel.any():
            continue
        # a floor on the minor axis keeps linear marks visible as thin ellipses
        minor = np.maximum(marks["minor"][sel], 0.04 * marks["major"][sel])
        coll = collections.EllipseCollection(
            2 * marks["major"][sel], 2 * minor, marks["angle_deg"][sel], units="xy",
            offsets=np.column_stack([marks["x"][sel], marks["y"][sel]]), offset_transform=ax.transData,
            facecolors="none", edgecolors=colour, linewidths=1.3,
        )
        ax.add_collection(coll)
    ax.set_xlim(-half, half)
    ax.set_ylim(-half, half)
    ax.set_xlabel("x / w0")
    ax.set_ylabel("y / w0")
    ax.set_title("intensity and local polarization ellipses (size ∝ intensity)", fontsize=10)
    handles = [lines.Line2D([], [], color=c, lw=2, label=HAND_NAMES[h]) for h, c in HAND_COLOURS.items()]
    ax.legend(handles=handles, loc="upper right", fontsize=8, framealpha=0.85)
    fig.colorbar(im, ax=ax, fraction=0.046, pad=0.02).set_label("intensity / peak", fontsize=9)

    s0 = np.where(dark, np.nan, p.intensity)
    panels = [
        (gs[0, 2], p.stokes[..., 1] / s0, "S1 / S0 (H − V)", "RdBu_r", (-1, 1)),
        (gs[0, 3], p.stokes[..., 2] / s0, "S2 / S0 (D − A)", "RdBu_r", (-1, 1)),
        (gs[1, 2], p.stokes[..., 3] / s0, "S3 / S0 (R − L)", "RdBu_r", (-1, 1)),
        (gs[1, 3], p.dop, "local degree of polarization", "viridis", (0, 1)),
    ]
    for spec, data, name, cmap, (lo, hi) in panels:
        a = fig.add_subplot(spec)
        cm = colormaps[cmap].with_extremes(bad="#d9d9d9")
        m = a.imshow(np.ma.masked_invalid(data), origin="lower", extent=extent, cmap=cm, vmin=lo, vmax=hi)
        a.set_title(name, fontsize=10)
        a.tick_params(labelsize=8)
        fig.colorbar(m, ax=a, fraction=0.046, pad=0.03).ax.tick_params(labelsize=8)
    for k, (angle, data) in enumerate(p.polarizer.items()):
        a = fig.add_subplot(gs[2, k])
        a.imshow(data / peak, origin="lower", extent=extent, cmap=colormaps["inferno"], vmin=0, vmax=1)
        a.set_title(f"behind a polarizer at {angle:g}°", fontsize=10)
        a.tick_params(labelsize=8)
        # the polarizer's axis, drawn in the corner
        t = np.radians(angle)
        c = (-0.72 * half, -0.72 * half)
        r = 0.18 * half
        a.plot([c[0] - r * np.cos(t), c[0] + r * np.cos(t)], [c[1] - r * np.sin(t), c[1] + r * np.sin(t)],
               color="white", lw=2)
    fig.text(0.5, 0.005, "grey in the maps: dark (intensity below 0.1% of the peak); coordinates in waist radii; "
             "first-order Hermite-Gauss modes at the waist", ha="center", fontsize=8, color="#555555")
    if title:
        fig.suptitle(title, fontsize=13)
    return fig


def plot_portrait(p: Portrait, path: str | os.PathLike[str], title: str = "") -> Path:
    """Draw the portrait and write it as a PNG at ``path``; returns the path."""
    return save_png(portrait_figure(p, title), path, dpi=DPI)
