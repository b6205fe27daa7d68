"""Plain-data records of a run: its header, each reading, each event, and readings as columns."""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass, fields
from typing import Any

import numpy as np

from lightloom.sequencer.model.shared_operators import SharedOperators

from lightloom.sequencer.model.vocabulary import (
    ANALYZERS, EVENT_KINDS, PORT_UNITS, READING_KINDS, RUN_STATUSES, SORTER_PORTS, SPLITTER_PORTS,
)

FORMAT_VERSION = 1


FLAG_DRIFT = 1
"""Reading bit: the reference reading around it showed source drift beyond the protocol's limit."""
FLAG_RETRIED = 2
"""Reading bit: a transient instrument fault was retried before this reading succeeded."""
FLAG_AFTER_BEAM_WAIT = 4
"""Reading bit: taken right after the run paused for a lost beam and the beam came back."""
FLAG_NAMES: dict[int, str] = {
    FLAG_DRIFT: "drift flagged",
    FLAG_RETRIED: "retried",
    FLAG_AFTER_BEAM_WAIT: "after beam wait",
}

ELEMENT_UNITS: dict[str, str] = {
    "quarter_wave_plate": "deg",
    "half_wave_plate": "deg",
    "mode_converter": "state (1.0 = in the beam, 0.0 = out)",
    "converter_angle": "deg",
    "image_rotator": "deg",
}


def element_unit(name: str) -> str:
    """The unit written beside an element's settings ("deg", or the converter's state code)."""
    return ELEMENT_UNITS.get(name, "unspecified")


def _frozen_array(value: Any, dtype: type, ndim: int, what: str) -> np.ndarray:
    array = np.array(value, dtype=dtype, copy=True)
    if array.ndim != ndim:
        raise ValueError(f"{what} must have {ndim} dimension(s), got shape {array.shape}")
    array.setflags(write=False)
    return array


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, SharedOperators) or isinstance(b, SharedOperators):
        a = None if a is None else np.asarray(a)
        b = None if b is None else np.asarray(b)
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        if a is None or b is None:
            return False
        a, b = np.asarray(a), np.asarray(b)
        nan_aware = a.dtype.kind in "fc"
        return (a.shape == b.shape and a.dtype == b.dtype
                and bool(np.array_equal(a, b, equal_nan=nan_aware)))
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return bool(a == b)


def _fields_equal(left: Any, right: Any) -> bool:
    if type(left) is not type(right):
        return NotImplemented
    return all(_same(getattr(left, f.name), getattr(right, f.name)) for f in fields(left))


@dataclass(frozen=True)
class PortLayout:
    """One detector port: the projector it nominally measures, the outputs it sits behind, its gain.

    ``label`` names the projector of the first setting (e.g. "H,h"); ``sorter_port`` (h | v) and
    ``splitter_port`` (H | V) are None where the bench has no sorter or splitter in front of it;
    ``gain`` is the calibrated relative port gain (1 = nominal).
    """

    label: str
    sorter_port: str | None
    splitter_port: str | None
    gain: float = 1.0

    def __post_init__(self) -> None:
        if self.sorter_port not in (None, *SORTER_PORTS):
            raise ValueError(f"sorter_port is {self.sorter_port!r}; expected one of {SORTER_PORTS} or None")
        if self.splitter_port not in (None, *SPLITTER_PORTS):
            raise ValueError(f"splitter_port is {self.splitter_port!r}; expected one of {SPLITTER_PORTS} or None")
        object.__setattr__(self, "gain", float(self.gain))


@dataclass(frozen=True)
class RunSources:
    """Where the protocol and the bench of a run came from.

    ``*_spec`` as given on the command line (a built-in name or a path), ``*_path`` the file read,
    made absolute when it was a file (so resume and calibrate work from any folder).
    """

    protocol_spec: str
    protocol_path: str
    bench_spec: str
    bench_path: str


