"""Binary journal format: record framing with magic and CRC32, and fixed-size reading payloads.

A journal is a sequence of frames, each::

    magic  4 bytes  b"\\xabLLJ"
    type   uint8    1 header, 2 reading, 3 event, 4 status
    length uint32   payload bytes (little-endian)
    payload
    crc32  uint32   zlib CRC-32 of type + length + payload (little-endian)

The first frame is the header (UTF-8 JSON of the run header, once per run). A reading
payload has a fixed size per run, given the header's element count, port count and
dimension: little-endian int64 step_index, pass_index, point_index, repeat_index, flags;
uint8 kind code; float64 reference_w, dwell_s, t_start, t_end; then float64 commanded
and readback (n_elements each), float64 values (n_ports), complex128 operators
(n_ports x d x d, C order). Event and status payloads are float64 t, uint8 kind/status
code, then the UTF-8 message. Everything here is pure: bytes in, bytes or arrays out.
"""

from __future__ import annotations

import json
import struct
import zlib
from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from lightloom.sequencer.model.records import (
    EVENT_KINDS, READING_KINDS, RUN_STATUSES, Event, Reading, ReadingTable, RunHeader,
)

MAGIC = b"\xabLLJ"
JOURNAL_FORMAT = 1
TYPE_HEADER = 1
TYPE_READING = 2
TYPE_EVENT = 3
TYPE_STATUS = 4
RECORD_TYPES = (TYPE_HEADER, TYPE_READING, TYPE_EVENT, TYPE_STATUS)

_FRAME_HEAD = struct.Struct("<4sBI")
_TYPE_LENGTH = struct.Struct("<BI")
_CRC = struct.Struct("<I")
_READING_HEAD = struct.Struct("<5qB4d")
_STAMPED = struct.Struct("<dB")
FRAME_OVERHEAD = _FRAME_HEAD.size + _CRC.size
FRAME_HEAD_BYTES = _FRAME_HEAD.size
MAX_PAYLOAD = 1 << 30
_KIND_CODE = {name: code for code, name in enumerate(READING_KINDS)}
_EVENT_CODE = {name: code for code, name in enumerate(EVENT_KINDS)}
_STATUS_CODE = {name: code for code, name in enumerate(RUN_STATUSES)}


def frame(record_type: int, payload: bytes) -> bytes:
    """One framed record: magic, type, length, payload, CRC32."""
    type_length = _TYPE_LENGTH.pack(record_type, len(payload))
    crc = zlib.crc32(payload, zlib.crc32(type_length))
    return b"".join((MAGIC, type_length, payload, _CRC.pack(crc)))


@dataclass(frozen=True)
class ReadingLayout:
    """The fixed shape of one run's reading payloads."""

    n_elements: int
    n_ports: int
    dimension: int

    @classmethod
    def of(cls, header: RunHeader) -> ReadingLayout:
        """The layout a header implies."""
        return cls(len(header.element_names), len(header.port_names), header.dimension)

    @cached_property
    def dtype(self) -> np.dtype:
        """Packed structured dtype of one payload (same bytes as :func:`encode_reading`)."""
        n_el, n_p, d = self.n_elements, self.n_ports, self.dimension
        return np.dtype([
            ("step_index", "<i8"), ("pass_index", "<i8"), ("point_index", "<i8"),
            ("repeat_index", "<i8"), ("flags", "<i8"), ("kind", "u1"),
            ("reference_w", "<f8"), ("dwell_s", "<f8"), ("t_start", "<f8"), ("t_end", "<f8"),
            ("commanded", "<f8", (n_el,)), ("readback", "<f8", (n_el,)),
            ("values", "<f8", (n_p,)), ("operators", "<c16", (n_p, d, d)),
        ])

    @cached_property
    def payload_size(self) -> int:
        """Bytes of one reading payload."""
        return self.dtype.itemsize


