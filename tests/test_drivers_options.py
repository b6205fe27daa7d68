"""Validation of the VISA and serial drivers' bench options and limits."""

from __future__ import annotations

import dataclasses

import pytest

from lightloom.drivers.options import (
    DEFAULT_COMMANDS,
    DriverConfigError,
    check_limits,
    check_options,
    option_defaults,
    parse_config,
)


def _error(driver, options):
    with pytest.raises(DriverConfigError) as caught:
        check_options(driver, options)
    return caught.value


def test_empty_options_are_valid_for_every_builtin_driver():
    for family in ("visa", "serial"):
        for kind in DEFAULT_COMMANDS:
            check_options(f"{family}.{kind}", {})


def test_defaults_speak_the_simulated_command_set():
    config = parse_config("visa.rotation_stage", {}, None)
    assert config.commands["move"] == "ANGL {angle_deg:.4f}"
    assert config.identity == "lightloom,SIM-STAGE"
    assert config.line.read_termination == "\n" and config.line.visa_library == "@py"
    assert parse_config("serial.photon_counter", {}, None).identity == "lightloom,SIM-COUNTER"


def test_unknown_option_names_the_nearest_valid_key():
    error = _error("visa.power_meter", {"timout_s": 1.0})
    assert error.key == "options.timout_s"
    assert "did you mean 'timeout_s'" in str(error)


def test_driver_config_error_is_a_value_error_with_a_key_path():
    error = _error("serial.shutter", {"commands": {"opne": "O"}})
    assert isinstance(error, ValueError)
    assert error.path == ("options", "commands", "opne")
    assert "did you mean 'open'" in str(error)


def test_family_specific_options_are_refused_in_the_other_family():
    assert _error("serial.shutter", {"visa_library": "@py"}).key == "options.visa_library"
    check_options("visa.shutter", {"baud_rate": 115200, "parity": "even"})


def test_kind_specific_options_are_refused_for_other_kinds():
    error = _error("visa.shutter", {"wavelength_nm": 800})
    assert error.key == "options.wavelength_nm"


@pytest.mark.parametrize(
    "options, key",
    [
        ({"timeout_s": 0}, "options.timeout_s"),
        ({"timeout_s": True}, "options.timeout_s"),
        ({"timeout_s": float("inf")}, "options.timeout_s"),
        ({"read_termination": ";"}, "options.read_termination"),
        ({"encoding": "klingon"}, "options.encoding"),
        ({"check_errors": "yes"}, "options.check_errors"),
        ({"init_commands": "*CLS"}, "options.init_commands"),
        ({"parity": "sometimes"}, "options.parity"),
        ({"stop_bits": 3}, "options.stop_bits"),
        ({"baud_rate": -9600}, "options.baud_rate"),
    ],
)
def test_bad_option_values_name_their_key(options, key):
    assert _error("serial.rotation_stage", options).key == key


def test_template_with_an_unknown_field_names_the_nearest_one():
    error = _error("visa.rotation_stage", {"commands": {"move": "MOVE {angle:.3f}"}})
    assert error.key == "options.commands.move"
    assert "{angle}" in str(error) and "did you mean 'angle_deg'" in str(error)


def test_template_missing_its_value_field_is_refused():
    error = _error("visa.power_meter", {"commands": {"set_wavelength": "WAV 800"}})
    assert "{wavelength_nm}" in str(error)


def test_template_with_a_bad_format_spec_is_refused():
    error = _error("visa.rotation_stage", {"commands": {"move": "ANGL {angle_deg:.3q}"}})
    assert error.key == "options.commands.move" and "cannot be filled" in str(error)


def test_constant_fields_may_be_used_in_templates():
    options = {"fields": {"axis": 2}, "commands": {"move": "{axis}PA{angle_deg}"}}
    check_options("serial.rotation_stage", options)


def test_reply_pattern_needs_exactly_one_group():
    error = _error("visa.rotation_stage", {"reply_pattern": r"POS=\S+"})
    assert error.key == "options.reply_pattern" and "exactly one group" in str(error)


def test_per_operation_reply_scale_must_name_a_query():
    error = _error("visa.power_meter", {"reply_scale": {"zero": 2.0}})
    assert error.key == "options.reply_scale.zero"
    assert "read" in str(error)


def test_reply_scale_zero_is_refused():
    assert _error("visa.power_meter", {"reply_scale": 0}).key == "options.reply_scale"


def test_check_errors_without_an_error_query_is_refused():
    error = _error("visa.shutter", {"check_errors": True, "error_query": None})
    assert error.key == "options.check_errors"


def test_stage_with_neither_busy_nor_opc_is_refused():
    error = _error("serial.rotation_stage", {"commands": {"busy": None}, "opc_query": None})
    assert error.key == "options.commands.busy"


def test_shutter_verify_needs_a_state_query():
    assert _error("visa.shutter", {"commands": {"state": None}}).key == "options.verify"
    check_options("visa.shutter", {"commands": {"state": None}, "verify": False})


def test_actuator_needs_its_states_from_somewhere():
    assert _error("visa.actuator", {"commands": {"states": None}}).key == "options.states"
    check_options("visa.actuator", {"commands": {"states": None}, "states": ["in", "out"]})
    parse_config("visa.actuator", {"commands": {"states": None}}, {"states": ["in", "out"]})


def test_unknown_driver_names_the_nearest():
    error = _error("visa.rotaton_stage", {})
    assert error.key == "driver" and "did you mean 'visa.rotation_stage'" in str(error)


def test_stage_limits_accept_the_bench_keys_and_a_dataclass():
    @dataclasses.dataclass(frozen=True)
    class Limits:
        min_deg: float
        max_deg: float
        speed_deg_per_s: float
        acceleration_deg_per_s2: float

    config = parse_config("visa.rotation_stage", {}, Limits(-90, 90, 10, 40))
    assert (config.limits["min_deg"], config.limits["max_deg"]) == (-90.0, 90.0)
    check_limits("serial.rotation_stage", {"travel_deg": [-10, 10], "backlash_deg": 0.5})


@pytest.mark.parametrize(
    "limits, key",
    [
        ({"min_dgree": 0}, "limits.min_dgree"),
        ({"min_deg": 10, "max_deg": 5}, "limits.min_deg"),
        ({"speed_deg_per_s": 0}, "limits.speed_deg_per_s"),
        ({"travel_deg": [1]}, "limits.travel_deg"),
        ({"travel_deg": [0, 1], "min_deg": 0}, "limits.travel_deg"),
    ],
)
def test_bad_stage_limits_name_their_key(limits, key):
    with pytest.raises(DriverConfigError) as caught:
        check_limits("visa.rotation_stage", limits)
    assert caught.value.key == key


def test_limits_are_refused_for_kinds_without_any():
    with pytest.raises(DriverConfigError, match="valid: none"):
        check_limits("visa.power_meter", {"min_deg": 0})


def test_option_defaults_list_every_accepted_key():
    defaults = option_defaults("serial.power_meter")
    assert defaults["baud_rate"] == 9600 and defaults["timeout_s"] == 2.0
    assert defaults["commands"]["read"] == "MEAS?"
    check_options("serial.power_meter", {k: v for k, v in defaults.items() if k != "identity"})
