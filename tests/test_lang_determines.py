"""`validate` and `dry-run` say what a protocol determines on a bench; `determines:` makes a shortfall bad input."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from lightloom.sequencer import cli

HV_ONLY = """\
protocol: hv-only
analyzes: [polarization]
measure:
  targets:
    polarization: [H, V]
dwell_s: 0.1
"""


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def json_of(capsys, *argv: str) -> dict:
    assert cli.main(list(argv)) == 0
    return json.loads(capsys.readouterr().out)


def test_h_and_v_only_is_partial_with_diagonal_and_circular_missing(tmp_path, capsys) -> None:
    path = write(tmp_path, "hv.yaml", HV_ONLY)
    doc = json_of(capsys, "dry-run", str(path), "--bench", "sim", "--json")
    assert doc["determines"] == "partial"
    assert doc["missing"] == [
        "polarization: no diagonal (D/A) projection",
        "polarization: no circular (R/L) projection",
    ]
    assert doc["stokes_determined"]["polarization"] == ["S0", "S1"]


@pytest.mark.parametrize("verb", [["validate"], ["dry-run"]])
def test_an_incomplete_set_without_the_key_is_a_one_line_warning_never_silent(tmp_path, capsys, verb) -> None:
    path = write(tmp_path, "hv.yaml", HV_ONLY)
    assert cli.main([*verb, str(path), "--bench", "sim"]) == 0
    captured = capsys.readouterr()
    lines = captured.err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("lightloom: warning: ")
    assert "no diagonal (D/A) projection" in lines[0] and "no circular (R/L) projection" in lines[0]
    assert "partial" in captured.out


def test_validate_without_a_bench_judges_the_requested_projectors(tmp_path, capsys) -> None:
    path = write(tmp_path, "hv.yaml", HV_ONLY)
    doc = json_of(capsys, "validate", str(path), "--json")
    assert doc["determines"] == "partial"
    assert "polarization: no circular (R/L) projection" in doc["missing"]
    assert json_of(capsys, "validate", "polarization-4", "--json")["determines"] == "polarization-state"


@pytest.mark.parametrize(
    "protocol, bench, expected",
    [
        ("polarization-6", "sim", "polarization-state"),
        ("polarization-6", "sim-single", "polarization-state"),
        ("spatial-4", "sim", "spatial-state"),
        ("joint-16", "sim", "joint-state"),
        ("joint-36", "sim", "joint-state"),
        ("spatial-6", "sim-single", "spatial-state"),
        ("waveplate-calibration-hwp", "sim", "scan"),
        ("calibration-rotator", "sim-uncalibrated", "scan"),
    ],
)
def test_built_in_protocols_determine_what_they_are_for(capsys, protocol, bench, expected) -> None:
    for verb in ("validate", "dry-run"):
        doc = json_of(capsys, verb, protocol, "--bench", bench, "--json")
        assert (doc["determines"], doc["missing"]) == (expected, [])


def test_determines_joint_state_on_a_polarization_only_protocol_is_refused_at_its_line(tmp_path, capsys) -> None:
    path = write(tmp_path, "p.yaml", HV_ONLY + "determines: joint-state\n")
    assert cli.main(["validate", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert err.startswith(f"lightloom: {path}:7: determines: joint-state needs analyzes to include spatial")


POLARIZATION_ONLY_JOINT = """\
protocol: pol-only-joint
analyzes: [polarization, spatial]
determines: joint-state
measure:
  settings:
    - {polarization: H, spatial: h}
    - {polarization: D, spatial: h}
    - {polarization: R, spatial: h}
