"""Ordering of analyzer settings: as written, shuffled with a seed, or least motion.

Least motion solves a small open travelling-salesman problem on the move time between settings
(stages move at the same time, so a transition costs the slowest stage's backlash-aware move, plus
the converter switch), by nearest-neighbour construction then 2-opt and or-opt improvement.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from sequencer.kinematics import leg_times_s, nearest_equivalent_deg
from sequencer.optics.analyzer import CONVERTER

if TYPE_CHECKING:
    from sequencer.compiler import TableModel

ORDERS = ("as-written", "shuffled", "least-motion")
PERIOD_DEG = 180.0


def transition_time_s(a: np.ndarray, b: np.ndarray, table: "TableModel") -> float:
    """Time to go from settings ``a`` to settings ``b`` with every stage moving at once, s.

    Stages move leg by leg together (see kinematics.leg_times_s); the converter switches while the
    stages move.
    """
    legs: list[float] = []
    for i, k in table.kinematics.items():
        if math.isnan(a[i]) or math.isnan(b[i]):
            continue
        target = nearest_equivalent_deg(b[i], a[i], PERIOD_DEG, k)
        for j, leg in enumerate(leg_times_s(a[i], target, k)):
            if j == len(legs):
                legs.append(leg)
            else:
                legs[j] = max(legs[j], leg)
    t = float(sum(legs))
    if not (math.isnan(a[CONVERTER]) or math.isnan(b[CONVERTER])) and a[CONVERTER] != b[CONVERTER]:
        t = max(t, table.converter_switch_s)
    return t


def _path_cost(order: list[int], cost: np.ndarray, start: np.ndarray) -> float:
    total = start[order[0]]
    for i, j in zip(order[:-1], order[1:]):
        total += cost[i, j]
    return float(total)


def least_motion_order(settings: np.ndarray, table: "TableModel", origin: np.ndarray) -> list[int]:
    """An order of ``settings`` (n, 5) with a short total transition time starting from ``origin``."""
    n = len(settings)
    if n <= 1:
        return list(range(n))
    cost = np.array([[transition_time_s(settings[i], settings[j], table) for j in range(n)] for i in range(n)])
    start = np.array([transition_time_s(origin, settings[j], table) for j in range(n)])
    best_order, best_cost = None, math.inf
    for first in range(n):
        order = [first]
        left = set(range(n)) - {first}
        while left:
            here = order[-1]
            nxt = min(left, key=lambda j: (cost[here, j], j))
            order.append(nxt)
            left.remove(nxt)
        c = _path_cost(order, cost, start)
        if c < best_cost:
            best_order, best_cost = order, c
    assert best_order is not None
    order = best_order
    improved = True
    while improved:
        improved = False
        for i in range(n - 1):
            for j in range(i + 1, n):
                cand = order[:i] + order[i : j + 1][::-1] + order[j + 1 :]
                c = _path_cost(cand, cost, start)
                if c < best_cost - 1e-12:
                    order, best_cost, improved = cand, c, True
        for length in (1, 2, 3):
            for i in range(n - length + 1):
                seg = order[i : i + length]
                rest = order[:i] + order[i + length :]
                for j in range(len(rest) + 1):
                    cand = rest[:j] + seg + rest[j:]
                    c = _path_cost(cand, cost, start)
                    if c < best_cost - 1e-12:
                        order, best_cost, improved = cand, c, True
                        break
    return order


def order_settings(settings: np.ndarray, table: "TableModel", order: str, seed: int) -> list[int]:
    """Indices of ``settings`` in the requested order ("as-written", "shuffled", "least-motion")."""
    n = len(settings)
    if order == "as-written":
        return list(range(n))
    if order == "shuffled":
        return [int(i) for i in np.random.default_rng(seed).permutation(n)]
    if order == "least-motion":
        origin = np.where(np.isnan(settings[0]), np.nan, 0.0)
        return least_motion_order(settings, table, origin)
    raise ValueError(f"order must be one of {', '.join(ORDERS)}, got {order!r}")
