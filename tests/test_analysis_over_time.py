"""Results over time (--per-pass, --window), their figures, and many runs in one summary table."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np
import pytest

from lightloom.sequencer.analysis.summary import SUMMARY_COLUMNS, parse_duration_s
from lightloom.sequencer.cli import main
from lightloom.sequencer.present.timeline import reference_series
from lightloom.sequencer.storage.store import load_run

NIGHT = """\
protocol: night-3
description: Joint 16-setting tomography, three passes five minutes apart
analyzes: [polarization, spatial]
measure:
  targets:
    polarization: [H, D, R, L]
    spatial: [h, d, l+, l-]
dwell_s: 0.5
repeats: 2
background: {every_points: 16, at_start: true, at_end: true, dwell_s: 0.5}
reference: {every_points: 4, dwell_s: 0.2}
order: least-motion
sweep: {passes: 3, interval_s: 300}
target_state: {name: radial}
"""


@pytest.fixture(scope="module")
def night(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("overtime")
    protocol = d / "night.yaml"
    protocol.write_text(NIGHT, encoding="utf-8")
    out = d / "night.h5"
    assert main(["run", str(protocol), "--bench", "sim", "--out", str(out), "--quiet"]) == 0
    return out


def _json(capsys, *args: str) -> dict:
    capsys.readouterr()
    assert main(["analyze", *args, "--json", "--bootstrap", "20"]) == 0
    return json.loads(capsys.readouterr().out)


def test_per_pass_gives_one_document_per_pass_with_the_whole_run_keys(night: Path, capsys) -> None:
    doc = _json(capsys, str(night), "--per-pass")
    passes = doc["passes"]
    assert [p["pass"] for p in passes] == [0, 1, 2]
    whole_keys = set(doc) - {"passes"}
    for p in passes:
        assert whole_keys <= set(p), whole_keys - set(p)
        assert p["t_start"] < p["t_end"]
        assert p["estimator"]["readings"] * 3 == doc["estimator"]["readings"]
        # each pass alone is about as good as a third of the data: its std is larger than the whole run's
        assert p["concurrence"]["std"] > doc["concurrence"]["std"]
        assert abs(p["concurrence"]["value"] - doc["concurrence"]["value"]) <= 5 * p["concurrence"]["std"]
    assert passes[0]["t_end"] < passes[1]["t_start"] < passes[1]["t_end"] < passes[2]["t_start"]


def test_per_pass_json_written_pass_by_pass_is_the_document_of_the_analysis(night: Path, capsys) -> None:
    # --json alone writes each pass as it is made; the document is the one analyse_run makes
    from lightloom.sequencer.analysis.pipeline import analyse_run, by_pass

    capsys.readouterr()
    assert main(["analyze", str(night), "--per-pass", "--json", "--bootstrap", "20"]) == 0
    text = capsys.readouterr().out
    run = load_run(night)
    doc, _, parts = analyse_run(run, rng=np.random.default_rng(0), n_bootstrap=20,
                                segments=by_pass(np.asarray(run.readings.pass_index)))
    doc["passes"] = [d for d, _ in parts]
    assert text == json.dumps(json.loads(json.dumps(doc)), indent=1) + "\n"


def test_window_cuts_by_time(night: Path, capsys) -> None:
    doc = _json(capsys, str(night), "--window", "5min")
    windows = doc["passes"]
    assert len(windows) >= 3 and all("window" in w for w in windows)
    assert all(w["t_end"] - w["t_start"] <= 300 for w in windows)


@pytest.mark.parametrize("text", ["0s", "ten minutes", "5 weeks"])
def test_a_window_that_is_not_a_duration_is_bad_input(night: Path, capsys, text: str) -> None:
    assert main(["analyze", str(night), "--window", text]) == 2
    assert "duration" in capsys.readouterr().err


def test_durations() -> None:
    assert parse_duration_s("900s") == 900 and parse_duration_s("30min") == 1800
    assert parse_duration_s("2h") == 7200 and parse_duration_s("1.5 h") == 5400 and parse_duration_s("600") == 600


def test_figures_over_time_and_power_with_gaps(night: Path, tmp_path: Path, capsys) -> None:
    doc = _json(capsys, str(night), "--per-pass", "--plots", str(tmp_path / "fig"))
    names = {Path(p).name for p in doc["plots"]}
    assert {"over_time.png", "reference.png"} <= names
    assert all(Path(p).stat().st_size > 10_000 for p in doc["plots"])
    series = reference_series(load_run(night))
    pickoff = next(line for line in series.lines if line.name.startswith("pick-off"))
    # one unbroken stretch per pass: the line breaks between passes and at background readings,
    # and never joins two passes (no zig-zag through the waits)
    breaks = np.flatnonzero(np.isnan(pickoff.value))
    assert len(breaks) >= 2
    run = load_run(night)
    t_mid = 0.5 * (run.readings.t_start + run.readings.t_end)
    bg_times = t_mid[run.readings.of_kind("background")]
    stretches = np.split(pickoff.t, breaks)
    for stretch in stretches:
        stretch = stretch[1:] if stretch.size and stretch is not stretches[0] else stretch
        if stretch.size >= 2:
            assert not np.any((bg_times > stretch.min()) & (bg_times < stretch.max()))
    ref_step_lines = [line for line in series.lines if "reference steps" in line.name]
    assert len(ref_step_lines) == 4  # one per detector port


def test_many_files_one_table_json_and_csv(night: Path, tmp_path: Path, capsys) -> None:
    other = tmp_path / "pol.h5"
    assert main(["run", "polarization-4", "--bench", "sim", "--out", str(other), "--quiet"]) == 0
    files = [str(night), str(other)]
    doc = _json(capsys, *files)
    assert [r["file"] for r in doc["runs"]] == files
    assert doc["runs"][0]["run"]["protocol"] == "night-3" and "concurrence" in doc["runs"][0]
    assert doc["runs"][1]["basis"] == ["H", "V"]
    capsys.readouterr()
    assert main(["analyze", *files, "--csv", "--bootstrap", "20"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert [r["file"] for r in rows] == files and list(rows[0]) == list(SUMMARY_COLUMNS)
    assert float(rows[0]["concurrence"]) == pytest.approx(doc["runs"][0]["concurrence"]["value"])
    assert rows[1]["concurrence"] == "" and float(rows[1]["polarization_S1"]) == pytest.approx(
        doc["runs"][1]["stokes"]["polarization"][1]["value"])
    assert main(["analyze", *files, "--bootstrap", "20"]) == 0
    text = "".join(capsys.readouterr().out.split())  # narrow columns fold long names
    assert "night-3" in text and "polarization-4" in text


def test_an_unreadable_file_among_many_is_reported_and_exit_2(night: Path, tmp_path: Path, capsys) -> None:
    capsys.readouterr()
    missing = str(tmp_path / "nothing.h5")
    assert main(["analyze", str(night), missing, "--json", "--bootstrap", "20"]) == 2
    runs = json.loads(capsys.readouterr().out)["runs"]
    assert "concurrence" in runs[0] and "error" in runs[1]


HV_ONLY = """\
protocol: hv-only
analyzes: [polarization]
measure:
  targets: {polarization: [H, V]}
