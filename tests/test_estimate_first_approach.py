"""The dry-run estimate counts the run's first moves: every stage from rest at 0 deg, approached from above.

Checked against the simulated bench's own clock (time_scale 0: virtual time, exact, no machine load).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.model.elements import COLUMN
from lightloom.sequencer.model.vocabulary import STAGE_ELEMENTS
from lightloom.sequencer.plan.kinematics import StageKinematics, move_time_s
from lightloom.sequencer.plan.tablemodel import table_model
from lightloom.sequencer.plan.timing import estimate_steps, first_approach_s
from lightloom.sequencer.storage import read_runfile
from tests.helpers.runs import run_cli, stored_plan, write_bench


def test_a_first_target_is_reached_by_overshooting_twice_the_backlash_then_moving_up():
    k = StageKinematics(speed_deg_per_s=20.0, acceleration_deg_per_s2=100.0, backlash_deg=0.5, settle_s=0.05,
                        overhead_s=0.01)
    stage = STAGE_ELEMENTS[0]
    table = dataclasses.replace(table_model(load_bench("sim")), kinematics={stage: k})
    first = np.full(len(COLUMN), np.nan)
    first[COLUMN[stage]] = 30.0
    legs = move_time_s(29.0, 20.0, 100.0) + move_time_s(1.0, 20.0, 100.0) + 2 * (0.05 + 0.01)
    assert math.isclose(first_approach_s(first, table), legs, rel_tol=1e-12)
    first[COLUMN[stage]] = np.nan  # a setting that moves no stage costs nothing
    assert first_approach_s(first, table) == 0.0


def test_the_first_moves_take_on_the_simulated_clock_what_the_estimate_says(tmp_path):
    bench = write_bench(tmp_path, "instant", simulation={"time_scale": 0})
    out = tmp_path / "run.h5"
    assert run_cli("run", "joint-36", "--bench", bench, "--out", out, "--quiet") == 0
    data = read_runfile(out)
    plan = stored_plan(data)
    table = table_model(load_bench(bench))
    est = estimate_steps(plan, table)
    started = next(e.t for e in data.events if e.kind == "start")
    # From the run's first event to its first integration: connecting, the shutter and every
    # stage's first approach. (At time_scale 0 the detectors integrate one after the other, so
    # only the time before the first integration is compared.)
    before_first_dwell = float(data.readings.t_start[0]) - started
    estimated = est.step_seconds[0] - plan.steps[0].dwell_s - table.read_overhead_s
    assert before_first_dwell > 0.1  # the stages do move: a check that 0 would fail
    assert abs(before_first_dwell - estimated) < 0.01, (before_first_dwell, estimated)
