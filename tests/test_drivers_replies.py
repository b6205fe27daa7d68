"""Parsing of instrument replies into numbers, flags, pairs, lists and error-queue entries."""

from __future__ import annotations

import re

import pytest
from hypothesis import given
from hypothesis import strategies as st

from lightloom.drivers.replies import (
    ReplyError,
    parse_count,
    parse_error_entry,
    parse_flag,
    parse_float,
    parse_list,
    parse_pair,
)


@given(st.floats(allow_nan=False, allow_infinity=False, width=64))
def test_a_float_survives_its_own_repr(value):
    assert parse_float(repr(value)) == value


def test_scale_converts_units():
    assert parse_float(" 1.5e+00 ", None, 1e-3) == pytest.approx(1.5e-3)


@pytest.mark.parametrize("text", ["", "abc", "nan", "inf", "-inf", "1,2"])
def test_non_finite_or_non_numeric_text_is_refused(text):
    with pytest.raises(ReplyError):
        parse_float(text)


def test_pattern_picks_the_value_out_of_a_decorated_reply():
    assert parse_float("POS=12.5 deg", re.compile(r"POS=(\S+)")) == 12.5


def test_reply_not_matching_the_pattern_says_so():
    with pytest.raises(ReplyError, match="reply_pattern"):
        parse_float("ANGLE 3", re.compile(r"POS=(\S+)"))


def test_counts_must_be_whole_and_non_negative():
    assert parse_count("1234") == 1234
    assert parse_count("1.234", None, 1e3) == 1234
    with pytest.raises(ReplyError):
        parse_count("12.5")
    with pytest.raises(ReplyError):
        parse_count("-3")


@pytest.mark.parametrize(
    "text, flag", [("1", True), ("0", False), ("+0", False), ("ON", True), ("off", False)]
)
def test_flags(text, flag):
    assert parse_flag(text) is flag


def test_garbage_flag_is_refused():
    with pytest.raises(ReplyError):
        parse_flag("maybe")


def test_pair_in_order():
    assert parse_pair("-170,170") == (-170.0, 170.0)
    assert parse_pair("-1 ; 2") == (-1.0, 2.0)
    with pytest.raises(ReplyError):
        parse_pair("5,1")
    with pytest.raises(ReplyError):
        parse_pair("5")


def test_list_of_names():
    assert parse_list(" in, out ") == ("in", "out")
    with pytest.raises(ReplyError):
        parse_list("in,,out")


# SCPI-99 volume 2, SYSTem:ERRor: '<code>,"<description>"', 0 meaning no error (from memory).
@pytest.mark.parametrize(
    "text, entry",
    [
        ('0,"No error"', (0, "No error")),
        ('+0,"No error"', (0, "No error")),
        ('-222,"Data out of range"', (-222, "Data out of range")),
        ("0", (0, "")),
    ],
)
def test_error_entries(text, entry):
    assert parse_error_entry(text) == entry


def test_error_entry_without_a_code_is_refused():
    with pytest.raises(ReplyError):
        parse_error_entry("No error")
