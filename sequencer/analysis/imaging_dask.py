"""Stokes imaging of a whole night, out of core: per-pass Stokes maps, integrated Stokes parameters
and the drift of the pattern, and maps per window, as dask graphs over frame stacks that never
need to fit in memory.

The frames are a dask array (n, rows, cols) in time order (storage.frames.frame_stack reads them
from a run file); the per-frame columns (kind, pass, operators) are small and in memory. Every
result is linear in the frames, pass by pass (analysis.imaging: S = A^+ (I - dark) at every pixel),
so a pass is a weighted sum of its own frames and the work streams: memory holds the chunks in
flight, not the night. Nothing here chooses where it runs: ``compute`` with the local threaded
scheduler, or with a dask.distributed Client (see sequencer.imaging_report).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from lightloom.sequencer.analysis.imaging import inversion_matrix, nonseparability, polarization_povms

MEASURE, DARK = 0, 1


@dataclass(frozen=True, eq=False)
class PassWeights:
    """How each pass's Stokes maps are made from its frames: ``weights[p]`` (4, frames of the pass)
    over the frames ``bounds[p]`` = (start, stop), and ``global_dark[p]`` (4,), the coefficient of
    the run's mean dark frame for passes without a dark frame of their own (else zeros)."""

    bounds: tuple[tuple[int, int], ...]
    weights: tuple[NDArray[np.float64], ...]
    global_dark: NDArray[np.float64]
    passes: NDArray[np.int64]

    @property
    def chunks(self) -> tuple[int, ...]:
        """Chunk sizes along the frames that put each pass in one chunk."""
        return tuple(b - a for a, b in self.bounds)


def pass_weights(kind: NDArray, pass_index: NDArray, operators: NDArray) -> PassWeights:
    """The per-pass linear maps from frames to Stokes parameters (dark frames of the pass
    subtracted; passes whose settings do not determine S0..S3 are left out).

    Frames must be in pass order (as a run writes them)."""
    kind = np.asarray(kind)
    passes = np.asarray(pass_index)
    if len(passes) and np.any(np.diff(passes) < 0):
        raise ValueError("frames are not in pass order; they must be as the run wrote them")
    bounds, weights, dark_coef, kept = [], [], [], []
    starts = np.flatnonzero(np.r_[True, np.diff(passes) != 0]) if len(passes) else np.array([], int)
    for start, stop in zip(starts, np.r_[starts[1:], len(passes)]):
        k = kind[start:stop]
        measure = np.flatnonzero(k == MEASURE)
        dark = np.flatnonzero(k == DARK)
        if len(measure) == 0:
            continue
        try:
            inverse = inversion_matrix(polarization_povms(operators[start:stop][measure]))
        except ValueError:
            continue
        w = np.zeros((4, stop - start))
        w[:, measure] = inverse
        coef = np.zeros(4)
        if len(dark):
            w[:, dark] = -inverse.sum(axis=1, keepdims=True) / len(dark)
        else:
            coef = -inverse.sum(axis=1)
        bounds.append((int(start), int(stop)))
        weights.append(w)
        dark_coef.append(coef)
        kept.append(int(passes[start]))
    return PassWeights(tuple(bounds), tuple(weights), np.array(dark_coef).reshape(-1, 4), np.array(kept, int))


def saturated_anywhere(saturated_stack):
    """(rows, cols) dask bool: the pixel saturated in at least one frame."""
    return saturated_stack.astype(bool).any(axis=0)


def frame_moments(stack, keep):
    """Per frame, over the kept pixels: [sum I, sum x I, sum y I] (n, 3), x and y in pixels. One
    streaming pass over the stack."""
    import dask.array as da

    rows, cols = stack.shape[1:]
    y, x = np.mgrid[0:rows, 0:cols]
    weights = np.stack([np.ones((rows, cols)), x, y]).astype(np.float64)
    weights = da.from_array(weights, chunks=weights.shape) * keep[None, :, :]
    return da.tensordot(stack.astype(np.float64), weights, axes=((1, 2), (1, 2)))


