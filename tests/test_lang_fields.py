"""Typed getters: the messages say what is wrong and what is expected, at the right line."""

from __future__ import annotations

import numpy as np
import pytest

from lightloom.sequencer.errors import InputError, ProtocolError
from lightloom.sequencer.lang.fields import (
    Section,
    complex_value,
    density_matrix,
    integer,
    nearest,
    normalized_ket,
    retyped,
)
from lightloom.sequencer.lang.yamlsafe import parse_text

ALLOWED = ("protocol", "dwell_s", "repeats", "order")


def section(text: str) -> Section:
    return Section.of(parse_text(text, "p.yaml"), "", "protocol")


def raised(fn) -> InputError:
    with pytest.raises(InputError) as info:
        fn()
    return info.value


def test_unknown_key_suggests_the_nearest_and_lists_the_valid_ones() -> None:
    err = raised(lambda: section("protocol: x\ndwel_s: 1\n").check_keys(ALLOWED))
    assert err.line == 2
    assert err.message == (
        "unknown key 'dwel_s' in protocol; did you mean 'dwell_s'? expected one of: dwell_s, order, protocol, repeats"
    )


def test_unknown_key_without_a_near_one_still_lists_the_valid_ones() -> None:
    err = raised(lambda: section("zzzz: 1\n").check_keys(ALLOWED))
    assert err.message.startswith("unknown key 'zzzz' in protocol; expected one of: dwell_s")


def test_number_of_wrong_type_names_the_unit() -> None:
    err = raised(lambda: section("dwell_s: abc\n").number("dwell_s", "s", gt=0))
    assert err.message == "dwell_s: expected a number in seconds, got 'abc'"


def test_number_out_of_range_states_the_bounds_and_the_value_written() -> None:
    err = raised(lambda: section("x: 1\ndwell_s: -1\n").number("dwell_s", "s", gt=0, le=3600))
    assert (err.line, err.message) == (2, "dwell_s must be > 0 s and at most 3600 s, got -1")


def test_boolean_is_not_a_number() -> None:
    assert "got true" in raised(lambda: section("dwell_s: true\n").number("dwell_s", "s")).message


def test_missing_required_key_says_what_to_write() -> None:
    err = raised(lambda: section("protocol: x\n").number("dwell_s", "s", gt=0))
    assert err.message == "missing key 'dwell_s' in the protocol file; expected a number in seconds"


def test_null_value_takes_the_default() -> None:
    assert section("repeats: null\n").integer("repeats", 1, ge=1) == 1


def test_nested_sections_use_dotted_names() -> None:
    sec = section("background:\n  dwell_s: 0\n").section("background")
    err = raised(lambda: sec.number("dwell_s", "s", gt=0))
    assert err.message.startswith("background.dwell_s must be > 0 s")


@pytest.mark.parametrize("text, value", [("n: 3\n", 3), ("n: 3.0\n", 3)])
def test_integer_accepts_whole_numbers(text: str, value: int) -> None:
    assert integer(parse_text(text, "f").get("n"), "n") == value


@pytest.mark.parametrize("text", ["n: 1.5\n", "n: '3'\n", "n: true\n"])
def test_integer_refuses_anything_else(text: str) -> None:
    assert "expected a whole number" in raised(lambda: integer(parse_text(text, "f").get("n"), "n")).message


def test_text_refuses_a_number_and_suggests_quoting() -> None:
    assert "(quote it)" in raised(lambda: section("protocol: 12\n").text("protocol")).message


def test_choice_suggests_the_nearest_option() -> None:
    err = raised(lambda: section("order: shufled\n").choice("order", ("as-written", "shuffled")))
    assert err.message.endswith("got 'shufled'; did you mean 'shuffled'?")


def test_choice_explains_yaml_booleans() -> None:
    err = raised(lambda: section("state: off\n").choice("state", ("in", "out")))
    assert "got off (quote the value)" in err.message


def test_nearest_prefers_a_match_ignoring_case() -> None:
    assert nearest("pm_hh", ["pm_hV", "pm_hH"]) == "pm_hH"


@pytest.mark.parametrize(
    "written, value",
    [("'0.6'", 0.6), ("'0.8j'", 0.8j), ("'0.1-0.2j'", 0.1 - 0.2j), ("1", 1.0), ("-0.5", -0.5), ("'-1e-3j'", -1e-3j)],
)
def test_complex_values_as_text_or_numbers(written: str, value: complex) -> None:
    assert complex_value(parse_text(f"z: {written}\n", "f").get("z"), "z") == pytest.approx(value)


@pytest.mark.parametrize("written", ["'0.1-'", "'abc'", "true", "'nan'", "'inf'", "[1, 2]"])
def test_bad_complex_values_are_refused(written: str) -> None:
    assert "z" in raised(lambda: complex_value(parse_text(f"z: {written}\n", "f").get("z"), "z")).message


def test_ket_is_normalised() -> None:
    ket = normalized_ket(parse_text("k: ['3', '4j']\n", "f").get("k"), "k", 2)
    assert ket == pytest.approx((0.6, 0.8j))


def test_density_matrix_is_scaled_to_unit_trace() -> None:
    rho = density_matrix(parse_text("m: [[2, '1j'], ['-1j', 2]]\n", "f").get("m"), "m", 2)
    assert np.allclose(np.array(rho), [[0.5, 0.25j], [-0.25j, 0.5]])


def test_non_hermitian_matrix_is_reported_at_the_row_below_the_diagonal() -> None:
    err = raised(lambda: density_matrix(parse_text("m:\n  - [1, '0.5j']\n  - ['0.5j', 1]\n", "f").get("m"), "m", 2))
    assert err.line == 3
    assert "entry [1][0] must be the complex conjugate of entry [0][1]" in err.message


def test_negative_eigenvalue_is_refused() -> None:
    err = raised(lambda: density_matrix(parse_text("m: [[1, 0], [0, -0.1]]\n", "f").get("m"), "m", 2))
    assert "not positive semidefinite" in err.message


def test_matrix_of_the_wrong_size_is_refused() -> None:
    err = raised(lambda: density_matrix(parse_text("m: [[1, 0], [0, 1]]\n", "f").get("m"), "m", 4))
    assert "expected 4 rows" in err.message


def test_retyped_turns_input_errors_into_the_language_error_keeping_file_and_line() -> None:
    with pytest.raises(ProtocolError) as info:
        with retyped(ProtocolError):
            raise InputError("bad", "p.yaml", 7)
    assert (info.value.file, info.value.line, info.value.message) == ("p.yaml", 7, "bad")
