"""The one set of value checks shared by the protocol and bench languages, driver options and faults."""

from __future__ import annotations

import math

import pytest

from lightloom.drivers.options import DriverConfigError, check_limits
from lightloom.sequencer.model.checks import (
    finite_number, fmt, is_flag, is_text, one_of, range_phrase, whole_number, within,
)
from lightloom.sequencer.model.faults import FaultRuleError, check_fault


def test_a_boolean_is_never_a_number_a_choice_or_text():
    assert finite_number(True) is None and whole_number(False) is None
    assert not one_of(True, (1, 2)) and one_of(1, (1, 2))
    assert not is_text(True) and is_flag(True) and not is_flag(1)


def test_numbers_beyond_float_range_and_non_finite_ones_are_refused():
    assert finite_number(10 ** 400) is None
    assert finite_number(math.inf) is None and finite_number(math.nan) is None
    assert finite_number(3) == 3.0 and whole_number(4.0) == 4 and whole_number(4.5) is None


def test_nan_meets_no_bound_and_bounds_are_phrased_with_units():
    assert not within(math.nan, gt=0) and within(0.0, ge=0) and not within(0.0, gt=0)
    assert range_phrase("s", gt=0, le=3600) == "> 0 s and at most 3600 s"
    assert fmt(1e-9) == "1e-09" and fmt(2.0) == "2"


def test_drivers_and_faults_refuse_through_the_same_checks():
    # A huge integer is refused as a number, not raised as an OverflowError from math.isfinite.
    with pytest.raises(DriverConfigError, match="must be a finite number"):
        check_limits("visa.rotation_stage", {"min_deg": 10 ** 400})
    with pytest.raises(FaultRuleError, match="'at_s' must be a finite number"):
        check_fault({"kind": "timeout", "device": "hwp", "at_s": 10 ** 400})
    with pytest.raises(FaultRuleError, match="'kind' must be one of"):
        check_fault({"kind": True, "device": "hwp", "at_s": 1.0})
