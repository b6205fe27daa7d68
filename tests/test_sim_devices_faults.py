"""Fault injection in process: spec validation, each kind at a time and with a probability, determinism."""

from __future__ import annotations

import math

import numpy as np
import pytest

from lightloom.drivers.errors import BadReply, ConnectionLost, DeviceFault, InstrumentTimeout
from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import SimActuator, SimPowerMeter, SimRotationStage, move_time_s
from lightloom.simulators.faults import FaultInjector, FaultSpecError, garble_reply, parse_faults


def meter_with(clock: SimClock, faults: list[dict], seed: int = 5) -> SimPowerMeter:
    injector = FaultInjector(faults, np.random.default_rng(seed))
    return SimPowerMeter("pm_hH", clock, lambda: 1e-4, np.random.default_rng(0), faults=injector)


def outcomes(pm: SimPowerMeter, n: int, dt: float = 0.0) -> list[str]:
    """The result of ``n`` readings ('ok' or the error class name), spending ``dt`` between them."""
    out = []
    for _ in range(n):
        try:
            pm.read_power_w(0.1)
            out.append("ok")
        except (InstrumentTimeout, BadReply, ConnectionLost) as exc:
            out.append(type(exc).__name__)
        pm.clock.sleep(dt)
    return out


@pytest.mark.parametrize(
    "item, message",
    [
        ({"device": "pm", "kind": "melt", "at_s": 1}, "'kind' must be one of"),
        ({"device": "pm", "kind": "timeout", "at_s": 1, "when": 2}, "unknown key"),
        ({"kind": "timeout", "at_s": 1}, "needs 'device'"),
        ({"device": "pm", "kind": "timeout"}, "give 'at_s'"),
        ({"device": "pm", "kind": "timeout", "probability": 1.5}, r"in \[0, 1\]"),
        ({"kind": "beam_loss", "probability": 0.1}, "beam_loss takes 'at_s'"),
        ({"device": "pm", "kind": "timeout", "at_s": 1, "count": 0}, "integer >= 1"),
    ],
)
def test_bad_fault_specs_are_refused_with_the_entry_and_key(item: dict, message: str) -> None:
    with pytest.raises(FaultSpecError, match=message):
        parse_faults([{"kind": "beam_loss", "at_s": 0.0}, item])
    with pytest.raises(FaultSpecError, match="fault #2"):
        parse_faults([{"kind": "beam_loss", "at_s": 0.0}, item])


def test_a_fault_naming_a_device_not_on_the_bench_is_refused() -> None:
    injector = FaultInjector([{"device": "pm_x", "kind": "drop", "at_s": 1.0}])
    with pytest.raises(FaultSpecError, match="'pm_x', which is not on the bench"):
        injector.validate_devices(["pm_hH", "hwp"])


def test_probability_faults_without_a_generator_are_refused() -> None:
    with pytest.raises(FaultSpecError, match="random generator"):
        FaultInjector([{"device": "pm", "kind": "timeout", "probability": 0.1}])


def test_timeout_at_a_time_hits_the_next_operation_only() -> None:
    pm = meter_with(SimClock(0.0), [{"device": "pm_hH", "kind": "timeout", "at_s": 0.35}])
    # readings start at 0, 0.1, 0.2, 0.3 s; the one at 0.4 s is the first after at_s
    assert outcomes(pm, 6) == ["ok"] * 4 + ["InstrumentTimeout", "ok"]


def test_timeout_with_a_count_hits_that_many_operations() -> None:
    pm = meter_with(SimClock(0.0), [{"device": "pm_hH", "kind": "timeout", "at_s": 0.0, "count": 3}])
    assert outcomes(pm, 5) == ["InstrumentTimeout"] * 3 + ["ok", "ok"]


def test_timeout_window_hits_every_operation_inside_it() -> None:
    pm = meter_with(SimClock(0.0), [{"device": "pm_hH", "kind": "timeout", "at_s": 1.0, "duration_s": 1.0}])
    # operations start at 0, 0.5 (a reading spends 0.1 s, then 0.4 s pass), 1.0, 1.4, 1.8, 2.2 s
    assert outcomes(pm, 6, dt=0.4) == ["ok", "ok"] + ["InstrumentTimeout"] * 3 + ["ok"]


def test_garbled_reply_raises_bad_reply() -> None:
    pm = meter_with(SimClock(0.0), [{"device": "pm_hH", "kind": "garbled", "at_s": 0.0}])
    assert outcomes(pm, 2) == ["BadReply", "ok"]


def test_garbled_text_parses_as_no_number() -> None:
    for reply in ("1.234567e-04", "1", "0", "-360,360", "OPEN"):
        garbled = garble_reply(reply)
        assert garbled != reply and "\n" not in garbled and garbled.isprintable()
        with pytest.raises(ValueError):
            float(garbled)


def test_drop_raises_connection_lost_until_reconnect() -> None:
    pm = meter_with(SimClock(0.0), [{"device": "pm_hH", "kind": "drop", "at_s": 0.0}])
    assert outcomes(pm, 3) == ["ConnectionLost"] * 3
    pm.reconnect()
    assert outcomes(pm, 2) == ["ok", "ok"]


def test_fault_on_another_device_leaves_this_one_alone() -> None:
    pm = meter_with(SimClock(0.0), [{"device": "apd", "kind": "timeout", "at_s": 0.0, "count": 5}])
    assert outcomes(pm, 3) == ["ok"] * 3


