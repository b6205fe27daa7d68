"""PNG figures of an analysed run: density matrix, Poincare spheres, reference trace, raw readings.

Matplotlib is optional (``pip install 'lightloom[plots]'``) and imported only when a figure is
drawn. Figures are built on ``matplotlib.figure.Figure`` with an Agg canvas, never through pyplot,
so no backend, rcParam or figure registry of the process is touched and no display is needed.
Each ``*_figure`` function builds a Figure and returns it; each ``plot_*`` function builds the same
figure, writes it as a PNG and returns the path.
"""

from __future__ import annotations

import importlib
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from types import SimpleNamespace
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike, NDArray

from lightloom.sequencer.errors import EXIT_BAD_INPUT, LightloomError

if TYPE_CHECKING:
    from matplotlib.figure import Figure

DPI = 130
EVENT_FONT_PT = 8.0
BAR_WIDTH = 0.62
MAX_BARS_DIM = 4
FACE_BRIGHTNESS = np.array([1.0, 1.0, 0.84, 0.7, 0.7, 0.84])
POLARIZATION_POLES: tuple[tuple[str, str], ...] = (("H", "V"), ("D", "A"), ("R", "L"))
SPATIAL_POLES: tuple[tuple[str, str], ...] = (("h", "v"), ("d", "a"), ("ℓ+", "ℓ−"))

_INSTALL_HINT = (
    "plots need matplotlib, which is not installed in this Python: "
    "run `pip install 'lightloom[plots]'` and repeat the command, or leave out --plots"
)
_SI_PREFIXES = ((1e-12, "p"), (1e-9, "n"), (1e-6, "µ"), (1e-3, "m"), (1.0, ""), (1e3, "k"))
_SI_UNITS = frozenset({"W", "V", "A", "s", "Hz"})
_TICK_STEPS_MIN = (1, 2, 5, 10, 15, 20, 30, 60, 120, 180, 240, 360, 720, 1440)
_KIND_STYLE = {
    "measure": ("o", 3.0, 0.85),
    "background": ("v", 4.0, 0.9),
    "reference": ("D", 3.5, 0.9),
}


class PlotsUnavailable(LightloomError):
    """Matplotlib is missing, so no figure can be drawn: exit status 2."""

    exit_status = EXIT_BAD_INPUT

    def __init__(self, message: str = _INSTALL_HINT) -> None:
        super().__init__(message)


def _mpl() -> SimpleNamespace:
    """The matplotlib pieces the figures use, imported on first need."""
    try:
        figure = importlib.import_module("matplotlib.figure")
        agg = importlib.import_module("matplotlib.backends.backend_agg")
        colors = importlib.import_module("matplotlib.colors")
        cm = importlib.import_module("matplotlib.cm")
        ticker = importlib.import_module("matplotlib.ticker")
        art3d = importlib.import_module("mpl_toolkits.mplot3d.art3d")
        colormaps = importlib.import_module("matplotlib").colormaps
    except ImportError as exc:
        raise PlotsUnavailable() from exc
    return SimpleNamespace(
        Figure=figure.Figure,
        FigureCanvasAgg=agg.FigureCanvasAgg,
        Normalize=colors.Normalize,
        ScalarMappable=cm.ScalarMappable,
        ticker=ticker,
        Poly3DCollection=art3d.Poly3DCollection,
        colormaps=colormaps,
    )


# ---------------------------------------------------------------- pure helpers


def ket_label(label: str) -> str:
    """``"H,h"`` -> ``"|H,h⟩"``; a label that already starts with ``|`` is kept."""
    return label if label.startswith("|") else f"|{label}⟩"


