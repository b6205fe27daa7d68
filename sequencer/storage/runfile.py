"""The HDF5 run file: a self-describing copy of a run, created atomically and grown by appending.

Layout (format_version 1; docs/hdf5-layout.md says the same at more length). Every
dataset carries ``description`` and, where it has one, ``units`` attributes. n is the
number of readings, m of events, E of elements, P of ports, d the dimension (4).

``/`` attributes: description, format_version, tool_version, created_utc, updated_utc
(ISO 8601 UTC), status ("running" | "complete" | "interrupted" | "fault"),
status_message, steps_total, steps_done (distinct step indices read), n_readings,
n_events, protocol_name, bench_name, simulated (1 simulated bench, 0 real), analyzes,
element_names, port_names, port_units, dimension, basis_labels, setup_json (JSON: the port
layout with gains, where protocol and bench came from, target label, a single-factor target,
the reference device and the wavelength; older files hold ``extra_json`` instead, still read).
run_id, journal_bytes (the journal offset up to which the file holds every record), writing
(1 while an append is under way).

- ``/protocol``, ``/bench``: scalar UTF-8 text (the protocol YAML, the resolved bench
  YAML), attributes name, sha256 (hex of the UTF-8 text), media_type.
- ``/steps``: scalar UTF-8 JSON of the compiled step list, attributes steps_total, media_type
  (older files name it ``/plan``; both are read).
- ``/readings/``: step_index, pass_index, point_index, repeat_index, flags (n,) int64;
  kind (n,) HDF5 enum over uint8 {measure 0, background 1, reference 2};
  commanded, readback (n, E) float64 with element_names and per-element units;
  values (n, P) float64 with port_names and units (W or counts); reference_w (n,) W
  (NaN if none); operators (n, P, d, d) complex128 (compound of float64 r, i), the POVM
  element each port's reading estimates on the joint polarization (x) spatial space in
  the order of basis_labels; dwell_s (n,) s; t_start, t_end (n,) UNIX seconds.
- ``/events/``: t (m,) UNIX seconds, kind (m,) enum over uint8, message (m,) UTF-8.
- ``/target_state``: (d, d) complex128 density matrix, only if the protocol gives one.

Row datasets are chunked (4 KiB a chunk, at least 16 rows), uncompressed and resizable along their
first axis: each refresh appends the journal's new records (O(new readings)), never
rewriting what the file holds. A refresh opens the file, marks it ``writing``, extends
and fills the datasets, updates the counts and ``journal_bytes``, clears the mark and
closes; HDF5's file lock keeps readers out meanwhile (they retry), and the writer skips
a refresh while a reader holds the file. A file left marked ``writing`` (a kill during
an append) is not trusted: readers fall back to the journal and resume rebuilds it. The
default (oldest) HDF5 format version is kept, so that HDF5 1.10 readers open the file.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import os
import re
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from lightloom.sequencer.errors import StorageError

from lightloom.sequencer.storage.atomic import publish, sync_path, temp_path
from lightloom.sequencer.storage.errors import RunFileBusyError, StorageWriteError
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.model.shared_operators import SharedOperators
from lightloom.sequencer.model.records import (
    EVENT_KINDS, FLAG_NAMES, FORMAT_VERSION, READING_KINDS, RUN_STATUSES, Event, Reading,
    ReadingTable, RunData, RunHeader, element_unit, setup_from_legacy_extra,
)

_STR = h5py.string_dtype()
_READING_KIND_TYPE = h5py.enum_dtype(
    {name: code for code, name in enumerate(READING_KINDS)}, basetype="u1"
)
_EVENT_KIND_TYPE = h5py.enum_dtype(
    {name: code for code, name in enumerate(EVENT_KINDS)}, basetype="u1"
)
_OPERATOR_DESCRIPTION = (
    "POVM element that each port's reading estimates, on the joint polarization (x) spatial "
    "space, basis order {basis}; from read-back positions and calibration; "
    "expected value of values[i, p] is proportional to trace(rho @ operators[i, p])"
)


def utc_now_iso(t: float) -> str:
    """UNIX time t (s) as an ISO 8601 UTC string with seconds resolution."""
    return dt.datetime.fromtimestamp(t, dt.timezone.utc).isoformat(timespec="seconds")


def _strings(values: Sequence[str]) -> np.ndarray:
    return np.array(list(values), dtype=_STR)


_CHUNK_BYTES = 4 << 10
_LOCK_RETRY_S = 2.0


def _dataset(group: h5py.Group, key: str, data: Any, description: str, **attrs: Any) -> h5py.Dataset:
    ds = group.create_dataset(key, data=data)
    ds.attrs["description"] = description
    for key, value in attrs.items():
        ds.attrs[key] = value
    return ds


def _text(group: h5py.Group, key: str, text: str, description: str, **attrs: Any) -> None:
    ds = group.create_dataset(key, data=text, dtype=_STR)
    ds.attrs["description"] = description
    for key, value in attrs.items():
        ds.attrs[key] = value


def _column(
    group: h5py.Group, key: str, data: np.ndarray, description: str, dtype: Any = None, **attrs: Any,
) -> h5py.Dataset:
    """A chunked dataset resizable along its first axis, holding ``data`` to begin with."""
    data = np.asarray(data)
    dtype = data.dtype if dtype is None else dtype
    row_bytes = max(1, int(np.prod(data.shape[1:], dtype=np.int64)) * max(1, np.dtype(dtype).itemsize))
    rows = int(max(16, min(512, _CHUNK_BYTES // row_bytes)))
    ds = group.create_dataset(
        key, data=data, dtype=dtype, maxshape=(None, *data.shape[1:]), chunks=(rows, *data.shape[1:]),
    )
    ds.attrs["description"] = description
    for name, value in attrs.items():
        ds.attrs[name] = value
    return ds


def _extend(ds: h5py.Dataset, start: int, data: np.ndarray) -> None:
    """Write ``data`` at rows ``start``.. of ``ds``, growing it to exactly the rows written."""
    end = start + len(data)
    if ds.shape[0] != end:
        ds.resize(end, axis=0)
    if len(data):
        ds[start:end] = data


def _write_step_columns(f: h5py.File, steps_json: str) -> None:
    """The compiled steps as typed columns, for any HDF5 tool (written once, at creation)."""
    try:
        steps = StepList.from_json(steps_json)
    except (ValueError, KeyError, TypeError):
        return  # not a step list this version can read: the text in /steps is kept as it is
    c = steps.columns
    g = f.create_group("step_columns")
    g.attrs["description"] = "the compiled steps as columns: row i is step i (readings/step_index)"
    g.attrs["labels"] = _strings(c.labels)
    g.attrs["port_label_sets"] = json.dumps([list(p) for p in c.port_label_sets], ensure_ascii=False)
    kind = g.create_dataset("kind", data=c.kind, dtype=_READING_KIND_TYPE)
    kind.attrs["description"] = "measure, background (shutter closed) or reference"
    for name, description in (
        ("pass_index", "outer pass (sweep)"), ("point_index", "analyzer setting within the pass"),
        ("repeat_index", "repeat at this setting"),
        ("label", "index into the attribute labels: the setting's short name"),
        ("port_labels", "index into the attribute port_label_sets: what each port measures"),
    ):
        _dataset(g, name, getattr(c, name), description)
    _dataset(g, "settings", c.settings, "commanded element settings (NaN where unused)",
             element_names=_strings(steps.element_names))
    _dataset(g, "dwell_s", c.dwell_s, "integration time", units="s")


def _write_header(f: h5py.File, header: RunHeader) -> None:
    a = f.attrs
    a["description"] = (
        "lightloom measurement run: protocol, resolved bench, every reading with the "
        "measurement operators it estimates, and the run's events"
    )
    a["format_version"] = header.format_version
    a["tool_version"] = header.tool_version
    a["created_utc"] = header.created_utc
    a["steps_total"] = header.steps_total
    a["protocol_name"] = header.protocol_name
    a["bench_name"] = header.bench_name
    a["simulated"] = np.int8(header.simulated)
    a["analyzes"] = _strings(header.analyzes)
    a["element_names"] = _strings(header.element_names)
    a["port_names"] = _strings(header.port_names)
    a["port_units"] = header.port_units
    a["dimension"] = header.dimension
    a["basis_labels"] = _strings(header.basis_labels)
    a["setup_json"] = json.dumps(header.setup_json_dict(), sort_keys=True)
    if header.run_id:
        a["run_id"] = header.run_id
    _text(f, "protocol", header.protocol_text, "protocol YAML as given",
          name=header.protocol_name, sha256=header.protocol_sha256, media_type="application/yaml")
    _text(f, "bench", header.bench_text, "bench YAML, resolved (extends applied)",
          name=header.bench_name, sha256=header.bench_sha256, media_type="application/yaml")
    _text(f, "steps", header.steps_json, "compiled steps of the run as JSON",
          steps_total=header.steps_total, media_type="application/json")
    _write_step_columns(f, header.steps_json)
    if header.target_state is not None:
        _dataset(f, "target_state", header.target_state,
                 "target density matrix given by the protocol (for fidelity)",
                 basis_labels=_strings(header.basis_labels))


_READING_COLUMNS = (
    "step_index", "pass_index", "point_index", "repeat_index", "commanded", "readback", "values",
    "reference_w", "operators", "dwell_s", "t_start", "t_end", "flags",
)


def reading_columns(readings: ReadingTable | np.ndarray) -> dict[str, np.ndarray]:
    """The columns the run file stores, from a table or from journal rows (``kind`` as codes)."""
    if isinstance(readings, ReadingTable):
        columns = {name: getattr(readings, name) for name in _READING_COLUMNS}
        columns["kind"] = readings.kind_code
        return columns
    return {name: readings[name] for name in (*_READING_COLUMNS, "kind")}


def _write_readings(f: h5py.File, header: RunHeader, columns: dict[str, np.ndarray]) -> None:
    g = f.create_group("readings")
    g.attrs["description"] = "one row per reading, in the order the readings were taken"
    g.attrs["n_readings"] = len(columns["kind"])
    units = _strings([element_unit(name) for name in header.element_names])
    for name, description in (
        ("step_index", "index of the compiled step (see /steps) this reading belongs to"),
        ("pass_index", "index of the outer pass (sweep) of the protocol"),
        ("point_index", "index of the analyzer setting within the pass"),
        ("repeat_index", "index of the repeat at this setting"),
    ):
        _column(g, name, columns[name], description)
    kind = _column(g, "kind", columns["kind"], "measure: analyzer reading; background: shutter "
                   "closed; reference: source-drift check", dtype=_READING_KIND_TYPE)
    kind.attrs["names"] = _strings(READING_KINDS)
    _column(g, "commanded", columns["commanded"], "element settings asked for (NaN where unused)",
            element_names=_strings(header.element_names), units=units)
    _column(g, "readback", columns["readback"], "element positions read back (NaN where unused)",
            element_names=_strings(header.element_names), units=units)
    _column(g, "values", columns["values"], "detector reading of each port",
            port_names=_strings(header.port_names), units=header.port_units)
    _column(g, "reference_w", columns["reference_w"],
            "pick-off reference meter read at the same time (NaN if none)", units="W")
    _column(g, "operators", columns["operators"],
            _OPERATOR_DESCRIPTION.format(basis=", ".join(header.basis_labels)),
            basis_labels=_strings(header.basis_labels), port_names=_strings(header.port_names))
    _column(g, "dwell_s", columns["dwell_s"], "integration time of the reading", units="s")
    _column(g, "t_start", columns["t_start"], "start of the reading", units="s since UNIX epoch")
    _column(g, "t_end", columns["t_end"], "end of the reading", units="s since UNIX epoch")
    _column(g, "flags", columns["flags"], "bitmask: " + ", ".join(
        f"{bit} {name}" for bit, name in FLAG_NAMES.items()),
        bits=np.array(list(FLAG_NAMES), dtype=np.int64), bit_names=_strings(FLAG_NAMES.values()))


def _event_columns(events: Sequence[Event]) -> dict[str, np.ndarray]:
    return {
        "t": np.array([e.t for e in events], dtype=np.float64),
        "kind": np.array([EVENT_KINDS.index(e.kind) for e in events], dtype=np.uint8),
        "message": _strings([e.message for e in events]),
    }


def _write_events(f: h5py.File, events: Sequence[Event]) -> None:
    g = f.create_group("events")
    g.attrs["description"] = "what happened during the run, in order"
    g.attrs["n_events"] = len(events)
    columns = _event_columns(events)
    _column(g, "t", columns["t"], "time of the event", units="s since UNIX epoch")
    kind = _column(g, "kind", columns["kind"], "kind of event", dtype=_EVENT_KIND_TYPE)
    kind.attrs["names"] = _strings(EVENT_KINDS)
    _column(g, "message", columns["message"], "what the run reported", dtype=_STR)


def _set_state(
    f: h5py.File, status: str, status_message: str, updated_utc: str, n_readings: int,
    n_events: int, steps_done: int, journal_bytes: int | None,
) -> None:
    f.attrs["updated_utc"] = updated_utc
    f.attrs["status"] = status
    f.attrs["status_message"] = status_message
    f.attrs["steps_done"] = steps_done
    f.attrs["n_readings"] = n_readings
    f.attrs["n_events"] = n_events
    f["readings"].attrs["n_readings"] = n_readings
    f["events"].attrs["n_events"] = n_events
    if journal_bytes is not None:
        f.attrs["journal_bytes"] = np.int64(journal_bytes)


def _disk_error(h5_path: Path, exc: BaseException) -> StorageWriteError:
    return StorageWriteError(
        f"{h5_path}: cannot write the run file ({getattr(exc, 'strerror', None) or exc}); free disk "
        "space or fix the disk, then `lightloom resume` it (the journal still holds every reading)"
    )


FREE_SPACE_MARGIN_BYTES = 1 << 20
"""Space kept free on the run file's disk: below it the run stops safely (exit 3)."""


