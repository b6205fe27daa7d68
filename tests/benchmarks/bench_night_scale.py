"""Benchmark: a whole night at growing size: memory, overhead per reading, file lag, resume, analyze.

Run on demand: ``python tests/benchmarks/bench_night_scale.py [--sizes 1000,10000,50000,200000]
[--dir DIR]``. For each size, a joint-36 protocol with an outer sweep (repeats 2, a background
every 36 points, a reference every 9 settings) on the built-in ``sim`` bench at time_scale 0:

- ``run`` in its own process: time from launch to its first reading (start-up, for comparison
  with resume), wall time, peak memory (the child's maxrss), overhead per reading;
  meanwhile this process polls the run file's ``journal_bytes`` against the journal's size every
  0.2 s: the file's lag behind the journal, in readings and in seconds of run;
- the run killed (SIGKILL) near its end, then ``resume`` in its own process: the time from its
  launch to its first new reading (journal growth, polled every 5 ms) and its peak memory;
- ``analyze --json`` of the finished run in its own process: time and peak memory;
- the refresh cost measured in-process on a store of the same size: median time of refreshes of
  200 new readings in the first and the last tenth of the night.

Output goes to ``--dir`` (default a temporary folder under /dev/shm when it exists, so that the
disk's sync time does not hide the code's cost; say so when quoting figures). Prints one line per
size and a table at the end; every figure is measured in this run.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import shutil
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

PROTOCOL = """\
protocol: night-scale-{n}
analyzes: [polarization, spatial]
measure:
  targets:
    polarization: [H, V, D, A, R, L]
    spatial: [h, v, d, a, l+, l-]
    combine: product