def bar_faces(values: ArrayLike, width: float = BAR_WIDTH) -> NDArray[np.float64]:
    """The six faces of one 3-D bar per matrix element, shape (d*d, 6, 4, 3).

    Element (i, j) stands at x = j (column), y = i (row), reaching from z = 0 to z = values[i, j];
    faces are ordered bottom, top, then the four sides, bars in row-major order.
    """
    v = np.asarray(values, dtype=float)
    rows, cols = np.indices(v.shape)
    x0 = cols.ravel() - width / 2
    y0 = rows.ravel() - width / 2
    z_lo = np.minimum(v.ravel(), 0.0)
    z_hi = np.maximum(v.ravel(), 0.0)
    # Unit-cube corners, indexed (face, corner) -> (dx, dy, dz) in {0, 1}.
    cube = np.array(
        [
            [[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]],
            [[0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]],
            [[0, 0, 0], [1, 0, 0], [1, 0, 1], [0, 0, 1]],
            [[1, 0, 0], [1, 1, 0], [1, 1, 1], [1, 0, 1]],
            [[1, 1, 0], [0, 1, 0], [0, 1, 1], [1, 1, 1]],
            [[0, 1, 0], [0, 0, 0], [0, 0, 1], [0, 1, 1]],
        ],
        dtype=float,
    )
    faces = np.empty((v.size, 6, 4, 3))
    faces[..., 0] = x0[:, None, None] + width * cube[None, :, :, 0]
    faces[..., 1] = y0[:, None, None] + width * cube[None, :, :, 1]
    faces[..., 2] = z_lo[:, None, None] + (z_hi - z_lo)[:, None, None] * cube[None, :, :, 2]
    return faces


def symmetric_limit(*arrays: ArrayLike, floor: float = 0.05) -> float:
    """A round bound m >= max |value| (steps of 0.05 below 1, then 0.25), used as [-m, m]."""
    peak = max((float(np.max(np.abs(a))) if np.size(a) else 0.0) for a in arrays)
    step = 0.05 if peak <= 1.0 else 0.25
    return max(floor, float(np.ceil(peak / step - 1e-9) * step))


def normalized_stokes(stokes: ArrayLike) -> NDArray[np.float64]:
    """[S1, S2, S3] / S0 from [S0, S1, S2, S3], or [S1, S2, S3] taken as already normalised."""
    s = np.asarray(stokes, dtype=float).ravel()
    if s.shape == (3,):
        return s.copy()
    if s.shape == (4,):
        if not s[0] > 0:
            raise ValueError(f"Stokes S0 must be positive to normalise, got {s[0]!r}")
        return s[1:] / s[0]
    raise ValueError(f"a Stokes vector has 3 or 4 components, got shape {np.shape(stokes)}")


def poles_for(name: str) -> tuple[tuple[str, str], ...]:
    """Default pole labels of a sphere by its key: spatial if the key says so, else polarization."""
    key = name.lower()
    return SPATIAL_POLES if "spatial" in key or "mode" in key else POLARIZATION_POLES


def relative_percent(reference: ArrayLike) -> tuple[NDArray[np.float64], float]:
    """(100 (x / x0 - 1), x0) with x0 the first finite non-zero reading."""
    x = np.asarray(reference, dtype=float).ravel()
    usable = np.flatnonzero(np.isfinite(x) & (x != 0))
    if usable.size == 0:
        raise ValueError("the reference trace has no finite non-zero reading to compare against")
    x0 = float(x[usable[0]])
    return 100.0 * (x / x0 - 1.0), x0


def si_scale(value: float, units: str) -> tuple[float, str]:
    """(factor, prefixed units) so that value / factor reads from 1 to 1000; SI units only."""
    if units not in _SI_UNITS or value == 0 or not np.isfinite(value):
        return 1.0, units
    mag = abs(value)
    factor, prefix = _SI_PREFIXES[0]
    for f, p in _SI_PREFIXES:
        if mag >= f:
            factor, prefix = f, p
    return factor, f"{prefix}{units}"


def time_tick_step_s(span_s: float) -> tuple[float, str]:
    """A tick step (s) and the clock format ("s", "m:ss" or "h:mm") for an elapsed-time span."""
    if span_s <= 180:
        return 0.0, "s"
    minutes = span_s / 60.0
    step = next((m for m in _TICK_STEPS_MIN if minutes / m <= 8), _TICK_STEPS_MIN[-1])
    return 60.0 * step, ("m:ss" if span_s < 3600 else "h:mm")


def format_elapsed(t_s: float, style: str) -> str:
    """Elapsed seconds as ``"h:mm"`` or ``"m:ss"`` (negative times get a minus sign)."""
    sign = "−" if t_s < 0 else ""
    # h:mm counts whole minutes, m:ss whole seconds; both split the count by 60.
    count = int(round(abs(t_s) / (60.0 if style == "h:mm" else 1.0)))
    return f"{sign}{count // 60}:{count % 60:02d}"