@dataclass(frozen=True, eq=False)
class Series:
    """Per pass: the pass number, its integrated Stokes parameters (P, 4) in ADU, the normalised
    ones (S0 = 1), the non-separability and the S0 centroid (x, y) in pixels."""

    passes: NDArray[np.int64]
    stokes: NDArray[np.float64]
    centroid_px: NDArray[np.float64]

    @property
    def normalised(self) -> NDArray[np.float64]:
        return self.stokes / self.stokes[:, :1]

    @property
    def nonseparability(self) -> NDArray[np.float64]:
        return np.array([nonseparability(s) for s in self.stokes])


def series_from_moments(moments: NDArray[np.float64], kind: NDArray, layout: PassWeights) -> Series:
    """Integrated Stokes and S0 centroid of every pass from the frames' moments (numpy, small)."""
    m = np.asarray(moments, dtype=np.float64)
    darks = np.asarray(kind) == DARK
    mean_dark = m[darks].mean(axis=0) if darks.any() else np.zeros(3)
    out = np.empty((len(layout.bounds), 4, 3))
    for p, ((a, b), w) in enumerate(zip(layout.bounds, layout.weights)):
        out[p] = w @ m[a:b] + np.outer(layout.global_dark[p], mean_dark)
    with np.errstate(invalid="ignore", divide="ignore"):
        centroid = out[:, 0, 1:] / out[:, 0, :1]
    return Series(layout.passes, out[:, :, 0], centroid)


def mean_dark_frame(stack, kind: NDArray):
    """Lazy mean of the run's dark frames (rows, cols), zeros without any."""
    import dask.array as da

    darks = np.flatnonzero(np.asarray(kind) == DARK)
    if len(darks) == 0:
        return da.zeros(stack.shape[1:])
    return stack[darks].astype(np.float64).mean(axis=0)


def _pass_pieces(stack, kind: NDArray, layout: PassWeights, chosen, mean_dark) -> list:
    """Lazy (4, rows, cols) Stokes maps of the passes ``chosen`` (positions in ``layout``)."""
    import dask.array as da

    pieces = []
    for p in chosen:
        (a, b), w, coef = layout.bounds[p], layout.weights[p], layout.global_dark[p]
        maps = da.tensordot(da.from_array(w, chunks=w.shape), stack[a:b].astype(np.float64), axes=(1, 0))
        if np.any(coef):
            if mean_dark is None:
                mean_dark = mean_dark_frame(stack, kind)
            maps = maps + da.from_array(coef, chunks=4)[:, None, None] * mean_dark[None]
        pieces.append(maps)
    return pieces


def pass_maps(stack, kind: NDArray, layout: PassWeights, passes: slice = slice(None), mean_dark=None):
    """Lazy Stokes maps (P, 4, rows, cols) of the passes ``passes`` (positions in ``layout``):
    per-pixel Stokes parameters against time. Each pass is built from its own frames only, so a
    graph for a few passes stays small however long the night. ``mean_dark`` (rows, cols; numpy
    or dask) is used by passes without a dark frame of their own; computed here when needed."""
    import dask.array as da

    pieces = _pass_pieces(stack, kind, layout, range(len(layout.bounds))[passes], mean_dark)
    return da.stack(pieces) if pieces else da.zeros((0, 4) + tuple(stack.shape[1:]))


def window_maps(stack, kind: NDArray, layout: PassWeights, passes_per_window: int, mean_dark=None) -> list:
    """Lazy mean Stokes maps (4, rows, cols) of every window of ``passes_per_window`` consecutive
    passes, one small graph per window (compute them one at a time to bound memory)."""
    if passes_per_window < 1:
        raise ValueError("a window holds at least one pass")
    n = len(layout.bounds)
    if mean_dark is None and np.any(layout.global_dark):
        mean_dark = mean_dark_frame(stack, kind).compute()
    windows = []
    for i in range(0, n, passes_per_window):
        # A running sum rather than a stacked mean: a window holds one pass's maps at a time.
        pieces = _pass_pieces(stack, kind, layout, range(i, min(i + passes_per_window, n)), mean_dark)
        total = pieces[0]
        for piece in pieces[1:]:
            total = total + piece
        windows.append(total / len(pieces))
    return windows
