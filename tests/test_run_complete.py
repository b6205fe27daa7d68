"""Complete runs on the simulated benches, and the helpers every tests/test_run_*.py module shares.

The helpers run the real command line in process (``sequencer.cli.main``) or as a subprocess
(``spawn``), write benches that ``extends:`` a built-in bench by name from the test's own folder,
and check a run file against the plan it was compiled from.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest
import yaml

from lightloom.sequencer import cli
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.lang.protocol import load_protocol
from lightloom.sequencer.run.session import log_path_for
from lightloom.sequencer.storage import RunData, read_runfile
from lightloom.sequencer.plan.tablemodel import compile_protocol

REPO = Path(__file__).resolve().parents[1]


# --------------------------------------------------------------------------- helpers
def write_bench(folder: Path, name: str, *, base: str = "sim", **sections: object) -> Path:
    """A bench file ``folder/NAME.yaml`` that extends ``base`` (a built-in name) and overrides ``sections``."""
    path = folder / f"{name}.yaml"
    path.write_text(yaml.safe_dump({"bench": name, "extends": base, **sections}, sort_keys=False))
    return path


def run_cli(*args: object) -> int:
    """The command line in this process; returns its exit status."""
    return cli.main([str(a) for a in args])


def spawn(*args: object, **popen: object) -> subprocess.Popen:
    """The command line in a new process (stdout and stderr piped, text); ``popen`` goes to Popen."""
    return subprocess.Popen(
        [sys.executable, "-m", "lightloom.sequencer", *[str(a) for a in args]],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        env={**os.environ, "PYTHONPATH": str(REPO)}, cwd=str(REPO), **popen,
    )


_STEP_LINE = re.compile(r"^\S+ step (\d+) \S+ \[[^\]]*\] (.*?) (?:W|counts)(?: ref=\S+)?$")


def log_steps(log: Path) -> dict[int, np.ndarray]:
    """Step index -> port values of every ``step N ...`` line in a RUN.log (the steps it reported)."""
    out: dict[int, np.ndarray] = {}
    if not log.exists():
        return out
    for line in log.read_text().splitlines():
        m = _STEP_LINE.match(line)
        if m:
            out[int(m.group(1))] = np.array([float(v) for v in m.group(2).split()])
    return out


def wait_for_log_steps(log: Path, n: int, proc: subprocess.Popen, timeout_s: float = 60.0) -> None:
    """Block until the log reports ``n`` steps (or the process ends, or the timeout)."""
    deadline = time.monotonic() + timeout_s
    while len(log_steps(log)) < n and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)


def stored_plan(data: RunData) -> StepList:
    return StepList.from_json(data.header.steps_json)


def assert_each_step_once(data: RunData) -> None:
    """Every step of the stored plan has exactly one reading, with the commanded settings of that step."""
    plan = stored_plan(data)
    r = data.readings
    assert sorted(r.step_index.tolist()) == list(range(len(plan.steps)))
    assert data.header.steps_total == len(plan.steps) == data.steps_done
    for row, index in enumerate(r.step_index):
        step = plan.steps[int(index)]
        assert r.kind[row] == step.kind
        np.testing.assert_array_equal(r.commanded[row], step.settings.as_vector())


def assert_operators_psd(data: RunData, n_ports: int) -> None:
    """Every reading carries (n_ports, 4, 4) Hermitian positive semidefinite measurement operators."""
    ops = data.readings.operators
    assert ops.shape == (len(data.readings), n_ports, 4, 4)
    np.testing.assert_allclose(ops, np.conj(np.swapaxes(ops, -1, -2)), atol=1e-12)
    assert np.linalg.eigvalsh(ops).min() >= -1e-12


def assert_complete(path: Path) -> RunData:
    """The .h5 by itself says complete and holds every step exactly once."""
    data = read_runfile(path)
    assert data.status == "complete", (data.status, data.message)
    assert_each_step_once(data)
    return data


@dataclass
class ShutterWatch:
    """What the simulated shutters were told, and the simulated tables built, during a test."""

    commands: list[str] = field(default_factory=list)
    tables: list = field(default_factory=list)

    @property
    def table(self):
        assert len(self.tables) == 1, f"{len(self.tables)} simulated tables were built"
        return self.tables[0]

    def assert_closed_at_the_end(self) -> None:
        assert self.commands, "the shutter was never commanded"
        assert self.commands[-1] == "close", self.commands[-3:]
        assert not self.table.shutter.transmits(), "the simulated shutter still lets the beam through"


@pytest.fixture
def shutter_watch(monkeypatch) -> ShutterWatch:
    """Record every completed open/close of a simulated shutter and every SimulatedTable built."""
    from lightloom.simulators import devices
    from lightloom.simulators.table import SimulatedTable

    watch = ShutterWatch()
    opened, closed, built = devices.SimShutter.open, devices.SimShutter.close_beam, SimulatedTable.__init__

    def open_(self):
        opened(self)
        watch.commands.append("open")

    def close_(self):
        closed(self)
        watch.commands.append("close")

    def init(self, *args, **kwargs):
        built(self, *args, **kwargs)
        watch.tables.append(self)

    monkeypatch.setattr(devices.SimShutter, "open", open_)
    monkeypatch.setattr(devices.SimShutter, "close_beam", close_)
    monkeypatch.setattr(SimulatedTable, "__init__", init)
    return watch


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
