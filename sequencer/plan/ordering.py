"""Ordering of analyzer settings: as written, shuffled with a seed, or least motion.

Least motion solves a small open travelling-salesman problem on the move time between settings
(stages move at the same time, so a transition costs the slowest stage's backlash-aware move, plus
the converter switch), by nearest-neighbour construction then 2-opt and or-opt improvement.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from lightloom.sequencer.plan.kinematics import leg_times_s, nearest_equivalent_deg
from lightloom.sequencer.optics.analyzer import CONVERTER
from lightloom.sequencer.model.elements import COLUMN
from lightloom.sequencer.model.vocabulary import ORDERS

if TYPE_CHECKING:
    from lightloom.sequencer.plan.compiler import TableModel

# Angles that give the same operator: plates and the converter stage repeat every 180 deg whatever
# their retardance; the image rotator (a reflection) every 90 deg.
PERIOD_DEG: dict[str, float] = {
    "quarter_wave_plate": 180.0, "half_wave_plate": 180.0, "converter_angle": 180.0, "image_rotator": 90.0,
}


def transition_time_s(a: np.ndarray, b: np.ndarray, table: "TableModel") -> float:
    """Time to go from settings ``a`` to settings ``b`` with every stage moving at once, s.

    Stages move leg by leg together (see kinematics.leg_times_s); the converter switches while the
    stages move.
    """
    legs: list[float] = []
    for name, k in table.kinematics.items():
        i = COLUMN[name]
        if math.isnan(a[i]) or math.isnan(b[i]):
            continue
        target = nearest_equivalent_deg(b[i], a[i], PERIOD_DEG[name], k)
        for j, leg in enumerate(leg_times_s(a[i], target, k)):
            if j == len(legs):
                legs.append(leg)
            else:
                legs[j] = max(legs[j], leg)
    t = float(sum(legs))
    if not (math.isnan(a[CONVERTER]) or math.isnan(b[CONVERTER])) and a[CONVERTER] != b[CONVERTER]:
        t = max(t, table.converter_switch_s)
    return t


def _best_variants(
    order: list[int], block: list[list[np.ndarray]], start: list[np.ndarray], ref_every: int
) -> tuple[float, list[int]]:
    """For a fixed order, the variant of every setting that minimises the total time (Viterbi).

    ``block[i][j]`` (V_i, V_j) holds the transition times between the variants of settings i and
    j, ``start[i]`` (V_i,) those from the origin. With references, the reference setting is the
    first setting measured (in the variant chosen for it); the compiler returns to it at the
    start, after every ``ref_every`` settings and at the end.
    """
    first = order[0]
    candidates = range(len(start[first])) if ref_every > 0 else [None]
    best_total, best_path = math.inf, [0] * len(order)
    for v0 in candidates:
        t = start[first].copy()
        if v0 is not None:
            t = np.full_like(t, math.inf)
            t[v0] = start[first][v0]
        back: list[np.ndarray] = []
        for k in range(1, len(order)):
            i, j = order[k - 1], order[k]
            if v0 is not None and k % ref_every == 0:
                step = block[i][first][:, v0 : v0 + 1] + block[first][j][v0 : v0 + 1, :]
            else:
                step = block[i][j]
            total = t[:, None] + step
            arg = np.argmin(total, axis=0)
            back.append(arg)
            t = total[arg, np.arange(total.shape[1])]
        if v0 is not None:
            t = t + block[order[-1]][first][:, v0]
        end = int(np.argmin(t))
        if float(t[end]) < best_total:
            best_total = float(t[end])
            path, w = [end], end
            for arg in reversed(back):
                w = int(arg[w])
                path.append(w)
            best_path = path[::-1]
    return best_total, best_path


def least_motion_order(
    variants: list[np.ndarray], table: "TableModel", origin: np.ndarray, ref_every: int = 0
) -> tuple[list[int], list[int]]:
    """An order of the settings, and a variant of each, with a short total transition time.

    ``variants[k]`` (V_k, 5) are interchangeable settings measuring the same projectors. With
    ``ref_every`` > 0 the cost includes the returns to the reference setting (the first setting
    measured) that the compiler inserts. Nearest-neighbour construction, then 2-opt and or-opt moves, each
    order scored with its best variants.
    """
    n = len(variants)
    if n <= 1:
        return list(range(n)), [0] * n
    block = [
        [np.array([[transition_time_s(a, b, table) for b in variants[j]] for a in variants[i]]) for j in range(n)]
        for i in range(n)
    ]
    start = [np.array([transition_time_s(origin, a, table) for a in variants[i]]) for i in range(n)]
    cost = np.array([[block[i][j].min() for j in range(n)] for i in range(n)])
    memo: dict[tuple[int, ...], tuple[float, list[int]]] = {}

    def total(order: list[int]) -> float:
        key = tuple(order)
        if key not in memo:
            memo[key] = _best_variants(order, block, start, ref_every)
        return memo[key][0]

    best_order, best_cost = None, math.inf
    for first in range(n):
        order = [first]
        left = set(range(n)) - {first}
        while left:
            here = order[-1]
            nxt = min(left, key=lambda j: (cost[here, j], j))
            order.append(nxt)
            left.remove(nxt)
        c = total(order)
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
                c = total(cand)
                if c < best_cost - 1e-12:
                    order, best_cost, improved = cand, c, True
        for length in (1, 2, 3):
            for i in range(n - length + 1):
                seg = order[i : i + length]
                rest = order[:i] + order[i + length :]
                for j in range(len(rest) + 1):
                    cand = rest[:j] + seg + rest[j:]
                    c = total(cand)
                    if c < best_cost - 1e-12:
                        order, best_cost, improved = cand, c, True
                        break
    path = memo[tuple(order)][1]
    choice = [0] * n
    for k, setting in enumerate(order):
        choice[setting] = path[k]
    return order, choice


def order_settings(
    variants: list[np.ndarray], table: "TableModel", order: str, seed: int, ref_every: int = 0
) -> tuple[list[int], list[int]]:
    """(indices of the settings in the requested order, the variant chosen for each setting).

    "as-written" and "shuffled" use every setting's first variant; "least-motion" chooses.
    """
    n = len(variants)
    if order == "as-written":
        return list(range(n)), [0] * n
    if order == "shuffled":
        return [int(i) for i in np.random.default_rng(seed).permutation(n)], [0] * n
    if order == "least-motion":
        first = variants[0][0]
        origin = np.where(np.isnan(first), np.nan, 0.0)
        return least_motion_order(variants, table, origin, ref_every)
    raise ValueError(f"order must be one of {', '.join(ORDERS)}, got {order!r}")