def encode_reading(reading: Reading, layout: ReadingLayout) -> bytes:
    """The payload of one reading; raises ValueError if its shapes do not fit the layout."""
    n_el, n_p, d = layout.n_elements, layout.n_ports, layout.dimension
    if (reading.commanded.shape != (n_el,) or reading.readback.shape != (n_el,)
            or reading.values.shape != (n_p,) or reading.operators.shape != (n_p, d, d)):
        raise ValueError(
            f"reading of step {reading.step_index} has commanded {reading.commanded.shape}, "
            f"readback {reading.readback.shape}, values {reading.values.shape}, operators "
            f"{reading.operators.shape}; this run expects ({n_el},), ({n_el},), ({n_p},), "
            f"({n_p}, {d}, {d})"
        )
    head = _READING_HEAD.pack(
        reading.step_index, reading.pass_index, reading.point_index, reading.repeat_index,
        reading.flags, _KIND_CODE[reading.kind],
        reading.reference_w, reading.dwell_s, reading.t_start, reading.t_end,
    )
    return b"".join((
        head, reading.commanded.tobytes(), reading.readback.tobytes(),
        reading.values.tobytes(), reading.operators.tobytes(),
    ))


def decode_rows(raw: bytes, starts: Sequence[int], layout: ReadingLayout) -> np.ndarray:
    """Reading payloads that begin at ``starts`` in raw, as one structured array.

    Runs of back-to-back reading frames (the usual case: events are rare) are copied
    with one strided view each rather than payload by payload.
    """
    size = layout.payload_size
    rows = np.empty(len(starts), dtype=layout.dtype)
    flat = rows.view(np.uint8).reshape(len(starts), size)
    data = np.frombuffer(raw, dtype=np.uint8)
    stride = size + FRAME_OVERHEAD
    at = np.asarray(starts, dtype=np.int64)
    bounds = np.concatenate(([0], np.flatnonzero(np.diff(at) != stride) + 1, [len(at)])).tolist()
    for i, j in zip(bounds[:-1], bounds[1:]):
        if j > i:
            flat[i:j] = np.lib.stride_tricks.as_strided(
                data[int(at[i]):], shape=(j - i, size), strides=(stride, 1), writeable=False
            )
    return rows


def table_from_rows(
    rows: np.ndarray, element_names: Sequence[str], port_names: Sequence[str],
) -> ReadingTable:
    """Columns of a structured array of reading payloads (dtype of :class:`ReadingLayout`)."""
    codes = rows["kind"]
    if codes.size and codes.max() >= len(READING_KINDS):
        raise ValueError(f"reading kind code {int(codes.max())} is unknown")
    columns = {name: np.ascontiguousarray(rows[name]) for name in rows.dtype.names}
    kinds = np.asarray(READING_KINDS, dtype="<U10")[columns.pop("kind")]
    return ReadingTable(element_names, port_names, kind=kinds, **columns)


def _encode_stamped(t: float, code: int, message: str) -> bytes:
    return _STAMPED.pack(t, code) + message.encode("utf-8")


def _decode_stamped(payload: bytes, names: Sequence[str], what: str) -> tuple[float, str, str]:
    if len(payload) < _STAMPED.size:
        raise ValueError(f"{what} record of {len(payload)} bytes is too short")
    t, code = _STAMPED.unpack_from(payload)
    if code >= len(names):
        raise ValueError(f"{what} code {code} is unknown")
    return t, names[code], bytes(payload[_STAMPED.size:]).decode("utf-8")


def encode_event(event: Event) -> bytes:
    """The payload of one event."""
    return _encode_stamped(event.t, _EVENT_CODE[event.kind], event.message)


def decode_event(payload: bytes) -> Event:
    """Inverse of :func:`encode_event`; raises ValueError on a bad payload."""
    t, kind, message = _decode_stamped(payload, EVENT_KINDS, "event")
    return Event(t, kind, message)


def encode_status(t: float, status: str, message: str) -> bytes:
    """The payload of a status record (the run's status as of UNIX time t)."""
    if status not in _STATUS_CODE:
        raise ValueError(f"run status {status!r}; expected one of {RUN_STATUSES}")
    return _encode_stamped(t, _STATUS_CODE[status], message)


def decode_status(payload: bytes) -> tuple[float, str, str]:
    """Inverse of :func:`encode_status`: (t, status, message)."""
    return _decode_stamped(payload, RUN_STATUSES, "status")


def encode_header(header: RunHeader) -> bytes:
    """The payload of the header record: UTF-8 JSON, with the journal format number."""
    data = {"journal_format": JOURNAL_FORMAT, "header": header.to_json_dict()}
    return json.dumps(data, sort_keys=True, ensure_ascii=False).encode("utf-8")


