"""Benchmark: wall time of a real-time simulated run against the dry-run estimate and the physical floor.

Run on demand: ``PYTHONPATH=. python tests/benchmarks/bench_runner_walltime.py [TIME_SCALE [PROTOCOL [BENCH]]]``
(default: joint-36 on sim at time_scale 1, real time, about 25 s).

The run goes through ``sequencer.session.start_run`` (compile, run file, runner, log, close). The
estimate is ``sequencer.timing.estimate_steps``; the physical floor is the dwell of every step plus
the least motion of the plan's order with every stage moving at once
(``sequencer.ordering.transition_time_s``, settling included), from the stages' start at 0 deg.
Requirements: wall time within 5 % of the estimate and within 10 % of the floor. Prints where the
time beyond the estimate goes, from the readings' own timestamps, measured in this run.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.plan.ordering import transition_time_s
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.run.session import start_run
from lightloom.sequencer.storage import read_runfile
from lightloom.sequencer.storage.store import RunStore
from lightloom.sequencer.plan.tablemodel import table_model
from lightloom.sequencer.plan.timing import estimate_steps


def floor_seconds(plan: StepList, bench) -> tuple[float, float]:
    """(dwell, motion) of the physical floor, s: motion from the stages at 0 deg and the converter out."""
    table = table_model(bench)
    start = np.where(np.isnan(plan.steps[0].settings.as_vector()), np.nan, 0.0)
    motion, here = 0.0, start
    for step in plan.steps:
        there = step.settings.as_vector()
        motion += transition_time_s(here, there, table)
        here = there
    return sum(s.dwell_s for s in plan.steps), motion


def main(argv: list[str]) -> int:
    scale = float(argv[0]) if argv else 1.0
    protocol = argv[1] if len(argv) > 1 else "joint-36"
    base = argv[2] if len(argv) > 2 else "sim"
    refreshes: list[float] = []
    refresh = RunStore.refresh

    def timed_refresh(self, *args, **kwargs):
        t0 = time.perf_counter()
        try:
            return refresh(self, *args, **kwargs)
        finally:
            refreshes.append(time.perf_counter() - t0)

    RunStore.refresh = timed_refresh  # type: ignore[method-assign]
    with tempfile.TemporaryDirectory() as tmp:
        bench_path = Path(tmp) / "bench.yaml"
        bench_path.write_text(yaml.safe_dump({"bench": f"{base}-x{scale:g}", "extends": base,
                                              "simulation": {"time_scale": scale}}))
        out = Path(tmp) / "run.h5"
        t0 = time.perf_counter()
        status = start_run(protocol, str(bench_path), str(out), console=None, live=False)
        wall = time.perf_counter() - t0
        data = read_runfile(out)
        bench = load_bench(bench_path)
    assert status == 0, data.message
    plan = StepList.from_json(data.header.steps_json)
    est = estimate_steps(plan, table_model(bench))
    dwell, motion = floor_seconds(plan, bench)
    floor = dwell + motion
    r = data.readings
    started = next(e.t for e in data.events if e.kind == "start")
    executed = float(r.t_end[-1]) - started  # the readings' times are virtual s
    to_wall = scale  # wall s per virtual s
    est_wall, floor_wall = est.total_seconds * to_wall, floor * to_wall
    print(f"{protocol} on {base} at time_scale {scale:g} ({len(plan.steps)} steps)")
    print(f"  wall time of `run` (compile, files, devices, close): {wall:8.3f} s")
    print(f"  wall time of the steps (start event to last reading): {executed * to_wall:8.3f} s")
    print(f"  dry-run estimate:  {est_wall:8.3f} s   ratio run/estimate {wall / est_wall:.4f} "
          f"(steps only {executed * to_wall / est_wall:.4f}); requirement within 5 %")
    print(f"  physical floor:    {floor_wall:8.3f} s   (dwell {dwell * to_wall:.3f} + least motion "
          f"{motion * to_wall:.3f}); ratio run/floor {wall / floor_wall:.4f}; requirement within 10 %")
    prev = started
    extra = []
    for i, s in enumerate(r.step_index):
        took = float(r.t_end[i]) - prev
        extra.append((took - est.step_seconds[int(s)], int(s), str(r.kind[i]), took, float(r.t_start[i]) - prev))
        prev = float(r.t_end[i])
    dwells = r.t_end - r.t_start
    print("  where the time beyond the estimate goes (s of wall time):")
    print(f"    first step (stages taken from an unknown position, backlash taken up): "
          f"{extra[0][0] * to_wall:+.3f}")
    print(f"    .h5 rebuilds (store.refresh): {len(refreshes)} taking {sum(refreshes):.3f} s in all, "
          f"the longest {max(refreshes, default=0):.3f} s")
    print(f"    integrations longer than the dwell: {float(np.sum(dwells - r.dwell_s)) * to_wall:+.3f}")
    print(f"    all other steps together: {sum(e[0] for e in extra[1:]) * to_wall:+.3f}")
    for dt, index, kind, took, before in sorted(extra, reverse=True)[:5]:
        print(f"      step {index:3d} {kind:10s} took {took * to_wall:.3f} s, estimate "
              f"{est.step_seconds[index] * to_wall:.3f} s ({dt * to_wall:+.3f}); before the dwell {before * to_wall:.3f} s")
    ok = abs(wall / est_wall - 1.0) <= 0.05 and wall / floor_wall <= 1.10
    print("  requirements met" if ok else "  REQUIREMENT NOT MET")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
