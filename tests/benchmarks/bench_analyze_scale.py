"""Benchmark: analyze cost against the number of readings (sufficient statistics keep the fit flat).

Usage: python tests/benchmarks/bench_analyze_scale.py RUN.h5 [--copies 1 2 5 10] [--bootstrap 200]

Reads RUN.h5 (any run, e.g. joint-36 with `sweep: {passes: P, interval_s: 0}` on `sim` at
time_scale 0), then analyses the run repeated k times end to end (the readings tiled with their
times shifted, as a night k times as long) in a fresh process per size, and prints for each: port
readings, distinct operators, wall and CPU time of the analysis alone, and the process's peak
resident memory (loading included). Run on a quiet machine; figures vary with load.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time

CHILD = r"""
import json, resource, sys, time
import numpy as np
from lightloom.sequencer.analysis.pipeline import analyse_run
from lightloom.sequencer.model.records import ReadingTable, RunData
from lightloom.sequencer.storage.store import load_run

path, copies, n_boot = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
run = load_run(path)
r = run.readings
if copies > 1:
    span = float(r.t_end.max() - r.t_start.min()) + 1.0
    cols = {}
    for name in ("step_index", "pass_index", "point_index", "repeat_index", "commanded", "readback", "values",
                 "reference_w", "operators", "dwell_s", "t_start", "t_end", "flags", "kind"):
        col = getattr(r, name)
        parts = []
        for k in range(copies):
            part = col
            if name in ("t_start", "t_end"):
                part = col + k * span
            elif name == "pass_index":
                part = col + k * (int(col.max()) + 1)
            elif name == "step_index":
                part = col + k * (int(col.max()) + 1)
            parts.append(part)
        cols[name] = np.concatenate(parts)
    table = ReadingTable(r.element_names, r.port_names, **cols)
    run = RunData(run.header, table, run.events, run.status, run.message, run.source)
    del cols, table
t0, c0 = time.perf_counter(), time.process_time()
doc, est, _ = analyse_run(run, rng=np.random.default_rng(0), n_bootstrap=n_boot)
wall, cpu = time.perf_counter() - t0, time.process_time() - c0
peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps({"readings": doc["estimator"]["readings"], "distinct": doc["estimator"]["distinct_operators"],
                  "analysis_wall_s": wall, "analysis_cpu_s": cpu, "peak_mb": peak_mb}))
"""


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("run")
    ap.add_argument("--copies", type=int, nargs="+", default=[1, 2, 5, 10])
    ap.add_argument("--bootstrap", type=int, default=200)
    args = ap.parse_args()
    print(f"{'port readings':>14} {'distinct':>9} {'wall s':>8} {'cpu s':>8} {'peak MB':>8}")
    for k in args.copies:
        out = subprocess.run([sys.executable, "-c", CHILD, args.run, str(k), str(args.bootstrap)],
                             capture_output=True, text=True, check=True)
        row = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"{row['readings']:>14} {row['distinct']:>9} {row['analysis_wall_s']:>8.2f} "
              f"{row['analysis_cpu_s']:>8.2f} {row['peak_mb']:>8.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