def test_probability_fault_rate_matches_the_probability() -> None:
    pm = meter_with(SimClock(0.0), [{"device": "pm_hH", "kind": "timeout", "probability": 0.2}])
    n = 2000
    failures = outcomes(pm, n).count("InstrumentTimeout")
    assert abs(failures - 0.2 * n) < 4 * math.sqrt(n * 0.2 * 0.8)  # binomial, 4 sigma


def test_probability_faults_are_deterministic_given_the_seed() -> None:
    spec = [{"device": "pm_hH", "kind": "garbled", "probability": 0.3}]
    a = outcomes(meter_with(SimClock(0.0), spec, seed=11), 60)
    b = outcomes(meter_with(SimClock(0.0), spec, seed=11), 60)
    c = outcomes(meter_with(SimClock(0.0), spec, seed=12), 60)
    assert a == b
    assert a != c


def test_probability_fault_count_caps_the_occurrences() -> None:
    pm = meter_with(SimClock(0.0), [{"device": "pm_hH", "kind": "drop", "probability": 1.0, "count": 2}])
    result = []
    for _ in range(4):
        result += outcomes(pm, 1)
        pm.reconnect()
    assert result == ["ConnectionLost", "ConnectionLost", "ok", "ok"]


def stuck_stage(clock: SimClock, faults: list[dict], seed: int = 0) -> SimRotationStage:
    injector = FaultInjector(faults, np.random.default_rng(seed))
    return SimRotationStage("hwp", clock, speed_deg_per_s=20.0, acceleration_deg_per_s2=40.0, settle_s=0.1, faults=injector)


def test_stuck_stage_freezes_readback_and_optic_then_resumes() -> None:
    clock = SimClock(0.0)
    s = stuck_stage(clock, [{"device": "hwp", "kind": "stuck", "at_s": 1.0, "duration_s": 3.0}])
    s.move_to_deg(90.0)
    clock.advance_to(1.0)
    frozen = s.position_deg()
    clock.advance_to(3.5)
    assert s.position_deg() == frozen == 15.0  # 0.5 s ramp to 20 deg/s, then 0.5 s cruise
    assert s.optical_angle_deg() == frozen
    assert s.is_busy()
    assert s.wait_settled(60.0) == 90.0
    assert clock.now() == pytest.approx(move_time_s(90.0, 20.0, 40.0) + 3.0 + 0.1)


def test_stuck_stage_wait_settled_reports_a_stall_at_its_timeout() -> None:
    clock = SimClock(0.0)
    s = stuck_stage(clock, [{"device": "hwp", "kind": "stuck", "at_s": 0.5}])
    s.move_to_deg(45.0)
    with pytest.raises(DeviceFault, match="stalled"):
        s.wait_settled(10.0)
    assert clock.now() == 10.0
    with pytest.raises(DeviceFault, match="stalled"):
        s.wait_settled(10.0)
    assert s.optical_angle_deg() == s.position_deg() == pytest.approx(5.0)


def test_stuck_with_probability_sticks_a_move_for_its_duration() -> None:
    clock = SimClock(0.0)
    s = stuck_stage(clock, [{"device": "hwp", "kind": "stuck", "probability": 1.0, "duration_s": 2.0, "count": 1}])
    s.move_to_deg(10.0)
    clock.advance_to(1.9)
    assert s.position_deg() == 0.0
    s.wait_settled(60.0)
    assert clock.now() == pytest.approx(2.0 + move_time_s(10.0, 20.0, 40.0) + 0.1)
    t0 = clock.now()
    s.move_to_deg(20.0)  # the count is used up: this move runs normally
    s.wait_settled(60.0)
    assert clock.now() - t0 == pytest.approx(move_time_s(10.0, 20.0, 40.0) + 0.1)


def test_stuck_actuator_never_switches_while_stuck() -> None:
    clock = SimClock(0.0)
    injector = FaultInjector([{"device": "converter", "kind": "stuck", "at_s": 0.0}])
    conv = SimActuator("converter", clock, switch_s=0.5, faults=injector)
    conv.set_state("out")
    with pytest.raises(DeviceFault, match="stalled"):
        conv.wait_settled(5.0)
    assert conv.optical_state() == "in"


def test_beam_loss_factor_drops_for_its_duration() -> None:
    injector = FaultInjector([{"kind": "beam_loss", "at_s": 12.0, "duration_s": 5.0, "residual": 0.001}])
    assert injector.beam_factor(11.9) == 1.0
    assert injector.beam_factor(12.0) == 0.001
    assert injector.beam_factor(16.9) == 0.001
    assert injector.beam_factor(17.0) == 1.0
    np.testing.assert_array_equal(injector.beam_factor(np.array([0.0, 14.0, 20.0])), [1.0, 0.001, 1.0])


def test_beam_loss_without_duration_lasts_for_ever() -> None:
    injector = FaultInjector([{"kind": "beam_loss", "at_s": 1.0}])
    assert injector.beam_factor(1e6) == 0.0


def test_physics_accessors_do_not_consume_link_faults() -> None:
    clock = SimClock(0.0)
    s = stuck_stage(clock, [{"device": "hwp", "kind": "timeout", "at_s": 0.0}])
    for _ in range(5):
        s.optical_angle_deg()
        s.motor_angle_deg()
        s.pending_s()
    with pytest.raises(InstrumentTimeout):
        s.position_deg()
    assert s.position_deg() == 0.0


def test_fired_faults_are_recorded_as_events() -> None:
    pm = meter_with(SimClock(0.0), [{"device": "pm_hH", "kind": "timeout", "at_s": 0.25}])
    outcomes(pm, 4)
    (event,) = pm.faults.events  # type: ignore[union-attr]
    assert (event.device, event.kind, event.t_s) == ("pm_hH", "timeout", pytest.approx(0.3))