@dataclass(frozen=True, eq=False)
class RunHeader:
    """What a run is: written once when the run starts, checked again when it resumes.

    ``dimension`` is the joint polarization (x) spatial dimension (4) on which the
    measurement operators of every reading act, in the order of ``basis_labels``.
    ``ports`` describes each of ``port_names``; ``target_state`` is the protocol's joint
    d x d target, ``factor_target_state`` its 2 x 2 target when it analyses one factor only,
    ``target_label`` how the protocol named it. ``reference_device`` names the pick-off meter
    (None without one), ``wavelength_nm`` is the bench's wavelength.
    ``run_id`` identifies the run (a random UUID, shared by its journal and run file;
    empty in files written before it existed).
    """

    format_version: int
    tool_version: str
    created_utc: str
    protocol_name: str
    protocol_text: str
    protocol_sha256: str
    bench_name: str
    bench_text: str
    bench_sha256: str
    simulated: bool
    analyzes: tuple[str, ...]
    element_names: tuple[str, ...]
    port_names: tuple[str, ...]
    port_units: str
    dimension: int
    basis_labels: tuple[str, ...]
    steps_total: int
    steps_json: str
    ports: tuple[PortLayout, ...]
    sources: RunSources
    target_state: np.ndarray | None = None
    factor_target_state: np.ndarray | None = None
    target_label: str | None = None
    reference_device: str | None = None
    wavelength_nm: float | None = None
    run_id: str = ""

    def __post_init__(self) -> None:
        for name in ("analyzes", "element_names", "port_names", "basis_labels"):
            object.__setattr__(self, name, tuple(str(v) for v in getattr(self, name)))
        object.__setattr__(self, "ports", tuple(self.ports))
        object.__setattr__(self, "simulated", bool(self.simulated))
        for name in ("format_version", "dimension", "steps_total"):
            object.__setattr__(self, name, int(getattr(self, name)))
        unknown = set(self.analyzes) - set(ANALYZERS)
        if unknown:
            raise ValueError(f"analyzes holds {sorted(unknown)}; expected some of {ANALYZERS}")
        if self.port_units not in PORT_UNITS:
            raise ValueError(f"port_units is {self.port_units!r}; expected one of {PORT_UNITS}")
        if not self.port_names:
            raise ValueError("port_names is empty; a run needs at least one detector port")
        if len(self.ports) != len(self.port_names) or not all(isinstance(p, PortLayout) for p in self.ports):
            raise ValueError(
                f"ports holds {len(self.ports)} port layouts for {len(self.port_names)} port names; "
                "expected one PortLayout per port"
            )
        if not isinstance(self.sources, RunSources):
            raise ValueError(f"sources is {type(self.sources).__name__}; expected RunSources")
        if len(self.basis_labels) != self.dimension:
            raise ValueError(
                f"basis_labels has {len(self.basis_labels)} labels for dimension {self.dimension}"
            )
        for name, size in (("target_state", self.dimension), ("factor_target_state", 2)):
            value = getattr(self, name)
            if value is None:
                continue
            target = _frozen_array(value, np.complex128, 2, name)
            if target.shape != (size, size):
                raise ValueError(f"{name} has shape {target.shape}; expected ({size}, {size})")
            object.__setattr__(self, name, target)
        if self.wavelength_nm is not None:
            object.__setattr__(self, "wavelength_nm", float(self.wavelength_nm))

    __eq__ = _fields_equal

    @property
    def port_gains(self) -> np.ndarray:
        """The calibrated gain of every port, in port order."""
        return np.array([p.gain for p in self.ports], dtype=float)

    def setup_json_dict(self) -> dict[str, Any]:
        """The run set-up beyond the file's fixed attributes, as JSON-able plain data."""
        return {
            "ports": [asdict(p) for p in self.ports],
            "sources": asdict(self.sources),
            "target_label": self.target_label,
            "factor_target_state": _complex_json(self.factor_target_state),
            "reference_device": self.reference_device,
            "wavelength_nm": self.wavelength_nm,
        }

    @staticmethod
    def setup_from_json_dict(data: dict[str, Any]) -> dict[str, Any]:
        """Inverse of :meth:`setup_json_dict`: the typed fields, as keyword arguments."""
        return {
            "ports": tuple(PortLayout(**p) for p in data["ports"]),
            "sources": RunSources(**data["sources"]),
            "target_label": data.get("target_label"),
            "factor_target_state": _complex_array(data.get("factor_target_state")),
            "reference_device": data.get("reference_device"),
            "wavelength_nm": data.get("wavelength_nm"),
        }

    def to_json_dict(self) -> dict[str, Any]:
        """The header as JSON-able plain data (complex targets as ``{"real", "imag"}`` lists)."""
        out: dict[str, Any] = {f.name: getattr(self, f.name) for f in fields(self) if f.name not in _SETUP_FIELDS}
        for name in ("analyzes", "element_names", "port_names", "basis_labels"):
            out[name] = list(out[name])
        out["target_state"] = _complex_json(self.target_state)
        if out["target_state"] is None:
            del out["target_state"]
        out["setup"] = self.setup_json_dict()
        return out

    @classmethod
    def from_json_dict(cls, data: dict[str, Any]) -> RunHeader:
        """Inverse of :meth:`to_json_dict`, also for headers written before the set-up was typed
        (an ``extra`` dict, a ``plan_json`` step list); raises KeyError or ValueError on a bad dict."""
        data = dict(data)
        if "steps_json" not in data and "plan_json" in data:
            data["steps_json"] = data.pop("plan_json")
        values = {f.name: data[f.name] for f in fields(cls) if f.name in data and f.name not in _SETUP_FIELDS}
        values["target_state"] = _complex_array(values.get("target_state"))
        if "setup" in data:
            values.update(cls.setup_from_json_dict(data["setup"]))
        else:
            values.update(setup_from_legacy_extra(data["extra"], values["port_names"]))
        return cls(**values)


