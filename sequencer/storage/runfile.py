"""The HDF5 run file: a self-describing copy of a run, rewritten whole and replaced atomically.

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

Datasets are contiguous and uncompressed: the file is never extended in place (each
refresh writes a new file), so chunking would only add an index, and compression would
cost more time than the rebuild budget allows. The default (oldest) HDF5 format version
is kept, so that HDF5 1.10 readers can open the file.
"""

from __future__ import annotations

import datetime as dt
import json
import os
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from lightloom.sequencer.errors import StorageError

from lightloom.sequencer.storage.atomic import publish, sync_path, temp_path
from lightloom.sequencer.storage.errors import StorageWriteError
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


def _dataset(group: h5py.Group, key: str, data: Any, description: str, **attrs: Any) -> None:
    ds = group.create_dataset(key, data=data)
    ds.attrs["description"] = description
    for key, value in attrs.items():
        ds.attrs[key] = value


def _text(group: h5py.Group, key: str, text: str, description: str, **attrs: Any) -> None:
    ds = group.create_dataset(key, data=text, dtype=_STR)
    ds.attrs["description"] = description
    for key, value in attrs.items():
        ds.attrs[key] = value


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
    _text(f, "protocol", header.protocol_text, "protocol YAML as given",
          name=header.protocol_name, sha256=header.protocol_sha256, media_type="application/yaml")
    _text(f, "bench", header.bench_text, "bench YAML, resolved (extends applied)",
          name=header.bench_name, sha256=header.bench_sha256, media_type="application/yaml")
    _text(f, "steps", header.steps_json, "compiled steps of the run as JSON",
          steps_total=header.steps_total, media_type="application/json")
    if header.target_state is not None:
        _dataset(f, "target_state", header.target_state,
                 "target density matrix given by the protocol (for fidelity)",
                 basis_labels=_strings(header.basis_labels))


def _write_readings(f: h5py.File, header: RunHeader, table: ReadingTable) -> None:
    g = f.create_group("readings")
    g.attrs["description"] = "one row per reading, in the order the readings were taken"
    g.attrs["n_readings"] = len(table)
    units = _strings([element_unit(name) for name in header.element_names])
    for name, description in (
        ("step_index", "index of the compiled step (see /steps) this reading belongs to"),
        ("pass_index", "index of the outer pass (sweep) of the protocol"),
        ("point_index", "index of the analyzer setting within the pass"),
        ("repeat_index", "index of the repeat at this setting"),
    ):
        _dataset(g, name, getattr(table, name), description)
    kind = g.create_dataset("kind", data=table.kind_code, dtype=_READING_KIND_TYPE)
    kind.attrs["description"] = "measure: analyzer reading; background: shutter closed; " \
        "reference: source-drift check"
    kind.attrs["names"] = _strings(READING_KINDS)
    _dataset(g, "commanded", table.commanded, "element settings asked for (NaN where unused)",
             element_names=_strings(header.element_names), units=units)
    _dataset(g, "readback", table.readback, "element positions read back (NaN where unused)",
             element_names=_strings(header.element_names), units=units)
    _dataset(g, "values", table.values, "detector reading of each port",
             port_names=_strings(header.port_names), units=header.port_units)
    _dataset(g, "reference_w", table.reference_w,
             "pick-off reference meter read at the same time (NaN if none)", units="W")
    _dataset(g, "operators", table.operators,
             _OPERATOR_DESCRIPTION.format(basis=", ".join(header.basis_labels)),
             basis_labels=_strings(header.basis_labels),
             port_names=_strings(header.port_names))
    _dataset(g, "dwell_s", table.dwell_s, "integration time of the reading", units="s")
    _dataset(g, "t_start", table.t_start, "start of the reading", units="s since UNIX epoch")
    _dataset(g, "t_end", table.t_end, "end of the reading", units="s since UNIX epoch")
    _dataset(g, "flags", table.flags, "bitmask: " + ", ".join(
        f"{bit} {name}" for bit, name in FLAG_NAMES.items()),
        bits=np.array(list(FLAG_NAMES), dtype=np.int64), bit_names=_strings(FLAG_NAMES.values()))


def _write_events(f: h5py.File, events: Sequence[Event]) -> None:
    g = f.create_group("events")
    g.attrs["description"] = "what happened during the run, in order"
    g.attrs["n_events"] = len(events)
    _dataset(g, "t", np.array([e.t for e in events], dtype=np.float64), "time of the event",
             units="s since UNIX epoch")
    codes = np.array([EVENT_KINDS.index(e.kind) for e in events], dtype=np.uint8)
    kind = g.create_dataset("kind", data=codes, dtype=_EVENT_KIND_TYPE)
    kind.attrs["description"] = "kind of event"
    kind.attrs["names"] = _strings(EVENT_KINDS)
    _dataset(g, "message", _strings([e.message for e in events]), "what the run reported")