def decode_header(payload: bytes) -> tuple[int, RunHeader]:
    """Inverse of :func:`encode_header`: (journal format, header); raises ValueError."""
    try:
        data = json.loads(bytes(payload).decode("utf-8"))
        return int(data["journal_format"]), RunHeader.from_json_dict(data["header"])
    except (KeyError, TypeError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ValueError(f"header record is not a run header: {exc}") from exc


@dataclass(frozen=True)
class Damage:
    """Where a scan of frames stopped before the end of the bytes, and why.

    ``intact_after`` counts valid frames found past the damage by searching for the
    magic: 0 means the damage is a torn tail (what a kill leaves), more means the
    middle of the journal is damaged.
    """

    offset: int
    reason: str
    intact_after: int


@dataclass(frozen=True)
class Scan:
    """Frames read from the start of a byte string, up to the first bad one.

    ``frames`` holds (type, payload start, payload length) triples into the scanned
    bytes; ``end`` is where the last intact frame ends.
    """

    frames: tuple[tuple[int, int, int], ...]
    end: int
    damage: Damage | None


def _frame_at(raw: bytes, view: memoryview, pos: int) -> tuple[int, int, int, int] | str:
    """The frame at pos as (type, payload start, payload length, next pos), or why not."""
    if len(raw) - pos < FRAME_OVERHEAD:
        return "incomplete record"
    magic, record_type, length = _FRAME_HEAD.unpack_from(raw, pos)
    if magic != MAGIC:
        return "no record marker"
    if record_type not in RECORD_TYPES:
        return f"unknown record type {record_type}"
    if length > MAX_PAYLOAD:
        return f"implausible record length {length}"
    start = pos + _FRAME_HEAD.size
    end = start + length + _CRC.size
    if end > len(raw):
        return "incomplete record"
    (crc,) = _CRC.unpack_from(raw, end - _CRC.size)
    if zlib.crc32(view[pos + 4:end - _CRC.size]) != crc:
        return "CRC mismatch"
    return record_type, start, length, end


def intact_readings_at(raw: bytes, view: memoryview, pos: int, payload_size: int) -> int:
    """How many intact reading frames of ``payload_size`` bytes lie back to back from pos.

    The frame heads (marker, type, length) of the whole stretch are compared at once
    and then each CRC is checked; counting stops before the first frame that is not an
    intact reading of that size, which the caller reads with :func:`_frame_at` as usual,
    so a damaged record is reported exactly as a frame-by-frame read would report it.
    """
    stride = payload_size + FRAME_OVERHEAD
    count = (len(raw) - pos) // stride
    if count <= 0:
        return 0
    data = np.frombuffer(raw, dtype=np.uint8)
    heads = np.lib.stride_tricks.as_strided(
        data[pos:], shape=(count, _FRAME_HEAD.size), strides=(stride, 1), writeable=False
    )
    expected = np.frombuffer(MAGIC + _TYPE_LENGTH.pack(TYPE_READING, payload_size), dtype=np.uint8)
    good = (heads == expected).all(axis=1)
    n = count if good.all() else int(np.argmin(good))
    crcs = np.ndarray(
        (n,), dtype="<u4", buffer=raw, offset=pos + stride - _CRC.size, strides=(stride,)
    ).tolist()
    crc32, covered = zlib.crc32, _TYPE_LENGTH.size + payload_size
    for i, crc in enumerate(crcs):
        begin = pos + len(MAGIC) + i * stride
        if crc32(view[begin:begin + covered]) != crc:
            return i
    return n


def _count_intact_after(raw: bytes, view: memoryview, pos: int) -> int:
    count = 0
    hit = raw.find(MAGIC, pos + 1)
    while hit >= 0:
        found = _frame_at(raw, view, hit)
        if isinstance(found, tuple):
            count += 1
            hit = raw.find(MAGIC, found[3])
        else:
            hit = raw.find(MAGIC, hit + 1)
    return count


def scan_frames(raw: bytes) -> Scan:
    """Every valid frame from the start up to the first bad one (reported as damage)."""
    view = memoryview(raw)
    frames: list[tuple[int, int, int]] = []
    pos = 0
    while pos < len(raw):
        found = _frame_at(raw, view, pos)
        if isinstance(found, str):
            damage = Damage(pos, found, _count_intact_after(raw, view, pos))
            return Scan(tuple(frames), pos, damage)
        record_type, start, length, pos = found
        frames.append((record_type, start, length))
    return Scan(tuple(frames), pos, None)