_SETUP_FIELDS = frozenset(
    {"ports", "sources", "factor_target_state", "target_label", "reference_device", "wavelength_nm"}
)


def _complex_json(value: np.ndarray | None) -> dict[str, Any] | None:
    return None if value is None else {"real": value.real.tolist(), "imag": value.imag.tolist()}


def _complex_array(value: Any) -> np.ndarray | None:
    if value is None or isinstance(value, np.ndarray):
        return value
    return np.asarray(value["real"]) + 1j * np.asarray(value["imag"])


def setup_from_legacy_extra(extra: dict[str, Any], port_names: Sequence[str]) -> dict[str, Any]:
    """The typed set-up of a header written before it was typed (an untyped ``extra`` dict).

    Such headers always carry the port layout (``port_labels``, ``port_sorter``,
    ``port_splitter``, ``port_gain``); a missing key raises KeyError rather than guess.
    """
    n = len(port_names)
    labels, sorter, splitter, gain = (
        list(extra[k]) for k in ("port_labels", "port_sorter", "port_splitter", "port_gain")
    )
    if not (len(labels) == len(sorter) == len(splitter) == len(gain) == n):
        raise ValueError(f"the stored port layout does not describe the {n} ports of the run")
    target = extra.get("target_state_2x2")
    return {
        "ports": tuple(PortLayout(labels[i], sorter[i], splitter[i], gain[i]) for i in range(n)),
        "sources": RunSources(
            protocol_spec=str(extra.get("protocol_spec") or extra.get("protocol_path") or ""),
            protocol_path=str(extra.get("protocol_path") or ""),
            bench_spec=str(extra.get("bench_spec") or extra.get("bench_path") or ""),
            bench_path=str(extra.get("bench_path") or ""),
        ),
        "target_label": extra.get("target_label"),
        "factor_target_state": _complex_array(target) if target else None,
        "reference_device": extra.get("reference_device"),
        "wavelength_nm": extra.get("wavelength_nm"),
    }


