"""kill -9 of a run at random moments, then ``resume``: every step exactly once, nothing reported lost."""

from __future__ import annotations

import random
import signal
import time

import numpy as np

from lightloom.sequencer.run.session import log_path_for
from lightloom.sequencer.storage import journal_path_for, read_journal
from helpers.runs import (
    assert_complete, log_steps, run_cli, spawn, wait_for_log_steps, write_bench,
)


def _kill(proc) -> None:
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=60)


def _assert_kept(final, before, reported: dict[int, np.ndarray]) -> None:
    """Every reading the journal held before a kill is in the final file unchanged; every logged one too."""
    at = {int(s): i for i, s in enumerate(final.readings.step_index)}
    for row in before.readings.rows():
        assert final.readings.row(at[row.step_index]) == row, f"step {row.step_index} changed"
    assert set(reported) <= {int(s) for s in before.readings.step_index}
    for index, values in reported.items():
        np.testing.assert_allclose(final.readings.values[at[index]], values, rtol=1e-5, atol=1e-14)


def test_kill9_at_random_moments_then_resume_gives_every_step_once_and_loses_nothing(tmp_path, capsys):
    rng = random.Random(20261201)
    bench = write_bench(tmp_path, "sim-tenth", simulation={"time_scale": 0.1})
    for trial in range(3):
        out = tmp_path / f"run{trial}.h5"
        log = log_path_for(out)
        before = None
        reported: dict[int, np.ndarray] = {}
        for kill in range(1 + trial % 2):  # odd trials kill the resumed run as well
            args = ("run", "joint-36", "--bench", bench, "--out", out) if kill == 0 else ("resume", out)
            proc = spawn(*args, "--quiet")
            wait_for_log_steps(log, len(reported) + rng.randint(1, 8), proc)
            time.sleep(rng.uniform(0.0, 0.3))
            _kill(proc)
            assert proc.returncode == -signal.SIGKILL, "the run ended before the kill; lengthen it"
            reported = log_steps(log)
            snapshot = read_journal(journal_path_for(out))
            if before is not None:
                _assert_kept(snapshot, before, {})
            before = snapshot
            assert 0 < len(before.readings) < before.header.steps_total
        assert run_cli("resume", out) == 0
        final = assert_complete(out)
        _assert_kept(final, before, reported)
        assert [e.kind for e in final.events].count("resume") == 1 + trial % 2


def test_kill9_during_file_creation_then_resume_completes_or_says_there_is_no_run(tmp_path, capsys):
    rng = random.Random(7)
    bench = write_bench(tmp_path, "sim-fast", simulation={"time_scale": 0.01})
    for trial in range(3):
        folder = tmp_path / f"t{trial}"
        folder.mkdir()
        out = folder / "run.h5"
        proc = spawn("run", "polarization-6", "--bench", bench, "--out", out, "--quiet")
        while not any(folder.iterdir()) and proc.poll() is None:
            time.sleep(0.0005)
        time.sleep(rng.uniform(0.0, 0.01))
        _kill(proc)
        capsys.readouterr()
        if journal_path_for(out).exists():
            assert run_cli("resume", out) == 0
        else:
            assert not out.exists()
            assert run_cli("resume", out) == 2
            err = capsys.readouterr().err
            assert err.count("\n") == 1 and "no such run" in err
            assert run_cli("run", "polarization-6", "--bench", bench, "--out", out) == 0
        assert_complete(out)