def check_free_space(h5_path: Path, needed_bytes: int) -> None:
    """Refuse an HDF5 write that the disk cannot hold, before the library tries it.

    HDF5 reacts badly to a full disk (a half-written file, even a crash on close), so
    the free space is checked first, with a margin for the library's own records.
    """
    try:
        stat = os.statvfs(h5_path.parent)
    except (OSError, AttributeError):
        return
    free = stat.f_bavail * stat.f_frsize
    if free < needed_bytes + FREE_SPACE_MARGIN_BYTES:
        raise StorageWriteError(
            f"{h5_path}: the disk is full ({free // 1024} KiB free, lightloom keeps "
            f"{FREE_SPACE_MARGIN_BYTES // 1024} KiB spare); free disk space, then `lightloom "
            "resume` the run (the journal holds every reading so far)"
        )


def write_runfile(
    h5_path: str | os.PathLike[str],
    header: RunHeader,
    readings: ReadingTable | Sequence[Reading] | np.ndarray,
    events: Sequence[Event],
    status: str,
    status_message: str = "",
    *,
    updated_utc: str | None = None,
    overwrite: bool = True,
    journal_bytes: int | None = None,
    more: Iterator[tuple[np.ndarray, Sequence[Event]]] | None = None,
) -> None:
    """Write a whole run file atomically: temporary file, sync, rename, sync directory.

    A reader opening ``h5_path`` at any moment sees the previous file or the new one,
    whole. ``readings`` is a table, Reading records, or journal rows; ``more`` yields
    further (rows, events) pieces appended before the file is published (a rebuild from
    the journal a chunk at a time). ``journal_bytes`` says how much of the journal the
    file holds. ``updated_utc`` defaults to the current time; ``overwrite=False`` raises
    FileExistsError rather than replace an existing file.
    """
    if status not in RUN_STATUSES:
        raise ValueError(f"run status {status!r}; expected one of {RUN_STATUSES}")
    if not isinstance(readings, (ReadingTable, np.ndarray)):
        readings = ReadingTable.from_readings(
            list(readings), header.element_names, header.port_names, header.dimension
        )
    h5_path = Path(h5_path)
    if updated_utc is None:
        updated_utc = utc_now_iso(time.time())
    columns = reading_columns(readings)
    check_free_space(h5_path, _bytes_of(columns) + len(header.steps_json) + len(header.protocol_text)
                     + len(header.bench_text))
    tmp = temp_path(h5_path)
    try:
        with h5py.File(tmp, "w") as f:
            _write_header(f, header)
            _write_readings(f, header, columns)
            _write_events(f, events)
            done = _StepsSeen(header.steps_total)
            done.add(columns["step_index"])
            n, m = len(columns["kind"]), len(events)
            for rows, extra_events in more or ():
                _append_columns(f, n, m, reading_columns(rows), extra_events)
                done.add(rows["step_index"])
                n, m = n + len(rows), m + len(extra_events)
            f.attrs["writing"] = np.int8(0)
            _set_state(f, status, status_message, updated_utc, n, m, done.count, journal_bytes)
        sync_path(tmp)
        publish(tmp, h5_path, overwrite=overwrite)
    except FileExistsError:
        tmp.unlink(missing_ok=True)
        raise
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise _disk_error(h5_path, exc) from exc
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _bytes_of(columns: dict[str, np.ndarray]) -> int:
    return int(sum(np.asarray(c).nbytes for c in columns.values()))


