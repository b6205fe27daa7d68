"""Time and motion estimates of a plan (pure): what the dry-run prints and the runner's ETA uses."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from lightloom.sequencer.plan.compiler import TableModel
from lightloom.sequencer.plan.kinematics import (
    StageKinematics, approach_path, move_time_s, nearest_equivalent_deg, path_time_s, path_travel_deg,
)
from lightloom.sequencer.optics.analyzer import CONVERTER, ELEMENT_NAMES
from lightloom.sequencer.model.elements import COLUMN
from lightloom.sequencer.plan.ordering import PERIOD_DEG, transition_time_s
from lightloom.sequencer.model.steps import STEP_KINDS, StepList


@dataclass(frozen=True)
class StepsEstimate:
    """Per-step durations (s, numpy arrays) and totals of a plan on a table."""

    step_seconds: np.ndarray
    motion_seconds: float
    dwell_seconds: float
    wait_seconds: float
    overhead_seconds: float
    travel_deg: dict[str, float]
    stage_seconds: dict[str, float]
    converter_switches: int
    step_wait_seconds: np.ndarray = field(default_factory=lambda: np.zeros(0))
    """Of each step's duration, the wait for its pass's start time (0 for most steps)."""

    @property
    def total_seconds(self) -> float:
        return float(np.sum(self.step_seconds))


def first_approach_s(first: np.ndarray, table: TableModel) -> float:
    """Time of the run's first moves, s: every stage from its rest at 0 deg to the first setting.

    The runner does not know where a stage stands before its first move, so it approaches every
    first target from above (overshoot by twice the backlash, then up), which takes the backlash up
    whatever the start. The stages are taken to rest at 0 deg, as the least-motion ordering does.
    Legs run as in a transition: every stage's first leg at once, then every second leg.
    """
    legs: list[list[float]] = []
    for name, k in table.kinematics.items():
        target = float(first[COLUMN[name]])
        if math.isnan(target):
            continue
        legs.append(_legs_from_unknown(0.0, target, k))
    phases = max((len(times) for times in legs), default=0)
    return float(sum(max((t[p] for t in legs if p < len(t)), default=0.0) for p in range(phases)))


def _legs_from_unknown(rest_deg: float, target_deg: float, k: StageKinematics) -> list[float]:
    """Leg durations (move, command overhead, settling) of a first approach from ``rest_deg``, s."""
    out, here = [], rest_deg
    for waypoint in approach_path(math.inf, target_deg, k.backlash_deg):
        if abs(waypoint - here) >= 1e-12:
            out.append(move_time_s(waypoint - here, k.speed_deg_per_s, k.acceleration_deg_per_s2)
                       + k.overhead_s + k.settle_s)
        else:
            out.append(0.0)
        here = waypoint
    return out


def estimate_steps(plan: StepList, table: TableModel) -> StepsEstimate:
    """Estimate the wall time of ``plan`` from the table's kinematics, dwell and command overheads.

    The first step includes the first approach of every stage (``first_approach_s``). Each step:
    the shutter change if any, the slowest stage's backlash-aware move (all stages move
    at once) or the converter switch, then the dwell with every detector integrating at once, plus
    the per-read command overhead. Outer-sweep passes start no earlier than ``pass_interval_s``
    apart. A night repeats a few moves many times: each distinct move is timed once, so the cost
    is O(steps) numpy work plus O(distinct moves + passes) Python.
    """
    c = plan.columns
    n = len(c)
    travel = {name: 0.0 for name in ELEMENT_NAMES if name in table.kinematics}
    stage_t = dict(travel)
    if n == 0:
        return StepsEstimate((), 0.0, 0.0, 0.0, 0.0, travel, stage_t, 0, ())
    # Code each distinct settings row (NaN made comparable), then each distinct (from, to) move.
    settings = np.ascontiguousarray(c.settings)
    keyed = np.where(np.isnan(settings), np.inf, settings)
    rows = np.ascontiguousarray(keyed).view(np.dtype((np.void, keyed.dtype.itemsize * keyed.shape[1]))).ravel()
    _, first, code = np.unique(rows, return_index=True, return_inverse=True)
    code = code.ravel()
    prev_code = np.concatenate([code[:1], code[:-1]])
    pair = prev_code.astype(np.int64) * len(first) + code
    pairs, pair_of_step = np.unique(pair, return_inverse=True)
    stage_items = list(table.kinematics.items())
    move_s = np.zeros(len(pairs))
    travel_of = np.zeros((len(pairs), len(stage_items)))
    time_of = np.zeros((len(pairs), len(stage_items)))
    switch_of = np.zeros(len(pairs), bool)
    for j, key in enumerate(pairs.tolist()):
        prev, cur = settings[first[key // len(first)]], settings[first[key % len(first)]]
        move_s[j] = transition_time_s(prev, cur, table)
        for col, (name, k) in enumerate(stage_items):
            i = COLUMN[name]
            if math.isnan(prev[i]) or math.isnan(cur[i]):
                continue
            tgt = nearest_equivalent_deg(cur[i], prev[i], PERIOD_DEG[name], k)
            travel_of[j, col] = path_travel_deg(prev[i], tgt, k.backlash_deg)
            time_of[j, col] = path_time_s(prev[i], tgt, k)
        switch_of[j] = not (math.isnan(prev[CONVERTER]) or math.isnan(cur[CONVERTER])) and prev[CONVERTER] != cur[CONVERTER]
    pair_of_step = pair_of_step.ravel()
    motion = move_s[pair_of_step]
    motion[0] += first_approach_s(settings[0], table)
    for col, (name, _) in enumerate(stage_items):
        travel[name] = float(np.sum(travel_of[pair_of_step, col]))
        stage_t[name] = float(np.sum(time_of[pair_of_step, col]))
    shutter_open = c.kind != STEP_KINDS.index("background")
    shutter_changes = shutter_open != np.concatenate([[False], shutter_open[:-1]])
    work = motion + shutter_changes * table.shutter_s + c.dwell_s + table.read_overhead_s
    # Waits: a pass starts no earlier than pass_index * interval after the start.
    waits = np.zeros(n)
    if plan.pass_interval_s > 0:
        starts = np.flatnonzero(np.concatenate([[True], c.pass_index[1:] != c.pass_index[:-1]]))
        before = np.concatenate([[0.0], np.cumsum(work)])[starts]  # work done before each pass starts
        elapsed_wait = 0.0
        for s_index, done_work in zip(starts.tolist(), before.tolist()):
            due = int(c.pass_index[s_index]) * plan.pass_interval_s
            w = due - (done_work + elapsed_wait)
            if w > 0:
                waits[s_index] = w
                elapsed_wait += w
    step_seconds = work + waits
    return StepsEstimate(
        step_seconds, float(np.sum(motion)), float(np.sum(c.dwell_s)), float(np.sum(waits)),
        float(np.count_nonzero(shutter_changes) * table.shutter_s + n * table.read_overhead_s),
        travel, stage_t, int(np.count_nonzero(switch_of[pair_of_step])), waits,
    )