def write_runfile(
    h5_path: str | os.PathLike[str],
    header: RunHeader,
    readings: ReadingTable | Sequence[Reading],
    events: Sequence[Event],
    status: str,
    status_message: str = "",
    *,
    updated_utc: str | None = None,
    overwrite: bool = True,
) -> None:
    """Write the whole run file atomically: temporary file, sync, rename, sync directory.

    A reader opening ``h5_path`` at any moment sees the previous file or the new one,
    whole. ``updated_utc`` defaults to the current time; ``overwrite=False`` raises
    FileExistsError rather than replace an existing file.
    """
    if status not in RUN_STATUSES:
        raise ValueError(f"run status {status!r}; expected one of {RUN_STATUSES}")
    if not isinstance(readings, ReadingTable):
        readings = ReadingTable.from_readings(
            list(readings), header.element_names, header.port_names, header.dimension
        )
    h5_path = Path(h5_path)
    if updated_utc is None:
        updated_utc = utc_now_iso(dt.datetime.now(dt.timezone.utc).timestamp())
    tmp = temp_path(h5_path)
    try:
        with h5py.File(tmp, "w") as f:
            _write_header(f, header)
            f.attrs["updated_utc"] = updated_utc
            f.attrs["status"] = status
            f.attrs["status_message"] = status_message
            f.attrs["steps_done"] = readings.steps_done
            f.attrs["n_readings"] = len(readings)
            f.attrs["n_events"] = len(events)
            _write_readings(f, header, readings)
            _write_events(f, events)
        sync_path(tmp)
        publish(tmp, h5_path, overwrite=overwrite)
    except FileExistsError:
        tmp.unlink(missing_ok=True)
        raise
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise StorageWriteError(
            f"{h5_path}: cannot write the run file: {exc}; free disk space or fix the disk "
            "(the journal still holds every reading)"
        ) from exc
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


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


def _read_header(f: h5py.File) -> RunHeader:
    a = f.attrs
    target = f["target_state"][()] if "target_state" in f else None
    port_names = _str_list(a["port_names"])
    if "setup_json" in a:
        setup = RunHeader.setup_from_json_dict(json.loads(_str(a["setup_json"])))
    else:
        setup = setup_from_legacy_extra(json.loads(_str(a["extra_json"])), port_names)
    return RunHeader(
        format_version=int(a["format_version"]),
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
        dimension=int(a["dimension"]),
        basis_labels=_str_list(a["basis_labels"]),
        steps_total=int(a["steps_total"]),
        steps_json=f["steps" if "steps" in f else "plan"].asstr()[()],
        target_state=target,
        **setup,
    )


def _read_table(f: h5py.File, header: RunHeader) -> ReadingTable:
    g = f["readings"]
    kind = g["kind"]
    names = _names_of(kind, READING_KINDS)
    columns = {
        name: g[name][()]
        for name in ("step_index", "pass_index", "point_index", "repeat_index", "commanded",
                     "readback", "values", "reference_w", "operators", "dwell_s", "t_start",
                     "t_end", "flags")
    }
    for name in ("step_index", "pass_index", "point_index", "repeat_index", "flags"):
        columns[name] = columns[name].astype(np.int64, copy=False)
    columns["operators"] = columns["operators"].astype(np.complex128, copy=False)
    return ReadingTable(
        header.element_names, header.port_names,
        kind=names[kind[()]].astype("<U10"), **columns,
    )


def _read_events(f: h5py.File) -> tuple[Event, ...]:
    g = f["events"]
    names = _names_of(g["kind"], EVENT_KINDS)
    t, codes, messages = g["t"][()], g["kind"][()], g["message"].asstr()[()]
    return tuple(Event(float(t[i]), str(names[codes[i]]), str(messages[i])) for i in range(len(t)))


@contextmanager
def _open_run(h5_path: Path) -> Iterator[h5py.File]:
    """Open a run file for reading, turning every way it can be unusable into StorageError."""
    if not h5_path.exists():
        raise StorageError(f"{h5_path}: no such run file")
    try:
        with h5py.File(h5_path, "r") as f:
            version = int(f.attrs["format_version"])
            if version > FORMAT_VERSION:
                raise StorageError(
                    f"{h5_path}: written by a newer lightloom (file format {version}); upgrade "
                    "lightloom to read it"
                )
            yield f
    except StorageError:
        raise
    except KeyError as exc:
        raise StorageError(
            f"{h5_path}: not a lightloom run file (missing {exc.args[0] if exc.args else exc})"
        ) from exc
    except (OSError, ValueError) as exc:
        raise StorageError(
            f"{h5_path}: not a readable HDF5 file ({exc}); if its journal "
            f"{h5_path.name}.journal is beside it, `lightloom resume` or analyze rebuilds it"
        ) from exc


def read_runfile_header(h5_path: str | os.PathLike[str]) -> tuple[RunHeader, int]:
    """The header of a run file and its number of readings, without reading the readings."""
    with _open_run(Path(h5_path)) as f:
        return _read_header(f), int(f.attrs["n_readings"])


def read_runfile(h5_path: str | os.PathLike[str]) -> RunData:
    """Read a whole run file; raises StorageError if it is missing, unreadable or not a run."""
    with _open_run(Path(h5_path)) as f:
        header = _read_header(f)
        return RunData(
            header=header,
            readings=_read_table(f, header),
            events=_read_events(f),
            status=_str(f.attrs["status"]),
            message=_str(f.attrs["status_message"]),
            source="runfile",
        )