class _StepsSeen:
    """Which step indices have a reading: a bitmap over the plan, so O(steps), not O(readings)."""

    def __init__(self, steps_total: int) -> None:
        self.seen = np.zeros(max(0, steps_total), dtype=bool)
        self.count = 0

    def add(self, step_index: np.ndarray) -> None:
        index = np.asarray(step_index, dtype=np.int64)
        index = index[(index >= 0) & (index < len(self.seen))]
        if index.size:
            new = np.unique(index[~self.seen[index]]) if index.size > 1 else index[~self.seen[index]]
            self.seen[new] = True
            self.count += int(new.size)


def _append_columns(
    f: h5py.File, n: int, m: int, columns: dict[str, np.ndarray], events: Sequence[Event],
) -> None:
    g = f["readings"]
    for name, data in columns.items():
        _extend(g[name], n, data)
    if events:
        e = f["events"]
        for name, data in _event_columns(events).items():
            _extend(e[name], m, data)


def _open_locked(h5_path: Path, mode: str, wait_s: float) -> h5py.File:
    """Open with HDF5's file lock, retrying for ``wait_s`` while another process holds it.

    Readers get a small chunk cache per dataset: the columns are read once, front to back, in
    slices of whole chunks, so a cache only holds memory (1 MB a dataset by default).
    """
    deadline = time.monotonic() + wait_s
    cache = {"rdcc_nbytes": _READ_CHUNK_CACHE_BYTES} if mode == "r" else {}
    while True:
        try:
            return h5py.File(h5_path, mode, **cache)
        except OSError as exc:
            if "lock" not in str(exc) or time.monotonic() >= deadline:
                raise
            time.sleep(0.02)


