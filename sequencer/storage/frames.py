"""Camera frames of a run: the durable frame journal beside the run file, and the chunked,
compressed ``/frames`` datasets in the run file.

A frame goes to ``RUN.h5.frames`` (append-only, one CRC-framed record per frame, zlib-compressed,
data-synced) BEFORE its reading goes to the run journal, so a reading that was reported always has
its frame on disk. A kill between the two leaves a frame whose step has no reading; resume measures
that step again and appends a new frame, and the run file takes, for every (step, port) with a
recorded reading, the LAST frame the journal holds: every reported frame exactly once.

``publish`` copies the frames into the run file when the run closes (``/frames``, chunked one frame
per chunk, gzip with byte shuffle), with the commanded settings, the measurement operator and the
kind of the reading they belong to, and marks the group complete last. Readers take ``/frames``
when it is complete and the frame journal otherwise (a run still going, or killed).
"""

from __future__ import annotations

import os
import struct
import zlib
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from lightloom.sequencer.errors import StorageError
from lightloom.sequencer.storage.atomic import sync_fd

FRAMES_SUFFIX = ".frames"
MAGIC = b"LLFR"
# magic, payload length, crc32 of the payload
_RECORD = struct.Struct("<4sQI")
# step, port, t_s, exposure_s, n_averaged, saturation_level, rows, cols
_META = struct.Struct("<qiddidii")
KIND_CODES = {"measure": 0, "background": 1, "reference": 2}


def frames_path_for(h5_path: str | os.PathLike[str]) -> Path:
    """The frame journal beside a run file: ``RUN.h5`` -> ``RUN.h5.frames``."""
    p = Path(h5_path)
    return p.with_name(p.name + FRAMES_SUFFIX)


@dataclass(frozen=True, eq=False)
class StoredFrame:
    """A frame as stored: its step and port, its time, exposure and averaging, data and mask."""

    step_index: int
    port: int
    t_s: float
    exposure_s: float
    n_averaged: int
    saturation_level: float
    data: np.ndarray
    saturated: np.ndarray


def encode_frame(step_index: int, port: int, frame) -> bytes:
    """One record of the frame journal (``frame`` is a drivers.camera.Frame)."""
    data = np.ascontiguousarray(frame.data, dtype="<f4")
    rows, cols = data.shape
    meta = _META.pack(int(step_index), int(port), float(frame.t_s), float(frame.exposure_s),
                      int(frame.n_averaged), float(frame.saturation_level), rows, cols)
    mask = np.packbits(np.asarray(frame.saturated, dtype=bool).ravel()).tobytes()
    payload = zlib.compress(meta + data.tobytes() + mask, 1)
    return _RECORD.pack(MAGIC, len(payload), zlib.crc32(payload)) + payload


def decode_payload(payload: bytes) -> StoredFrame:
    raw = zlib.decompress(payload)
    step, port, t_s, exposure_s, n_avg, level, rows, cols = _META.unpack_from(raw)
    start = _META.size
    n = rows * cols
    data = np.frombuffer(raw, dtype="<f4", count=n, offset=start).reshape(rows, cols)
    bits = np.frombuffer(raw, dtype=np.uint8, offset=start + 4 * n)
    mask = np.unpackbits(bits, count=n).astype(bool).reshape(rows, cols)
    return StoredFrame(step, port, t_s, exposure_s, n_avg, level, data, mask)


class FrameJournal:
    """The append-only frame journal of one run (the runner's frame sink)."""

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = Path(path)
        try:
            self._fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        except OSError as error:
            raise StorageError(f"{self.path}: cannot open the frame journal: {error.strerror}") from None
        self.bytes_written = 0

    def append(self, step_index: int, frames: Sequence[tuple[int, object]]) -> None:
        """Write the frames (port, frame) of one step; on disk when this returns."""
        record = b"".join(encode_frame(step_index, port, frame) for port, frame in frames)
        try:
            written = os.write(self._fd, record)
            if written != len(record):
                raise OSError(28, "short write")
            sync_fd(self._fd)
        except OSError as error:
            raise StorageError(
                f"{self.path}: cannot write a frame ({error.strerror}); free disk space, then "
                "`lightloom resume` the run"
            ) from None
        self.bytes_written += len(record)

    def close(self) -> None:
        if self._fd >= 0:
            os.close(self._fd)
            self._fd = -1


