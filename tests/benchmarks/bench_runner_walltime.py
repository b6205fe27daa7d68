"""Benchmark: wall time of a real-time simulated run against the dry-run estimate and the physical floor.

Run on demand: ``python tests/benchmarks/bench_runner_walltime.py [TIME_SCALE [PROTOCOL [BENCH]]]``
(default: joint-36 on sim at time_scale 1, real time, about 50 s: the run twice).

First the whole ``lightloom run`` process, as a user waits for it (interpreter start, imports,
compile, run file, devices, steps, close, exit), in a child process: its wall time against the
dry-run estimate, its CPU time, and where the wall time goes (process start to the run's first
event, the steps, last reading to exit). Then the same run in process through ``start_run``,
with the time beyond the estimate step by step from the readings' own timestamps. The estimate
is ``plan.timing.estimate_steps``; the physical floor is the dwell of every step plus the least
motion of the plan's order with every stage moving at once (``plan.ordering.transition_time_s``,
settling included), from the stages' start at 0 deg. Requirements: the whole process within 3 %
of the estimate, the in-process run within 3 %, and within 10 % of the floor. On a loaded
machine, compare the CPU time with the wall time: a process that waits for the CPU shows more
wall time than its own work.
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
import tempfile
import time
from datetime import datetime
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


def whole_process(protocol: str, bench_path: Path, out: Path, scale: float) -> tuple[float, float, float]:
    """Run ``lightloom run`` in a child process; print its times; return (wall s, CPU s, estimate s)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.time()
    done = subprocess.run(
        [sys.executable, "-m", "lightloom.sequencer.cli", "run", protocol, "--bench", str(bench_path),
         "--out", str(out), "--quiet"], capture_output=True, text=True, env={**os.environ, "COLUMNS": "100"},
    )
    t_exit = time.time()
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    assert done.returncode == 0, done.stderr
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    data = read_runfile(out)
    bench = load_bench(bench_path)
    plan = StepList.from_json(data.header.steps_json)
    est = estimate_steps(plan, table_model(bench)).total_seconds * scale
    # Wall times from the run's log (the simulated clock's zero is a whole second before the start).
    stamps = [(datetime.fromisoformat(line[:29]).timestamp(), line[30:])
              for line in out.with_suffix(".log").read_text().splitlines()]
    started = next(t for t, text in stamps if text.startswith("start:"))
    steps = [t for t, text in stamps if text.startswith("step ")]
    wall = t_exit - t0
    print(f"whole `lightloom run {protocol}` process, {len(plan.steps)} steps, time_scale {scale:g}")
    print(f"  wall {wall:8.3f} s   CPU {cpu:6.3f} s   dry-run estimate {est:8.3f} s   "
          f"ratio process/estimate {wall / est:.4f}; requirement within 3 %")
    print(f"    process start to the run's first event:      {started - t0:7.3f} s")
    print(f"    first event to the first reading recorded:   {steps[0] - started:7.3f} s")
    print(f"    first to last reading recorded:              {steps[-1] - steps[0]:7.3f} s")
    print(f"    last reading recorded to the process's exit: {t_exit - steps[-1]:7.3f} s")
    return wall, cpu, est


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
        p_wall, _, p_est = whole_process(protocol, bench_path, Path(tmp) / "process.h5", scale)
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
          f"(steps only {executed * to_wall / est_wall:.4f}); requirement within 3 %")
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
    print(f"    first step (first approach from 0 deg now in the estimate): "
          f"{extra[0][0] * to_wall:+.3f}")
    print(f"    .h5 rebuilds (store.refresh): {len(refreshes)} taking {sum(refreshes):.3f} s in all, "
          f"the longest {max(refreshes, default=0):.3f} s")
    print(f"    integrations longer than the dwell: {float(np.sum(dwells - r.dwell_s)) * to_wall:+.3f}")
    print(f"    all other steps together: {sum(e[0] for e in extra[1:]) * to_wall:+.3f}")
    for dt, index, kind, took, before in sorted(extra, reverse=True)[:5]:
        print(f"      step {index:3d} {kind:10s} took {took * to_wall:.3f} s, estimate "
              f"{est.step_seconds[index] * to_wall:.3f} s ({dt * to_wall:+.3f}); before the dwell {before * to_wall:.3f} s")
    ok = abs(wall / est_wall - 1.0) <= 0.03 and abs(p_wall / p_est - 1.0) <= 0.03 and wall / floor_wall <= 1.10
    print("  requirements met" if ok else "  REQUIREMENT NOT MET")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