@dataclass(frozen=True, eq=False)
class Reading:
    """One reading of every detector port at one analyzer setting.

    ``commanded`` and ``readback`` hold one value per element of the header's
    ``element_names`` (deg, mode converter 1.0 in / 0.0 out, NaN where unused);
    ``values`` one per port (W or counts); ``operators`` (n_ports, d, d) the POVM
    element each port's reading estimates; ``t_start``/``t_end`` UNIX seconds;
    ``flags`` a bitmask of the ``FLAG_*`` constants.
    """

    step_index: int
    kind: str
    pass_index: int
    point_index: int
    repeat_index: int
    commanded: np.ndarray
    readback: np.ndarray
    values: np.ndarray
    reference_w: float
    operators: np.ndarray
    dwell_s: float
    t_start: float
    t_end: float
    flags: int = 0

    def __post_init__(self) -> None:
        if self.kind not in READING_KINDS:
            raise ValueError(f"reading kind {self.kind!r}; expected one of {READING_KINDS}")
        for name in ("step_index", "pass_index", "point_index", "repeat_index", "flags"):
            object.__setattr__(self, name, int(getattr(self, name)))
        for name in ("reference_w", "dwell_s", "t_start", "t_end"):
            object.__setattr__(self, name, float(getattr(self, name)))
        for name in ("commanded", "readback", "values"):
            object.__setattr__(self, name, _frozen_array(getattr(self, name), np.float64, 1, name))
        operators = _frozen_array(self.operators, np.complex128, 3, "operators")
        if operators.shape[0] != self.values.shape[0] or operators.shape[1] != operators.shape[2]:
            raise ValueError(
                f"operators has shape {operators.shape}; expected ({self.values.shape[0]}, d, d)"
            )
        object.__setattr__(self, "operators", operators)

    __eq__ = _fields_equal


@dataclass(frozen=True, eq=False)
class Event:
    """Something that happened during a run: ``t`` UNIX seconds, ``kind`` one of EVENT_KINDS."""

    t: float
    kind: str
    message: str = ""

    def __post_init__(self) -> None:
        if self.kind not in EVENT_KINDS:
            raise ValueError(f"event kind {self.kind!r}; expected one of {EVENT_KINDS}")
        object.__setattr__(self, "t", float(self.t))
        object.__setattr__(self, "message", str(self.message))

    __eq__ = _fields_equal


_INT_COLUMNS = ("step_index", "pass_index", "point_index", "repeat_index", "flags")
_FLOAT_COLUMNS = ("reference_w", "dwell_s", "t_start", "t_end")


