"""Template-driven actuator and shutter over pyvisa-py and pyserial, on loopback."""

from __future__ import annotations

import pytest

from lightloom.drivers.errors import BadReply, DeviceFault, LimitViolation
from helpers.fake_server import FAMILIES, Rig


@pytest.fixture
def rig():
    made = Rig()
    yield made
    made.close()


@pytest.fixture(params=FAMILIES)
def family(request):
    return request.param


def test_actuator_states_are_read_from_the_instrument(rig, family):
    server = rig.server("actuator")
    converter = rig.device(family, "actuator", server)
    assert converter.states == ("in", "out")


def test_actuator_moves_and_reports_the_new_state(rig, family):
    server = rig.server("actuator", busy_s=0.05)
    converter = rig.device(family, "actuator", server)
    converter.set_state("in")
    assert converter.wait_settled(1.0) == "in"
    assert server.commands("STATE") == ["STATE in"]


def test_actuator_refuses_a_state_it_does_not_have(rig, family):
    server = rig.server("actuator")
    converter = rig.device(family, "actuator", server, name="mc")
    with pytest.raises(LimitViolation, match="'halfway' is not one of in, out"):
        converter.set_state("halfway")
    converter.state()  # a query: the server has handled every earlier command
    assert server.commands("STATE") == []


def test_bench_states_limit_what_the_actuator_accepts(rig, family):
    server = rig.server("actuator")
    converter = rig.device(family, "actuator", server, limits={"states": ["out"]})
    with pytest.raises(LimitViolation):
        converter.set_state("in")
    converter.state()
    assert server.commands("STATES?") == [] and server.commands("STATE") == []


def test_state_map_translates_bench_names_to_instrument_tokens(rig, family):
    server = rig.server("actuator", busy_s=0.0)
    converter = rig.device(
        family, "actuator", server, {"state_map": {"inserted": "in", "removed": "out"}}
    )
    assert converter.states == ("inserted", "removed")
    converter.set_state("inserted")
    assert converter.wait_settled(1.0) == "inserted"
    assert server.commands("STATE") == ["STATE in"]


def test_actuator_state_outside_its_states_is_a_bad_reply(rig, family):
    server = rig.server("actuator")
    converter = rig.device(family, "actuator", server, {"states": ["up", "down"]})
    with pytest.raises(BadReply, match="'out'"):
        converter.state()


def test_shutter_opens_and_closes_with_read_back(rig, family):
    server = rig.server("shutter")
    shutter = rig.device(family, "shutter", server)
    shutter.open()
    assert shutter.is_open() and server.instrument.shutter_open
    shutter.close_beam()
    assert not shutter.is_open() and not server.instrument.shutter_open
    assert server.commands("SHUT") == ["SHUT OPEN", "SHUT CLOSE"]


def test_close_beam_is_safe_to_repeat(rig, family):
    server = rig.server("shutter")
    shutter = rig.device(family, "shutter", server)
    shutter.close_beam()
    shutter.close_beam()
    assert not server.instrument.shutter_open


def test_shutter_that_stays_open_after_close_is_a_fault_saying_the_beam_may_be_on(rig, family):
    server = rig.server("shutter")
    shutter = rig.device(family, "shutter", server, {"commands": {"close": "SHUT OPEN"}}, name="sh")
    with pytest.raises(DeviceFault, match="beam may be on"):
        shutter.close_beam()


def test_shutter_without_verify_does_not_read_back(rig, family):
    server = rig.server("shutter")
    shutter = rig.device(family, "shutter", server, {"verify": False})
    shutter.close_beam()
    assert not shutter.is_open()
    assert server.commands("SHUT?") == ["SHUT?"]


def test_shutter_state_replies_are_configurable(rig, family):
    server = rig.server("shutter")
    shutter = rig.device(
        family, "shutter", server, {"open_reply": "1", "closed_reply": "0", "verify": False}
    )
    with pytest.raises(BadReply, match="neither '1' nor '0'"):
        shutter.is_open()