dwell_s: 0.1
"""


@pytest.mark.parametrize("verb", [["validate"], ["dry-run"], ["dry-run", "--json"]])
def test_determines_joint_state_with_a_polarization_only_set_is_bad_input_naming_what_lacks(
    tmp_path, capsys, verb
) -> None:
    path = write(tmp_path, "p.yaml", POLARIZATION_ONLY_JOINT)
    assert cli.main([verb[0], str(path), "--bench", "sim", *verb[1:]]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    line = captured.err.strip()
    assert "\n" not in line and line.startswith(f"lightloom: {path}:3: determines: joint-state")
    assert "spatial: no diagonal (d/a) projection" in line
    assert "spatial: no orbital (l+/l-) projection" in line


def test_run_refuses_a_protocol_that_cannot_deliver_its_stated_purpose(tmp_path, capsys) -> None:
    path = write(tmp_path, "p.yaml", HV_ONLY + "determines: polarization-state\n")
    out = tmp_path / "run.h5"
    assert cli.main(["run", str(path), "--bench", "sim", "--out", str(out)]) == 2
    assert f"{path}:7: determines: polarization-state" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == [path]


def test_determines_scan_silences_the_warning_for_a_drift_run(tmp_path, capsys) -> None:
    path = write(tmp_path, "p.yaml", HV_ONLY + "determines: scan\n")
    doc = json_of(capsys, "dry-run", str(path), "--bench", "sim", "--json")
    assert doc["determines"] == "scan"
    assert capsys.readouterr().err == ""


def test_run_of_an_incomplete_set_without_the_key_warns_before_it_starts(tmp_path, capsys) -> None:
    path = write(tmp_path, "hv.yaml", HV_ONLY)
    assert cli.main(["run", str(path), "--bench", "sim", "--out", str(tmp_path / "run.h5"), "--quiet"]) == 0
    warnings = [line for line in capsys.readouterr().err.splitlines() if line.startswith("lightloom: warning:")]
    assert len(warnings) == 1 and "no circular (R/L) projection" in warnings[0]


def test_a_stated_state_that_no_bench_can_deliver_is_bad_input_without_a_bench(tmp_path, capsys) -> None:
    # H and V alone: even a table reading both splitter outputs never sees D/A or R/L
    path = write(tmp_path, "p.yaml", HV_ONLY + "determines: polarization-state\n")
    assert cli.main(["validate", str(path)]) == 2
    captured = capsys.readouterr()
    line = captured.err.strip()
    assert captured.out == "" and "\n" not in line
    assert line.startswith(f"lightloom: {path}:7: determines: polarization-state") and "on any bench" in line
    assert "no diagonal (D/A) projection" in line and "no circular (R/L) projection" in line
    # H, D, R: incomplete on one detector each (no S0), complete once the partners are read: allowed
    three = HV_ONLY.replace("[H, V]", "[H, D, R]") + "determines: polarization-state\n"
    assert cli.main(["validate", str(write(tmp_path, "q.yaml", three))]) == 0


QWP_POLARIMETER = """\
protocol: qwp-polarimeter
analyzes: [polarization]
measure:
  scan: {element: quarter_wave_plate, from_deg: 0, to_deg: 180, step_deg: 22.5,
         fixed: {half_wave_plate_deg: 0, mode_converter: out, image_rotator_deg: 0}}
dwell_s: 0.1
"""


@pytest.mark.parametrize("verb", ["validate", "dry-run"])
def test_a_scan_that_is_a_polarimeter_says_it_also_determines_the_state(tmp_path, capsys, verb) -> None:
    # a quarter-wave plate turned in front of the polarizing splitter (a rotating-plate polarimeter,
    # common practice, no source): a scan whose readings fix S0..S3, as `analyze` then reports
    path = write(tmp_path, "p.yaml", QWP_POLARIMETER)
    doc = json_of(capsys, verb, str(path), "--bench", "sim", "--json")
    assert (doc["determines"], doc["state_determined"], doc["missing"]) == ("scan", "polarization-state", [])
    assert cli.main([verb, str(path), "--bench", "sim"]) == 0
    assert "its readings also determine the 2x2 polarization state" in " ".join(capsys.readouterr().out.split())
    # an image-rotator scan with the converter out sees h/v and d/a only: a scan, no state
    doc = json_of(capsys, verb, "calibration-rotator", "--bench", "sim", "--json")
    assert (doc["determines"], doc["state_determined"]) == ("scan", None)


WEAK_DIAGONAL = """\
protocol: weak-diagonal
analyzes: [polarization]
measure:
  settings:
    - {elements: {quarter_wave_plate_deg: 0, half_wave_plate_deg: 0, mode_converter: out, image_rotator_deg: 0}}
    - {elements: {quarter_wave_plate_deg: 0, half_wave_plate_deg: 22.5}}
    - {polarization: R}
dwell_s: 0.1
"""


def test_a_basis_reached_only_through_an_imperfect_plate_is_not_determined(tmp_path, capsys) -> None:
    # A half-wave plate at 22.5 deg behind a quarter-wave plate at 0 measures R/L, not D/A: these
    # settings give H/V and R/L twice. The 91.2 deg quarter-wave plate of `sim` leaks a sliver of
    # D/A into them (sin 1.2 deg, about 0.02), which spans the space but amplifies a reading's
    # noise hundreds of times (Jones calculus, common practice, no source): partial, not a state.
    path = write(tmp_path, "p.yaml", WEAK_DIAGONAL)
    doc = json_of(capsys, "dry-run", str(path), "--bench", "sim", "--json")
    assert doc["determines"] == "partial" and doc["state_determined"] is None
    assert doc["stokes_determined"]["polarization"] == ["S0", "S1", "S3"]
    assert len(doc["missing"]) == 1 and doc["missing"][0].startswith("polarization: D/A reached only weakly")
    assert "add a setting that measures D" in doc["missing"][0]
    # stated as a polarization tomography, the pair is bad input naming the weak basis
    stated = write(tmp_path, "q.yaml", WEAK_DIAGONAL + "determines: polarization-state\n")
    assert cli.main(["validate", str(stated), "--bench", "sim"]) == 2
    assert "D/A reached only weakly" in capsys.readouterr().err
