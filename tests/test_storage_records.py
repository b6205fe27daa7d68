"""Storage records: validation, JSON form of the header, readings as columns; shared builders."""

from __future__ import annotations

import hashlib
import json
from dataclasses import replace

import numpy as np
import pytest

from lightloom.sequencer.storage import (
    FLAG_DRIFT, FLAG_RETRIED, Event, Reading, ReadingTable, RunHeader,
)
from lightloom.sequencer.model.records import PortLayout, RunSources

from helpers.records import BASIS, ELEMENTS, PORTS, make_header, make_reading


def test_reading_rejects_unknown_kind():
    with pytest.raises(ValueError, match="reading kind"):
        make_reading(0, kind="dark")


def test_reading_operators_must_match_port_count():
    good = make_reading(0)
    with pytest.raises(ValueError, match="operators"):
        Reading(0, "measure", 0, 0, 0, good.commanded, good.readback, good.values[:2], np.nan,
                good.operators, 0.1, 0.0, 0.1)


def test_reading_arrays_are_read_only_copies():
    values = np.array([1.0, 2.0, 3.0, 4.0])
    r = make_reading(0)
    r2 = Reading(0, "measure", 0, 0, 0, r.commanded, r.readback, values, np.nan, r.operators,
                 0.1, 0.0, 0.1)
    values[0] = 99.0
    assert r2.values[0] == 1.0
    with pytest.raises(ValueError):
        r2.values[0] = 5.0


def test_readings_compare_equal_field_by_field_with_nan():
    assert make_reading(3) == make_reading(3)
    assert make_reading(3) != make_reading(4)


def test_event_rejects_unknown_kind():
    with pytest.raises(ValueError, match="event kind"):
        Event(0.0, "explosion", "")


def test_header_rejects_target_of_wrong_shape():
    with pytest.raises(ValueError, match="target_state"):
        replace(make_header(), target_state=np.eye(2))


def test_header_rejects_unknown_analyzer():
    with pytest.raises(ValueError, match="analyzes"):
        replace(make_header(), analyzes=("orbital",))


def test_header_rejects_a_port_layout_that_does_not_match_the_ports():
    with pytest.raises(ValueError, match="port layouts"):
        replace(make_header(), ports=make_header().ports[:2])


def test_header_rejects_a_single_factor_target_that_is_not_2x2():
    with pytest.raises(ValueError, match="factor_target_state"):
        replace(make_header(), factor_target_state=np.eye(4))


def test_header_json_dict_round_trips_exactly():
    header = make_header()
    text = json.dumps(header.to_json_dict())
    assert RunHeader.from_json_dict(json.loads(text)) == header


def test_header_without_target_round_trips():
    header = make_header(target=False)
    assert RunHeader.from_json_dict(json.loads(json.dumps(header.to_json_dict()))) == header


def test_table_rows_give_back_the_readings():
    readings = [make_reading(i) for i in range(7)]
    table = ReadingTable.from_readings(readings, ELEMENTS, PORTS, 4)
    assert list(table.rows()) == readings
    assert table.values.shape == (7, 4) and table.operators.shape == (7, 4, 4, 4)
    assert table.operators.dtype == np.complex128 and table.step_index.dtype == np.int64


def test_table_steps_done_counts_distinct_step_indices():
    readings = [make_reading(i) for i in (0, 1, 1, 2, 2, 2)]
    assert ReadingTable.from_readings(readings, ELEMENTS, PORTS, 4).steps_done == 3


def test_table_column_of_an_element_by_name():
    table = ReadingTable.from_readings([make_reading(i) for i in range(3)], ELEMENTS, PORTS, 4)
    np.testing.assert_array_equal(table.commanded_of("half_wave_plate"), [0.25, 1.25, 2.25])


def test_table_select_by_kind_mask():
    readings = [make_reading(0), make_reading(1, kind="background"), make_reading(2)]
    table = ReadingTable.from_readings(readings, ELEMENTS, PORTS, 4)
    measured = table.select(table.of_kind("measure"))
    np.testing.assert_array_equal(measured.step_index, [0, 2])


def test_table_from_readings_rejects_reading_of_another_shape():
    with pytest.raises(ValueError, match="does not fit"):
        ReadingTable.from_readings([make_reading(0, n_ports=2)], ELEMENTS, PORTS, 4)