def append_runfile(
    h5_path: str | os.PathLike[str],
    rows: np.ndarray,
    events: Sequence[Event],
    status: str,
    status_message: str,
    *,
    updated_utc: str,
    steps_done: int,
    journal_bytes: int,
) -> None:
    """Append journal rows and events to a run file in place and update its state.

    Costs O(new rows). Raises RunFileBusyError when a reader holds the file (the caller
    tries again at its next refresh), StorageWriteError when the disk refuses.
    """
    h5_path = Path(h5_path)
    if status not in RUN_STATUSES:
        raise ValueError(f"run status {status!r}; expected one of {RUN_STATUSES}")
    columns = reading_columns(rows)
    check_free_space(h5_path, 2 * _bytes_of(columns) + 64 * len(events))
    try:
        f = _open_locked(h5_path, "r+", 0.0)
    except OSError as exc:
        if "lock" in str(exc):
            raise RunFileBusyError(f"{h5_path}: a reader holds the run file; refresh later") from exc
        raise _disk_error(h5_path, exc) from exc
    try:
        with f:
            n, m = int(f.attrs["n_readings"]), int(f.attrs["n_events"])
            f.attrs["writing"] = np.int8(1)
            f.flush()
            _append_columns(f, n, m, columns, events)
            _set_state(f, status, status_message, updated_utc, n + len(rows), m + len(events),
                       steps_done, journal_bytes)
            f.attrs["writing"] = np.int8(0)
    except OSError as exc:
        raise _disk_error(h5_path, exc) from exc


