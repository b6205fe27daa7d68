"""The compiled step list: what to do, step by step, as plain data in columns, and its compact JSON form.

A night holds up to 200,000 steps, so the list keeps one numpy column per field (about 70 bytes
a step) rather than an object per step; ``steps`` still reads as a sequence of :class:`Step`
records, built on demand. Its JSON form (stored in every run's header) carries the columns as
zlib-compressed little-endian bytes in base64, so it is small and fast at any night length;
the verbose form of earlier versions (one object per step) is still read.
"""

from __future__ import annotations

import base64
import hashlib
import json
import zlib
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any, overload

import numpy as np

from lightloom.sequencer.model.elements import ElementSettings
from lightloom.sequencer.model.vocabulary import READING_KINDS

STEP_KINDS: tuple[str, ...] = READING_KINDS
"""Kinds of steps, by code (the same as the kinds of readings)."""
_COMPACT_FORMAT = "lightloom-steps-columns-1"
_BLOCK = 4096


@dataclass(frozen=True)
class Step:
    """One reading of every detector at one analyzer setting.

    ``settings`` are the commanded element positions (unset where the bench has no such
    element). ``port_labels`` says which projector each detector port nominally measures (the
    file stores the exact operators).
    """

    index: int
    kind: str
    pass_index: int
    point_index: int
    repeat_index: int
    settings: ElementSettings
    dwell_s: float
    label: str
    port_labels: tuple[str, ...]

    @property
    def shutter_open(self) -> bool:
        return self.kind != "background"


@dataclass(frozen=True, eq=False)
class StepColumns:
    """The steps as columns: row i is step i.

    ``kind`` holds codes into STEP_KINDS; ``label`` codes into ``labels``; ``port_labels``
    codes into ``port_label_sets`` (one tuple of labels per port); ``settings`` (n, E) deg or
    converter state code, NaN where an element is absent; ``dwell_s`` s.
    """

    kind: np.ndarray
    pass_index: np.ndarray
    point_index: np.ndarray
    repeat_index: np.ndarray
    settings: np.ndarray
    dwell_s: np.ndarray
    label: np.ndarray
    port_labels: np.ndarray
    labels: tuple[str, ...]
    port_label_sets: tuple[tuple[str, ...], ...]

    _INTS = ("kind", "pass_index", "point_index", "repeat_index", "label", "port_labels")
    _DTYPES = {"kind": "<u1", "pass_index": "<i4", "point_index": "<i4", "repeat_index": "<i4",
               "label": "<i4", "port_labels": "<i4", "settings": "<f8", "dwell_s": "<f8"}

    def __post_init__(self) -> None:
        for name, dtype in self._DTYPES.items():
            array = np.ascontiguousarray(getattr(self, name), dtype=dtype)
            array.setflags(write=False)
            object.__setattr__(self, name, array)
        object.__setattr__(self, "labels", tuple(self.labels))
        object.__setattr__(self, "port_label_sets", tuple(tuple(p) for p in self.port_label_sets))
        # One canonical coding (tables in order of first use), so equal steps give equal columns.
        for codes, table in (("label", "labels"), ("port_labels", "port_label_sets")):
            array, entries = _first_use_order(getattr(self, codes), getattr(self, table))
            object.__setattr__(self, codes, array)
            object.__setattr__(self, table, entries)
        n = len(self.kind)
        for name in self._DTYPES:
            if len(getattr(self, name)) != n:
                raise ValueError(f"step column {name} has {len(getattr(self, name))} rows, kind has {n}")
        if n and (self.label.max() >= len(self.labels) or self.port_labels.max() >= len(self.port_label_sets)
                  or self.kind.max() >= len(STEP_KINDS)):
            raise ValueError("a step column holds a code beyond its table")

    def __len__(self) -> int:
        return len(self.kind)

    def step(self, i: int) -> Step:
        """Step i as a :class:`Step` record."""
        return Step(
            i, STEP_KINDS[self.kind[i]], int(self.pass_index[i]), int(self.point_index[i]),
            int(self.repeat_index[i]), ElementSettings.from_vector(self.settings[i]),
            float(self.dwell_s[i]), self.labels[self.label[i]], self.port_label_sets[self.port_labels[i]],
        )

    @classmethod
    def from_steps(cls, steps: Sequence[Step], n_elements: int) -> StepColumns:
        """Columns of a list of :class:`Step` records (indices must be 0, 1, 2, ...)."""
        labels: dict[str, int] = {}
        port_sets: dict[tuple[str, ...], int] = {}
        kind_code = {k: i for i, k in enumerate(STEP_KINDS)}
        return cls(
            kind=np.array([kind_code[s.kind] for s in steps], dtype="<u1"),
            pass_index=np.array([s.pass_index for s in steps], dtype="<i4"),
            point_index=np.array([s.point_index for s in steps], dtype="<i4"),
            repeat_index=np.array([s.repeat_index for s in steps], dtype="<i4"),
            settings=np.array([s.settings.as_vector() for s in steps], dtype="<f8").reshape(len(steps), n_elements),
            dwell_s=np.array([s.dwell_s for s in steps], dtype="<f8"),
            label=np.array([labels.setdefault(s.label, len(labels)) for s in steps], dtype="<i4"),
            port_labels=np.array([port_sets.setdefault(tuple(s.port_labels), len(port_sets)) for s in steps],
                                 dtype="<i4"),
            labels=tuple(labels), port_label_sets=tuple(port_sets),
        )


