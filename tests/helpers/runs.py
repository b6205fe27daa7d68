"""Running the command line on simulated benches and checking the run files it writes.

``run_cli`` runs it in this process (``sequencer.cli.main``), ``spawn`` as a subprocess;
``write_bench`` writes benches that ``extends:`` a built-in bench by name from the test's own
folder; ``assert_complete`` checks a run file against the steps it was compiled from.
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import yaml

from lightloom.sequencer import cli
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.storage import RunData, read_runfile

REPO = Path(__file__).resolve().parents[2]


def write_bench(folder: Path, name: str, *, base: str = "sim", **sections: object) -> Path:
    """A bench file ``folder/NAME.yaml`` that extends ``base`` (a built-in name) and overrides ``sections``."""
    path = folder / f"{name}.yaml"
    path.write_text(yaml.safe_dump({"bench": name, "extends": base, **sections}, sort_keys=False))
    return path


def run_cli(*args: object) -> int:
    """The command line in this process; returns its exit status."""
    return cli.main([str(a) for a in args])


def default_ctrl_c() -> None:
    """In a child before exec: Ctrl-C (SIGINT) handled as in a terminal's foreground process.

    A test suite started as a background job of a shell has SIGINT ignored, children inherit
    that, and Python then installs no KeyboardInterrupt for it: a test sending Ctrl-C would see
    the command go on."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def spawn(*args: object, **popen: object) -> subprocess.Popen:
    """The command line in a new process (stdout and stderr piped, text); ``popen`` goes to Popen.
    Ctrl-C reaches it as in a terminal (default_ctrl_c) unless ``preexec_fn`` is given."""
    popen.setdefault("preexec_fn", default_ctrl_c)
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