def _str_list(value: Any) -> tuple[str, ...]:
    return tuple(v.decode("utf-8") if isinstance(v, bytes) else str(v) for v in value)


def _str(value: Any) -> str:
    return value.decode("utf-8") if isinstance(value, bytes) else str(value)


def _names_of(ds: h5py.Dataset, fallback: Sequence[str]) -> np.ndarray:
    mapping = h5py.check_enum_dtype(ds.dtype)
    names = list(fallback)
    if mapping:
        names = [""] * (max(mapping.values()) + 1)
        for name, code in mapping.items():
            names[code] = name
    return np.asarray(names, dtype="<U16")


class _Malformed(Exception):
    """A run file attribute or dataset outside what lightloom writes."""


def _whole(a: Any, name: str, low: int, high: int | None = None) -> int:
    value = a[name]
    if not isinstance(value, (int, np.integer)) or isinstance(value, (bool, np.bool_)):
        raise _Malformed(f"attribute {name} is {_shown(value)}; expected a whole number")
    value = int(value)
    if value < low or (high is not None and value > high):
        span = f"from {low} to {high}" if high is not None else f"of at least {low}"
        raise _Malformed(f"attribute {name} is {value}; expected a whole number {span}")
    return value


def _shown(value: Any) -> str:
    text = repr(value.tolist() if isinstance(value, np.ndarray) else value)
    return text if len(text) <= 60 else text[:57] + "..."


