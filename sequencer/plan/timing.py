"""Time and motion estimates of a plan (pure): what the dry-run prints and the runner's ETA uses."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from lightloom.sequencer.plan.compiler import TableModel
from lightloom.sequencer.plan.kinematics import nearest_equivalent_deg, path_time_s, path_travel_deg
from lightloom.sequencer.optics.analyzer import CONVERTER, ELEMENT_NAMES
from lightloom.sequencer.model.elements import COLUMN
from lightloom.sequencer.plan.ordering import PERIOD_DEG, transition_time_s
from lightloom.sequencer.model.steps import StepList


@dataclass(frozen=True)
class StepsEstimate:
    """Per-step durations (s) and totals of a plan on a table."""

    step_seconds: tuple[float, ...]
    motion_seconds: float
    dwell_seconds: float
    wait_seconds: float
    overhead_seconds: float
    travel_deg: dict[str, float]
    stage_seconds: dict[str, float]
    converter_switches: int

    @property
    def total_seconds(self) -> float:
        return float(sum(self.step_seconds))


def estimate_steps(plan: StepList, table: TableModel) -> StepsEstimate:
    """Estimate the wall time of ``plan`` from the table's kinematics, dwell and command overheads.

    Each step: the shutter change if any, the slowest stage's backlash-aware move (all stages move
    at once) or the converter switch, then the dwell with every detector integrating at once, plus
    the per-read command overhead. Outer-sweep passes start no earlier than ``pass_interval_s``
    apart.
    """
    times: list[float] = []
    motion = dwell = overhead = wait = 0.0
    travel = {name: 0.0 for name in ELEMENT_NAMES if name in table.kinematics}
    stage_t = dict(travel)
    switches = 0
    prev = plan.steps[0].settings.as_vector() if plan.steps else np.array([])
    shutter_open = False
    elapsed = 0.0
    pass_start_due = 0.0
    current_pass = -1
    for step in plan.steps:
        t = 0.0
        if step.pass_index != current_pass:
            current_pass = step.pass_index
            pass_start_due = current_pass * plan.pass_interval_s
            if elapsed < pass_start_due:
                w = pass_start_due - elapsed
                t += w
                wait += w
        cur = step.settings.as_vector()
        if step.shutter_open != shutter_open:
            t += table.shutter_s
            overhead += table.shutter_s
            shutter_open = step.shutter_open
        m = transition_time_s(prev, cur, table)
        t += m
        motion += m
        for name, k in table.kinematics.items():
            i = COLUMN[name]
            if math.isnan(prev[i]) or math.isnan(cur[i]):
                continue
            tgt = nearest_equivalent_deg(cur[i], prev[i], PERIOD_DEG[name], k)
            travel[name] += path_travel_deg(prev[i], tgt, k.backlash_deg)
            stage_t[name] += path_time_s(prev[i], tgt, k)
        if not (math.isnan(prev[CONVERTER]) or math.isnan(cur[CONVERTER])) and prev[CONVERTER] != cur[CONVERTER]:
            switches += 1
        t += step.dwell_s + table.read_overhead_s
        dwell += step.dwell_s
        overhead += table.read_overhead_s
        prev = cur
        times.append(t)
        elapsed += t
    return StepsEstimate(tuple(times), motion, dwell, wait, overhead, travel, stage_t, switches)
