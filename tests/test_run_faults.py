"""Instrument faults during a run: transient ones are retried and flagged, the rest stop safely (exit 3)."""

from __future__ import annotations

import re

import numpy as np
import pytest

from lightloom.sequencer.run import runner as runner_module
from lightloom.sequencer.run.session import log_path_for
from lightloom.sequencer.storage import read_runfile
from lightloom.sequencer.storage.errors import StorageWriteError
from lightloom.sequencer.model.records import FLAG_RETRIED
from lightloom.sequencer.storage.store import RunStore
from helpers.runs import assert_complete, log_steps, run_cli, write_bench

_TRANSIENT = re.compile(r"transient fault on (.+?) \(attempt (\d+)\): device '(\w+)'.*retrying in ([\d.]+) s$")


def _retries_before_steps(log_text: str) -> dict[int, list[str]]:
    """Step index -> devices whose transient faults the log reports while that step was measured."""
    out: dict[int, list[str]] = {}
    pending: list[str] = []
    for line in log_text.splitlines():
        m = _TRANSIENT.search(line)
        if m:
            pending.append(m.group(3))
            continue
        words = line.split()
        if len(words) > 2 and words[1] == "step":
            if pending:
                out[int(words[2])] = pending
            pending = []
    return out


def _stuck_bench(folder, at_s: float = 6.5, duration_s: float | None = None):
    fault = {"device": "hwp_stage", "kind": "stuck", "at_s": at_s}
    if duration_s is not None:
        fault["duration_s"] = duration_s
    return write_bench(folder, "sim-stuck", simulation={"faults": [fault]})


# Stuck long enough for the first run to give up on the stage (120 s settle timeout), short enough
# that the stage moves again during the resume (the simulated clock continues where the run stopped).
_UNSTICKS_S = 200.0


def test_transient_timeout_garbled_and_drop_are_retried_and_flag_the_reading(tmp_path, capsys, shutter_watch):
    faults = [
        {"device": "pm_hH", "kind": "timeout", "at_s": 3.0},
        {"device": "qwp_stage", "kind": "garbled", "at_s": 6.0},
        {"device": "hwp_stage", "kind": "drop", "at_s": 12.0},
        {"device": "pm_ref", "kind": "garbled", "probability": 0.1},
    ]
    bench = write_bench(tmp_path, "sim-flaky", simulation={"faults": faults})
    out = tmp_path / "run.h5"
    assert run_cli("run", "joint-16", "--bench", bench, "--out", out) == 0
    data = assert_complete(out)
    log_text = log_path_for(out).read_text()
    retried = _retries_before_steps(log_text)
    assert {"pm_hH", "qwp_stage", "hwp_stage", "pm_ref"} <= {d for ds in retried.values() for d in ds}
    flagged = {int(s) for s, f in zip(data.readings.step_index, data.readings.flags) if f & FLAG_RETRIED}
    assert flagged == set(retried)
    shutter_watch.assert_closed_at_the_end()


def test_retried_readings_hold_the_same_light_as_a_run_without_faults(tmp_path, capsys):
    faults = [{"device": "pm_vV", "kind": "timeout", "at_s": 2.0}, {"device": "pm_hV", "kind": "drop", "at_s": 5.0}]
    clean, flaky = tmp_path / "clean.h5", tmp_path / "flaky.h5"
    assert run_cli("run", "polarization-6", "--bench", "sim", "--out", clean) == 0
    bench = write_bench(tmp_path, "sim-flaky", simulation={"faults": faults})
    assert run_cli("run", "polarization-6", "--bench", bench, "--out", flaky) == 0
    a, b = read_runfile(clean).readings, read_runfile(flaky).readings
    assert np.count_nonzero(b.flags & FLAG_RETRIED) >= 2
    light = a.kind != "background"
    # The retry spends virtual back-off time, so the slow laser drift differs by far less than 1e-3.
    np.testing.assert_allclose(b.values[light], a.values[light], rtol=1e-3)


def test_back_off_doubles_up_to_its_cap_and_the_run_gives_up_after_the_attempts(tmp_path, capsys, shutter_watch):
    bench = write_bench(
        tmp_path, "sim-dead-meter",
        retry={"attempts": 6, "backoff_s": 0.1, "max_backoff_s": 0.3},
        simulation={"faults": [{"device": "pm_vV", "kind": "timeout", "at_s": 4.0, "duration_s": 1000.0}]},
    )
    out = tmp_path / "run.h5"
    assert run_cli("run", "polarization-6", "--bench", bench, "--out", out) == 3
    delays = [float(m.group(4)) for m in map(_TRANSIENT.search, log_path_for(out).read_text().splitlines()) if m]
    assert delays == [0.1, 0.2, 0.3, 0.3, 0.3]
    data = read_runfile(out)
    assert data.status == "fault"
    assert "pm_vV" in data.message and "after 6 attempt(s)" in data.message and "lightloom resume" in data.message
    assert data.events[-1].kind == "fault" and data.events[-1].message == data.message
    shutter_watch.assert_closed_at_the_end()