def _read_header(f: h5py.File) -> RunHeader:
    a = f.attrs
    version = _whole(a, "format_version", 1)
    if version > FORMAT_VERSION:
        raise _Newer(version)
    status = _str(a["status"])
    if status not in RUN_STATUSES:
        raise _Malformed(f"attribute status is {_shown(status)}; expected one of {', '.join(RUN_STATUSES)}")
    target = f["target_state"][()] if "target_state" in f else None
    key = "steps" if "steps" in f else "plan"
    steps = f[key]
    if not isinstance(steps, h5py.Dataset) or steps.shape != () or h5py.check_string_dtype(steps.dtype) is None:
        raise _Malformed(f"/{key} is not a text; expected the compiled steps as JSON")
    steps_json = steps.asstr()[()]
    try:
        n_steps = len(StepList.from_json(steps_json))
    except (ValueError, KeyError, TypeError, AttributeError) as exc:
        raise _Malformed(
            f"/{key} holds {_shown(steps_json)}, not a step list lightloom wrote ({_shown(str(exc))})"
        ) from None
    if n_steps != _whole(a, "steps_total", 0):
        raise _Malformed(f"/{key} holds {n_steps} steps but steps_total is {int(a['steps_total'])}")
    port_names = _str_list(a["port_names"])
    try:
        if "setup_json" in a:
            setup = RunHeader.setup_from_json_dict(json.loads(_str(a["setup_json"])))
        else:
            setup = setup_from_legacy_extra(json.loads(_str(a["extra_json"])), port_names)
    except (json.JSONDecodeError, KeyError, TypeError, ValueError, AttributeError) as exc:
        raise _Malformed(f"the run's set-up attribute is not what lightloom writes ({exc})") from None
    try:
        return RunHeader(
            format_version=version,
            tool_version=_str(a["tool_version"]),
            created_utc=_str(a["created_utc"]),
            protocol_name=_str(a["protocol_name"]),
            protocol_text=f["protocol"].asstr()[()],
            protocol_sha256=_str(f["protocol"].attrs["sha256"]),
            bench_name=_str(a["bench_name"]),
            bench_text=f["bench"].asstr()[()],
            bench_sha256=_str(f["bench"].attrs["sha256"]),
            simulated=bool(a["simulated"]),
            analyzes=_str_list(a["analyzes"]),
            element_names=_str_list(a["element_names"]),
            port_names=port_names,
            port_units=_str(a["port_units"]),
            dimension=_whole(a, "dimension", 1, 64),
            basis_labels=_str_list(a["basis_labels"]),
            steps_total=_whole(a, "steps_total", 0),
            steps_json=steps_json,
            target_state=target,
            **setup,
            **({"run_id": _str(a["run_id"])} if "run_id" in a else {}),
        )
    except (TypeError, ValueError) as exc:
        raise _Malformed(str(exc)) from None


