"""Ctrl-C (SIGINT) and SIGTERM stop a run safely: exit 130, status interrupted, shutter closed, resumable."""

from __future__ import annotations

import signal

import pytest

from lightloom.sequencer.run.session import log_path_for
from lightloom.sequencer.storage import journal_path_for, read_journal, read_runfile
from lightloom.sequencer.storage.store import RunStore
from helpers.runs import (
    assert_complete, run_cli, spawn, wait_for_log_steps, write_bench,
)


@pytest.mark.parametrize(
    "signum, said", [(signal.SIGINT, "Ctrl-C"), (signal.SIGTERM, "SIGTERM"), (signal.SIGHUP, "SIGHUP")]
)
def test_a_signal_stops_the_run_safely_with_exit_130_and_resume_completes_it(tmp_path, capsys, signum, said):
    bench = write_bench(tmp_path, "sim-tenth", simulation={"time_scale": 0.1})
    out = tmp_path / "run.h5"
    log = log_path_for(out)
    proc = spawn("run", "polarization-6", "--bench", bench, "--out", out, "--quiet")
    wait_for_log_steps(log, 2, proc)
    proc.send_signal(signum)
    stdout, _ = proc.communicate(timeout=60)
    assert "complete: all" not in stdout, "the run ended before the signal; lengthen it"
    assert proc.returncode == 130, stdout
    data = read_runfile(out)
    assert data.status == "interrupted" and said in data.message and "lightloom resume" in data.message
    assert data.events[-1].kind == "interrupted"
    lines = log.read_text().splitlines()
    assert "shutter closed (it reads back closed)" in lines[-2] and lines[-1].split(" ", 1)[1].startswith("interrupted:")
    assert 2 <= len(data.readings) < data.header.steps_total
    before = read_journal(journal_path_for(out)).readings
    assert run_cli("resume", out) == 0
    final = assert_complete(out)
    assert final.readings.select(slice(0, len(before))) == before


def test_a_run_started_under_nohup_ignores_sighup_and_completes(tmp_path, capsys):
    bench = write_bench(tmp_path, "sim-tenth", simulation={"time_scale": 0.1})
    out = tmp_path / "run.h5"
    proc = spawn(
        "run", "polarization-6", "--bench", bench, "--out", out, "--quiet",
        preexec_fn=lambda: signal.signal(signal.SIGHUP, signal.SIG_IGN),
    )
    wait_for_log_steps(log_path_for(out), 2, proc)
    proc.send_signal(signal.SIGHUP)
    stdout, _ = proc.communicate(timeout=60)
    assert proc.returncode == 0, stdout
    assert_complete(out)


def test_a_second_ctrl_c_while_the_shutter_closes_does_not_stop_the_closing(tmp_path, capsys, monkeypatch, shutter_watch):
    from lightloom.simulators.devices import SimShutter

    record, close = RunStore.record, SimShutter.close_beam
    state = {"records": 0, "stopping": False, "second": False}

    def record_then_ctrl_c(self, reading):
        record(self, reading)
        state["records"] += 1
        if state["records"] == 3:
            state["stopping"] = True
            raise KeyboardInterrupt

    def close_with_second_ctrl_c(self):
        if state["stopping"] and not state["second"]:
            state["second"] = True
            raise KeyboardInterrupt
        close(self)

    monkeypatch.setattr(RunStore, "record", record_then_ctrl_c)
    monkeypatch.setattr(SimShutter, "close_beam", close_with_second_ctrl_c)
    out = tmp_path / "run.h5"
    assert run_cli("run", "polarization-6", "--bench", "sim", "--out", out) == 130
    assert state["second"]
    assert not shutter_watch.table.shutter.transmits(), "the second Ctrl-C left the beam on"
    assert read_runfile(out).status == "interrupted"