# ---------------------------------------------------------------- writing


def save_png(fig: Figure, path: str | os.PathLike[str], dpi: int = DPI) -> Path:
    """Write ``fig`` as PNG at ``path`` (parents made, atomic), clear it and return the path."""
    mpl = _mpl()
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    if fig.canvas is None or not isinstance(fig.canvas, mpl.FigureCanvasAgg):
        mpl.FigureCanvasAgg(fig)
    # A sibling temporary file keeps a half-written PNG from ever carrying the final name; open()
    # rather than mkstemp so the file gets the user's usual permissions (umask), not 0600.
    tmp = out.with_name(f".{out.name}.{os.getpid()}.{id(fig):x}.tmp")
    try:
        with open(tmp, "xb") as fh:
            fig.savefig(fh, format="png", dpi=dpi)
        os.replace(tmp, out)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    finally:
        fig.clear()
    return out


def _new_figure(mpl: SimpleNamespace, size_in: tuple[float, float]) -> Figure:
    fig = mpl.Figure(figsize=size_in, dpi=DPI, facecolor="white")
    mpl.FigureCanvasAgg(fig)
    return fig


# ---------------------------------------------------------------- density matrix


def density_matrix_figure(
    rho: ArrayLike, labels: Sequence[str], title: str = "", style: str = "auto"
) -> Figure:
    """Real and imaginary parts of a density matrix side by side on one symmetric colour scale.

    Parameters
    ----------
    rho : (d, d) complex array, dimensionless.
    labels : d basis labels in the matrix's order, e.g. ("H,h", "H,v", "V,h", "V,v").
    title : figure title.
    style : "bars" (3-D bars), "map" (2-D heat maps with the values printed) or "auto" (bars up to
        d = 4, maps above, where 3-D bars hide one another).
    """
    r = np.asarray(rho, dtype=np.complex128)
    if r.ndim != 2 or r.shape[0] != r.shape[1]:
        raise ValueError(f"a density matrix is square, got shape {r.shape}")
    d = r.shape[0]
    if len(labels) != d:
        raise ValueError(f"{d}x{d} density matrix needs {d} basis labels, got {len(labels)}")
    if style not in ("auto", "bars", "map"):
        raise ValueError(f"style is 'auto', 'bars' or 'map', got {style!r}")
    if style == "auto":
        style = "bars" if d <= MAX_BARS_DIM else "map"
    mpl = _mpl()
    limit = symmetric_limit(r.real, r.imag)
    norm = mpl.Normalize(vmin=-limit, vmax=limit)
    cmap = mpl.colormaps["RdBu_r"]
    kets = [ket_label(s) for s in labels]
    parts = (("Re ρ", r.real), ("Im ρ", r.imag))
    if style == "bars":
        fig = _new_figure(mpl, (11.0, 5.2))
        for k, (name, part) in enumerate(parts):
            ax = fig.add_subplot(1, 2, k + 1, projection="3d")
            _draw_bars(mpl, ax, part, kets, limit, norm, cmap, name)
        fig.subplots_adjust(left=0.0, right=0.9, bottom=0.04, top=0.88, wspace=0.02)
        cax = fig.add_axes((0.915, 0.22, 0.015, 0.55))
    else:
        fig = _new_figure(mpl, (4.2 + 1.0 * d, 1.8 + 0.5 * d))
        for k, (name, part) in enumerate(parts):
            ax = fig.add_subplot(1, 2, k + 1)
            _draw_map(ax, part, kets, norm, cmap, name)
        fig.subplots_adjust(left=0.12, right=0.88, bottom=0.14, top=0.86, wspace=0.35)
        cax = fig.add_axes((0.905, 0.2, 0.015, 0.6))
    bar = fig.colorbar(mpl.ScalarMappable(norm=norm, cmap=cmap), cax=cax)
    bar.set_label("matrix element", fontsize=10)
    bar.ax.tick_params(labelsize=9)
    if title:
        fig.suptitle(title, fontsize=13)
    return fig


