"""Start-up and end-to-end figures of the command line, as ratios measured in one run.

1. ``lightloom --help`` against a bare ``python -c pass`` (wall time, median of several runs;
   target: within 3x);
2. ``lightloom validate joint-36 --bench sim``: CPU seconds of the whole process (target: < 0.5 s);
3. ``lightloom run joint-36`` on the sim bench in real time (``simulation.time_scale: 1``): the
   whole process's wall time against the dry-run estimate (target: within about 3%).

Run on demand: ``python tests/benchmarks/bench_startup.py [--repeats N] [--skip-run]``.
"""

from __future__ import annotations

import argparse
import json
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def command(*args: str) -> list[str]:
    """The installed console command if it sits beside this interpreter, else ``python -m``."""
    script = Path(sys.executable).with_name("lightloom")
    if script.exists():
        return [str(script), *args]
    found = shutil.which("lightloom")
    return [found, *args] if found else [sys.executable, "-m", "lightloom.sequencer", *args]


def timed(argv: list[str], cwd: Path) -> tuple[float, float, subprocess.CompletedProcess]:
    """(wall s, CPU s of the child, the completed process)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    done = subprocess.run(argv, cwd=cwd, capture_output=True, text=True)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu, done


def median_wall(argv: list[str], cwd: Path, repeats: int) -> tuple[float, float]:
    """Median wall and CPU seconds over ``repeats`` runs (after one warm-up run)."""
    timed(argv, cwd)
    walls, cpus = [], []
    for _ in range(repeats):
        wall, cpu, done = timed(argv, cwd)
        if done.returncode != 0:
            raise SystemExit(f"{' '.join(argv)} exited {done.returncode}: {done.stderr.strip()}")
        walls.append(wall)
        cpus.append(cpu)
    return statistics.median(walls), statistics.median(cpus)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=9, help="runs per start-up figure (default 9)")
    parser.add_argument("--skip-run", action="store_true", help="skip the real-time joint-36 run (about 25 s)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        bare, bare_cpu = median_wall([sys.executable, "-c", "pass"], folder, args.repeats)
        help_wall, help_cpu = median_wall(command("--help"), folder, args.repeats)
        print(f"python -c pass            {bare * 1e3:7.1f} ms wall  {bare_cpu * 1e3:6.1f} ms CPU")
        print(f"lightloom --help          {help_wall * 1e3:7.1f} ms wall  {help_cpu * 1e3:6.1f} ms CPU"
              f"  ratio {help_wall / bare:.2f}x wall (target <= 3x)")
        val_wall, val_cpu = median_wall(command("validate", "joint-36", "--bench", "sim"), folder, args.repeats)
        print(f"validate joint-36 (sim)   {val_wall * 1e3:7.1f} ms wall  {val_cpu * 1e3:6.1f} ms CPU"
              f"  (target < 500 ms CPU)")
        if args.skip_run:
            return 0
        bench = folder / "sim-real-time.yaml"
        bench.write_text("bench: sim-real-time\nextends: sim\nsimulation:\n  time_scale: 1\n", encoding="utf-8")
        wall, cpu, done = timed(command("dry-run", "joint-36", "--bench", str(bench), "--json"), folder)
        estimate = json.loads(done.stdout)["estimated_seconds"]
        wall, cpu, done = timed(command("run", "joint-36", "--bench", str(bench), "--out", "run.h5", "--quiet"), folder)
        if done.returncode != 0:
            raise SystemExit(f"run exited {done.returncode}: {done.stderr.strip()}")
        print(f"run joint-36 (time_scale 1) {wall:6.2f} s wall against the dry-run estimate {estimate:.2f} s:"
              f" ratio {wall / estimate:.4f} (target within about 3%)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
