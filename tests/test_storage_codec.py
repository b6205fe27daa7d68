"""Journal binary format: reading payloads, frames, CRC and damage detection."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from lightloom.sequencer.storage import Event, Reading
from lightloom.sequencer.storage.codec import (
    TYPE_EVENT, TYPE_HEADER, TYPE_READING, ReadingLayout, decode_event,
    decode_header, decode_rows, encode_event, encode_header, encode_reading, frame, scan_frames,
    table_from_rows,
)
from helpers.legacy_files import legacy_header_json
from helpers.records import ELEMENTS, PORTS, make_header, make_reading

LAYOUT = ReadingLayout(len(ELEMENTS), len(PORTS), 4)
floats = st.floats(allow_nan=True, allow_infinity=True, width=64)


def _journal_bytes(n: int) -> tuple[bytes, list[int]]:
    """Header frame then n reading frames, and where each frame starts."""
    parts = [frame(TYPE_HEADER, encode_header(make_header()))]
    starts = [0]
    for i in range(n):
        starts.append(starts[-1] + len(parts[-1]))
        parts.append(frame(TYPE_READING, encode_reading(make_reading(i), LAYOUT)))
    return b"".join(parts), starts


def test_reading_payload_size_is_fixed_by_the_layout():
    assert len(encode_reading(make_reading(0), LAYOUT)) == LAYOUT.payload_size
    assert LAYOUT.payload_size == 73 + 8 * (2 * 5 + 4) + 16 * 4 * 16


def test_encode_rejects_reading_that_does_not_fit_the_run():
    with pytest.raises(ValueError, match="this run expects"):
        encode_reading(make_reading(0, n_ports=2), LAYOUT)


@settings(max_examples=60, deadline=None)
@given(
    step=st.integers(-2**62, 2**62), flags=st.integers(0, 2**40),
    kind=st.sampled_from(["measure", "background", "reference"]),
    scalars=st.lists(floats, min_size=4, max_size=4),
    commanded=arrays(np.float64, 5, elements=floats),
    values=arrays(np.float64, 4, elements=floats),
    ops=arrays(np.complex128, (4, 4, 4), elements=st.complex_numbers(allow_nan=True, width=128)),
)
def test_reading_survives_encode_and_decode_bit_for_bit(step, flags, kind, scalars, commanded,
                                                        values, ops):
    reading = Reading(step, kind, 1, 2, 3, commanded, commanded[::-1], values, scalars[0], ops,
                      scalars[1], scalars[2], scalars[3], flags)
    payload = encode_reading(reading, LAYOUT)
    raw = frame(TYPE_READING, payload)
    rows = decode_rows(raw, [raw.index(payload)], LAYOUT)
    back = table_from_rows(rows, ELEMENTS, PORTS).row(0)
    assert encode_reading(back, LAYOUT) == payload


def test_decode_rows_reads_runs_broken_by_events():
    parts, expected = [], []
    for i in range(9):
        if i % 4 == 3:
            parts.append(frame(TYPE_EVENT, encode_event(Event(i, "note", "x" * i))))
        else:
            parts.append(frame(TYPE_READING, encode_reading(make_reading(i), LAYOUT)))
            expected.append(i)
    raw = b"".join(parts)
    starts = [start for kind, start, _ in scan_frames(raw).frames if kind == TYPE_READING]
    table = table_from_rows(decode_rows(raw, starts, LAYOUT), ELEMENTS, PORTS)
    np.testing.assert_array_equal(table.step_index, expected)
    assert [table.row(k) for k in range(len(expected))] == [make_reading(i) for i in expected]


def test_event_round_trips_with_unicode_message():
    event = Event(1.7e9, "beam_lost", "power 2 µW < 10 µW")
    assert decode_event(encode_event(event)) == event


def test_header_round_trips_through_its_record():
    fmt, header = decode_header(encode_header(make_header()))
    assert fmt == 1 and header == make_header()


def test_scan_of_intact_bytes_reports_no_damage():
    raw, starts = _journal_bytes(5)
    scan = scan_frames(raw)
    assert scan.damage is None and scan.end == len(raw) and len(scan.frames) == 6


@pytest.mark.parametrize("missing", [1, 4, 9, 100, 1000])
def test_scan_reports_torn_tail_with_nothing_intact_after(missing):
    raw, starts = _journal_bytes(5)
    scan = scan_frames(raw[:-missing])
    assert scan.damage is not None
    assert scan.damage.offset == starts[-1] == scan.end
    assert scan.damage.intact_after == 0
    assert len(scan.frames) == 5


@settings(max_examples=40, deadline=None)
@given(bit=st.integers(0, 2**31))
def test_any_single_bit_flip_in_a_record_is_detected(bit):
    raw, starts = _journal_bytes(3)
    record = starts[2]
    bit %= 8 * (starts[3] - record)
    damaged = bytearray(raw)
    damaged[record + bit // 8] ^= 1 << (bit % 8)
    scan = scan_frames(bytes(damaged))
    assert scan.damage is not None and scan.damage.offset == record
    assert len(scan.frames) == 2
    assert scan.damage.intact_after == 1


def test_scan_stops_at_first_bad_record_and_counts_intact_ones_after():
    raw, starts = _journal_bytes(6)
    damaged = bytearray(raw)
    damaged[starts[3] + 40] ^= 0xFF
    scan = scan_frames(bytes(damaged))
    assert scan.damage.reason == "CRC mismatch"
    assert scan.damage.offset == starts[3] and len(scan.frames) == 3
    assert scan.damage.intact_after == 3


def test_scan_of_garbage_after_records_is_a_tail():
    raw, _ = _journal_bytes(2)
    scan = scan_frames(raw + np.random.default_rng(5).bytes(3000))
    assert scan.end == len(raw) and scan.damage.intact_after == 0


def test_journal_header_written_by_an_earlier_version_still_decodes():
    # Earlier versions named the header's step list "plan_json" and kept the set-up in "extra".
    payload = {"journal_format": 1, "header": legacy_header_json(make_header())}
    assert "plan_json" in payload["header"] and "extra" in payload["header"]
    fmt, header = decode_header(json.dumps(payload).encode("utf-8"))
    assert header == make_header() and fmt == 1