def _draw_bars(mpl, ax, part, kets, limit, norm, cmap, name) -> None:
    d = part.shape[0]
    faces = bar_faces(part)
    # Fixed per-face brightness (bottom, top, four sides) so tops stand out from sides in a still
    # image; top and bottom keep the exact colour-bar colour, as a zero-height bar shows either.
    base = cmap(norm(part.ravel()))
    shaded = base[:, None, :].repeat(6, axis=1)
    shaded[..., :3] *= FACE_BRIGHTNESS[None, :, None]
    coll = mpl.Poly3DCollection(
        faces.reshape(-1, 4, 3),
        facecolors=shaded.reshape(-1, 4),
        edgecolors=(0.15, 0.15, 0.15, 0.7),
        linewidths=0.5,
        zsort="average",
    )
    coll.set_gid(f"bars:{name}")
    ax.add_collection3d(coll)
    lo, hi = -0.5, d - 0.5
    ax.plot([lo, hi, hi, lo, lo], [lo, lo, hi, hi, lo], [0, 0, 0, 0, 0], color="0.45", lw=0.8)
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    ax.set_zlim(-limit, limit)
    ax.set_box_aspect((1, 1, 0.75))
    ax.view_init(elev=28, azim=-58)
    ticks = np.arange(d)
    fs = 9 if d <= 2 else 8
    ax.set_xticks(ticks, kets, fontsize=fs)
    ax.set_yticks(ticks, kets, fontsize=fs)
    ax.tick_params(axis="x", pad=-2)
    ax.tick_params(axis="y", pad=-2)
    ax.tick_params(axis="z", labelsize=8, pad=2)
    ax.set_xlabel("column", fontsize=9, labelpad=4)
    ax.set_ylabel("row", fontsize=9, labelpad=4)
    ax.set_title(name, fontsize=12, pad=0)


def _draw_map(ax, part, kets, norm, cmap, name) -> None:
    d = part.shape[0]
    im = ax.imshow(part, cmap=cmap, norm=norm, origin="upper")
    im.set_gid(f"map:{name}")
    ax.set_xticks(range(d), kets, rotation=45, ha="right", fontsize=8)
    ax.set_yticks(range(d), kets, fontsize=8)
    ax.set_xlabel("column", fontsize=9)
    ax.set_ylabel("row", fontsize=9)
    ax.set_title(name, fontsize=12)
    if d <= 8:
        for (i, j), v in np.ndenumerate(part):
            shade = "white" if abs(norm(v) - 0.5) > 0.3 else "black"
            ax.text(j, i, f"{round(v, 2) + 0.0:+.2f}", ha="center", va="center", fontsize=7,
                    color=shade)


def plot_density_matrix(
    rho: ArrayLike,
    labels: Sequence[str],
    path: str | os.PathLike[str],
    title: str = "",
    *,
    style: str = "auto",
    dpi: int = DPI,
) -> Path:
    """Write :func:`density_matrix_figure` as a PNG at ``path`` and return the path."""
    return save_png(density_matrix_figure(rho, labels, title, style), path, dpi)


# ---------------------------------------------------------------- Poincare spheres


def poincare_figure(
    points: Mapping[str, ArrayLike],
    title: str = "",
    axis_labels: Sequence[str] = ("S1", "S2", "S3"),
    uncertainties: Mapping[str, float] | None = None,
    poles: Mapping[str, Sequence[tuple[str, str]]] | None = None,
) -> Figure:
    """One Poincare sphere per entry of ``points``, the Stokes vector drawn from the origin.

    Parameters
    ----------
    points : name -> [S1, S2, S3] (normalised) or [S0, S1, S2, S3]; the arrow's length is the
        degree of polarization |S| / S0 (on a spatial sphere, its analogue for the mode).
    axis_labels : names of the three axes, printed beside the positive pole labels.
    uncertainties : name -> radius (same units as the Stokes vector) of the uncertainty ball
        drawn around the tip, e.g. the standard deviation of its position.
    poles : name -> ((+S1, -S1), (+S2, -S2), (+S3, -S3)) pole labels; by default H/V, D/A, R/L,
        or h/v, d/a, l+/l- for a key that names a spatial sphere.
    """
    if not points:
        raise ValueError("no Stokes vector to draw: points is empty")
    if len(axis_labels) != 3:
        raise ValueError(f"axis_labels names the 3 axes, got {len(axis_labels)}")
    mpl = _mpl()
    uncertainties = uncertainties or {}
    poles = poles or {}
    n = len(points)
    fig = _new_figure(mpl, (4.8 * n, 5.0))
    for k, (name, raw) in enumerate(points.items()):
        s = normalized_stokes(raw)
        sphere_poles = tuple(poles.get(name, poles_for(name)))
        if len(sphere_poles) != 3:
            raise ValueError(f"sphere {name!r} needs 3 pole pairs, got {len(sphere_poles)}")
        ax = fig.add_subplot(1, n, k + 1, projection="3d")
        _draw_sphere(ax, name, s, sphere_poles, tuple(axis_labels), uncertainties.get(name))
    fig.subplots_adjust(left=0.0, right=1.0, bottom=0.02, top=0.86 if title else 0.92, wspace=0.0)
    if title:
        fig.suptitle(title, fontsize=13)
    return fig