def test_a_stage_stuck_for_ever_stops_with_exit_3_the_shutter_closed_and_the_fault_in_the_file(
    tmp_path, capsys, shutter_watch
):
    out = tmp_path / "run.h5"
    assert run_cli("run", "polarization-6", "--bench", _stuck_bench(tmp_path), "--out", out) == 3
    shutter_watch.assert_closed_at_the_end()
    data = read_runfile(out)
    assert data.status == "fault" and "hwp_stage" in data.message and "stalled" in data.message
    assert 0 < len(data.readings) < data.header.steps_total
    printed = capsys.readouterr().out
    assert "fault:" in printed and "hwp_stage" in printed
    assert data.message in log_path_for(out).read_text()


def test_resume_after_a_fault_records_only_the_missing_steps_until_complete(tmp_path, capsys):
    out = tmp_path / "run.h5"
    assert run_cli("run", "polarization-6", "--bench", _stuck_bench(tmp_path, duration_s=_UNSTICKS_S), "--out", out) == 3
    done = len(read_runfile(out).readings)
    for _ in range(5):
        status = run_cli("resume", out)
        now = read_runfile(out)
        assert len(now.readings) > done and len(set(now.readings.step_index.tolist())) == len(now.readings)
        done = len(now.readings)
        if status == 0:
            break
        assert status == 3 and now.status == "fault"
    assert_complete(out)


def test_resume_refuses_a_bench_changed_after_a_fault_and_leaves_the_run_as_it_was(tmp_path, capsys):
    bench = _stuck_bench(tmp_path, duration_s=_UNSTICKS_S)
    out = tmp_path / "run.h5"
    assert run_cli("run", "polarization-6", "--bench", bench, "--out", out) == 3
    before = read_runfile(out)
    original = bench.read_text()
    bench.write_text(original.replace("6.5", "600.0"))
    capsys.readouterr()
    assert run_cli("resume", out) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and str(bench) in err and "changed since the run started" in err
    after = read_runfile(out)
    assert (after.status, after.message) == (before.status, before.message)
    assert after.readings == before.readings and after.events == before.events
    bench.write_text(original)
    assert run_cli("resume", out) in (0, 3)
    assert len(read_runfile(out).readings) > len(before.readings)


def test_a_shutter_that_will_not_close_is_reported_with_block_the_beam_by_hand(tmp_path, capsys, shutter_watch):
    bench = write_bench(
        tmp_path, "sim-bad-shutter",
        simulation={"faults": [{"device": "shutter", "kind": "timeout", "at_s": 4.0, "duration_s": 100000.0}]},
    )
    out = tmp_path / "run.h5"
    assert run_cli("run", "polarization-6", "--bench", bench, "--out", out) == 3
    data = read_runfile(out)
    assert data.status == "fault" and "block the beam by hand" in data.message
    assert "block the beam by hand" in capsys.readouterr().out
    assert shutter_watch.table.shutter.transmits(), "the fault should have left the simulated shutter open"


def test_a_journal_write_failure_stops_with_exit_3_and_the_shutter_closed(tmp_path, capsys, monkeypatch, shutter_watch):
    record = RunStore.record
    calls = []

    def failing(self, reading):
        calls.append(reading.step_index)
        if len(calls) == 4:
            raise StorageWriteError(f"{self.journal_path}: cannot append to the journal: No space left on device")
        record(self, reading)

    monkeypatch.setattr(RunStore, "record", failing)
    out = tmp_path / "run.h5"
    assert run_cli("run", "polarization-6", "--bench", "sim", "--out", out) == 3
    shutter_watch.assert_closed_at_the_end()
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "No space left on device" in err


def test_an_unexpected_error_in_the_runner_closes_the_shutter_and_leaves_a_resumable_run(
    tmp_path, capsys, monkeypatch, shutter_watch
):
    operators = runner_module.port_operators
    calls = []

    def broken(*args, **kwargs):
        calls.append(1)
        if len(calls) == 3:
            raise RuntimeError("a bug")
        return operators(*args, **kwargs)

    monkeypatch.setattr(runner_module, "port_operators", broken)
    out = tmp_path / "run.h5"
    with pytest.raises(RuntimeError, match="a bug"):
        run_cli("run", "polarization-6", "--bench", "sim", "--out", out)
    shutter_watch.assert_closed_at_the_end()
    stopped = read_runfile(out)
    assert stopped.status == "fault" and "internal error RuntimeError('a bug')" in stopped.message
    monkeypatch.setattr(runner_module, "port_operators", operators)
    assert sorted(log_steps(log_path_for(out))) == [0, 1]
    assert run_cli("resume", out) == 0
    assert_complete(out)
