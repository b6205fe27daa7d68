"""The imaging part of ``lightloom analyze``, shell glue between storage and analysis: frames of a
camera run -> Stokes maps, integrated Stokes parameters, non-separability (JSON keys), the maps
file (``--maps``), and the night out of core (``--series``) on local threads or a dask cluster."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from lightloom.sequencer.analysis.imaging import ImagingResult, analyze_frames, polarization_povms
from lightloom.sequencer.errors import UsageError
from lightloom.sequencer.outputs import check_new_output

MAP_NAMES = ("S0", "S1", "S2", "S3", "dop", "orientation_deg", "ellipticity_deg")


def setting_groups(commanded: np.ndarray) -> np.ndarray:
    """One label per distinct commanded setting (repeats of a setting share it)."""
    key = np.round(np.nan_to_num(np.asarray(commanded, dtype=float), nan=-999.0), 6)
    return np.unique(key, axis=0, return_inverse=True)[1].reshape(-1)


def imaging_result(path: str, data, *, rng: np.random.Generator, replicates: int) -> ImagingResult | None:
    """The imaging analysis of a run's frames (None for a run without a camera). Frames of the
    first camera port are used; a run whose measurement frames do not yet determine S0..S3 gives
    None too (partial runs are analysed with what they hold)."""
    from lightloom.sequencer.storage.frames import load_frames

    frames = load_frames(path, data.readings)
    if frames is None:
        return None
    port = frames.port == frames.port.min()
    measure = port & (frames.kind == 0)
    dark = port & (frames.kind == 1)
    if not measure.any():
        return None
    try:
        return analyze_frames(
            frames.data[measure], polarization_povms(frames.operators[measure]),
            setting_groups(frames.commanded[measure]), frames.data[dark] if dark.any() else None,
            frames.saturated[measure], rng=rng, replicates=replicates,
        )
    except ValueError:
        return None


def add_to_document(doc: dict, result: ImagingResult) -> None:
    """``nonseparability`` and ``stokes.polarization`` (of the whole beam, from the frames)."""
    doc["nonseparability"] = result.nonseparability.to_json()
    stokes = []
    for j in range(4):
        value, std = float(result.integrated[j]), float(result.integrated_std[j])
        if j == 0:
            stokes.append({"value": 1.0, "std": 0.0, "interval": [1.0, 1.0]})
            continue
        lo, hi = value - 1.96 * std, value + 1.96 * std
        stokes.append({"value": value, "std": std, "interval": [max(-1.0, lo), min(1.0, hi)]})
    doc.setdefault("stokes", {})["polarization"] = stokes
    doc["imaging"] = {
        "pixels": list(result.maps.stokes.shape[1:]),
        "saturated_pixels": result.masked_pixels,
        "stokes_from": "spatially integrated Stokes maps (dark subtracted, saturated pixels left out)",
    }


def write_maps(result: ImagingResult, out: str) -> Path:
    """The maps as an HDF5 file: datasets S0..S3 (ADU), dop, orientation_deg, ellipticity_deg
    (NaN where saturated or dark) and saturated (1 where a frame saturated)."""
    import h5py

    path = Path(out)
    check_new_output(path, "--maps", f"{path} exists already; choose another --maps file (lightloom never overwrites)")
    maps = result.maps
    values = dict(zip(MAP_NAMES[:4], maps.stokes))
    values.update(dop=maps.dop, orientation_deg=maps.orientation_deg, ellipticity_deg=maps.ellipticity_deg)
    units = {"S0": "ADU", "S1": "ADU", "S2": "ADU", "S3": "ADU", "dop": "1",
             "orientation_deg": "deg", "ellipticity_deg": "deg"}
    with h5py.File(path, "w-") as f:
        for name in MAP_NAMES:
            d = f.create_dataset(name, data=np.asarray(values[name], dtype=np.float64), compression="gzip")
            d.attrs["units"] = units[name]
        f.create_dataset("saturated", data=maps.saturated.astype(np.uint8))
        f.attrs["conventions"] = "S1 = H - V, S2 = D - A, S3 = R - L (sympy handedness); rows = y, columns = x"
        f.attrs["nonseparability"] = result.nonseparability.value
    return path


def imaging_series(path: str, *, address: str | None = None, maps_out: str | None = None,
                   passes_per_window: int = 1, frames_per_chunk: int = 8) -> dict:
    """The night of an imaging run, out of core with dask: per pass its integrated Stokes
    parameters, non-separability and S0 centroid (the drift of the pattern); with ``maps_out``,
    Stokes maps per window of ``passes_per_window`` passes written to that new HDF5 file one window
    at a time. On the local threaded scheduler, or on the dask.distributed cluster at ``address``."""
    import contextlib

    import dask

    from lightloom.sequencer.analysis import imaging_dask as night
    from lightloom.sequencer.storage.frames import frame_columns, frame_stack

    columns = frame_columns(path)
    if len(set(columns.port.tolist())) > 1:
        raise UsageError(f"{path}: the series analysis takes runs with one camera")
    if maps_out is not None:
        check_new_output(Path(maps_out), "--series-maps",
                         f"{maps_out} exists already; choose another --series-maps file (lightloom never overwrites)")
    layout = night.pass_weights(columns.kind, columns.pass_index, columns.operators)
    stack = frame_stack(path, frames_per_chunk)
    keep = ~night.saturated_anywhere(frame_stack(path, frames_per_chunk, "frames/saturated"))
    if address:
        try:
            from distributed import Client
        except ImportError:
            raise UsageError("--dask needs dask.distributed: pip install 'lightloom[imaging]'") from None
        try:
            where = Client(address, timeout=10)
        except (OSError, TimeoutError) as exc:
            raise UsageError(f"cannot reach the dask scheduler at {address}: {exc}") from None
    else:
        where = contextlib.nullcontext()
    with where, dask.config.set(scheduler="threads") if not address else contextlib.nullcontext():
        moments = night.frame_moments(stack, keep).compute()
        series = night.series_from_moments(moments, columns.kind, layout)
        written = None
        if maps_out is not None:
            written = _write_window_maps(night.window_maps(stack, columns.kind, layout, passes_per_window),
                                         maps_out, passes_per_window, stack.shape[1:])
    rows = []
    t = columns.t_s
    for p, s, v, c in zip(series.passes, series.normalised, series.nonseparability, series.centroid_px):
        mine = columns.pass_index == p
        rows.append({"pass": int(p), "t_start": float(t[mine].min()), "t_end": float(t[mine].max()),
                     "stokes": [float(x) for x in s], "nonseparability": float(v),
                     "centroid_px": [float(c[0]), float(c[1])]})
    drift = series.centroid_px - series.centroid_px[:1]
    out = {"passes": rows, "drift_px": float(np.nanmax(np.hypot(drift[:, 0], drift[:, 1]))) if len(rows) else 0.0,
           "scheduler": address or "local threads"}
    if written:
        out["maps"] = written
    return out


def _write_window_maps(maps: list, out: str, passes_per_window: int, shape: tuple[int, int]) -> str:
    """Write the window maps (each lazy (4, rows, cols)) to ``out``/stokes, one window in memory at
    a time."""
    import h5py

    rows, cols = shape
    n = len(maps)
    with h5py.File(out, "w-") as f:
        d = f.create_dataset("stokes", shape=(n, 4, rows, cols), dtype="f8", chunks=(1, 1, rows, cols),
                             compression="gzip")
        d.attrs["units"] = "ADU"
        d.attrs["axes"] = "window, Stokes parameter S0..S3, row (y), column (x)"
        d.attrs["passes_per_window"] = passes_per_window
        for i in range(n):
            d[i] = maps[i].compute()
    return out
