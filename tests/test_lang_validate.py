"""Built-in protocols and benches load by name, and `lightloom validate` accepts every one of them."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from lightloom.sequencer.lang import builtins
from lightloom.sequencer import cli
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.lang.protocol import load_protocol

REPO = Path(__file__).resolve().parent.parent

REQUIRED_PROTOCOLS = {
    "polarization-4", "polarization-6", "spatial-4", "spatial-6", "joint-16", "joint-36",
    "waveplate-calibration-hwp", "waveplate-calibration-qwp", "stability", "overnight-joint-36",
}
PROTOCOLS = builtins.builtin_protocols()
BENCHES = builtins.builtin_benches()
POLARIZATION_ONLY_BENCHES = {"sim-camera"}


def test_library_lists_every_standard_protocol_and_both_sim_benches() -> None:
    assert REQUIRED_PROTOCOLS <= set(PROTOCOLS)
    assert {"sim", "sim-single"} <= set(BENCHES)


@pytest.mark.parametrize("name", PROTOCOLS)
def test_built_in_protocol_loads_with_a_header_comment(name: str) -> None:
    p = load_protocol(name)
    assert p.name == name
    assert p.points
    assert p.source_text.startswith(f"# {name}:")


@pytest.mark.parametrize(
    "name, points, analyzes",
    [
        ("polarization-4", 4, ("polarization",)),
        ("polarization-6", 6, ("polarization",)),
        ("spatial-4", 4, ("spatial",)),
        ("spatial-6", 6, ("spatial",)),
        ("joint-16", 16, ("polarization", "spatial")),
        ("joint-36", 36, ("polarization", "spatial")),
        ("waveplate-calibration-hwp", 37, ("polarization",)),
        ("waveplate-calibration-qwp", 37, ("polarization",)),
        ("stability", 1, ("polarization", "spatial")),
        ("overnight-joint-36", 36, ("polarization", "spatial")),
    ],
)
def test_built_in_protocol_has_its_documented_size(name: str, points: int, analyzes: tuple[str, ...]) -> None:
    p = load_protocol(name)
    assert (len(p.points), p.analyzes) == (points, analyzes)


def test_joint_16_is_the_product_of_hvdr_and_hvdl_plus() -> None:
    # The 16-setting set of James, Kwiat, Munro, White, PRA 64, 052312 (2001), with the second qubit spatial.
    labels = [pt.label for pt in load_protocol("joint-16").points]
    assert labels == [f"{p},{s}" for p in "HVDR" for s in ("h", "v", "d", "l+")]


def test_joint_36_targets_radial_and_overnight_repeats_it() -> None:
    single, overnight = load_protocol("joint-36"), load_protocol("overnight-joint-36")
    assert single.target_label == overnight.target_label == "radial"
    assert [p.label for p in single.points] == [p.label for p in overnight.points]
    assert (overnight.sweep.passes, overnight.sweep.interval_s) == (24, 1800)


def test_calibration_scans_step_one_plate_with_the_other_parked() -> None:
    hwp, qwp = load_protocol("waveplate-calibration-hwp"), load_protocol("waveplate-calibration-qwp")
    assert hwp.scan.element == "half_wave_plate" and qwp.scan.element == "quarter_wave_plate"
    assert {pt.elements["quarter_wave_plate"] for pt in hwp.points} == {0.0}
    assert {pt.elements["half_wave_plate"] for pt in qwp.points} == {0.0}
    assert "linearly polarized input" in hwp.source_text and "linearly polarized input" in qwp.source_text


def test_stability_reads_one_setting_with_a_reference_after_every_point() -> None:
    p = load_protocol("stability")
    assert len(p.points) == 1 and p.reference.every_points == 1 and p.sweep.passes > 1


@pytest.mark.parametrize("name", BENCHES)
def test_built_in_bench_loads(name: str) -> None:
    assert load_bench(name).name == name


def test_a_path_that_exists_wins_over_a_built_in_name(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    (tmp_path / "polarization-4.yaml").write_text(
        "protocol: local\nanalyzes: [polarization]\nmeasure: {targets: {polarization: [H]}}\ndwell_s: 1\n")
    monkeypatch.chdir(tmp_path)
    assert load_protocol("polarization-4.yaml").name == "local"
    assert load_protocol("polarization-4").name == "polarization-4"


def test_built_in_name_may_carry_the_yaml_suffix(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    assert load_protocol("joint-16.yaml").name == "joint-16"
    assert load_bench("sim.yaml").name == "sim"


@pytest.mark.parametrize("name", PROTOCOLS)
def test_validate_accepts_every_built_in_protocol(name: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["validate", name]) == 0
    out, err = capsys.readouterr()
    assert err == "" and out.rstrip().endswith("ok") and f"protocol {name}" in out


@pytest.mark.parametrize("bench", BENCHES)
@pytest.mark.parametrize("protocol", ["polarization-4", "spatial-6", "joint-36", "waveplate-calibration-qwp"])
def test_validate_accepts_built_in_protocols_on_built_in_benches(
    protocol: str, bench: str, capsys: pytest.CaptureFixture[str]
) -> None:
    if bench in POLARIZATION_ONLY_BENCHES and protocol != "polarization-4":
        # A camera behind the polarization analyzer only: spatial settings are refused, in one line.
        assert cli.main(["validate", protocol, "--bench", bench]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and f"bench '{bench}' has no" in err
        return
    assert cli.main(["validate", protocol, "--bench", bench]) == 0
    out = capsys.readouterr().out
    assert f"bench {bench}" in out and "simulated" in out


def test_validate_json_reports_points_and_detector_ports(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["validate", "joint-36", "--bench", "sim", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["ok"] is True
    assert summary["protocol"]["points"] == 36 and summary["protocol"]["analyzes"] == ["polarization", "spatial"]
    assert summary["protocol"]["dwell_s"] == 0.5 and summary["protocol"]["order"] == "least-motion"
    assert summary["bench"]["simulated"] is True
    assert {(d["sorter_port"], d["splitter_port"]) for d in summary["bench"]["detectors"]} == {
        ("h", "H"), ("h", "V"), ("v", "H"), ("v", "V")}
    assert set(summary["compile"]) >= {"checked"}


def test_validate_without_bench_reports_no_bench(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["validate", "spatial-4", "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["bench"] is None and summary["compile"] is None


def test_validate_by_subprocess_from_another_directory(tmp_path: Path) -> None:
    env = dict(os.environ, PYTHONPATH=str(REPO), PYTHONDONTWRITEBYTECODE="1")
    proc = subprocess.run(
        [sys.executable, "-m", "lightloom.sequencer", "validate", "joint-36", "--bench", "sim-single"],
        cwd=tmp_path, env=env, capture_output=True, text=True, timeout=60,
    )
    assert proc.returncode == 0, proc.stderr
    assert "bench sim-single" in proc.stdout and "pm_hH (h,H)" in proc.stdout
    assert list(tmp_path.iterdir()) == []
