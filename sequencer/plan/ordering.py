"""Ordering of analyzer settings: as written, shuffled with a seed, or least motion.

Least motion solves a small open travelling-salesman problem on the move time between settings
(stages move at the same time, so a transition costs the slowest stage's backlash-aware move, plus
the converter switch), by nearest-neighbour construction then 2-opt and or-opt improvement.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from lightloom.sequencer.plan.kinematics import leg_times_matrix_s
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


def transition_times_s(a: np.ndarray, b: np.ndarray, table: "TableModel") -> np.ndarray:
    """Time to go from each row of settings ``a`` (m, 5) to each row of ``b`` (n, 5), s, (m, n).

    Stages move leg by leg together (see kinematics.leg_times_s): a transition takes, leg by leg,
    the slowest stage's leg; the converter switches while the stages move.
    """
    a, b = np.atleast_2d(a), np.atleast_2d(b)
    first = np.zeros((len(a), len(b)))
    second = np.zeros((len(a), len(b)))
    for name, k in table.kinematics.items():
        i = COLUMN[name]
        moves = ~np.isnan(a[:, i])[:, None] & ~np.isnan(b[:, i])[None, :]
        if not moves.any():
            continue
        t1, t2 = leg_times_matrix_s(np.nan_to_num(a[:, i]), np.nan_to_num(b[:, i]), PERIOD_DEG[name], k)
        first = np.maximum(first, np.where(moves, t1, 0.0))
        second = np.maximum(second, np.where(moves, t2, 0.0))
    t = 0.0 + first + second
    ca, cb = a[:, CONVERTER][:, None], b[:, CONVERTER][None, :]
    switch = ~np.isnan(ca) & ~np.isnan(cb) & (ca != cb)
    return np.where(switch, np.maximum(t, table.converter_switch_s), t)


def transition_time_s(a: np.ndarray, b: np.ndarray, table: "TableModel") -> float:
    """Time to go from settings ``a`` to settings ``b`` (5,) with every stage moving at once, s."""
    return float(transition_times_s(a, b, table)[0, 0])


def _best_variants(
    order: list[int], block: list[list[list[list[float]]]], start: list[list[float]], ref_every: int
) -> tuple[float, list[int]]:
    """For a fixed order, the variant of every setting that minimises the total time (Viterbi).

    ``block[i][j][a][b]`` is the transition time from variant a of setting i to variant b of
    setting j, ``start[i][a]`` from the origin. With references, the reference setting is the
    first setting measured (in the variant chosen for it); the compiler returns to it at the
    start, after every ``ref_every`` settings and at the end. Plain lists: settings have one to
    four variants, where numpy's per-call overhead would cost more than the arithmetic.
    """
    first = order[0]
    candidates = range(len(start[first])) if ref_every > 0 else [None]
    best_total, best_path = math.inf, [0] * len(order)
    for v0 in candidates:
        t = list(start[first])
        if v0 is not None:
            t = [math.inf] * len(t)
            t[v0] = start[first][v0]
        back: list[list[int]] = []
        for k in range(1, len(order)):
            i, j = order[k - 1], order[k]
            if v0 is not None and k % ref_every == 0:
                out_, in_ = block[i][first], block[first][j][v0]
                step = [[out_[a][v0] + in_[b] for b in range(len(in_))] for a in range(len(t))]
            else:
                step = block[i][j]
            args, new_t = [], []
            for b in range(len(step[0])):
                best_a, best_v = 0, t[0] + step[0][b]
                for a in range(1, len(t)):
                    v = t[a] + step[a][b]
                    if v < best_v:
                        best_a, best_v = a, v
                args.append(best_a)
                new_t.append(best_v)
            back.append(args)
            t = new_t
        if v0 is not None:
            closing = block[order[-1]][first]
            t = [t[a] + closing[a][v0] for a in range(len(t))]
        end = min(range(len(t)), key=t.__getitem__)
        if t[end] < best_total:
            best_total = t[end]
            path, w = [end], end
            for args in reversed(back):
                w = args[w]
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
    rows = np.concatenate(variants)
    edges = np.cumsum([0] + [len(v) for v in variants])
    every = transition_times_s(rows, rows, table)
    blocks = [[every[edges[i]:edges[i + 1], edges[j]:edges[j + 1]] for j in range(n)] for i in range(n)]
    cost = np.array([[blocks[i][j].min() for j in range(n)] for i in range(n)])
    block = [[b.tolist() for b in row] for row in blocks]
    from_origin = transition_times_s(origin, rows, table)[0]
    start = [from_origin[edges[i]:edges[i + 1]].tolist() for i in range(n)]
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