def scan_journal(path: str | os.PathLike[str]) -> Iterator[tuple[int, int, int, int]]:
    """(offset of payload, payload length, step, port) of every intact record, stopping at a torn
    or damaged tail (a frame that was never reported)."""
    p = Path(path)
    if not p.exists():
        return
    with open(p, "rb") as f:
        offset = 0
        while True:
            head = f.read(_RECORD.size)
            if len(head) < _RECORD.size:
                return
            magic, length, crc = _RECORD.unpack(head)
            payload = f.read(length)
            if magic != MAGIC or len(payload) < length or zlib.crc32(payload) != crc:
                return
            meta = zlib.decompressobj().decompress(payload, _META.size)
            step, port = struct.unpack_from("<qi", meta)
            yield offset + _RECORD.size, length, step, port
            offset += _RECORD.size + length


def reported_frames(path: str | os.PathLike[str], recorded_steps: set[int]) -> list[tuple[int, int]]:
    """(payload offset, length) of the frame to keep for each (step, port) with a recorded reading:
    the last one in the journal; in the order those frames were written."""
    last: dict[tuple[int, int], tuple[int, int]] = {}
    for offset, length, step, port in scan_journal(path):
        if step in recorded_steps:
            last.pop((step, port), None)  # re-insert: keep the order of the last write
            last[(step, port)] = (offset, length)
    return list(last.values())


def read_journal_frames(path: str | os.PathLike[str], recorded_steps: set[int]) -> Iterator[StoredFrame]:
    """The reported frames of a frame journal, one at a time (memory: one frame)."""
    with open(path, "rb") as f:
        for offset, length in reported_frames(path, recorded_steps):
            f.seek(offset)
            yield decode_payload(f.read(length))


def publish(h5_path: str | os.PathLike[str], readings) -> int:
    """Copy the reported frames of the frame journal into ``/frames`` of the run file; return how
    many. ``readings`` is the run's ReadingTable (settings, operators and kinds come from it)."""
    import h5py

    journal = frames_path_for(h5_path)
    if not journal.exists():
        return 0
    row_of = {int(s): i for i, s in enumerate(readings.step_index)}
    frames = read_journal_frames(journal, set(row_of))
    with h5py.File(h5_path, "r+") as f:
        if "frames" in f:
            del f["frames"]
        group = f.create_group("frames")
        n = 0
        data = mask = None
        columns: dict[str, list] = {k: [] for k in (
            "step_index", "port", "t_s", "exposure_s", "n_averaged", "saturation_level", "kind",
            "pass_index", "commanded", "operators")}
        for frame in frames:
            if data is None:
                rows, cols = frame.data.shape
                data = group.create_dataset(
                    "data", shape=(0, rows, cols), maxshape=(None, rows, cols), dtype="f4",
                    chunks=(1, rows, cols), compression="gzip", compression_opts=4, shuffle=True,
                )
                mask = group.create_dataset(
                    "saturated", shape=(0, rows, cols), maxshape=(None, rows, cols), dtype="u1",
                    chunks=(1, rows, cols), compression="gzip", compression_opts=4,
                )
                data.attrs["units"] = "ADU"
                data.attrs["description"] = "camera frames, each averaged over n_averaged raw frames"
                mask.attrs["description"] = "1 where a raw frame reached saturation_level"
            if frame.data.shape != data.shape[1:]:
                raise StorageError(
                    f"{h5_path}: frame of step {frame.step_index} is {frame.data.shape}, the others "
                    f"{data.shape[1:]}; one run keeps one region of interest and binning"
                )
            data.resize(n + 1, axis=0)
            mask.resize(n + 1, axis=0)
            data[n] = frame.data
            mask[n] = frame.saturated
            row = row_of[frame.step_index]
            columns["step_index"].append(frame.step_index)
            columns["port"].append(frame.port)
            columns["t_s"].append(frame.t_s)
            columns["exposure_s"].append(frame.exposure_s)
            columns["n_averaged"].append(frame.n_averaged)
            columns["saturation_level"].append(frame.saturation_level)
            columns["kind"].append(KIND_CODES[str(readings.kind[row])])
            columns["pass_index"].append(int(readings.pass_index[row]))
            columns["commanded"].append(readings.commanded[row])
            columns["operators"].append(readings.operators[row, frame.port])
            n += 1
        if n == 0:
            return 0
        for name, values in columns.items():
            group.create_dataset(name, data=np.asarray(values))
        group["t_s"].attrs["units"] = "s (UNIX, start of the first exposure)"
        group["exposure_s"].attrs["units"] = "s"
        group["saturation_level"].attrs["units"] = "ADU"
        group["kind"].attrs["codes"] = "0 measure, 1 background (shutter closed), 2 reference"
        group["commanded"].attrs["elements"] = list(readings.element_names)
        group["operators"].attrs["description"] = "4x4 measurement operator of the frame's port"
        group.attrs["complete"] = True
    return n