class _Newer(Exception):
    """A run file written by a newer lightloom."""


def _counts(f: h5py.File) -> tuple[int, int]:
    n = _whole(f.attrs, "n_readings", 0)
    m = _whole(f.attrs, "n_events", 0)
    g, e = f["readings"], f["events"]
    short = [name for name in (*_READING_COLUMNS, "kind") if g[name].shape[:1] < (n,)]
    short += [f"events/{name}" for name in ("t", "kind", "message") if e[name].shape[:1] < (m,)]
    if short:
        raise _Malformed(f"n_readings {n} / n_events {m} but {', '.join(short)} hold fewer rows")
    return n, m


# Rows read at once: the columns into arrays made beforehand, the operators (1 kB a reading for
# a 4x4 joint protocol) into a 1 MB slice. Whole-column reads cost HDF5 temporaries of the
# column's size, and large slices leave the allocator holding tens of MB once freed.
_COLUMN_SLICE = 16384
_OPERATOR_SLICE = 1024
_READ_CHUNK_CACHE_BYTES = 64 * 1024


def _column_of(ds: h5py.Dataset, n: int) -> np.ndarray:
    """The first ``n`` rows of a dataset, read a slice at a time into one array."""
    out = np.empty((n, *ds.shape[1:]), dtype=ds.dtype)
    for i in range(0, n, _COLUMN_SLICE):
        j = min(i + _COLUMN_SLICE, n)
        ds.read_direct(out, np.s_[i:j], np.s_[i:j])
    return out


def _read_table(f: h5py.File, header: RunHeader, n: int) -> ReadingTable:
    g = f["readings"]
    kind = g["kind"]
    names = _names_of(kind, READING_KINDS)
    columns: dict[str, Any] = {name: _column_of(g[name], n) for name in _READING_COLUMNS if name != "operators"}
    for name in ("step_index", "pass_index", "point_index", "repeat_index", "flags"):
        columns[name] = columns[name].astype(np.int64, copy=False)
    # The operators column is read in slices and kept once per distinct block: as a plain array it
    # is most of the file's size (1 kB a reading for a 4x4 joint protocol) and mostly repeats.
    ops = g["operators"]
    columns["operators"] = SharedOperators.from_chunks(
        ops[i:min(i + _OPERATOR_SLICE, n)] for i in range(0, max(n, 1), _OPERATOR_SLICE)
    )
    steps = columns["step_index"]
    if steps.size and (steps.min() < 0 or steps.max() >= max(header.steps_total, 1)):
        bad = int(steps.min()) if steps.min() < 0 else int(steps.max())
        raise _Malformed(
            f"readings/step_index holds {bad}; expected step indices from 0 to "
            f"{header.steps_total - 1} (steps_total {header.steps_total})"
        )
    codes = _column_of(kind, n)
    if codes.size and int(codes.max()) >= len(names):
        raise _Malformed(f"readings/kind holds code {int(codes.max())}; expected 0 to {len(names) - 1}")
    try:
        return ReadingTable(
            header.element_names, header.port_names,
            kind=names.astype("<U10")[codes], **columns,
        )
    except ValueError as exc:
        raise _Malformed(str(exc)) from None


def _read_events(f: h5py.File, m: int) -> tuple[Event, ...]:
    g = f["events"]
    names = _names_of(g["kind"], EVENT_KINDS)
    t, codes, messages = g["t"][:m], g["kind"][:m], g["message"].asstr()[:m]
    try:
        return tuple(Event(float(t[i]), str(names[codes[i]]), str(messages[i])) for i in range(len(t)))
    except (ValueError, IndexError) as exc:
        raise _Malformed(f"events: {exc}") from None


