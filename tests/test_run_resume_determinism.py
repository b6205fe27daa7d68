"""A simulated instant run stopped part way (kill -9, SIGTERM) and resumed records exactly what an
uninterrupted run with the same seed records: every detector value, every reference value and the
virtual time of every reading, laser drift included, on the built-in benches as they ship."""

from __future__ import annotations

import math
import signal

import numpy as np
import pytest

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.run.runner import StopRequested
from lightloom.sequencer.run.session import log_path_for
from lightloom.sequencer.storage import journal_path_for, read_journal, read_runfile
from lightloom.sequencer.storage.store import RunStore
from lightloom.simulators import devices
from lightloom.simulators.table import READING_GRID_S, SimulatedTable
from helpers.runs import assert_complete, log_steps, run_cli, spawn, wait_for_log_steps, write_bench

# Passes 30 s apart: between passes the runner waits (instantly, on the virtual clock). Steps per
# pass: 3 points x 2 repeats + 3 references = 9, after one background at the start.
PROTOCOL = """\
protocol: resume-check
description: Three joint settings read in passes with waits between them, for stop-and-resume checks
analyzes: [polarization, spatial]
determines: scan
measure:
  settings:
    - {polarization: H, spatial: h}
    - {polarization: D, spatial: l+}
    - {polarization: R, spatial: d}
dwell_s: 0.1
repeats: 2
background: {every_points: 0, at_start: true, at_end: true, dwell_s: 0.1}
reference: {every_points: 1, dwell_s: 0.05}
order: as-written
sweep: {passes: 3, interval_s: 30}
"""
PASS_STEPS, FIRST_PASS_ENDS = 9, 10


def _protocol(folder):
    path = folder / "resume-check.yaml"
    path.write_text(PROTOCOL)
    return path


@pytest.fixture(scope="module")
def uninterrupted(tmp_path_factory):
    """bench -> an uninterrupted run of PROTOCOL on that built-in bench (made once per module)."""
    folder, runs = tmp_path_factory.mktemp("uninterrupted"), {}

    def run(bench):
        if bench not in runs:
            runs[bench] = folder / f"{bench}.h5"
            assert run_cli("run", _protocol(folder), "--bench", bench, "--out", runs[bench], "--quiet") == 0
        return runs[bench]
    return run


def _recorded(path):
    """Values, references and reading start/end times (s after the run's start event), by step."""
    data = read_runfile(path)
    order = np.argsort(data.readings.step_index)
    start = next(e.t for e in data.events if e.kind == "start")
    r = data.readings
    return data, {"values": r.values[order], "reference": r.reference_w[order],
                  "t_start": r.t_start[order] - start, "t_end": r.t_end[order] - start,
                  "readback": r.readback[order]}


def _assert_identical(whole, resumed, resumes=1):
    _, a = _recorded(whole)
    data, b = _recorded(resumed)
    assert_complete(resumed)
    assert [e.kind for e in data.events].count("resume") == resumes
    # Read-backs too, but for the first step after a resume: where the uninterrupted runner took a
    # target equal to the last one up to rounding (< 1e-9 deg) as no move, the resumed one
    # approached it afresh, so that single read-back may differ by such a rounding.
    ra, rb = a.pop("readback"), b.pop("readback")
    differ = ~((ra == rb) | (np.isnan(ra) & np.isnan(rb)))
    assert len(set(np.flatnonzero(differ.any(axis=1)))) <= resumes
    assert np.all(np.abs(ra - rb)[differ] < 1e-9)
    for key in a:
        assert np.array_equal(a[key], b[key], equal_nan=True), (
            key, resumed.name, np.argwhere(~((a[key] == b[key]) | (np.isnan(a[key]) & np.isnan(b[key])))).T.tolist(),
            float(np.nanmax(np.abs(a[key] - b[key]))))


def _stopped_after(monkeypatch, protocol, bench, out, n_records):
    """Run in this process; SIGTERM's stop (StopRequested) right after the n-th reading is stored."""
    record = RunStore.record
    stored = [0]

    def record_then_stop(self, reading):
        record(self, reading)
        stored[0] += 1
        if stored[0] == n_records:
            raise StopRequested("SIGTERM")

    with monkeypatch.context() as m:
        m.setattr(RunStore, "record", record_then_stop)
        assert run_cli("run", protocol, "--bench", bench, "--out", out, "--quiet") == 130
    assert len(read_runfile(out).readings) == n_records


@pytest.mark.parametrize(("bench", "stops"), [
    # After the first reading; mid-pass; after the last reading of a pass (the uninterrupted run's
    # next act was the wait for the next pass).
    ("sim", (1, FIRST_PASS_ENDS + 4, FIRST_PASS_ENDS + PASS_STEPS)),
    ("sim-single", (FIRST_PASS_ENDS, FIRST_PASS_ENDS + 5)),
])
def test_a_stopped_and_resumed_drifting_run_records_exactly_what_an_uninterrupted_one_does(
        tmp_path, capsys, monkeypatch, uninterrupted, bench, stops):
    assert load_bench(bench).simulation.drift.amplitude > 0  # the benches as they ship drift
    protocol, whole = _protocol(tmp_path), uninterrupted(bench)
    for n in stops:
        out = tmp_path / f"stopped-{n}.h5"
        _stopped_after(monkeypatch, protocol, bench, out, n)
        assert run_cli("resume", out, "--quiet") == 0
        _assert_identical(whole, out)