dwell_s: 0.1
"""


def test_the_summary_table_on_80_columns_cuts_no_number(night: Path, tmp_path: Path, capsys, monkeypatch) -> None:
    monkeypatch.setenv("COLUMNS", "80")
    protocol = tmp_path / "hv.yaml"
    protocol.write_text(HV_ONLY, encoding="utf-8")
    hv = tmp_path / "a-rather-long-run-file-name-hv.h5"
    assert main(["run", str(protocol), "--bench", "sim", "--out", str(hv), "--quiet"]) == 0
    files = [str(night), str(hv)]
    capsys.readouterr()
    doc = _json(capsys, *files, "--bootstrap", "20")
    assert main(["analyze", *files, "--bootstrap", "20"]) == 0
    out = capsys.readouterr().out
    tokens = out.split()
    # every Stokes component of the joint night, as the table writes it, whole
    for factor in ("polarization", "spatial"):
        for k in (1, 2, 3):
            assert f"{doc['runs'][0]['stokes'][factor][k]['value']:+.3f}" in tokens, (factor, k, out)
    assert f"{doc['runs'][1]['stokes']['polarization'][1]['value']:+.3f}" in tokens
    # a complete run that cannot determine its state is "not determined", not "not yet"
    text = " ".join(tokens)
    assert "h5: not determined: polarization: no diagonal (D/A) projection" in text and "not yet" not in text
