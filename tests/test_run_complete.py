"""Complete runs on the simulated benches: every step once, the operators, the log, the shutter."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from helpers.runs import (
    assert_complete, assert_operators_psd, log_steps, run_cli, stored_plan, write_bench,
)
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.lang.protocol import load_protocol
from lightloom.sequencer.plan.tablemodel import compile_protocol
from lightloom.sequencer.run.session import log_path_for
from lightloom.sequencer.storage import read_runfile


# --------------------------------------------------------------------------- tests
def test_a_bench_in_another_folder_extends_the_builtin_sim_by_name(tmp_path):
    path = write_bench(tmp_path, "sim-scaled", simulation={"time_scale": 0.01})
    bench, sim = load_bench(path), load_bench("sim")
    assert bench.simulation.time_scale == 0.01 and sim.simulation.time_scale == 0.0
    assert bench.devices == sim.devices and bench.roles == sim.roles
    assert Path(bench.extends[0]).name == "sim.yaml"


@pytest.mark.parametrize(
    "protocol, bench, n_ports",
    [
        ("polarization-6", "sim", 4),
        ("spatial-4", "sim", 4),
        ("joint-16", "sim", 4),
        ("polarization-4", "sim-single", 1),
        ("joint-16", "sim-single", 1),
    ],
)
def test_a_run_completes_with_every_step_once_and_psd_operators(tmp_path, capsys, protocol, bench, n_ports):
    out = tmp_path / "run.h5"
    assert run_cli("run", protocol, "--bench", bench, "--out", out) == 0
    data = assert_complete(out)
    assert data.message == f"all {len(stored_plan(data).steps)} steps recorded"
    assert data.header.steps_json == compile_protocol(load_protocol(protocol), load_bench(bench)).to_json()
    assert_operators_psd(data, n_ports)
    assert data.readings.values.shape == (len(data.readings), n_ports)
    assert np.all(data.readings.flags == 0)
    assert [e.kind for e in data.events] == ["start", "complete"]
    assert sorted(log_steps(log_path_for(out))) == list(range(len(data.readings)))
    assert "complete: all" in log_path_for(out).read_text().splitlines()[-1]


def test_read_back_positions_are_where_the_plan_sent_the_stages(tmp_path, capsys):
    out = tmp_path / "run.h5"
    assert run_cli("run", "joint-16", "--bench", "sim", "--out", out) == 0
    r = read_runfile(out).readings
    used = ~np.isnan(r.commanded)
    assert np.array_equal(used, ~np.isnan(r.readback))
    assert np.abs(r.readback[used] - r.commanded[used]).max() <= 0.05


def test_the_log_has_one_line_per_reading_with_the_recorded_values(tmp_path, capsys):
    out = tmp_path / "run.h5"
    assert run_cli("run", "spatial-4", "--bench", "sim", "--out", out) == 0
    r = read_runfile(out).readings
    logged = log_steps(log_path_for(out))
    for row, index in enumerate(r.step_index):
        np.testing.assert_allclose(logged[int(index)], r.values[row], rtol=1e-5, atol=1e-14)


def test_the_shutter_is_closed_after_a_complete_run(tmp_path, capsys, shutter_watch):
    assert run_cli("run", "polarization-6", "--bench", "sim", "--out", tmp_path / "run.h5") == 0
    shutter_watch.assert_closed_at_the_end()
    assert "open" in shutter_watch.commands