def _draw_sphere(ax, name, s, poles, axis_labels, radius) -> None:
    u = np.linspace(0, 2 * np.pi, 25)
    v = np.linspace(0, np.pi, 13)
    xs = np.outer(np.cos(u), np.sin(v))
    ys = np.outer(np.sin(u), np.sin(v))
    zs = np.outer(np.ones_like(u), np.cos(v))
    ax.plot_wireframe(xs, ys, zs, color="0.82", linewidth=0.4, rstride=1, cstride=1)
    t = np.linspace(0, 2 * np.pi, 181)
    c, sn, z = np.cos(t), np.sin(t), np.zeros_like(t)
    ax.plot(c, sn, z, color="0.35", lw=1.0)  # equator: linear states
    ax.plot(c, z, sn, color="0.55", lw=0.8, ls="--")  # S1-S3 meridian
    ax.plot(z, c, sn, color="0.55", lw=0.8, ls="--")  # S2-S3 meridian
    reach = 1.18
    for axis, ((plus, minus), axis_name) in enumerate(zip(poles, axis_labels)):
        end = np.zeros(3)
        end[axis] = reach
        ax.plot(*zip(-end, end), color="0.25", lw=0.9)
        tip = end * 1.12
        ax.text(*tip, f"{plus} ({axis_name})", ha="center", va="center", fontsize=10)
        ax.text(*(-tip), minus, ha="center", va="center", fontsize=10, color="0.3")
    colour = "#c0392b"
    # Drop lines to the equatorial plane make the tip's height readable in a still image.
    ax.plot([s[0], s[0]], [s[1], s[1]], [0, s[2]], color=colour, lw=0.8, ls=":")
    ax.plot([0, s[0]], [0, s[1]], [0, 0], color=colour, lw=0.8, ls=":")
    (vec,) = ax.plot([0, s[0]], [0, s[1]], [0, s[2]], color=colour, lw=2.4, solid_capstyle="round")
    vec.set_gid(f"stokes:{name}")
    ax.plot([s[0]], [s[1]], [s[2]], "o", color=colour, ms=6, mec="white", mew=0.8)
    if radius is not None and radius > 0:
        ball = _ball(s, float(radius))
        ax.plot_surface(*ball, color=colour, alpha=0.25, linewidth=0, shade=False)
    ax.set_xlim(-1.05, 1.05)
    ax.set_ylim(-1.05, 1.05)
    ax.set_zlim(-1.05, 1.05)
    ax.set_box_aspect((1, 1, 1), zoom=1.15)
    ax.view_init(elev=22, azim=35)
    ax.set_axis_off()
    dop = float(np.linalg.norm(s))
    spread = f" ± {radius:.3f}" if radius is not None else ""
    ax.set_title(
        f"{name}\n({s[0]:+.3f}, {s[1]:+.3f}, {s[2]:+.3f}),  |S| = {dop:.3f}{spread}",
        fontsize=10,
        pad=0,
    )


