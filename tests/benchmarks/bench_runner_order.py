"""Benchmark: motion time of least-motion ordering against the order as written, on sim and sim-single.

Run on demand: ``PYTHONPATH=. python tests/benchmarks/bench_runner_order.py [PROTOCOL]`` (default joint-36).

For each bench the protocol is compiled twice, with ``order: least-motion`` and ``order: as-written``.
Motion time is given two ways: the plan estimate (``sequencer.timing``, every stage moving at once)
and the time the simulated table actually spent between readings when the runner executed the plan
(time_scale 0, virtual seconds from the readings' timestamps), and, for comparison, the estimate of
the motion between measurement settings alone (leaving out the visits to the reference setting and
the background). Requirement (on the whole plan's motion): least motion at least 30 % less than as
written. Prints the ratios measured in this run.
"""

from __future__ import annotations

import re
import sys
import tempfile
from pathlib import Path

import numpy as np

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.lang.builtins import find
from lightloom.sequencer.plan.ordering import transition_time_s
from lightloom.sequencer.lang.protocol import load_protocol
from lightloom.sequencer.run.session import start_run
from lightloom.sequencer.storage import read_runfile
from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model
from lightloom.sequencer.plan.timing import estimate_steps

REQUIRED_SAVING = 0.30


def simulated_motion_s(protocol_path: Path, bench: str, out: Path) -> float:
    """Virtual seconds the simulated table spent outside the dwell windows while the runner ran the plan."""
    assert start_run(str(protocol_path), bench, str(out), console=None, live=False) == 0
    data = read_runfile(out)
    r = data.readings
    prev = next(e.t for e in data.events if e.kind == "start")
    total = 0.0
    for start, end in zip(r.t_start, r.t_end):
        total += float(start) - prev
        prev = float(end)
    return total


def motion_between_settings_s(plan, table) -> float:
    """Estimated motion between consecutive measurement settings only (reference and background visits left out), s."""
    settings = []
    for step in plan.steps:
        if step.kind == "measure" and (not settings or settings[-1][0] != step.point_index):
            settings.append((step.point_index, step.settings.as_vector()))
    return sum(transition_time_s(a, b, table) for (_, a), (_, b) in zip(settings[:-1], settings[1:]))


def main(argv: list[str]) -> int:
    name = argv[0] if argv else "joint-36"
    text = find("protocol", name).data.decode()
    ok = True
    with tempfile.TemporaryDirectory() as tmp:
        paths = {}
        for order in ("least-motion", "as-written"):
            paths[order] = Path(tmp) / f"{name}-{order}.yaml"
            paths[order].write_text(re.sub(r"(?m)^order: .*$", f"order: {order}", text))
        for bench_name in ("sim", "sim-single"):
            bench = load_bench(bench_name)
            table = table_model(bench)
            est, sim, between = {}, {}, {}
            for order, path in paths.items():
                plan = compile_protocol(load_protocol(path), bench)
                assert plan.order == order
                est[order] = estimate_steps(plan, table).motion_seconds
                between[order] = motion_between_settings_s(plan, table)
                sim[order] = simulated_motion_s(path, bench_name, Path(tmp) / f"{bench_name}-{order}.h5")
            e_ratio = est["least-motion"] / est["as-written"]
            s_ratio = sim["least-motion"] / sim["as-written"]
            print(f"{name} on {bench_name}:")
            print(f"  estimated motion  least-motion {est['least-motion']:7.2f} s  as-written {est['as-written']:7.2f} s"
                  f"  ratio {e_ratio:.3f} ({1 - e_ratio:.0%} less)")
            print(f"  simulated motion  least-motion {sim['least-motion']:7.2f} s  as-written {sim['as-written']:7.2f} s"
                  f"  ratio {s_ratio:.3f} ({1 - s_ratio:.0%} less)")
            b_ratio = between["least-motion"] / between["as-written"]
            print(f"  between measurement settings only (estimate)  least-motion {between['least-motion']:7.2f} s"
                  f"  as-written {between['as-written']:7.2f} s  ratio {b_ratio:.3f} ({1 - b_ratio:.0%} less)")
            ok &= e_ratio <= 1 - REQUIRED_SAVING and s_ratio <= 1 - REQUIRED_SAVING
    print("requirement met (at least 30 % less motion)" if ok else "REQUIREMENT NOT MET")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