def _first_use_order(codes: np.ndarray, table: tuple) -> tuple[np.ndarray, tuple]:
    if not len(codes):
        return codes, ()
    if codes.min() < 0 or codes.max() >= len(table):
        raise ValueError("a step column holds a code beyond its table")
    used, first = np.unique(codes, return_index=True)
    order = used[np.argsort(first)]
    remap = np.zeros(len(table), dtype="<i4")
    remap[order] = np.arange(len(order), dtype="<i4")
    array = remap[codes]
    array.setflags(write=False)
    return array, tuple(table[i] for i in order)


class StepView(Sequence[Step]):
    """The steps of a :class:`StepColumns` as a read-only sequence of :class:`Step` records."""

    def __init__(self, columns: StepColumns) -> None:
        self._columns = columns

    def __len__(self) -> int:
        return len(self._columns)

    @overload
    def __getitem__(self, i: int) -> Step: ...

    @overload
    def __getitem__(self, i: slice) -> list[Step]: ...

    def __getitem__(self, i: int | slice) -> Step | list[Step]:
        if isinstance(i, slice):
            return [self._columns.step(j) for j in range(*i.indices(len(self)))]
        n = len(self)
        if i < 0:
            i += n
        if not 0 <= i < n:
            raise IndexError("step index out of range")
        return self._columns.step(i)

    def __iter__(self) -> Iterator[Step]:
        c = self._columns
        # Settings rows repeat through a night: build each distinct one once.
        cache: dict[bytes, ElementSettings] = {}
        rows = c.settings
        # A block of steps at a time: iterating a night holds no per-step Python objects.
        for start in range(0, len(c), _BLOCK):
            end = min(len(c), start + _BLOCK)
            kinds = [STEP_KINDS[k] for k in c.kind[start:end].tolist()]
            passes, points = c.pass_index[start:end].tolist(), c.point_index[start:end].tolist()
            repeats, dwell = c.repeat_index[start:end].tolist(), c.dwell_s[start:end].tolist()
            labels, port_labels = c.label[start:end].tolist(), c.port_labels[start:end].tolist()
            for j in range(end - start):
                i = start + j
                key = rows[i].tobytes()
                settings = cache.get(key)
                if settings is None:
                    settings = cache[key] = ElementSettings.from_vector(rows[i])
                yield Step(i, kinds[j], passes[j], points[j], repeats[j], settings, dwell[j],
                           c.labels[labels[j]], c.port_label_sets[port_labels[j]])

    def __eq__(self, other: object) -> bool:
        if isinstance(other, StepView):
            return _columns_equal(self._columns, other._columns)
        if isinstance(other, (tuple, list)):
            return len(other) == len(self) and all(a == b for a, b in zip(self, other))
        return NotImplemented


def _columns_equal(a: StepColumns, b: StepColumns) -> bool:
    if len(a) != len(b):
        return False
    same = all(np.array_equal(getattr(a, n), getattr(b, n), equal_nan=n in ("settings", "dwell_s"))
               for n in StepColumns._INTS + ("settings", "dwell_s") if n not in ("label", "port_labels"))
    return same and all(a.labels[x] == b.labels[y] for x, y in zip(a.label, b.label)) and all(
        a.port_label_sets[x] == b.port_label_sets[y] for x, y in zip(a.port_labels, b.port_labels))


