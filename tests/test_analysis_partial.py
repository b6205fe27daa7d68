"""Runs part way (stopped, killed, still being written) are analysed from what they hold: exit 0, the
run section, the Stokes components the readings determine, and a plain list of what is missing."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from lightloom.sequencer.analysis.pipeline import analyse_run
from lightloom.sequencer.cli import main
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.model.records import RunData
from lightloom.sequencer.optics.stokes import reduced_stokes
from lightloom.sequencer.storage.store import load_run

KINDS = {"joint-state", "polarization-state", "spatial-state", "partial"}


@pytest.fixture(scope="module")
def joint_run(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("partial") / "joint.h5"
    assert main(["run", "joint-36", "--bench", "sim", "--out", str(out), "--quiet"]) == 0
    return out


def _prefix(run: RunData, n: int) -> RunData:
    return RunData(run.header, run.readings.select(slice(0, n)), run.events, "running", "")


def test_every_prefix_of_a_run_gives_a_document(joint_run: Path) -> None:
    # What a monitoring script polling a live run sees, reading after reading.
    run = load_run(joint_run)
    n = len(run.readings)
    kinds = []
    for k in range(0, n + 1):
        doc, _, _ = analyse_run(_prefix(run, k), rng=np.random.default_rng(0), n_bootstrap=5)
        assert set(doc["run"]) >= {"status", "steps_done", "steps_total"}
        assert doc["run"]["steps_done"] == run.readings.select(slice(0, k)).steps_done
        assert doc["determines"] in KINDS
        if doc["determines"] == "joint-state":
            assert doc["missing"] == [] and "density_matrix" in doc
        else:
            assert doc["missing"] and "density_matrix" not in doc
        kinds.append(doc["determines"])
    assert kinds[0] == "partial" and kinds[-1] == "joint-state"
    # once determined, a longer prefix stays determined
    first = kinds.index("joint-state")
    assert set(kinds[first:]) == {"joint-state"}


def test_stokes_of_complete_bases_are_given_before_the_state(joint_run: Path) -> None:
    run = load_run(joint_run)
    truth = load_bench("sim").simulation.source.density()
    seen_partial_stokes = False
    for k in range(1, len(run.readings)):
        doc, _, _ = analyse_run(_prefix(run, k), rng=np.random.default_rng(0), n_bootstrap=40)
        if doc["determines"] != "partial":
            break
        for factor, values in doc.get("stokes", {}).items():
            s_true = reduced_stokes(truth, factor)  # partial trace of the simulated source
            for j in (1, 2, 3):
                if values[j] is not None:
                    seen_partial_stokes = True
                    assert abs(values[j]["value"] - s_true[j]) <= 5 * values[j]["std"] + 2e-3
    assert seen_partial_stokes


def test_a_protocol_of_H_and_V_only_gives_S1_and_names_the_missing_bases(tmp_path: Path, capsys) -> None:
    protocol = tmp_path / "hv.yaml"
    protocol.write_text(
        "protocol: hv-only\ndescription: H and V only\nanalyzes: [polarization]\n"
        "measure:\n  targets:\n    polarization: [H, V]\ndwell_s: 0.2\nrepeats: 2\n",
        encoding="utf-8",
    )
    out = tmp_path / "hv.h5"
    assert main(["run", str(protocol), "--bench", "sim", "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["analyze", str(out), "--json", "--bootstrap", "30"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["determines"] == "partial"
    s = doc["stokes"]["polarization"]
    assert s[2] is None and s[3] is None
    truth = reduced_stokes(load_bench("sim").simulation.source.density(), "polarization")
    assert abs(s[1]["value"] - truth[1]) <= 5 * s[1]["std"] + 2e-3
    assert any("D/A" in m for m in doc["missing"]) and any("R/L" in m for m in doc["missing"])
    assert doc["power"]["units"] == "W" and doc["power"]["value"] > 0
    assert main(["analyze", str(out)]) == 0
    text = capsys.readouterr().out
    # the run is complete: nothing is "still" to come, the text says what the protocol lacks
    assert "the state is not determined; missing from the complete run:" in text and "D/A" in text


def test_a_run_killed_after_a_few_steps_exits_0_in_text_and_json(tmp_path: Path, capsys) -> None:
    bench = tmp_path / "sticky.yaml"
    bench.write_text(
        "bench: sticky\nextends: sim\nsimulation:\n  faults:\n    - {device: hwp_stage, kind: stuck, at_s: 8}\n",
        encoding="utf-8",
    )
    out = tmp_path / "stopped.h5"
    assert main(["run", "joint-36", "--bench", str(bench), "--out", str(out), "--quiet"]) == 3
    capsys.readouterr()
    assert main(["analyze", str(out), "--json", "--bootstrap", "20"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["run"]["status"] == "fault" and 0 < doc["run"]["steps_done"] < doc["run"]["steps_total"]
    assert doc["determines"] == "partial" and doc["missing"]
    assert main(["analyze", str(out), "--bootstrap", "20"]) == 0
    assert "still missing" in capsys.readouterr().out
