"""A simulated run killed part way and resumed reads the same noise at every step as an
uninterrupted run with the same seed."""

from __future__ import annotations

import signal

import numpy as np

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.run.session import log_path_for
from lightloom.sequencer.storage import read_runfile
from lightloom.simulators.table import SimulatedTable
from helpers.runs import assert_complete, log_steps, run_cli, spawn, wait_for_log_steps, write_bench


def _by_step(path):
    data = read_runfile(path)
    order = np.argsort(data.readings.step_index)
    return data, data.readings.values[order], data.readings.reference_w[order], data.readings.t_end[order]


PROTOCOL = """\
protocol: resume-check
description: Joint settings read in passes, for a stop-and-resume check
analyzes: [polarization, spatial]
measure:
  settings:
    - {polarization: H, spatial: h}
    - {polarization: D, spatial: h}
    - {polarization: R, spatial: d}
    - {polarization: V, spatial: l+}
dwell_s: 0.1
repeats: 3
background: {every_points: 6, dwell_s: 0.1}
reference: {every_points: 4, dwell_s: 0.1}
order: as-written
sweep: {passes: 16, interval_s: 0}
"""


def _protocol(folder):
    path = folder / "resume-check.yaml"
    path.write_text(PROTOCOL)
    return path


def _killed_and_resumed(protocol, bench, out, after_steps: int) -> None:
    proc = spawn("run", protocol, "--bench", bench, "--out", out, "--quiet")
    wait_for_log_steps(log_path_for(out), after_steps, proc)
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=60)
    assert proc.returncode == -signal.SIGKILL, "the run ended before the kill; lengthen it"
    recorded = len(log_steps(log_path_for(out)))
    assert 0 < recorded < read_runfile(out).header.steps_total
    assert run_cli("resume", out, "--quiet") == 0


def test_without_drift_a_killed_and_resumed_instant_run_equals_an_uninterrupted_one(tmp_path):
    bench = write_bench(tmp_path, "sim-steady", simulation={"drift": {"amplitude": 0.0, "period_s": 1800}})
    whole, killed = tmp_path / "whole.h5", tmp_path / "killed.h5"
    protocol = _protocol(tmp_path)
    assert run_cli("run", protocol, "--bench", bench, "--out", whole, "--quiet") == 0
    _killed_and_resumed(protocol, bench, killed, after_steps=40)
    assert_complete(killed)
    a, va, ra, _ = _by_step(whole)
    b, vb, rb, _ = _by_step(killed)
    assert [e.kind for e in b.events].count("resume") == 1
    np.testing.assert_array_equal(va, vb)
    np.testing.assert_array_equal(ra, rb)


def test_with_drift_the_resumed_run_continues_the_clock_and_differs_only_by_the_drift_of_repositioning(tmp_path):
    # The built-in bench drifts 2 % over 1800 s. After a resume the stages are approached again
    # (a fraction of a second of virtual time), so the drift factor moves by ~1e-5; the noise
    # (2e-3 relative) is the same stream. Before, the clock restarted at 0 and the noise stream
    # at its beginning, so readings after the resume differed at the noise level and beyond.
    bench = write_bench(tmp_path, "sim-drifting")
    whole, killed = tmp_path / "whole.h5", tmp_path / "killed.h5"
    protocol = _protocol(tmp_path)
    assert run_cli("run", protocol, "--bench", bench, "--out", whole, "--quiet") == 0
    _killed_and_resumed(protocol, bench, killed, after_steps=40)
    _, va, _, ta = _by_step(whole)
    _, vb, _, tb = _by_step(killed)
    np.testing.assert_allclose(vb, va, rtol=1e-4, atol=1e-8)
    # The virtual clock continues: the whole run's time line, shifted by the repositioning only.
    elapsed_a, elapsed_b = ta - ta[0], tb - tb[0]
    assert np.max(np.abs(elapsed_b - elapsed_a)) < 5.0


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