dwell_s: 0.5
repeats: 2
background: {{every_points: 36, at_start: true, at_end: true}}
reference: {{every_points: 9, dwell_s: 0.2}}
order: least-motion
seed: 1
sweep: {{passes: {passes}, interval_s: 0}}
"""
STEPS_PER_PASS = 21  # on sim: 9 settings x 2 repeats, 2 references, 1 background
RECORD_BYTES = 1222 + 13  # a reading's journal record with 4 ports (payload + frame)

LAUNCHER = (
    "import resource, subprocess, sys\n"
    "p = subprocess.Popen(sys.argv[1:], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)\n"
    "print(p.pid, flush=True)\n"
    "err = p.communicate()[1]\n"
    "sys.stderr.write(err.decode()[-2000:])\n"
    "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n"
    "sys.exit(p.returncode)\n"
)


def lightloom(*args: str) -> list[str]:
    return [sys.executable, "-m", "lightloom.sequencer.cli", *args]


def launch(cmd: list[str]) -> subprocess.Popen:
    """``cmd`` under a launcher that prints the child's pid, then its peak memory (kB) when it ends."""
    proc = subprocess.Popen([sys.executable, "-c", LAUNCHER, *cmd], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    proc.child_pid = int(proc.stdout.readline())  # type: ignore[attr-defined]
    return proc


def finish(proc: subprocess.Popen) -> tuple[int, float]:
    out, err = proc.communicate()
    if proc.returncode not in (0, 3, 130):
        sys.stderr.write(err)
    lines = out.split()
    return proc.returncode, (int(lines[-1]) / 1024 if lines else math.nan)


def file_state(h5: Path) -> int | None:
    import h5py

    try:
        with h5py.File(h5, "r") as f:
            return int(f.attrs["journal_bytes"])
    except Exception:
        return None


def poll_lag(h5: Path, journal: Path, stop: threading.Event, samples: list[tuple[float, int, int]]) -> None:
    while not stop.is_set():
        t = time.monotonic()
        size = journal.stat().st_size if journal.exists() else 0
        in_file = file_state(h5)
        if in_file is not None:
            samples.append((t, size, in_file))
        stop.wait(0.2)


def lag_seconds(samples: list[tuple[float, int, int]]) -> float:
    """Largest time by which the file trailed the journal: for each sample, how long ago the
    journal had only as many bytes as the file holds now."""
    worst = 0.0
    for t, _, in_file in samples:
        earlier = [t0 for t0, size, _ in samples if t0 <= t and size > in_file]
        if earlier:
            worst = max(worst, t - min(earlier))
    return worst


def refresh_costs(n: int, folder: Path) -> tuple[float, float]:
    """Median seconds of a 200-reading refresh early and late in an n-reading store."""
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    from helpers.records import make_header, make_reading
    from lightloom.sequencer.storage import RunStore
    import lightloom.sequencer.storage.journal as journal_module

    journal_module.sync_fd = lambda fd: None  # the refresh is measured, not the disk
    store = RunStore.create(folder / f"refresh-{n}.h5", make_header(n))
    readings = [make_reading(i) for i in range(200)]
    early, late = [], []
    for start in range(0, n, 200):
        for i, r in enumerate(readings[: min(200, n - start)]):
            store._journal.append_reading(type(r)(**{**r.__dict__, "step_index": start + i}))
        t0 = time.perf_counter()
        store.refresh()
        dt = time.perf_counter() - t0
        if start < n // 10:
            early.append(dt)
        elif start >= n - n // 10 - 200:
            late.append(dt)
    store.close("complete")
    return statistics.median(early or [math.nan]), statistics.median(late or [math.nan])


def one_size(n: int, folder: Path) -> dict:
    passes = max(1, min(round(n / STEPS_PER_PASS), (200_000 - 2) // STEPS_PER_PASS))
    protocol = folder / f"night-{n}.yaml"
    protocol.write_text(PROTOCOL.format(n=n, passes=passes))
    out = folder / f"night-{n}.h5"
    journal = out.with_name(out.name + ".journal")
    result: dict = {"readings_planned": None}

    # 1. the run, with the lag poller; killed near its end
    samples: list[tuple[float, int, int]] = []
    stop = threading.Event()
    t0 = time.monotonic()
    run = launch(lightloom("run", str(protocol), "--bench", "sim", "--out", str(out), "--quiet"))
    poller = threading.Thread(target=poll_lag, args=(out, journal, stop, samples), daemon=True)
    poller.start()
    kill_at = int(0.97 * passes * STEPS_PER_PASS) * RECORD_BYTES
    first_reading = math.nan
    head = None
    while run.poll() is None:
        size = journal.stat().st_size if journal.exists() else 0
        if head is None and size:
            head = size
        if math.isnan(first_reading) and head is not None and size > head + 200:
            first_reading = time.monotonic() - t0
        if size >= kill_at:
            os.kill(run.child_pid, signal.SIGKILL)
            break
        time.sleep(0.005)
    status, run_mb = finish(run)
    run_s = time.monotonic() - t0
    stop.set()
    poller.join()
    done_before = (journal.stat().st_size - 4000) // RECORD_BYTES
    result.update(run_first_s=first_reading, run_s=run_s, run_mb=run_mb, run_status=status, lag_s=lag_seconds(samples),
                  lag_readings=max((s - f) / RECORD_BYTES for _, s, f in samples) if samples else math.nan,
                  readings_before_kill=done_before)
    print(f"  {n}: run {result}", flush=True)

    # 2. resume: time to the first new reading
    size0 = journal.stat().st_size
    t0 = time.monotonic()
    resume = launch(lightloom("resume", str(out), "--quiet"))
    first = math.nan
    while resume.poll() is None:
        if math.isnan(first) and journal.stat().st_size > size0 + 200:
            first = time.monotonic() - t0
        time.sleep(0.005)
    status, resume_mb = finish(resume)
    resume_s = time.monotonic() - t0
    if math.isnan(first) and journal.stat().st_size > size0 + 200:
        first = resume_s
    import h5py

    with h5py.File(out, "r") as f:
        readings = int(f.attrs["n_readings"])
    result.update(resume_first_s=first, resume_mb=resume_mb, resume_status=status, readings=readings,
                  overhead_ms=1e3 * run_s / max(1, done_before))
    print(f"  {n}: resume first reading {first:.2f} s, {resume_mb:.0f} MB", flush=True)

    # 3. analyze
    t0 = time.monotonic()
    status, analyze_mb = finish(launch(lightloom("analyze", str(out), "--json")))
    result.update(analyze_s=time.monotonic() - t0, analyze_mb=analyze_mb, analyze_status=status)

    # 4. refresh cost in-process
    early, late = refresh_costs(readings, folder)
    result.update(refresh_early_ms=1e3 * early, refresh_late_ms=1e3 * late,
                  h5_mb=out.stat().st_size / 2**20, journal_mb=journal.stat().st_size / 2**20)
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="1000,10000,50000,200000")
    parser.add_argument("--dir", default=None)
    parser.add_argument("--keep", action="store_true", help="keep the run files")
    args = parser.parse_args()
    base = args.dir or ("/dev/shm" if Path("/dev/shm").is_dir() else None)
    folder = Path(tempfile.mkdtemp(prefix="night-scale-", dir=base))
    print(f"files in {folder}")
    rows = []
    try:
        for n in (int(x) for x in args.sizes.split(",")):
            r = one_size(n, folder)
            rows.append((n, r))
            print(json.dumps({"size": n, **{k: (round(v, 3) if isinstance(v, float) else v) for k, v in r.items()}}),
                  flush=True)
            if not args.keep:
                for p in folder.glob(f"night-{n}.*"):
                    p.unlink()
                for p in folder.glob("refresh-*"):
                    p.unlink()
    finally:
        if not args.keep:
            shutil.rmtree(folder, ignore_errors=True)
    print()
    print(f"{'readings':>9} {'run MB':>7} {'ms/rdg':>7} {'lag s':>6} {'lag rdg':>8} {'refresh ms early/late':>22} "
          f"{'run 1st s':>9} {'resume 1st s':>12} {'resume MB':>9} {'analyze s':>9} {'analyze MB':>10}")
    for n, r in rows:
        print(f"{r['readings']:>9} {r['run_mb']:>7.0f} {r['overhead_ms']:>7.2f} {r['lag_s']:>6.1f} "
              f"{r['lag_readings']:>8.0f} {r['refresh_early_ms']:>10.1f}/{r['refresh_late_ms']:<11.1f} "
              f"{r['run_first_s']:>9.2f} {r['resume_first_s']:>12.2f} {r['resume_mb']:>9.0f} "
              f"{r['analyze_s']:>9.1f} {r['analyze_mb']:>10.0f}")


if __name__ == "__main__":
    main()
