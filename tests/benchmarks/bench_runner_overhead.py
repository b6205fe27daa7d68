"""Benchmark: software overhead of the runner per reading, durability included.

Run on demand: ``PYTHONPATH=. python tests/benchmarks/bench_runner_overhead.py [PROTOCOL [BENCH]]``
(default overnight-joint-36 on sim, instant simulated devices: time_scale 0).

The real runner (Runner + RunStore journal + RUN.log + periodic .h5 rebuilds) executes the plan on a
SimulatedTable; a minimal hand-written loop executes the same plan on a second SimulatedTable with
the same device calls in the same order (shutter, converter, backlash legs of every stage, read-back,
every detector) and one journal write of the same size per step (os.write + the journal's sync).
Requirement: median runner step time minus median loop step time under 5 ms. Prints both medians,
their difference and their ratio, measured in this run.
"""

from __future__ import annotations

import math
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.plan.kinematics import approach_path
from lightloom.sequencer.lang.protocol import load_protocol
from lightloom.sequencer.run.runner import Runner
from lightloom.sequencer.run.session import RunLog, assemble, make_header, policy_for, port_units
from lightloom.sequencer.storage import RunStore
from lightloom.sequencer.storage.atomic import sync_fd
from lightloom.sequencer.storage.codec import ReadingLayout
from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model

REQUIREMENT_S = 0.005
ROUNDS = 3


class StepClock:
    """A runner monitor that notes the wall time at which each step was recorded."""

    def __init__(self) -> None:
        self.times = [time.perf_counter()]

    def step_done(self, step, reading, steps_done, steps_total) -> None:
        self.times.append(time.perf_counter())

    def warning(self, message: str) -> None:
        pass

    def info(self, message: str) -> None:
        pass


def runner_step_times(protocol_spec: str, bench_spec: str, folder: Path) -> list[float]:
    """Per-step wall times (s) of the real runner with its storage and log."""
    protocol, bench = load_protocol(protocol_spec), load_bench(bench_spec)
    plan = compile_protocol(protocol, bench)
    table = table_model(bench)
    assembled = assemble(bench)
    units = port_units(bench)
    out = folder / "runner.h5"
    store = RunStore.create(out, make_header(protocol, bench, plan, units, protocol_spec, bench_spec))
    log = RunLog(folder / "runner.log")
    clock = StepClock()
    runner = Runner(plan, table, assembled.rig, store, policy_for(bench), now=assembled.now,
                    sleep=assembled.sleep, wall=time.monotonic, monitor=clock, log=log, units=units,
                    run_start=assembled.now())
    status, message = runner.execute(set())
    store.close(status, message)
    log.close()
    assert status == "complete", message
    return list(np.diff(clock.times))


def loop_step_times(protocol_spec: str, bench_spec: str, folder: Path) -> list[float]:
    """Per-step wall times (s) of a minimal loop doing the same device calls and journal writes."""
    protocol, bench = load_protocol(protocol_spec), load_bench(bench_spec)
    plan = compile_protocol(protocol, bench)
    table = table_model(bench)
    rig = assemble(bench).rig
    record_size = ReadingLayout.of(
        make_header(protocol, bench, plan, port_units(bench), protocol_spec, bench_spec)
    ).payload_size + 16
    readers = [*rig.detectors, *([rig.reference] if rig.reference is not None else [])]
    fd = os.open(folder / "loop.journal", os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
    for device in rig.devices():
        device.connect()
    rig.shutter.close_beam()
    shutter_open, positions, converter = False, {}, None
    times = [time.perf_counter()]
    for step in plan.steps:
        if step.shutter_open != shutter_open:
            (rig.shutter.open if step.shutter_open else rig.shutter.close_beam)()
            shutter_open = step.shutter_open
        want = None
        if rig.converter is not None and step.settings.mode_converter is not None:
            want = step.settings.mode_converter
            if want != converter:
                rig.converter.set_state(want)
        paths = {}
        angles = step.settings.stage_angles()
        for i in rig.stages:
            target = angles.get(i, math.nan)
            if math.isnan(target) or positions.get(i) == target:
                continue
            backlash = table.kinematics[i].backlash_deg if i in table.kinematics else 0.0
            paths[i] = approach_path(positions.get(i, math.inf), target, backlash)
            positions[i] = target
        for leg in range(max((len(p) for p in paths.values()), default=0)):
            moving = [i for i, p in paths.items() if leg < len(p)]
            for i in moving:
                rig.stages[i].move_to_deg(paths[i][leg])
            for i in moving:
                rig.stages[i].wait_settled(120.0)
        if want is not None and want != converter:
            rig.converter.wait_settled(120.0)
            converter = want
        readback = [rig.stages[i].position_deg() for i in rig.stages if i in angles]
        if want is not None:
            rig.converter.state()
        values = [d.read_power_w(step.dwell_s) for d in readers]
        record = np.array([*readback, *values], dtype=float).tobytes().ljust(record_size, b"\0")
        os.write(fd, record)
        sync_fd(fd)
        times.append(time.perf_counter())
    rig.shutter.close_beam()
    os.close(fd)
    return list(np.diff(times))


def main(argv: list[str]) -> int:
    protocol = argv[0] if argv else "overnight-joint-36"
    bench = argv[1] if len(argv) > 1 else "sim"
    loop: list[float] = []
    run: list[float] = []
    # Alternate the two, so that a change in disk load hits both alike.
    for repeat in range(ROUNDS):
        with tempfile.TemporaryDirectory(dir=os.environ.get("BENCH_DIR")) as tmp:
            loop += loop_step_times(protocol, bench, Path(tmp))
        with tempfile.TemporaryDirectory(dir=os.environ.get("BENCH_DIR")) as tmp:
            run += runner_step_times(protocol, bench, Path(tmp))
    m_loop, m_run = statistics.median(loop), statistics.median(run)
    overhead = m_run - m_loop
    print(f"{protocol} on {bench}: {len(run) // ROUNDS} steps x {ROUNDS} rounds, instant simulated devices (time_scale 0)")
    print(f"  minimal loop   median step {m_loop * 1e3:8.3f} ms   (p90 {np.percentile(loop, 90) * 1e3:.3f} ms)")
    print(f"  real runner    median step {m_run * 1e3:8.3f} ms   (p90 {np.percentile(run, 90) * 1e3:.3f} ms)")
    print(f"  overhead       {overhead * 1e3:8.3f} ms per reading (requirement < {REQUIREMENT_S * 1e3:.0f} ms)")
    print(f"  ratio runner / loop: {m_run / m_loop:.2f}")
    ok = overhead < REQUIREMENT_S
    print("  requirement met" if ok else "  REQUIREMENT NOT MET")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
