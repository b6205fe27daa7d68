"""Simulated rotation stage: trapezoidal kinematics, read-back during moves, backlash, limits, homing."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lightloom.drivers.errors import InstrumentTimeout, LimitViolation
from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import (
    SimRotationStage,
    home_time_s,
    move_time_s,
    profile_displacement_deg,
)

SPEED, ACCEL = 20.0, 40.0  # deg/s, deg/s^2: moves longer than v^2/a = 10 deg reach cruise speed


def profile_area_deg(total_s: float, v: float, a: float, n: int = 200_001) -> float:
    """Distance covered by the speed profile min(a t, v, a (T - t)) over [0, T], by quadrature."""
    t = np.linspace(0.0, total_s, n)
    speed = np.minimum(np.minimum(a * t, v), a * (total_s - t))
    return float(np.trapezoid(speed, t))


def stage(clock: SimClock, **kw: float) -> SimRotationStage:
    params = dict(speed_deg_per_s=SPEED, acceleration_deg_per_s2=ACCEL, settle_s=0.1)
    params.update(kw)
    return SimRotationStage("hwp", clock, **params)  # type: ignore[arg-type]


@pytest.mark.parametrize("distance", [2.0, 10.0, 90.0])
def test_speed_profile_of_move_time_covers_the_distance(distance: float) -> None:
    # The trapezoid (ramp at a, cap at v) run for move_time_s covers exactly the distance:
    # quadrature of the profile's definition (common practice, no source).
    total = move_time_s(distance, SPEED, ACCEL)
    assert profile_area_deg(total, SPEED, ACCEL) == pytest.approx(distance, rel=1e-6)
    assert profile_area_deg(total * 0.99, SPEED, ACCEL) < distance


def test_short_move_has_a_triangular_profile() -> None:
    d = 5.0  # < v^2/a: the axis never reaches cruise speed
    total = move_time_s(d, SPEED, ACCEL)
    assert total == pytest.approx(2 * math.sqrt(d / ACCEL))
    h = 1e-6
    peak_speed = (profile_displacement_deg(d, SPEED, ACCEL, total / 2 + h) - profile_displacement_deg(d, SPEED, ACCEL, total / 2 - h)) / (2 * h)
    assert peak_speed == pytest.approx(math.sqrt(d * ACCEL), rel=1e-4)
    assert peak_speed < SPEED


@settings(max_examples=60, deadline=None)
@given(
    d=st.floats(-400, 400).filter(lambda x: abs(x) > 1e-6),
    v=st.floats(0.5, 100),
    a=st.floats(0.5, 500),
)
def test_profile_is_monotonic_and_ends_on_target_at_move_time(d: float, v: float, a: float) -> None:
    total = move_time_s(d, v, a)
    ts = np.linspace(0, total, 41)
    xs = np.array([profile_displacement_deg(d, v, a, t) for t in ts]) * np.sign(d)
    assert np.all(np.diff(xs) >= -1e-9)
    assert profile_displacement_deg(d, v, a, total) == d
    assert abs(profile_displacement_deg(d, v, a, total * (1 - 1e-9)) - d) < 1e-6 * max(1.0, abs(d))


def test_instant_clock_move_spends_exactly_move_plus_settle_time() -> None:
    clock = SimClock(0.0)
    s = stage(clock)
    s.move_to_deg(90.0)
    assert s.wait_settled(60.0) == 90.0
    assert clock.now() == move_time_s(90.0, SPEED, ACCEL) + 0.1


def test_readback_during_a_move_is_the_profile_position() -> None:
    clock = SimClock(0.0)
    s = stage(clock)
    s.move_to_deg(-60.0)
    for t in (0.2, 1.0, 2.9):
        clock.advance_to(t)
        assert s.position_deg() == pytest.approx(profile_displacement_deg(-60.0, SPEED, ACCEL, t))
    assert s.is_busy()


def test_scaled_clock_move_takes_scaled_wall_time() -> None:
    clock = SimClock(0.01)
    s = stage(clock)
    expected_wall = (move_time_s(90.0, SPEED, ACCEL) + 0.1) * 0.01  # 51 ms
    wall0 = time.perf_counter()
    s.move_to_deg(90.0)
    s.wait_settled(60.0)
    elapsed = time.perf_counter() - wall0
    assert expected_wall - 1e-3 <= elapsed <= expected_wall + 0.03
    assert s.position_deg() == 90.0


def test_opposite_approaches_differ_by_the_backlash() -> None:
    clock = SimClock(0.0)
    s = stage(clock, backlash_deg=0.4)
    s.move_to_deg(10.0)
    s.wait_settled(60)
    from_below = s.optical_angle_deg()
    s.move_to_deg(50.0)
    s.wait_settled(60)
    s.move_to_deg(10.0)
    s.wait_settled(60)
    from_above = s.optical_angle_deg()
    assert s.position_deg() == 10.0
    assert from_above - from_below == pytest.approx(0.4)


def test_same_side_approaches_give_identical_optical_angles() -> None:
    clock = SimClock(0.0)
    s = stage(clock, backlash_deg=0.4)
    angles = []
    for start in (-20.0, 5.0):
        s.move_to_deg(start)
        s.wait_settled(60)
        s.move_to_deg(30.0)
        s.wait_settled(60)
        angles.append(s.optical_angle_deg())
    assert angles[0] == angles[1] == 30.0


def test_optic_stays_put_while_the_motor_takes_up_the_play_after_a_reversal() -> None:
    clock = SimClock(0.0)
    s = stage(clock, backlash_deg=0.5)
    s.move_to_deg(20.0)
    s.wait_settled(60)
    s.move_to_deg(19.7)  # reversal by less than the play
    s.wait_settled(60)
    assert s.optical_angle_deg() == 20.0
    s.move_to_deg(19.0)  # past the play: now dragged, lagging by the backlash
    s.wait_settled(60)
    assert s.optical_angle_deg() == pytest.approx(19.5)


def test_move_outside_limits_raises_and_does_not_start() -> None:
    clock = SimClock(0.0)
    s = stage(clock, limits_deg=(-10.0, 190.0))
    with pytest.raises(LimitViolation, match="outside the travel limits"):
        s.move_to_deg(200.0)
    assert not s.is_busy()
    assert s.position_deg() == 0.0


def test_home_ends_at_zero_with_the_play_taken_up_from_below() -> None:
    clock = SimClock(0.0)
    s = stage(clock, backlash_deg=0.5)
    s.move_to_deg(45.0)
    s.wait_settled(60)
    s.move_to_deg(30.0)  # last approach from above: optic at motor + backlash
    s.wait_settled(60)
    t0 = clock.now()
    s.home()
    assert s.position_deg() == 0.0
    assert s.optical_angle_deg() == 0.0
    assert clock.now() - t0 == pytest.approx(home_time_s(30.0, SPEED, ACCEL, backoff_deg=1.0) + 0.1)


def test_wait_settled_times_out_when_the_move_is_longer() -> None:
    clock = SimClock(0.0)
    s = stage(clock)
    s.move_to_deg(300.0)
    with pytest.raises(InstrumentTimeout, match="not settled"):
        s.wait_settled(1.0)
    assert clock.now() == 1.0
    assert s.is_busy()


def test_settle_time_keeps_the_stage_busy_after_the_profile_ends() -> None:
    clock = SimClock(0.0)
    s = stage(clock, settle_s=0.5)
    s.move_to_deg(90.0)
    clock.advance_to(move_time_s(90.0, SPEED, ACCEL) + 0.25)
    assert s.position_deg() == 90.0
    assert s.is_busy()
    assert s.pending_s() == pytest.approx(0.25)
