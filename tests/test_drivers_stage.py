"""Template-driven rotation stage over pyvisa-py and pyserial against a loopback line server."""

from __future__ import annotations

import time

import pytest

from lightloom.drivers.errors import BadReply, DeviceFault, InstrumentTimeout, LimitViolation, NotSupported
from helpers.fake_server import FAMILIES, Rig


@pytest.fixture
def rig():
    made = Rig()
    yield made
    made.close()


@pytest.fixture(params=FAMILIES)
def family(request):
    return request.param


def test_move_then_wait_settled_returns_the_read_back_target(rig, family):
    server = rig.server("stage", busy_s=0.05)
    stage = rig.device(family, "rotation_stage", server)
    stage.move_to_deg(22.5)
    assert stage.wait_settled(2.0) == 22.5
    assert stage.position_deg() == 22.5
    assert server.commands("ANGL") == ["ANGL 22.5000"]


def test_move_returns_before_the_stage_has_arrived(rig, family):
    server = rig.server("stage", busy_s=0.3)
    stage = rig.device(family, "rotation_stage", server)
    stage.move_to_deg(45.0)
    assert stage.position_deg() == 0.0
    assert stage.wait_settled(2.0) == 45.0


def test_move_outside_the_bench_limits_is_refused_before_sending(rig, family):
    server = rig.server("stage")
    stage = rig.device(
        family, "rotation_stage", server, limits={"min_deg": -90.0, "max_deg": 90.0}, name="hwp"
    )
    with pytest.raises(LimitViolation) as caught:
        stage.move_to_deg(120.0)
    text = str(caught.value)
    assert "hwp" in text and "120" in text and "[-90, 90]" in text
    stage.position_deg()  # a query: the server has handled every earlier command
    assert server.commands("ANGL") == []


def test_instrument_limits_apply_when_tighter_than_the_bench(rig, family):
    server = rig.server("stage", limits_deg=(-170.0, 170.0))
    stage = rig.device(
        family, "rotation_stage", server, limits={"min_deg": -360.0, "max_deg": 360.0}
    )
    stage.connect()
    assert stage.limits_deg == (-170.0, 170.0)
    with pytest.raises(LimitViolation):
        stage.move_to_deg(200.0)


def test_not_a_number_target_is_a_limit_violation(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server)
    with pytest.raises(LimitViolation):
        stage.move_to_deg(float("nan"))


def test_wait_settled_times_out_naming_the_device(rig, family):
    server = rig.server("stage", busy_s=5.0)
    stage = rig.device(family, "rotation_stage", server, name="qwp")
    stage.move_to_deg(10.0)
    start = time.monotonic()
    with pytest.raises(InstrumentTimeout) as caught:
        stage.wait_settled(0.2)
    assert 0.2 <= time.monotonic() - start < 0.8
    assert "qwp" in str(caught.value) and "still moving" in str(caught.value)


def test_wait_settled_uses_the_operation_complete_query_without_a_busy_command(rig, family):
    server = rig.server("stage", busy_s=0.1)
    stage = rig.device(family, "rotation_stage", server, {"commands": {"busy": None}})
    stage.move_to_deg(-30.0)
    assert stage.wait_settled(2.0) == -30.0
    assert server.commands("BUSY?") == [] and server.commands("*OPC?") == ["*OPC?"]


def test_operation_complete_wait_times_out_within_the_given_time(rig, family):
    server = rig.server("stage", busy_s=2.0)
    stage = rig.device(family, "rotation_stage", server, {"commands": {"busy": None}})
    stage.move_to_deg(5.0)
    start = time.monotonic()
    with pytest.raises(InstrumentTimeout):
        stage.wait_settled(0.2)
    assert time.monotonic() - start < 0.8


def test_home_waits_until_the_stage_is_at_zero(rig, family):
    server = rig.server("stage", busy_s=0.05)
    stage = rig.device(family, "rotation_stage", server)
    stage.move_to_deg(30.0)
    stage.wait_settled(2.0)
    stage.home()
    assert stage.position_deg() == 0.0


def test_speed_comes_from_the_bench_limits_before_the_instrument(rig, family):
    server = rig.server("stage")
    from_bench = rig.device(family, "rotation_stage", server, limits={"speed_deg_per_s": 5.0})
    from_instrument = rig.device(family, "rotation_stage", server)
    from_instrument.connect()
    assert from_bench.speed_deg_per_s == 5.0
    assert from_instrument.speed_deg_per_s == 20.0


def test_unknown_speed_names_the_bench_key_to_set(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server, {"commands": {"speed": None}})
    stage.connect()
    with pytest.raises(NotSupported, match="limits.speed_deg_per_s"):
        stage.speed_deg_per_s


def test_backlash_comes_from_limits_or_options(rig, family):
    server = rig.server("stage")
    by_limits = rig.device(family, "rotation_stage", server, limits={"backlash_deg": 0.3})
    by_options = rig.device(family, "rotation_stage", server, {"backlash_deg": 0.2})
    assert by_limits.backlash_deg == 0.3 and by_options.backlash_deg == 0.2


def test_reply_pattern_reads_a_decorated_position(rig, family):
    server = rig.server("stage", position_format="POS={:.3f} deg", busy_s=0.0)
    stage = rig.device(
        family, "rotation_stage", server, {"reply_pattern": {"position": r"POS=\s*(\S+)"}}
    )
    stage.move_to_deg(12.5)
    assert stage.wait_settled(1.0) == 12.5


def test_decorated_position_without_a_pattern_is_a_bad_reply(rig, family):
    server = rig.server("stage", position_format="POS={:.3f} deg")
    stage = rig.device(family, "rotation_stage", server)
    with pytest.raises(BadReply, match="POS=0.000 deg"):
        stage.position_deg()


def test_error_queue_entry_after_a_move_is_a_device_fault(rig, family):
    server = rig.server("stage", limits_deg=(-170.0, 170.0))
    stage = rig.device(
        family,
        "rotation_stage",
        server,
        {"check_errors": True, "commands": {"limits": None}},
        limits={"min_deg": -360.0, "max_deg": 360.0},
        name="hwp",
    )
    with pytest.raises(DeviceFault) as caught:
        stage.move_to_deg(200.0)
    assert "-222" in str(caught.value) and "ANGL 200.0000" in str(caught.value)


def test_errors_queued_before_connect_are_cleared_not_blamed_on_a_move(rig, family):
    server = rig.server("stage")
    server.instrument.errors.append('-113,"Undefined header"')
    stage = rig.device(family, "rotation_stage", server, {"check_errors": True})
    stage.move_to_deg(10.0)
    assert stage.wait_settled(1.0) == 10.0


def test_custom_templates_and_constant_fields_shape_the_commands(rig, family):
    server = rig.server("stage")
    stage = rig.device(
        family,
        "rotation_stage",
        server,
        {"commands": {"move": "ANGL {angle_deg:.{digits}f}"}, "fields": {"digits": 2}},
    )
    stage.move_to_deg(1.234)
    stage.position_deg()  # a query: the server has handled every earlier command
    assert server.commands("ANGL") == ["ANGL 1.23"]


def test_init_commands_are_sent_after_the_identity_check(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server, {"init_commands": ["*CLS"]})
    stage.connect()
    assert server.received[:2] == ["*IDN?", "*CLS"]