def _ball(centre: NDArray[np.float64], radius: float) -> tuple[NDArray[np.float64], ...]:
    u = np.linspace(0, 2 * np.pi, 17)
    v = np.linspace(0, np.pi, 9)
    return (
        centre[0] + radius * np.outer(np.cos(u), np.sin(v)),
        centre[1] + radius * np.outer(np.sin(u), np.sin(v)),
        centre[2] + radius * np.outer(np.ones_like(u), np.cos(v)),
    )


def plot_poincare(
    points: Mapping[str, ArrayLike],
    path: str | os.PathLike[str],
    title: str = "",
    axis_labels: Sequence[str] = ("S1", "S2", "S3"),
    uncertainties: Mapping[str, float] | None = None,
    *,
    poles: Mapping[str, Sequence[tuple[str, str]]] | None = None,
    dpi: int = DPI,
) -> Path:
    """Write :func:`poincare_figure` as a PNG at ``path`` and return the path."""
    fig = poincare_figure(points, title, axis_labels, uncertainties, poles)
    return save_png(fig, path, dpi)


# ---------------------------------------------------------------- reference (drift) trace


def _apply_time_axis(mpl, ax, t_rel: NDArray[np.float64]) -> None:
    span = float(np.nanmax(t_rel) - np.nanmin(t_rel)) if t_rel.size else 0.0
    step, style = time_tick_step_s(span)
    if style == "s":
        ax.set_xlabel("elapsed time (s)", fontsize=10)
        return
    ax.xaxis.set_major_locator(mpl.ticker.MultipleLocator(step))
    ax.xaxis.set_major_formatter(mpl.ticker.FuncFormatter(lambda x, _pos: format_elapsed(x, style)))
    ax.set_xlabel(f"elapsed time ({style})", fontsize=10)


def reference_trace_figure(
    t_s: ArrayLike,
    reference: ArrayLike,
    title: str = "",
    units: str = "W",
    flagged: ArrayLike | None = None,
    events: Sequence[tuple[float, str]] = (),
) -> Figure:
    """The reference (drift) readings over elapsed time, in % of the first reading.

    Parameters
    ----------
    t_s : reading times, s (any origin; the first reading is time zero).
    reference : reference readings in ``units``; the right axis shows them in those units.
    flagged : boolean mask of readings to highlight (e.g. beam lost, out of tolerance).
    events : (time in s on the same origin as ``t_s``, short label) marked as vertical lines.
    """
    t = np.asarray(t_s, dtype=float).ravel()
    x = np.asarray(reference, dtype=float).ravel()
    if t.shape != x.shape:
        raise ValueError(f"t_s has {t.size} times but reference has {x.size} readings")
    if t.size == 0:
        raise ValueError("the reference trace is empty")
    mask = np.zeros(t.shape, bool) if flagged is None else np.asarray(flagged, dtype=bool).ravel()
    if mask.shape != t.shape:
        raise ValueError(f"flagged has {mask.size} entries for {t.size} readings")
    mpl = _mpl()
    pct, x0 = relative_percent(x)
    t0 = float(t[0])
    t_rel = t - t0
    fig = _new_figure(mpl, (9.0, 4.4))
    ax = fig.add_subplot(1, 1, 1)
    fig.subplots_adjust(left=0.1, right=0.88, bottom=0.14, top=0.85)
    ax.axhline(0.0, color="0.6", lw=0.8)
    ax.plot(t_rel, pct, "-", color="#1f5f99", lw=1.0, marker="o", ms=2.5, label="reference")
    if mask.any():
        ax.plot(t_rel[mask], pct[mask], "x", color="#c0392b", ms=7, mew=1.6, ls="none",
                label=f"flagged ({int(mask.sum())})")
    finite = pct[np.isfinite(pct)]
    half = max(0.5, float(np.max(np.abs(finite))) * 1.15) if finite.size else 1.0
    _draw_events(ax, events, t0, t_rel, half)
    _apply_time_axis(mpl, ax, t_rel)
    ax.set_ylabel("change from first reading (%)", fontsize=10)
    factor, shown_units = si_scale(x0, units)
    sec = ax.secondary_yaxis(
        "right",
        functions=(
            lambda p: x0 * (1 + p / 100.0) / factor,
            lambda a: 100.0 * (a * factor / x0 - 1.0),
        ),
    )
    sec.set_ylabel(f"reference ({shown_units})", fontsize=10)
    sec.tick_params(labelsize=9)
    ax.tick_params(labelsize=9)
    ax.grid(True, color="0.9", lw=0.6)
    ax.legend(loc="best", fontsize=8, frameon=False)
    head = title or "reference (drift) trace"
    ax.set_title(f"{head}\nfirst reading {x0 / factor:#.4g} {shown_units}", fontsize=11)
    return fig