def _pack(array: np.ndarray) -> str:
    return base64.b64encode(zlib.compress(np.ascontiguousarray(array).tobytes(), 6)).decode("ascii")


def _unpack(text: str, dtype: str, shape: tuple[int, ...]) -> np.ndarray:
    raw = zlib.decompress(base64.b64decode(text.encode("ascii"), validate=True))
    array = np.frombuffer(raw, dtype=dtype)
    if array.size != int(np.prod(shape)):
        raise ValueError(f"step column of {array.size} values, expected {int(np.prod(shape))}")
    return array.reshape(shape)


@dataclass(frozen=True, eq=False)
class StepList:
    """Everything the runner needs to execute a protocol on a bench, and nothing it must look up.

    ``columns`` holds the steps; ``steps`` shows them as :class:`Step` records.
    """

    protocol_name: str
    bench_name: str
    element_names: tuple[str, ...]
    port_names: tuple[str, ...]
    columns: StepColumns
    n_settings: int
    passes: int
    pass_interval_s: float
    order: str
    violations: tuple[str, ...] = field(default=())

    @property
    def steps(self) -> StepView:
        """The steps, in order, as a sequence of :class:`Step` (built on demand)."""
        return StepView(self.columns)

    def __len__(self) -> int:
        return len(self.columns)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, StepList):
            return NotImplemented
        return self.to_json() == other.to_json()

    def to_json(self) -> str:
        """A canonical, compact JSON text, identical for identical step lists (any length)."""
        c = self.columns
        data: dict[str, Any] = {
            "format": _COMPACT_FORMAT,
            "protocol_name": self.protocol_name, "bench_name": self.bench_name,
            "element_names": list(self.element_names), "port_names": list(self.port_names),
            "n_settings": self.n_settings, "passes": self.passes,
            "pass_interval_s": self.pass_interval_s, "order": self.order,
            "violations": list(self.violations), "n_steps": len(c),
            "kinds": list(STEP_KINDS), "labels": list(c.labels),
            "port_label_sets": [list(p) for p in c.port_label_sets],
            "columns": {name: _pack(getattr(c, name)) for name in StepColumns._DTYPES},
        }
        return json.dumps(data, sort_keys=True, separators=(",", ":"))

    def digest(self) -> str:
        """SHA-256 (hex) of :meth:`to_json`: equal step lists, equal digests."""
        return hashlib.sha256(self.to_json().encode("utf-8")).hexdigest()

    @staticmethod
    def from_json(text: str) -> StepList:
        """Inverse of :meth:`to_json`; also reads the verbose form (one object per step) of
        earlier versions. Raises ValueError (or KeyError, TypeError) on a text of another shape."""
        d = json.loads(text)
        if not isinstance(d, dict):
            raise ValueError("the step list is not a JSON object")
        common = dict(
            protocol_name=str(d["protocol_name"]), bench_name=str(d["bench_name"]),
            element_names=tuple(d["element_names"]), port_names=tuple(d["port_names"]),
            n_settings=int(d["n_settings"]), passes=int(d["passes"]),
            pass_interval_s=float(d["pass_interval_s"]), order=str(d["order"]),
            violations=tuple(d.get("violations", ())),
        )
        n_el = len(common["element_names"])
        if d.get("format") == _COMPACT_FORMAT:
            if tuple(d["kinds"]) != STEP_KINDS:
                raise ValueError(f"step kinds {d['kinds']}; expected {list(STEP_KINDS)}")
            n = int(d["n_steps"])
            packed = d["columns"]
            arrays = {
                name: _unpack(packed[name], dtype, (n, n_el) if name == "settings" else (n,))
                for name, dtype in StepColumns._DTYPES.items()
            }
            columns = StepColumns(**arrays, labels=tuple(d["labels"]),
                                  port_label_sets=tuple(tuple(p) for p in d["port_label_sets"]))
            return StepList(columns=columns, **common)
        steps = [
            Step(**{**s, "settings": ElementSettings.from_vector(s["settings"]),
                    "port_labels": tuple(s["port_labels"])})
            for s in d["steps"]
        ]
        if [s.index for s in steps] != list(range(len(steps))):
            raise ValueError("step indices are not 0, 1, 2, ...")
        return StepList(columns=StepColumns.from_steps(steps, n_el), **common)
