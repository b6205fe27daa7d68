"""Kill -9 at random moments: every reading reported before the kill is kept, exactly once.

Run as a script, this file is the writer process that the tests kill:
``python test_storage_kill.py append RUN.h5 TOTAL`` creates (or resumes) a run and
prints each step index after ``record`` returns; ``create RUN.h5`` prints "imported"
and then creates the run.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from lightloom.sequencer.errors import StorageError
from lightloom.sequencer.storage import Event, RunStore, load_run, read_journal, read_runfile
from helpers.records import make_header, make_reading

REPO = Path(__file__).resolve().parents[1]


def _writer_main(argv: list[str]) -> None:
    mode, path = argv[0], Path(argv[1])
    if mode == "create":
        print("imported", flush=True)
        RunStore.create(path, make_header())
        print("created", flush=True)
        return
    total = int(argv[2])
    if path.with_name(path.name + ".journal").exists():
        store = RunStore.reopen(path)
        store.event(Event(time.time(), "resume", ""))
    else:
        store = RunStore.create(path, make_header(total))
        store.event(Event(time.time(), "start", ""))
    store.refresh("running")
    print("ready", flush=True)
    for i in range(store.n_readings, total):
        store.record(make_reading(i))
        print(i, flush=True)
        if i % 25 == 24:
            store.refresh("running")
    store.close("complete")
    print("closed", flush=True)


def start_writer(*args: str) -> subprocess.Popen:
    """The writer of this file in a new process, its stdout a text pipe."""
    return subprocess.Popen(
        [sys.executable, str(Path(__file__).resolve()), *args], stdout=subprocess.PIPE,
        text=True, env={**os.environ, "PYTHONPATH": str(REPO)},
    )


def kill_after_lines(writer: subprocess.Popen, lines: int, extra_s: float) -> list[str]:
    """SIGKILL the writer once it has printed ``lines`` lines and ``extra_s`` more seconds."""
    seen = []
    while len(seen) < lines:
        line = writer.stdout.readline()
        if not line:
            break
        seen.append(line)
    time.sleep(extra_s)
    writer.send_signal(signal.SIGKILL)
    seen += writer.stdout.readlines()
    writer.wait(timeout=30)
    return [line.strip() for line in seen if line.endswith("\n")]


def reported_indices(lines: list[str]) -> set[int]:
    """Step indices the writer printed after record() returned."""
    return {int(line) for line in lines if line.isdigit()}


def check_run(path: Path, reported: set[int]) -> int:
    """Assert every reported reading is stored once, in order, intact; return how many."""
    contents = read_journal(path.with_name(path.name + ".journal"))
    assert contents.damage is None or contents.damage.intact_after == 0
    steps = contents.readings.step_index
    np.testing.assert_array_equal(steps, np.arange(len(steps)))
    assert reported <= set(steps.tolist()), sorted(reported - set(steps.tolist()))
    assert all(contents.readings.row(i) == make_reading(i) for i in range(len(steps)))
    try:
        in_file = read_runfile(path).readings.step_index
    except StorageError as exc:
        # Killed during an append: the file says so, and resume rebuilds it from the journal.
        assert "lightloom resume" in str(exc) and "journal" in str(exc), exc
    else:
        np.testing.assert_array_equal(in_file, np.arange(len(in_file)))
        assert len(in_file) <= len(steps)
    assert len(load_run(path).readings) == len(steps)
    return len(steps)


def test_kill9_during_appends_loses_no_reported_reading(tmp_path):
    rng = random.Random(20260304)
    total = 200
    for trial in range(3):
        path = tmp_path / f"run{trial}.h5"
        for _ in range(2):
            writer = start_writer("append", str(path), str(total))
            lines = kill_after_lines(writer, rng.randint(3, 60), rng.uniform(0, 0.004))
            assert writer.returncode == -signal.SIGKILL
            check_run(path, reported_indices(lines))
        writer = start_writer("append", str(path), str(total))
        out, _ = writer.communicate(timeout=120)
        assert writer.returncode == 0 and out.splitlines()[-1] == "closed"
        assert check_run(path, set()) == total
        data = load_run(path)
        assert data.status == "complete" and data.steps_done == total


def test_kill9_during_creation_leaves_a_run_that_resumes_or_nothing(tmp_path):
    rng = random.Random(77)
    for trial in range(5):
        path = tmp_path / f"new{trial}.h5"
        writer = start_writer("create", str(path))
        lines = kill_after_lines(writer, 1, rng.uniform(0, 0.04))
        journal = path.with_name(path.name + ".journal")
        if journal.exists():
            RunStore.reopen(path).close("interrupted")
            assert len(read_runfile(path).readings) == 0
        else:
            assert "created" not in lines and not path.exists()
            RunStore.create(path, make_header()).close("complete")


if __name__ == "__main__":
    _writer_main(sys.argv[1:])
