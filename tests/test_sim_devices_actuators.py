"""Simulated actuator and shutter, identities and the link state shared by every device."""

from __future__ import annotations

import numpy as np
import pytest

from lightloom.drivers.errors import ConnectionLost, InstrumentTimeout, LimitViolation
from lightloom.drivers.interfaces import DiscreteActuator, PhotonCounter, PowerMeter, RotationStage, Shutter
from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import SimActuator, SimPhotonCounter, SimPowerMeter, SimRotationStage, SimShutter


def test_actuator_switch_takes_switch_time_and_the_beam_sees_the_old_state_until_done() -> None:
    clock = SimClock(0.0)
    conv = SimActuator("converter", clock, states=("out", "in"), switch_s=0.8)
    conv.set_state("in")
    clock.advance_to(0.5)
    assert conv.state() == "out"
    assert conv.optical_state() == "out"
    assert conv.is_busy()
    assert conv.wait_settled(5.0) == "in"
    assert clock.now() == pytest.approx(0.8)
    assert not conv.is_busy()


def test_actuator_refuses_an_unknown_state() -> None:
    conv = SimActuator("converter", SimClock(0.0))
    with pytest.raises(LimitViolation, match="accepts in, out"):
        conv.set_state("half")
    assert conv.state() == "in"


def test_actuator_wait_shorter_than_the_switch_times_out() -> None:
    clock = SimClock(0.0)
    conv = SimActuator("converter", clock, switch_s=2.0)
    conv.set_state("out")
    with pytest.raises(InstrumentTimeout):
        conv.wait_settled(0.5)
    assert clock.now() == 0.5


def test_shutter_opens_and_closes_spending_its_switch_time() -> None:
    clock = SimClock(0.0)
    shutter = SimShutter("shutter", clock, switch_s=0.02)
    assert not shutter.is_open()
    shutter.open()
    assert shutter.is_open() and shutter.transmits()
    assert clock.now() == pytest.approx(0.02)
    shutter.close_beam()
    shutter.close_beam()
    assert not shutter.is_open()
    assert clock.now() == pytest.approx(0.04)


def test_shutter_reset_closes_it() -> None:
    shutter = SimShutter("shutter", SimClock(0.0), initially_open=True)
    shutter.reset()
    assert not shutter.transmits()


def test_every_device_implements_its_interface_and_names_itself() -> None:
    clock = SimClock(0.0)
    rng = np.random.default_rng(0)
    devices = [
        (SimRotationStage("qwp", clock), RotationStage, "lightloom,SIM-STAGE,qwp,0.1"),
        (SimActuator("converter", clock), DiscreteActuator, "lightloom,SIM-ACTUATOR,converter,0.1"),
        (SimShutter("shutter", clock), Shutter, "lightloom,SIM-SHUTTER,shutter,0.1"),
        (SimPowerMeter("pm_hH", clock, lambda: 0.0, rng), PowerMeter, "lightloom,SIM-POWERMETER,pm_hH,0.1"),
        (SimPhotonCounter("apd", clock, lambda: 0.0, rng, counts_per_w=1.0), PhotonCounter, "lightloom,SIM-COUNTER,apd,0.1"),
    ]
    for device, interface, idn in devices:
        assert isinstance(device, interface)
        assert device.identity() == idn


def test_a_name_with_a_comma_is_refused() -> None:
    with pytest.raises(ValueError, match="commas"):
        SimShutter("shut,ter", SimClock(0.0))


def test_a_closed_device_raises_connection_lost_until_connect() -> None:
    shutter = SimShutter("shutter", SimClock(0.0))
    shutter.close()
    shutter.close()
    with pytest.raises(ConnectionLost, match="connect"):
        shutter.is_open()
    shutter.connect()
    assert shutter.is_open() is False