def _draw_events(ax, events: Sequence[tuple[float, str]], t0: float, t_rel, half: float) -> None:
    """Vertical lines with horizontal labels in staggered rows above the data, never overlapping."""
    if not events:
        ax.set_ylim(-half, half)
        return
    times = np.array([float(te) - t0 for te, _ in events])
    labels = [_short(lbl) for _, lbl in events]
    lo = float(min(np.nanmin(t_rel), times.min()))
    hi = float(max(np.nanmax(t_rel), times.max()))
    pad = 0.02 * (hi - lo if hi > lo else 1.0)
    ax.set_xlim(lo - pad, hi + pad)
    x_frac = (times - (lo - pad)) / (hi - lo + 2 * pad)
    axes_width_pt = ax.figure.get_figwidth() * ax.get_position().width * 72.0
    width_frac = (np.array([len(s) for s in labels]) + 1.5) * 0.6 * EVENT_FONT_PT / axes_width_pt
    rows = label_rows(x_frac, width_frac)
    row_frac = 1.5 * EVENT_FONT_PT / (ax.figure.get_figheight() * ax.get_position().height * 72.0)
    band = (rows.max() + 1) * row_frac + 0.02
    # Reserve the top band of the axes for the labels: the data span only the part below it.
    ax.set_ylim(-half, -half + 2 * half / (1.0 - band))
    trans = ax.get_xaxis_transform()
    for te, label, row, xf, wf in zip(times, labels, rows, x_frac, width_frac):
        ax.axvline(te, color="0.35", lw=0.9, ls="--")
        # A label that would run off the right edge is set to the line's left instead.
        right = xf + wf > 1.0
        ax.text(te, 0.985 - row * row_frac, f" {label} " if not right else f"{label} ",
                transform=trans, ha="right" if right else "left", va="top",
                fontsize=EVENT_FONT_PT, color="0.2")


def label_rows(x_frac: ArrayLike, width_frac: ArrayLike, gap: float = 0.01) -> NDArray[np.int64]:
    """Row of each label (0 = top) so that labels at ``x_frac``, ``width_frac`` wide, never overlap.

    Greedy from the left: each label takes the first row whose last label ends before it starts.
    Positions and widths are fractions of the axes width; a label that would pass the right edge
    ends at its line instead of starting there.
    """
    x = np.asarray(x_frac, dtype=float).ravel()
    w = np.broadcast_to(np.asarray(width_frac, dtype=float), x.shape)
    rows = np.zeros(x.size, dtype=np.int64)
    ends: list[float] = []
    for i in np.argsort(x, kind="stable"):
        start = x[i] - w[i] if x[i] + w[i] > 1.0 else x[i]
        row = next((r for r, end in enumerate(ends) if end + gap <= start), len(ends))
        if row == len(ends):
            ends.append(start + w[i])
        else:
            ends[row] = start + w[i]
        rows[i] = row
    return rows


def _short(label: str, limit: int = 18) -> str:
    text = " ".join(str(label).split())
    return text if len(text) <= limit else text[: limit - 1] + "…"


def plot_reference_trace(
    t_s: ArrayLike,
    reference: ArrayLike,
    path: str | os.PathLike[str],
    title: str = "",
    units: str = "W",
    flagged: ArrayLike | None = None,
    events: Sequence[tuple[float, str]] = (),
    *,
    dpi: int = DPI,
) -> Path:
    """Write :func:`reference_trace_figure` as a PNG at ``path`` and return the path."""
    fig = reference_trace_figure(t_s, reference, title, units, flagged, events)
    return save_png(fig, path, dpi)


# ---------------------------------------------------------------- raw readings