@dataclass(frozen=True, eq=False)
class ReadingTable:
    """Readings as columns: row i of every array is reading i, in the order they were taken.

    Integer columns are int64, ``kind`` a str array, ``commanded``/``readback``
    (n, n_elements) float64, ``values`` (n, n_ports) float64, ``operators``
    (n, n_ports, d, d) complex128, times in UNIX seconds.
    """

    element_names: tuple[str, ...]
    port_names: tuple[str, ...]
    step_index: np.ndarray
    kind: np.ndarray
    pass_index: np.ndarray
    point_index: np.ndarray
    repeat_index: np.ndarray
    commanded: np.ndarray
    readback: np.ndarray
    values: np.ndarray
    reference_w: np.ndarray
    operators: np.ndarray
    dwell_s: np.ndarray
    t_start: np.ndarray
    t_end: np.ndarray
    flags: np.ndarray

    def __post_init__(self) -> None:
        object.__setattr__(self, "element_names", tuple(self.element_names))
        object.__setattr__(self, "port_names", tuple(self.port_names))
        n = len(self.step_index)
        for f in fields(self)[2:]:
            column = getattr(self, f.name)
            if len(column) != n:
                raise ValueError(f"column {f.name} has {len(column)} rows; step_index has {n}")

    __eq__ = _fields_equal

    def __len__(self) -> int:
        return len(self.step_index)

    @property
    def dimension(self) -> int:
        """Dimension d of the space the operators act on."""
        return int(self.operators.shape[-1])

    @property
    def kind_code(self) -> np.ndarray:
        """``kind`` as uint8 codes: the index into READING_KINDS."""
        codes = np.zeros(len(self), dtype=np.uint8)
        for code, name in enumerate(READING_KINDS):
            codes[self.kind == name] = code
        return codes

    @property
    def steps_done(self) -> int:
        """Number of distinct step indices with at least one reading."""
        # Sort and count changes: np.unique would import numpy.ma (0.1 s) on first use.
        ordered = np.sort(self.step_index)
        return int(np.count_nonzero(np.diff(ordered)) + 1) if ordered.size else 0

    def of_kind(self, kind: str) -> np.ndarray:
        """Boolean mask of the rows of one kind ("measure", "background" or "reference")."""
        if kind not in READING_KINDS:
            raise ValueError(f"reading kind {kind!r}; expected one of {READING_KINDS}")
        return self.kind == kind

    def commanded_of(self, element: str) -> np.ndarray:
        """The commanded column of one element (deg, or converter state code)."""
        return self.commanded[:, self.element_names.index(element)]

    def readback_of(self, element: str) -> np.ndarray:
        """The read-back column of one element (deg, or converter state code)."""
        return self.readback[:, self.element_names.index(element)]

    def select(self, rows: np.ndarray | slice) -> ReadingTable:
        """A table of the chosen rows (a boolean mask, an index array or a slice)."""
        taken = {f.name: getattr(self, f.name)[rows] for f in fields(self)[2:]}
        return ReadingTable(self.element_names, self.port_names, **taken)

    def row(self, i: int) -> Reading:
        """Reading number i as a :class:`Reading`."""
        return Reading(
            step_index=int(self.step_index[i]), kind=str(self.kind[i]),
            pass_index=int(self.pass_index[i]), point_index=int(self.point_index[i]),
            repeat_index=int(self.repeat_index[i]), commanded=self.commanded[i],
            readback=self.readback[i], values=self.values[i],
            reference_w=float(self.reference_w[i]), operators=self.operators[i],
            dwell_s=float(self.dwell_s[i]), t_start=float(self.t_start[i]),
            t_end=float(self.t_end[i]), flags=int(self.flags[i]),
        )

    def rows(self) -> Iterable[Reading]:
        """Every reading in order, as :class:`Reading` records."""
        return (self.row(i) for i in range(len(self)))

    @classmethod
    def empty(
        cls, element_names: Sequence[str], port_names: Sequence[str], dimension: int
    ) -> ReadingTable:
        """A table with no rows and the right column shapes."""
        n_el, n_ports = len(element_names), len(port_names)
        return cls(
            element_names, port_names,
            **{name: np.zeros(0, np.int64) for name in _INT_COLUMNS},
            kind=np.zeros(0, dtype="<U10"),
            commanded=np.zeros((0, n_el)), readback=np.zeros((0, n_el)),
            values=np.zeros((0, n_ports)),
            operators=np.zeros((0, n_ports, dimension, dimension), np.complex128),
            **{name: np.zeros(0) for name in _FLOAT_COLUMNS},
        )

    @classmethod
    def from_readings(
        cls, readings: Sequence[Reading], element_names: Sequence[str],
        port_names: Sequence[str], dimension: int,
    ) -> ReadingTable:
        """Stack :class:`Reading` records into columns (shapes checked against the names)."""
        if not readings:
            return cls.empty(element_names, port_names, dimension)
        n_el, n_ports = len(element_names), len(port_names)
        for r in readings:
            if (r.commanded.shape != (n_el,) or r.readback.shape != (n_el,)
                    or r.operators.shape != (n_ports, dimension, dimension)):
                raise ValueError(
                    f"reading of step {r.step_index} does not fit {n_el} elements, "
                    f"{n_ports} ports, dimension {dimension}"
                )
        return cls(
            element_names, port_names,
            **{name: np.array([getattr(r, name) for r in readings], np.int64)
               for name in _INT_COLUMNS},
            kind=np.array([r.kind for r in readings], dtype="<U10"),
            commanded=np.stack([r.commanded for r in readings]),
            readback=np.stack([r.readback for r in readings]),
            values=np.stack([r.values for r in readings]),
            operators=np.stack([r.operators for r in readings]),
            **{name: np.array([getattr(r, name) for r in readings], np.float64)
               for name in _FLOAT_COLUMNS},
        )


@dataclass(frozen=True, eq=False)
class RunData:
    """A whole run as read back: header, readings as columns, events, status and message.

    ``source`` says where it was read from: "runfile" (the .h5 alone) or "journal".
    """

    header: RunHeader
    readings: ReadingTable
    events: tuple[Event, ...]
    status: str
    message: str
    source: str = "runfile"

    __eq__ = _fields_equal

    @property
    def steps_done(self) -> int:
        """Number of distinct step indices with at least one reading."""
        return self.readings.steps_done
