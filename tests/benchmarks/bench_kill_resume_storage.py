"""Benchmark: many kill -9 trials against the storage writer, then resume; counts every outcome.

Run on demand: ``PYTHONPATH=. python tests/benchmarks/bench_kill_resume_storage.py [APPEND_KILLS
CREATE_KILLS]``. Uses the writer process of tests/test_storage_kill.py. Prints how many
reported readings were lost or duplicated (both must be 0), how many torn tails were cut,
and where the kills during creation landed.
"""

from __future__ import annotations

import random
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

TESTS = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(TESTS))

from lightloom.sequencer.storage import RunStore, load_run, read_journal, read_runfile  # noqa: E402
from test_storage_kill import (  # noqa: E402
    check_run, kill_after_lines, reported_indices, start_writer,
)
from helpers.records import make_header  # noqa: E402


def append_kills(tmp: Path, kills: int, rng: random.Random, total: int = 100_000) -> None:
    path = tmp / "append.h5"
    lost = duplicated = torn = cut_bytes = reported_total = 0
    started = time.perf_counter()
    for _ in range(kills):
        writer = start_writer("append", str(path), str(total))
        lines = kill_after_lines(writer, rng.randint(2, 300), rng.uniform(0, 0.005))
        reported = reported_indices(lines)
        reported_total += len(reported)
        journal = path.with_name(path.name + ".journal")
        steps = read_journal(journal).readings.step_index.tolist()
        lost += len(reported - set(steps))
        duplicated += len(steps) - len(set(steps))
        check_run(path, reported)
        store = RunStore.reopen(path)
        torn += store.bytes_cut > 0
        cut_bytes += store.bytes_cut
        store.release()
    n = len(load_run(path).readings)
    print(f"append kills: {kills} in {time.perf_counter() - started:.1f} s; readings stored "
          f"{n}, reported {reported_total} (a reading reported twice would count twice)")
    print(f"  lost reported readings: {lost}; duplicated step indices: {duplicated}")
    print(f"  torn tails cut on resume: {torn} ({cut_bytes} bytes in all)")


def create_kills(tmp: Path, kills: int, rng: random.Random) -> None:
    outcomes: Counter[str] = Counter()
    for trial in range(kills):
        path = tmp / f"new{trial}.h5"
        writer = start_writer("create", str(path))
        kill_after_lines(writer, 1, rng.uniform(0, 0.045))
        journal = path.with_name(path.name + ".journal")
        h5_ok = True
        try:
            read_runfile(path)
        except Exception:
            h5_ok = False
        if not journal.exists():
            outcomes["nothing (create again)" if not path.exists() else "BAD: h5 without journal"] += 1
            RunStore.create(path, make_header()).close("complete")
        else:
            outcomes["journal + readable h5" if h5_ok else "journal, no usable h5"] += 1
            RunStore.reopen(path).close("interrupted")
            read_runfile(path)
    print(f"create kills: {kills}; outcomes: {dict(outcomes)}; every run resumable or absent")


def main(append: int = 50, create: int = 40) -> None:
    rng = random.Random(4242)
    with tempfile.TemporaryDirectory() as tmpdir:
        tmp = Path(tmpdir)
        if append:
            append_kills(tmp, append, rng)
        if create:
            create_kills(tmp, create, rng)


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:]))