def _missing_name(exc: KeyError) -> str:
    """The attribute, group or dataset an h5py KeyError names ('format_version'), else its text."""
    text = str(exc.args[0]) if exc.args else str(exc)
    quoted = re.findall(r"'([^']+)'", text.replace("can't", "cannot"))
    return repr(quoted[-1]) if quoted else text


@contextmanager
def _open_run(h5_path: Path, wait_s: float = _LOCK_RETRY_S) -> Iterator[h5py.File]:
    """Open a run file for reading, turning every way it can be unusable into StorageError.

    While the runner appends (for a few milliseconds every few seconds) HDF5's file lock
    keeps readers out: the open is retried for up to ``wait_s``.
    """
    if not h5_path.exists():
        raise StorageError(f"{h5_path}: no such run file")
    try:
        with _open_locked(h5_path, "r", wait_s) as f:
            if int(np.asarray(f.attrs.get("writing", 0)).ravel()[:1].sum()):
                raise StorageError(
                    f"{h5_path}: the run file was left half-appended (the writer stopped during "
                    f"a refresh); `lightloom resume` rebuilds it from its journal "
                    f"{h5_path.name}.journal, and analyze reads the journal"
                )
            yield f
    except StorageError:
        raise
    except _Newer as exc:
        raise StorageError(
            f"{h5_path}: written by a newer lightloom (file format {exc.args[0]}); upgrade "
            "lightloom to read it"
        ) from None
    except _Malformed as exc:
        raise StorageError(
            f"{h5_path}: not a valid lightloom run file: {exc}; it was altered or damaged"
        ) from None
    except KeyError as exc:
        raise StorageError(
            f"{h5_path}: not a lightloom run file: it has no {_missing_name(exc)} (an HDF5 file from "
            "another program?); analyze reads the files `lightloom run` writes"
        ) from exc
    except (OSError, ValueError, TypeError, IndexError) as exc:
        raise StorageError(
            f"{h5_path}: not a readable HDF5 file ({exc}); if its journal "
            f"{h5_path.name}.journal is beside it, `lightloom resume` or analyze rebuilds it"
        ) from exc


@dataclass(frozen=True)
class RunFileState:
    """What a run file holds, read without its readings: header, counts, journal offset."""

    header: RunHeader
    n_readings: int
    n_events: int
    status: str
    journal_bytes: int | None


def read_runfile_state(h5_path: str | os.PathLike[str]) -> RunFileState:
    """The header, counts, status and journal offset of a run file (cheap: no readings read)."""
    with _open_run(Path(h5_path)) as f:
        try:
            header = _read_header(f)
            n, m = _counts(f)
            jb = _whole(f.attrs, "journal_bytes", 0) if "journal_bytes" in f.attrs else None
        except (_Malformed, _Newer):
            raise
        return RunFileState(header, n, m, _str(f.attrs["status"]), jb)


def read_runfile_header(h5_path: str | os.PathLike[str]) -> tuple[RunHeader, int]:
    """The header of a run file and its number of readings, without reading the readings."""
    state = read_runfile_state(h5_path)
    return state.header, state.n_readings


def read_runfile_with_offset(h5_path: str | os.PathLike[str]) -> tuple[RunData, int | None]:
    """A whole run file and its ``journal_bytes`` (None in files older than that attribute)."""
    with _open_run(Path(h5_path)) as f:
        header = _read_header(f)
        n, m = _counts(f)
        jb = _whole(f.attrs, "journal_bytes", 0) if "journal_bytes" in f.attrs else None
        return RunData(
            header=header,
            readings=_read_table(f, header, n),
            events=_read_events(f, m),
            status=_str(f.attrs["status"]),
            message=_str(f.attrs["status_message"]),
            source="runfile",
        ), jb


def read_runfile(h5_path: str | os.PathLike[str]) -> RunData:
    """Read a whole run file; raises StorageError if it is missing, unreadable or not a run."""
    return read_runfile_with_offset(h5_path)[0]
