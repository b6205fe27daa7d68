"""What ``run``, ``resume`` and ``dry-run`` refuse: exit 2, one line, nothing written or overwritten."""

from __future__ import annotations

import json
import os
import shutil

import pytest

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.lang.protocol import load_protocol
from lightloom.sequencer.storage import read_runfile
from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model
from lightloom.sequencer.plan.timing import estimate_steps
from helpers.runs import REPO, run_cli, write_bench


def _one_line(err: str) -> str:
    assert err.count("\n") == 1 and err.startswith("lightloom: "), err
    return err


def _snapshot(folder):
    return {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in folder.iterdir()}


@pytest.mark.parametrize("existing", ["run.h5", "run.h5.journal"])
def test_run_refuses_an_existing_out_and_leaves_it_untouched(tmp_path, capsys, existing):
    (tmp_path / existing).write_bytes(b"last night's data")
    before = _snapshot(tmp_path)
    assert run_cli("run", "polarization-6", "--bench", "sim", "--out", tmp_path / "run.h5") == 2
    assert "lightloom resume" in _one_line(capsys.readouterr().err)
    assert _snapshot(tmp_path) == before


def test_run_refuses_to_write_over_a_finished_run(tmp_path, capsys):
    out = tmp_path / "run.h5"
    assert run_cli("run", "polarization-4", "--bench", "sim", "--out", out) == 0
    capsys.readouterr()
    before = _snapshot(tmp_path)
    assert run_cli("run", "polarization-4", "--bench", "sim", "--out", out) == 2
    assert "exists already" in _one_line(capsys.readouterr().err)
    assert _snapshot(tmp_path) == before


def test_run_refuses_an_out_in_a_missing_folder(tmp_path, capsys):
    assert run_cli("run", "polarization-4", "--bench", "sim", "--out", tmp_path / "no" / "run.h5") == 2
    assert "does not exist" in _one_line(capsys.readouterr().err)
    assert list(tmp_path.iterdir()) == []


def test_resume_refuses_a_protocol_file_changed_since_the_start(tmp_path, capsys):
    protocol = tmp_path / "pol6.yaml"
    shutil.copy(REPO / "protocols" / "polarization-6.yaml", protocol)
    bench = write_bench(tmp_path, "sim-stuck", simulation={"faults": [{"device": "hwp_stage", "kind": "stuck", "at_s": 6.5, "duration_s": 200.0}]})
    out = tmp_path / "run.h5"
    assert run_cli("run", protocol, "--bench", bench, "--out", out) == 3
    before = read_runfile(out)
    original = protocol.read_text()
    protocol.write_text(original.replace("dwell_s: 0.5\n", "dwell_s: 0.7\n", 1))
    assert protocol.read_text() != original
    capsys.readouterr()
    assert run_cli("resume", out) == 2
    err = _one_line(capsys.readouterr().err)
    assert str(protocol) in err and "changed since the run started" in err
    after = read_runfile(out)
    assert (after.status, after.message, after.readings) == (before.status, before.message, before.readings)
    protocol.write_text(original)
    assert run_cli("resume", out) in (0, 3)
    assert len(read_runfile(out).readings) > len(before.readings)


def test_dry_run_json_has_points_and_an_estimate_that_adds_up(capsys):
    assert run_cli("dry-run", "joint-36", "--bench", "sim", "--json") == 0
    out = json.loads(capsys.readouterr().out)
    plan = compile_protocol(load_protocol("joint-36"), load_bench("sim"))
    est = estimate_steps(plan, table_model(load_bench("sim")))
    assert out["points"] == len(plan.steps) == len(out["steps"])
    assert out["estimated_seconds"] == pytest.approx(est.total_seconds, abs=1e-3)
    assert out["estimated_seconds"] == pytest.approx(sum(s["seconds"] for s in out["steps"]), abs=0.01)
    assert out["estimated_seconds"] > out["dwell_seconds"] + out["motion_seconds"] - 1e-3 > 0
    assert out["limit_violations"] == []


def test_dry_run_reports_limit_violations_with_exit_2_and_run_refuses_the_plan(tmp_path, capsys):
    bench = write_bench(tmp_path, "sim-tight", devices={"hwp_stage": {"limits": {"min_deg": 0, "max_deg": 10}}})
    assert run_cli("dry-run", "polarization-6", "--bench", bench, "--json") == 2
    violations = json.loads(capsys.readouterr().out)["limit_violations"]
    assert violations and all("half_wave_plate" in v and "0..10 deg" in v for v in violations)
    assert run_cli("run", "polarization-6", "--bench", bench, "--out", tmp_path / "run.h5") == 2
    assert "breaks the bench's limits" in _one_line(capsys.readouterr().err)
    assert sorted(os.listdir(tmp_path)) == ["sim-tight.yaml"]
