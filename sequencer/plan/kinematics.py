"""Stage kinematics (pure): trapezoidal move times, backlash-aware approach, periodic plate angles.

The single source of truth for how long a move takes: the dry-run estimate, the least-motion
ordering and the simulated stages all use these functions.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class StageKinematics:
    """Motion parameters of one rotation stage (deg, deg/s, deg/s^2, s)."""

    speed_deg_per_s: float
    acceleration_deg_per_s2: float
    backlash_deg: float = 0.0
    settle_s: float = 0.0
    min_deg: float = -math.inf
    max_deg: float = math.inf
    overhead_s: float = 0.0


def move_time_s(distance_deg: float, speed_deg_per_s: float, acceleration_deg_per_s2: float) -> float:
    """Duration of a point-to-point move with a trapezoidal (or triangular) velocity profile, s.

    Accelerates at ``acceleration_deg_per_s2`` up to ``speed_deg_per_s``, cruises, decelerates;
    short moves never reach cruise speed and take 2 sqrt(d / a). Zero distance takes no time.
    """
    d = abs(distance_deg)
    if d == 0.0:
        return 0.0
    v, a = speed_deg_per_s, acceleration_deg_per_s2
    if not math.isfinite(a) or a <= 0:
        return d / v
    d_ramp = v * v / a  # distance spent accelerating and decelerating to and from v
    if d <= d_ramp:
        return 2.0 * math.sqrt(d / a)
    return 2.0 * v / a + (d - d_ramp) / v


def approach_path(start_deg: float, target_deg: float, backlash_deg: float) -> tuple[float, ...]:
    """Waypoints that make every move end travelling in the positive direction.

    A move in the negative direction overshoots by twice the backlash and comes back, so the gear
    play is always taken up on the same side and a target means the same optical angle whatever the
    previous position.
    """
    if backlash_deg <= 0.0 or target_deg >= start_deg - 1e-12:
        return (target_deg,)
    return (target_deg - 2.0 * backlash_deg, target_deg)


def leg_times_s(start_deg: float, target_deg: float, k: StageKinematics) -> tuple[float, ...]:
    """Duration of each leg of approach_path (move, command overhead and settling), s.

    The runner moves every stage's first leg at once, waits for all of them, then every stage's
    second leg: a transition takes the sum over legs of the slowest stage's leg.
    """
    if abs(target_deg - start_deg) < 1e-12:
        return ()
    out, here = [], start_deg
    for waypoint in approach_path(start_deg, target_deg, k.backlash_deg):
        out.append(
            move_time_s(waypoint - here, k.speed_deg_per_s, k.acceleration_deg_per_s2) + k.overhead_s + k.settle_s
        )
        here = waypoint
    return tuple(out)


def path_time_s(start_deg: float, target_deg: float, k: StageKinematics) -> float:
    """Time for one stage to reach ``target_deg`` from ``start_deg`` along approach_path, s."""
    return float(sum(leg_times_s(start_deg, target_deg, k)))


def path_travel_deg(start_deg: float, target_deg: float, backlash_deg: float) -> float:
    """Total angle travelled along approach_path, deg."""
    total, here = 0.0, start_deg
    for waypoint in approach_path(start_deg, target_deg, backlash_deg):
        total += abs(waypoint - here)
        here = waypoint
    return total


def nearest_equivalent_deg(angle_deg: float, current_deg: float, period_deg: float, k: StageKinematics) -> float:
    """Among angle + n * period inside the travel limits (with room for the backlash overshoot),
    the one reached fastest from ``current_deg``.
    """
    lo, hi = k.min_deg + 2.0 * k.backlash_deg, k.max_deg
    base = angle_deg - period_deg * math.floor((angle_deg - current_deg) / period_deg)
    candidates = [base + n * period_deg for n in range(-3, 3)]
    inside = [c for c in candidates if lo - 1e-9 <= c <= hi + 1e-9]
    if not inside:
        inside = [c for c in candidates if k.min_deg - 1e-9 <= c <= k.max_deg + 1e-9]
    if not inside:
        return angle_deg
    return min(inside, key=lambda c: (path_time_s(current_deg, c, k), abs(c)))


def _move_times_s(distance_deg: np.ndarray, k: StageKinematics) -> np.ndarray:
    """move_time_s of every distance at once (same arithmetic, element by element), s."""
    d = np.abs(distance_deg)
    v, a = k.speed_deg_per_s, k.acceleration_deg_per_s2
    if not math.isfinite(a) or a <= 0:
        out = d / v
    else:
        d_ramp = v * v / a
        out = np.where(d <= d_ramp, 2.0 * np.sqrt(d / a), 2.0 * v / a + (d - d_ramp) / v)
    return np.where(d == 0.0, 0.0, out)


def leg_times_matrix_s(
    start_deg: np.ndarray, angle_deg: np.ndarray, period_deg: float, k: StageKinematics
) -> tuple[np.ndarray, np.ndarray]:
    """Both legs of the move from every start to the nearest equivalent of every angle, s.

    ``start_deg`` (m,) and ``angle_deg`` (n,) give (m, n) arrays (first leg, second leg; 0 where a
    move has one leg or none), equal element by element to leg_times_s(start,
    nearest_equivalent_deg(angle, start, period_deg, k), k): the least-motion search needs every
    transition between the settings, and this is the same rule without a Python loop per pair.
    """
    s = np.asarray(start_deg, dtype=float)[:, None, None]
    angle = np.asarray(angle_deg, dtype=float)[None, :, None]
    base = angle - period_deg * np.floor((angle - s) / period_deg)
    cand = base + np.arange(-3, 3)[None, None, :] * period_deg
    lo, hi = k.min_deg + 2.0 * k.backlash_deg, k.max_deg
    inside = (lo - 1e-9 <= cand) & (cand <= hi + 1e-9)
    fallback = (k.min_deg - 1e-9 <= cand) & (cand <= k.max_deg + 1e-9)
    allowed = np.where(inside.any(axis=2, keepdims=True), inside, fallback)
    t1, t2 = _legs(np.broadcast_to(s, cand.shape), cand, k)
    total = np.where(allowed, 0.0 + t1 + t2, np.inf)
    # min over candidates by (time, |angle|), first in candidate order on a tie
    best_t = total.min(axis=2, keepdims=True)
    key = np.where(total == best_t, np.abs(cand), np.inf)
    pick = np.argmin(key, axis=2)[..., None]
    target = np.take_along_axis(cand, pick, axis=2)[..., 0]
    target = np.where(allowed.any(axis=2), target, angle[..., 0] + 0.0 * s[..., 0])
    return _legs(s[..., 0], target, k)


def _legs(start: np.ndarray, target: np.ndarray, k: StageKinematics) -> tuple[np.ndarray, np.ndarray]:
    """leg_times_s for arrays of starts and targets: (first leg, second leg), 0 for absent legs."""
    still = np.abs(target - start) < 1e-12
    two = (k.backlash_deg > 0.0) & ~(target >= start - 1e-12)
    first_stop = np.where(two, target - 2.0 * k.backlash_deg, target)
    first = _move_times_s(first_stop - start, k) + k.overhead_s + k.settle_s
    second = _move_times_s(target - first_stop, k) + k.overhead_s + k.settle_s
    return np.where(still, 0.0, first), np.where(still | ~two, 0.0, second)
