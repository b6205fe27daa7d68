"""Benchmark: many kill -9 / resume trials of real runs, counting lost, changed and duplicated steps.

Run on demand: ``PYTHONPATH=. python tests/benchmarks/bench_runner_kill.py [TRIALS [SEED]]`` (default 50, 1).

Each trial starts ``lightloom run joint-36`` on the sim bench at time_scale 0.1 (about 2.5 s of
steps) in a new process and SIGKILLs it at a random moment: one trial in ten during start-up and
file creation, the others while steps are recorded; half of the killed runs are resumed in a new
process and killed again. Then ``lightloom resume`` runs to the end. A step is lost if the RUN.log
reported it (or the journal held it at a kill) and the final file lacks it; changed if its reading
differs from the one the journal held; duplicated if it appears twice. Prints the counts.
"""

from __future__ import annotations

import os
import random
import re
import signal
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

import yaml

from lightloom.sequencer.storage import journal_path_for, read_journal, read_runfile

REPO = Path(__file__).resolve().parents[2]
STEP_LINE = re.compile(r"^\S+ step (\d+) ")


def spawn(*args: str) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "lightloom.sequencer", *args, "--quiet"], stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL, env={**os.environ, "PYTHONPATH": str(REPO)},
    )


def logged_steps(log: Path) -> set[int]:
    if not log.exists():
        return set()
    return {int(m.group(1)) for m in map(STEP_LINE.match, log.read_text().splitlines()) if m}


def kill_at_random(proc: subprocess.Popen, log: Path, rng: random.Random, early: bool) -> None:
    if early:
        time.sleep(rng.uniform(0.0, 2.0))
    else:
        start = time.monotonic()
        while not log.exists() and proc.poll() is None and time.monotonic() - start < 60:
            time.sleep(0.005)
        time.sleep(rng.uniform(0.0, 2.5))
    proc.send_signal(signal.SIGKILL)
    proc.wait()


def trial(folder: Path, bench: Path, rng: random.Random) -> dict[str, int]:
    out = folder / "run.h5"
    log = out.with_suffix(".log")
    counts = Counter()
    held: dict[int, object] = {}
    reported: set[int] = set()
    early = rng.random() < 0.1
    for kill in range(1 + (rng.random() < 0.5)):
        args = ("run", "joint-36", "--bench", str(bench), "--out", str(out)) if kill == 0 else ("resume", str(out))
        if kill and not journal_path_for(out).exists():
            break
        proc = spawn(*args)
        kill_at_random(proc, log, rng, early and kill == 0)
        counts["kills"] += 1
        counts["ended before the kill"] += proc.returncode == 0
        reported |= logged_steps(log)
        if journal_path_for(out).exists():
            for row in read_journal(journal_path_for(out)).readings.rows():
                held.setdefault(row.step_index, row)
    if not journal_path_for(out).exists():
        counts["killed before the journal existed"] += 1
        status = subprocess.run([sys.executable, "-m", "lightloom.sequencer", "run", "joint-36", "--bench", str(bench),
                                 "--out", str(out), "--quiet"], env={**os.environ, "PYTHONPATH": str(REPO)},
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL).returncode
    else:
        status = subprocess.run([sys.executable, "-m", "lightloom.sequencer", "resume", str(out), "--quiet"],
                                env={**os.environ, "PYTHONPATH": str(REPO)},
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL).returncode
    final = read_runfile(out)
    steps = Counter(int(s) for s in final.readings.step_index)
    at = {int(s): i for i, s in enumerate(final.readings.step_index)}
    counts["steps"] += final.header.steps_total
    counts["resume not 0"] += status != 0
    counts["not complete"] += final.status != "complete"
    counts["duplicated"] += sum(n - 1 for n in steps.values())
    counts["missing"] += final.header.steps_total - len(steps)
    counts["lost (reported, then gone)"] += len((reported | set(held)) - set(steps))
    counts["changed"] += sum(1 for s, row in held.items() if s in at and final.readings.row(at[s]) != row)
    counts["readings held at a kill"] += len(held)
    return counts


def main(argv: list[str]) -> int:
    trials = int(argv[0]) if argv else 50
    rng = random.Random(int(argv[1]) if len(argv) > 1 else 1)
    total = Counter()
    t0 = time.monotonic()
    with tempfile.TemporaryDirectory() as tmp:
        bench = Path(tmp) / "sim-tenth.yaml"
        bench.write_text(yaml.safe_dump({"bench": "sim-tenth", "extends": "sim", "simulation": {"time_scale": 0.1}}))
        for i in range(trials):
            folder = Path(tmp) / f"trial{i}"
            folder.mkdir()
            total += trial(folder, bench, rng)
    bad = total["duplicated"] + total["missing"] + total["lost (reported, then gone)"] + total["changed"]
    bad += total["not complete"] + total["resume not 0"]
    print(f"{trials} trials, {total['kills']} kill -9s, {time.monotonic() - t0:.0f} s")
    for key in ("killed before the journal existed", "ended before the kill", "readings held at a kill", "steps",
                "lost (reported, then gone)", "changed", "duplicated", "missing", "not complete", "resume not 0"):
        print(f"  {key:36s} {total[key]}")
    print(f"  lost or duplicated per step: {bad / max(1, total['steps']):.4f}")
    print("  every step exactly once, nothing lost" if bad == 0 else "  PROMISE BROKEN")
    return 0 if bad == 0 else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