@dataclass(frozen=True, eq=False)
class FrameColumns:
    """The per-frame columns of ``/frames`` (everything but the pixels), in memory."""

    step_index: np.ndarray
    port: np.ndarray
    kind: np.ndarray
    pass_index: np.ndarray
    t_s: np.ndarray
    exposure_s: np.ndarray
    n_averaged: np.ndarray
    saturation_level: np.ndarray
    commanded: np.ndarray
    operators: np.ndarray

    def __len__(self) -> int:
        return len(self.step_index)


@dataclass(frozen=True, eq=False)
class FrameSet(FrameColumns):
    """The frames of a run: the per-frame columns of ``FrameColumns`` (step, port, kind code,
    pass, time, exposure, averaging, saturation level, commanded settings (n, n_elements), the
    4x4 operator of its port (n, 4, 4)) and, in memory, ``data`` and ``saturated`` (n, rows, cols)."""

    data: np.ndarray = field(kw_only=True)
    saturated: np.ndarray = field(kw_only=True)


_COLUMNS = ("step_index", "port", "kind", "pass_index", "t_s", "exposure_s", "n_averaged",
            "saturation_level", "commanded", "operators")


def has_published_frames(h5_path: str | os.PathLike[str]) -> bool:
    """True when the run file holds a complete ``/frames`` group."""
    import h5py

    try:
        with h5py.File(h5_path, "r") as f:
            return "frames" in f and bool(f["frames"].attrs.get("complete", False))
    except OSError:
        return False


def load_frames(h5_path: str | os.PathLike[str], readings) -> FrameSet | None:
    """Every reported frame of a run, in memory (None when the run has no frames): from the run
    file's ``/frames`` when complete, else from the frame journal and ``readings``."""
    import h5py

    if has_published_frames(h5_path):
        with h5py.File(h5_path, "r") as f:
            g = f["frames"]
            if "data" not in g:
                return None
            return FrameSet(data=g["data"][()], saturated=g["saturated"][()].astype(bool),
                            **{k: g[k][()] for k in _COLUMNS})
    journal = frames_path_for(h5_path)
    if not journal.exists():
        return None
    row_of = {int(s): i for i, s in enumerate(readings.step_index)}
    stored = list(read_journal_frames(journal, set(row_of)))
    if not stored:
        return None
    rows = [row_of[s.step_index] for s in stored]
    ports = np.array([s.port for s in stored])
    return FrameSet(
        data=np.stack([s.data for s in stored]),
        saturated=np.stack([s.saturated for s in stored]),
        step_index=np.array([s.step_index for s in stored]),
        port=ports,
        kind=np.array([KIND_CODES[str(readings.kind[r])] for r in rows]),
        pass_index=np.array([int(readings.pass_index[r]) for r in rows]),
        t_s=np.array([s.t_s for s in stored]),
        exposure_s=np.array([s.exposure_s for s in stored]),
        n_averaged=np.array([s.n_averaged for s in stored]),
        saturation_level=np.array([s.saturation_level for s in stored]),
        commanded=np.array([readings.commanded[r] for r in rows]),
        operators=np.array([readings.operators[r, p] for r, p in zip(rows, ports)]),
    )


class H5Slices:
    """A dataset of an HDF5 file as a picklable array-like: every ``[...]`` opens the file, reads
    the slice and closes it, so dask tasks can run in other processes (dask.distributed workers)
    and memory holds only the slices in flight."""

    def __init__(self, path: str | os.PathLike[str], dataset: str) -> None:
        import h5py

        self.path = str(path)
        self.dataset = dataset
        with h5py.File(self.path, "r") as f:
            d = f[dataset]
            self.shape = tuple(d.shape)
            self.dtype = d.dtype
        self.ndim = len(self.shape)

    def __getitem__(self, key):
        import h5py

        with h5py.File(self.path, "r") as f:
            return f[self.dataset][key]


def frame_columns(h5_path: str | os.PathLike[str]) -> FrameColumns:
    """The small per-frame columns of a run file's published ``/frames``."""
    import h5py

    if not has_published_frames(h5_path):
        raise StorageError(
            f"{h5_path}: no complete /frames group; the frames are published when the run closes "
            "(`lightloom resume` a killed run first)"
        )
    with h5py.File(h5_path, "r") as f:
        g = f["frames"]
        return FrameColumns(**{k: g[k][()] for k in _COLUMNS})


def frame_stack(h5_path: str | os.PathLike[str], frames_per_chunk: int | tuple[int, ...] = 8,
                dataset: str = "frames/data"):
    """The frames of a run file as a lazy dask array (n, rows, cols), read from the file only when
    computed: ``frames_per_chunk`` frames per task, or the given chunk sizes along the frames."""
    import dask.array as da

    source = H5Slices(h5_path, dataset)
    return da.from_array(source, chunks=(frames_per_chunk,) + source.shape[1:], lock=False, asarray=True)