def readings_figure(
    step_index: ArrayLike,
    readings: ArrayLike,
    port_names: Sequence[str],
    title: str = "",
    units: str = "W",
    kinds: Sequence[str] | None = None,
    log_scale: bool = False,
) -> Figure:
    """Raw detector readings per port over the step index, one panel per port.

    Parameters
    ----------
    step_index : (n,) step numbers.
    readings : (n, n_ports) detector values in ``units``.
    port_names : one name per port (column of ``readings``).
    kinds : per reading "measure", "background" or "reference", drawn with distinct markers.
    log_scale : logarithmic value axis (counters spanning decades).
    """
    idx = np.asarray(step_index, dtype=float).ravel()
    vals = np.asarray(readings, dtype=float)
    if vals.ndim == 1:
        vals = vals[:, None]
    if vals.ndim != 2 or vals.shape[0] != idx.size:
        raise ValueError(f"readings must be ({idx.size}, n_ports), got shape {vals.shape}")
    if len(port_names) != vals.shape[1]:
        raise ValueError(f"{vals.shape[1]} ports in readings but {len(port_names)} port names")
    kind_arr = np.asarray(["measure"] * idx.size if kinds is None else list(kinds), dtype=object)
    if kind_arr.shape != idx.shape:
        raise ValueError(f"kinds has {kind_arr.size} entries for {idx.size} readings")
    mpl = _mpl()
    finite = vals[np.isfinite(vals)]
    peak = float(np.max(np.abs(finite))) if finite.size else 0.0
    factor, shown_units = si_scale(peak, units)
    n_ports = vals.shape[1]
    fig = _new_figure(mpl, (9.0, 1.2 + 1.9 * n_ports))
    axes = fig.subplots(n_ports, 1, sharex=True, squeeze=False)[:, 0]
    palette = ("#1f5f99", "#555555", "#d68910")
    for p, ax in enumerate(axes):
        for (kind, (marker, ms, alpha)), colour in zip(_KIND_STYLE.items(), palette):
            sel = kind_arr == kind
            if sel.any():
                ax.plot(idx[sel], vals[sel, p] / factor, marker, ms=ms, color=colour, alpha=alpha,
                        ls="none", label=kind)
        other = ~np.isin(kind_arr, list(_KIND_STYLE))
        if other.any():
            ax.plot(idx[other], vals[other, p] / factor, "s", ms=3, color="#7d3c98", ls="none",
                    label="other")
        if log_scale:
            ax.set_yscale("log")
        ax.set_ylabel(f"{port_names[p]}\n({shown_units})", fontsize=9)
        ax.tick_params(labelsize=8)
        ax.grid(True, color="0.9", lw=0.6)
    # The legend sits above the first panel so that it never hides a reading.
    axes[0].legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), fontsize=8, frameon=False, ncol=4,
                   borderaxespad=0.2)
    axes[-1].set_xlabel("step index", fontsize=10)
    axes[-1].xaxis.set_major_locator(mpl.ticker.MaxNLocator(integer=True))
    height_in = fig.get_figheight()
    fig.suptitle(title or "raw readings per port", fontsize=12, y=1.0 - 0.12 / height_in, va="top")
    fig.subplots_adjust(left=0.12, right=0.97, bottom=0.6 / height_in, top=1.0 - 0.75 / height_in,
                        hspace=0.12)
    return fig


def plot_readings(
    step_index: ArrayLike,
    readings: ArrayLike,
    port_names: Sequence[str],
    path: str | os.PathLike[str],
    title: str = "",
    units: str = "W",
    kinds: Sequence[str] | None = None,
    *,
    log_scale: bool = False,
    dpi: int = DPI,
) -> Path:
    """Write :func:`readings_figure` as a PNG at ``path`` and return the path."""
    fig = readings_figure(step_index, readings, port_names, title, units, kinds, log_scale)
    return save_png(fig, path, dpi)


__all__ = [
    "PlotsUnavailable",
    "bar_faces",
    "density_matrix_figure",
    "format_elapsed",
    "ket_label",
    "label_rows",
    "normalized_stokes",
    "plot_density_matrix",
    "plot_poincare",
    "plot_readings",
    "plot_reference_trace",
    "poincare_figure",
    "poles_for",
    "readings_figure",
    "reference_trace_figure",
    "relative_percent",
    "save_png",
    "si_scale",
    "symmetric_limit",
    "time_tick_step_s",
]