def test_a_run_stopped_twice_resumes_twice_to_the_same_record(tmp_path, capsys, monkeypatch, uninterrupted):
    protocol, whole, out = _protocol(tmp_path), uninterrupted("sim"), tmp_path / "twice.h5"
    _stopped_after(monkeypatch, protocol, "sim", out, 7)
    record = RunStore.record
    stored = [0]

    def record_then_stop(self, reading):
        record(self, reading)
        stored[0] += 1
        if stored[0] == 20:
            raise StopRequested("SIGTERM")

    with monkeypatch.context() as m:
        m.setattr(RunStore, "record", record_then_stop)
        assert run_cli("resume", out, "--quiet") == 130
    assert run_cli("resume", out, "--quiet") == 0
    _assert_identical(whole, out, resumes=2)


def test_a_killed_and_resumed_run_records_exactly_what_an_uninterrupted_one_does(tmp_path, uninterrupted):
    protocol, whole, killed = _protocol(tmp_path), uninterrupted("sim"), tmp_path / "killed.h5"
    proc = spawn("run", protocol, "--bench", "sim", "--out", killed, "--quiet")
    wait_for_log_steps(log_path_for(killed), 12, proc)
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=60)
    assert proc.returncode == -signal.SIGKILL, "the run ended before the kill; lengthen it"
    # the kill may land during a refresh of the .h5 (that file is then half-appended until the
    # resume rebuilds it), so the killed run is read from its journal
    assert 0 < len(log_steps(log_path_for(killed))) < read_journal(journal_path_for(killed)).header.steps_total
    assert run_cli("resume", killed, "--quiet") == 0
    _assert_identical(whole, killed)


def test_the_resumed_run_still_closes_the_shutter_first_and_approaches_every_stage_again(
        tmp_path, capsys, monkeypatch):
    protocol, out = _protocol(tmp_path), tmp_path / "stopped.h5"
    _stopped_after(monkeypatch, protocol, "sim", out, FIRST_PASS_ENDS + 4)
    calls: list[tuple[str, object, float]] = []
    close, open_, move = devices.SimShutter.close_beam, devices.SimShutter.open, devices.SimRotationStage.move_to_deg

    def spy_close(self):
        calls.append(("close", self, math.nan))
        close(self)

    def spy_open(self):
        calls.append(("open", self, math.nan))
        open_(self)

    def spy_move(self, angle):
        calls.append(("move", self, float(angle)))
        move(self, angle)

    monkeypatch.setattr(devices.SimShutter, "close_beam", spy_close)
    monkeypatch.setattr(devices.SimShutter, "open", spy_open)
    monkeypatch.setattr(devices.SimRotationStage, "move_to_deg", spy_move)
    assert run_cli("resume", out, "--quiet") == 0
    # The resumed run's table is the one whose shutter was closed last; a stand-in table (which
    # times the transition to the first step left) has its own clock and is left out.
    clock = calls[-1][1].clock
    real = [(kind, device.name, angle) for kind, device, angle in calls if device.clock is clock]
    assert len(real) < len(calls)
    assert real[0][0] == "close", real[:3]
    bench = load_bench("sim")
    for stage in ("qwp_stage", "hwp_stage", "rotator_stage"):
        moves = [c[2] for c in real if c[0] == "move" and c[1] == stage]
        backlash = bench.devices[stage].backlash_deg
        # From an unknown position every stage is approached from below: target - 2 backlash, target.
        assert moves[1] - moves[0] == pytest.approx(2 * backlash), (stage, moves[:2])


def test_a_table_at_rest_re_anchored_in_time_keeps_its_state_and_reads_on_the_grid():
    table = SimulatedTable(load_bench("sim"))
    stage = table.stage_of[next(iter(table.stage_of))]
    table.shutter.open()
    stage.move_to_deg(30.0)
    with pytest.raises(ValueError, match="still moving"):
        table.rest_at(0.0)
    stage.wait_settled(60.0)
    before = (table.optical_settings().copy(), table.shutter.transmits(), table.clock.now())
    table.continue_at_step(5, 0.25)
    table.begin_step(4)  # another step: no re-anchoring, only the grid
    assert table.clock.now() >= before[2] and table.clock.now() % READING_GRID_S == 0
    table.continue_at_step(5, 0.25)
    table.begin_step(5)
    assert table.clock.now() == math.ceil(0.25 / READING_GRID_S) * READING_GRID_S
    assert np.array_equal(table.optical_settings(), before[0]) and table.shutter.transmits() == before[1]
    assert stage.pending_s() == 0.0


def test_each_step_has_its_own_noise_stream_whatever_came_before(tmp_path):
    bench = write_bench(tmp_path, "sim-steady", simulation={"drift": {"amplitude": 0.0, "period_s": 1800}})
    table = SimulatedTable(load_bench(str(bench)))
    meter = table.devices["pm_hH"]
    table.shutter.open()
    table.begin_step(7)
    first = [meter.read_power_w(0.01) for _ in range(3)]
    table.begin_step(3)
    meter.read_power_w(0.01)
    table.begin_step(7)
    again = [meter.read_power_w(0.01) for _ in range(3)]
    table.begin_step(8)
    other = meter.read_power_w(0.01)
    assert first == again and other != first[0]
