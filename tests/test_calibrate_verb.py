"""`lightloom calibrate` on simulated calibration runs: closed loop, the overlay it writes, and bad input."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml

from lightloom.sequencer.analysis import calibration as cal
from lightloom.sequencer import cli
from lightloom.sequencer.lang.bench import Bench, load_bench
from lightloom.sequencer.optics import jones
from lightloom.sequencer.optics.analyzer import polarization_unitary, spatial_unitary
from lightloom.sequencer.optics.states import POLARIZATION_KETS, SPATIAL_KETS
from lightloom.sequencer.lang.protocol import load_protocol
from lightloom.sequencer.plan.tablemodel import analyzer_model, compile_protocol

BENCH = "sim-uncalibrated"
SCANS = ("waveplate-calibration-hwp", "waveplate-calibration-qwp", "calibration-rotator", "calibration-converter")


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """The four calibration scans run on the uncalibrated simulated bench, then calibrated."""
    folder = tmp_path_factory.mktemp("calibrate")
    runs = []
    for protocol in SCANS:
        path = folder / f"{protocol}.h5"
        assert cli.main(["run", protocol, "--bench", BENCH, "--out", str(path), "--quiet"]) == 0
        runs.append(str(path))
    overlay = folder / "overlay.yaml"
    assert cli.main(["calibrate", *runs, "--out", str(overlay)]) == 0
    return {"folder": folder, "runs": runs, "overlay": overlay, "bench": load_bench(overlay)}


def overlay_std(text: str) -> dict[str, float]:
    """Parameter -> std from the overlay's comment header (the lines `#   KEY VALUE +- STD (was OLD)`)."""
    out = {}
    for line in text.splitlines():
        parts = line.split()
        if line.startswith("#   ") and len(parts) >= 5 and parts[3] == "+-":
            out[parts[1]] = float(parts[4])
    return out


def true_values(bench: Bench) -> dict[str, float]:
    t = bench.simulation.table
    values = {
        cal.QWP_OFFSET: t.quarter_wave_plate.fast_axis_offset_deg, cal.QWP_RETARDANCE: t.quarter_wave_plate.retardance_deg,
        cal.HWP_OFFSET: t.half_wave_plate.fast_axis_offset_deg, cal.HWP_RETARDANCE: t.half_wave_plate.retardance_deg,
        cal.CONVERTER_OFFSET: t.mode_converter.axis_offset_deg, cal.CONVERTER_RETARDANCE: t.mode_converter.retardance_deg,
        cal.ROTATOR_OFFSET: t.image_rotator.axis_offset_deg, cal.SORTER_VISIBILITY: t.parity_sorter.visibility,
    }
    first = bench.roles.detectors[0].device
    for d in bench.roles.detectors[1:]:
        values[cal.GAIN_PREFIX + d.device] = t.port_gain[d.device] / t.port_gain[first]
    return values


def fitted_value(bench: Bench, key: str) -> float:
    if key.startswith(cal.GAIN_PREFIX):
        return bench.calibration.port_gain[key[len(cal.GAIN_PREFIX):]]
    if key == cal.SORTER_VISIBILITY:
        return bench.optics.parity_sorter.visibility
    _, element, field = key.split(".")
    return getattr(getattr(bench.calibration, element), field)


def test_compile_time_calibration_offsets_cancel_simulated_offsets(calibrated: dict) -> None:
    # Closed loop on the simulator: the values fitted from the scans agree with the simulated table.
    bench = calibrated["bench"]
    stds = overlay_std(calibrated["overlay"].read_text())
    truth = true_values(bench)
    assert set(stds) == set(truth)
    off = {k: abs(fitted_value(bench, k) - v) / stds[k] for k, v in truth.items()}
    assert all(z < 4.0 for z in off.values()), off
    angles = [k for k in truth if k.endswith("_deg")]
    assert max(stds[k] for k in angles) < 0.1


def polarization_projections(bench: Bench) -> np.ndarray:
    """True probability that each polarization-6 reading projects onto its target, settings as compiled."""
    plan = compile_protocol(load_protocol("polarization-6"), bench)
    truth = analyzer_model(bench, truth=True)
    kraus = jones.splitter_ports(truth.splitter_extinction)
    out = []
    for step in plan.steps:
        if step.kind != "measure" or step.repeat_index:
            continue
        u = polarization_unitary(truth, step.settings.as_vector()[None])[0]
        for label, port in zip(step.port_labels[:2], "HV"):
            out.append(np.linalg.norm(kraus["HV".index(port)] @ u @ POLARIZATION_KETS[label]) ** 2)
    return np.array(out)


def spatial_projections(bench: Bench) -> np.ndarray:
    """The same for spatial-6 through the converter, the rotator and the sorter."""
    plan = compile_protocol(load_protocol("spatial-6"), bench)
    truth = analyzer_model(bench, truth=True)
    kraus = jones.sorter_ports(truth.sorter_visibility)
    ports = [d.sorter_port for d in bench.roles.detectors]
    out = []
    for step in plan.steps:
        if step.kind != "measure" or step.repeat_index:
            continue
        u = spatial_unitary(truth, step.settings.as_vector()[None])[0]
        for label, port in zip(step.port_labels, ports):
            out.append(np.linalg.norm(kraus["hv".index(port)] @ u @ SPATIAL_KETS[label]) ** 2)
    return np.array(out)


def test_overlay_compiles_polarization_settings_that_project_closer_to_the_targets(calibrated: dict) -> None:
    before = polarization_projections(load_bench(BENCH))
    after = polarization_projections(calibrated["bench"])
    assert np.mean(1 - after) < np.mean(1 - before)
    assert np.all(after >= before - 1e-9)


def test_overlay_compiles_spatial_settings_that_project_closer_to_the_targets(calibrated: dict) -> None:
    before = spatial_projections(load_bench(BENCH))
    after = spatial_projections(calibrated["bench"])
    assert np.mean(1 - after) < np.mean(1 - before)


def test_overlay_extends_the_run_bench_and_overrides_only_fitted_keys(calibrated: dict) -> None:
    text = calibrated["overlay"].read_text()
    data = yaml.safe_load(text)
    assert data["extends"] == BENCH
    assert set(data) == {"bench", "description", "extends", "calibration", "optics"}
    assert set(data["optics"]) == {"parity_sorter"}
    assert set(data["calibration"]["half_wave_plate"]) == {"fast_axis_offset_deg", "retardance_deg"}
    assert "pm_hH" not in data["calibration"]["port_gain"]
    base, bench = load_bench(BENCH), calibrated["bench"]
    assert bench.devices == base.devices and bench.simulation == base.simulation
    assert bench.calibration.mode_converter.axis_deg == base.calibration.mode_converter.axis_deg


def test_overlay_header_names_the_runs_and_the_time(calibrated: dict) -> None:
    header = [l for l in calibrated["overlay"].read_text().splitlines() if l.startswith("#")]
    assert "lightloom calibrate" in header[0] and "+00:00" in header[0]
    for run in calibrated["runs"]:
        assert any(str(Path(run).resolve()) in line for line in header)


def test_a_bench_given_by_path_is_extended_by_a_path_relative_to_the_overlay(
    calibrated: dict, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    benches = tmp_path / "benches"
    benches.mkdir()
    shutil.copy(load_bench(BENCH).source_path, benches / "table.yaml")
    (tmp_path / "out").mkdir()
    monkeypatch.chdir(tmp_path)
    assert cli.main(["run", "waveplate-calibration-hwp", "--bench", "benches/table.yaml", "--out", "hwp.h5", "--quiet"]) == 0
    assert cli.main(["calibrate", "hwp.h5", "--out", "out/overlay.yaml"]) == 0
    assert yaml.safe_load((tmp_path / "out" / "overlay.yaml").read_text())["extends"] == "../benches/table.yaml"
    monkeypatch.chdir(calibrated["folder"])
    overlay = load_bench(tmp_path / "out" / "overlay.yaml")
    assert overlay.calibration.half_wave_plate.fast_axis_offset_deg != 0.0


def test_existing_out_is_refused_with_one_line_and_left_alone(calibrated: dict, capsys: pytest.CaptureFixture[str]) -> None:
    before = calibrated["overlay"].read_bytes()
    assert cli.main(["calibrate", calibrated["runs"][0], "--out", str(calibrated["overlay"])]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "exists already" in err
    assert calibrated["overlay"].read_bytes() == before


def test_a_file_that_is_not_a_run_is_refused_with_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    junk = tmp_path / "notes.h5"
    junk.write_text("not hdf5 at all\n")
    assert cli.main(["calibrate", str(junk), "--out", str(tmp_path / "o.yaml")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and str(junk) in err and "run files written by" in err
    assert not (tmp_path / "o.yaml").exists()


def test_a_run_without_a_calibration_scan_is_refused_with_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    run = tmp_path / "tomo.h5"
    assert cli.main(["run", "polarization-4", "--bench", BENCH, "--out", str(run), "--quiet"]) == 0
    capsys.readouterr()
    assert cli.main(["calibrate", str(run), "--out", str(tmp_path / "o.yaml")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "not a calibration scan" in err and "polarization-4" in err
    assert not (tmp_path / "o.yaml").exists()


def test_a_missing_run_file_is_refused_with_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["calibrate", str(tmp_path / "absent.h5"), "--out", str(tmp_path / "o.yaml")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no such run file" in err



def test_calibrate_refuses_scans_whose_input_was_not_the_calibration_input(tmp_path: Path, capsys) -> None:
    # The built-in sim source is a vector beam, not |H,h>: a quarter-wave scan of it cannot be fitted by
    # the calibration model (its residuals dwarf the scatter of repeated readings), so no overlay of
    # nonsense values is written.
    run = tmp_path / "qwp-on-a-vector-beam.h5"
    assert cli.main(["run", "waveplate-calibration-qwp", "--bench", "sim", "--out", str(run), "--quiet"]) == 0
    capsys.readouterr()
    out = tmp_path / "overlay.yaml"
    assert cli.main(["calibrate", str(run), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "the calibration model does not describe this scan" in err and "nothing written" in err
    assert err.count("\n") == 1 and not out.exists()
