"""Stokes imaging end to end on the simulated bench: the simulated camera, imaging-4/6 runs with
frames in the run file, dry-run saturation checks, kill -9 and resume, analyze --json/--maps, and
the closed loop against joint-36 tomography of the same source."""

from __future__ import annotations

import json
import signal
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
import qutip

from lightloom.drivers.options import DriverConfigError
from lightloom.sequencer.cli import main
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.optics.transverse import field, local_stokes
from lightloom.sequencer.storage import journal_path_for, read_journal
from lightloom.sequencer.storage.frames import frames_path_for, load_frames, scan_journal
from lightloom.simulators.camera import (
    SensorModel, pixel_coordinates, polarization_povm, power_fraction_map, sensor_from_options,
)
from lightloom.simulators.table import SimulatedTable
from helpers.runs import spawn


def bench_with_ket(tmp_path: Path, ket, base: str = "sim-camera", extra: str = "", name: str = "src") -> Path:
    values = ", ".join(f'"{complex(z).real:.10f}{complex(z).imag:+.10f}j"' for z in ket)
    path = tmp_path / f"{name}.yaml"
    path.write_text(f"bench: {name}\nextends: {base}\nsimulation:\n  source:\n    state:\n"
                    f"      density_matrix: null\n      ket: [{values}]\n{extra}", encoding="utf-8")
    return path


def run(tmp_path: Path, protocol: str, bench, name: str = "run.h5") -> Path:
    out = tmp_path / name
    assert main(["run", protocol, "--bench", str(bench), "--out", str(out), "--quiet"]) == 0
    return out


def analyze(path: Path, capsys, *extra: str) -> dict:
    capsys.readouterr()
    assert main(["analyze", str(path), "--json", "--bootstrap", "100", *extra]) == 0
    return json.loads(capsys.readouterr().out)


# ---------------------------------------------------------------- the simulated camera


def test_pixel_power_behind_a_polarizer_is_the_squared_field_component():
    # Independent path: the Jones field of the ket (transverse.field) against the coherency route.
    model = SensorModel(sensor=(40, 48), pixel_um=5.0, waist_um=50.0, walk_px=0.0)
    ket = np.array([0.3, 0.5j, -0.6, 0.55])
    ket = ket / np.linalg.norm(ket)
    x, y = pixel_coordinates(model, 0.0)
    area = (model.pixel_um / model.waist_um) ** 2
    e = field(ket, x, y)
    for povm, component in ((np.diag([1.0, 0.0]), np.abs(e[..., 0]) ** 2),
                            (np.diag([0.0, 1.0]), np.abs(e[..., 1]) ** 2)):
        np.testing.assert_allclose(power_fraction_map(ket, povm, model), component * area, atol=1e-12)


def test_whole_sensor_collects_the_reduced_state_projection():
    model = SensorModel(sensor=(120, 120), pixel_um=4.0, waist_um=40.0, walk_px=0.0)
    rho = load_bench("sim").simulation.source.density()
    reduced = np.einsum("pmqm->pq", rho.reshape(2, 2, 2, 2))
    e = np.array([[0.5, 0.5j], [-0.5j, 0.5]])  # R projector
    assert power_fraction_map(rho, e, model).sum() == pytest.approx(np.trace(reduced @ e).real, abs=1e-9)


def test_beam_walks_with_the_half_wave_plate():
    model = SensorModel(sensor=(32, 32), walk_px=0.5)
    x0, _ = pixel_coordinates(model, 0.0)
    x90, y90 = pixel_coordinates(model, 90.0)
    assert x0[0, 0] - x90[0, 0] == pytest.approx(-0.5 * model.pixel_um / model.waist_um)


def test_sim_camera_frames_are_noisy_quantized_saturated_and_reproducible():
    bench = load_bench("sim-camera")
    frames = []
    for _ in range(2):
        table = SimulatedTable(bench)
        camera = table.devices["camera"]
        table.shutter.open()
        frames.append(camera.read_frame(exposure_s=0.002, frames=1))
    assert np.array_equal(frames[0].data, frames[1].data)  # same seed, same frame
    assert np.all(frames[0].data == np.rint(frames[0].data)) and frames[0].data.max() < 4095
    bright = camera.read_frame(exposure_s=0.02, frames=2)
    assert bright.saturated.any() and bright.data.max() == 4095
    table.shutter.close_beam()
    dark = camera.read_frame(exposure_s=0.002, frames=1)
    assert dark.data.max() < 10 and not dark.saturated.any()


def test_sim_camera_options_are_checked():
    with pytest.raises(DriverConfigError) as caught:
        sensor_from_options({"pixel_um": -1})
    assert caught.value.key == "pixel_um"
    with pytest.raises(DriverConfigError, match="unknown option 'pixels'"):
        sensor_from_options({"pixels": [3, 3]})


def test_polarization_povm_traces_out_the_spatial_factor():
    e = np.array([[0.9, 0.1], [0.1, 0.1]])
    assert np.allclose(polarization_povm(np.kron(e, np.eye(2))), e)


# ---------------------------------------------------------------- protocols, dry-run, storage


def test_dry_run_says_which_setting_would_saturate(tmp_path, capsys):
    slow = tmp_path / "slow.yaml"
    text = Path(__file__).resolve().parents[1].joinpath("protocols", "imaging-4.yaml").read_text()
    slow.write_text(text.replace("dwell_s: 0.002\nframes", "dwell_s: 0.006\nframes"))
    capsys.readouterr()
    assert main(["dry-run", str(slow), "--bench", "sim-camera", "--json"]) == 0
    checks = {c["setting"]: c for c in json.loads(capsys.readouterr().out)["camera_exposures"]}
    assert checks["camera H"]["saturates"] and not checks["camera R"]["saturates"]
    assert checks["camera H"]["max_exposure_s"] < 0.006
    assert main(["dry-run", str(slow), "--bench", "sim-camera"]) == 0
    assert "would saturate: camera H" in capsys.readouterr().out


def test_imaging_run_stores_every_frame_with_its_settings_and_operators(tmp_path, capsys):
    out = run(tmp_path, "imaging-6", "sim-camera")
    with h5py.File(out) as f:
        g = f["frames"]
        steps = f["readings/step_index"][()] if "readings/step_index" in f else None
        assert g.attrs["complete"] and g["data"].shape == (len(g["step_index"]), 64, 64)
        assert g["data"].chunks == (1, 64, 64) and g["data"].compression == "gzip"
        kinds = g["kind"][()]
        assert (kinds == 1).sum() == 2 and (kinds == 0).sum() == 18  # 2 dark, 6 settings x 3
        assert np.all(g["n_averaged"][()] == 4)
        assert g["operators"].shape == (20, 4, 4) and g["commanded"].shape == (20, 5)
        assert sorted(g["step_index"][()]) == list(range(20))
        if steps is not None:
            assert set(steps) == set(g["step_index"][()])
    data = read_journal(journal_path_for(out))
    frames = load_frames(out, data.readings)
    # The port reading is the frame's sum: the run table and the frames tell the same story.
    by_step = {int(s): i for i, s in enumerate(data.readings.step_index)}
    for k in range(len(frames)):
        assert data.readings.values[by_step[int(frames.step_index[k])], 0] == pytest.approx(
            float(frames.data[k].astype(np.float64).sum()), rel=1e-6)


def test_kill9_during_an_imaging_run_then_resume_keeps_every_reported_frame_once(tmp_path):
    bench = bench_with_ket(tmp_path, [1, 0, 0, 1], extra="  time_scale: 0.05\n", name="slow-cam")
    out = tmp_path / "run.h5"
    proc = spawn("run", "imaging-6", "--bench", bench, "--out", out, "--quiet")
    deadline = time.time() + 60
    while time.time() < deadline and proc.poll() is None:
        if journal_path_for(out).exists() and len(read_journal(journal_path_for(out)).readings) >= 5:
            break
        time.sleep(0.02)
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=60)
    assert proc.returncode == -signal.SIGKILL, "the run ended before the kill; slow it down"
    before = read_journal(journal_path_for(out))
    reported = {int(s) for s in before.readings.step_index}
    framed = {step for _, _, step, _ in scan_journal(frames_path_for(out))}
    assert reported <= framed  # the frame is on disk before its reading
    early = load_frames(out, before.readings)
    assert set(early.step_index) == reported  # readable from the frame journal while killed
    assert main(["resume", str(out), "--quiet"]) == 0
    final = read_journal(journal_path_for(out))
    with h5py.File(out) as f:
        steps = f["frames/step_index"][()]
        data = f["frames/data"]
        assert sorted(steps) == sorted(int(s) for s in final.readings.step_index)
        assert len(steps) == len(set(steps)) == final.header.steps_total
        position = {int(s): i for i, s in enumerate(steps)}
        for k, s in enumerate(early.step_index):  # every frame reported before the kill, unchanged
            np.testing.assert_array_equal(data[position[int(s)]], early.data[k])


# ---------------------------------------------------------------- analysis and the closed loop


def test_analyze_reports_nonseparability_and_writes_the_maps(tmp_path, capsys):
    out = run(tmp_path, "imaging-4", "sim-camera")
    doc = analyze(out, capsys, "--maps", str(tmp_path / "maps.h5"), "--plots", str(tmp_path / "fig"))
    v = doc["nonseparability"]
    assert set(v) == {"value", "std", "interval"} and 0 <= v["interval"][0] <= v["value"] <= v["interval"][1] <= 1
    assert [s["value"] for s in doc["stokes"]["polarization"]][0] == 1.0
    assert (tmp_path / "fig" / "stokes_ellipses.png").stat().st_size > 1000
    with h5py.File(tmp_path / "maps.h5") as f:
        assert {"S0", "S1", "S2", "S3", "dop", "orientation_deg", "ellipticity_deg"} <= set(f)
        assert f["S0"].shape == (64, 64) and f["orientation_deg"].attrs["units"] == "deg"
    assert main(["analyze", str(out), "--maps", str(tmp_path / "maps.h5")]) == 2  # never overwrites


def test_measured_maps_agree_with_the_maps_computed_from_the_source(tmp_path, capsys):
    ket = np.array([0.7, 0.2j, -0.3, 0.6])
    ket = ket / np.linalg.norm(ket)
    bench = bench_with_ket(tmp_path, ket)
    out = run(tmp_path, "imaging-6", bench)
    analyze(out, capsys, "--maps", str(tmp_path / "maps.h5"))
    model = sensor_from_options(load_bench(str(bench)).devices["camera"].options)
    x, y = pixel_coordinates(model, 0.0)
    truth = local_stokes(ket, x, y)
    with h5py.File(tmp_path / "maps.h5") as f:
        measured = np.stack([f[k][()] for k in ("S0", "S1", "S2", "S3")], axis=-1)
    bright = truth[..., 0] > 0.3 * truth[..., 0].max()
    # Normalised Stokes maps (s_j = S_j / S0) where the beam is bright: the table's imperfect
    # analyzer is calibrated, the beam walk (0.2 pixel) and the noise leave a few percent.
    for j in (1, 2, 3):
        with np.errstate(divide="ignore", invalid="ignore"):
            error = measured[..., j] / measured[..., 0] - truth[..., j] / truth[..., 0]
        assert np.nanmedian(np.abs(error[bright])) < 0.03, f"S{j}"
    shape = measured[..., 0] / np.nansum(measured[..., 0])
    assert np.nansum(np.abs(shape - truth[..., 0] / truth[..., 0].sum())) < 0.1


def test_camera_nonseparability_of_a_pure_source_agrees_with_joint_tomography(tmp_path, capsys):
    ket = np.array([0.8, 0.0, 0.0, 0.6j])  # concurrence 0.96 (Wootters: 2|ad - bc|)
    truth = qutip.concurrence(qutip.Qobj(ket.reshape(4, 1), dims=[[2, 2], [1, 1]]))
    imaging = analyze(run(tmp_path, "imaging-4", bench_with_ket(tmp_path, ket, name="cam"), "img.h5"), capsys)
    joint = analyze(run(tmp_path, "joint-36", bench_with_ket(tmp_path, ket, base="sim", name="tab"), "tom.h5"),
                    capsys)
    v, c = imaging["nonseparability"], joint["concurrence"]
    combined = np.hypot(v["std"], c["std"])
    # Within their combined error bars (both tight: about 3e-5 and 8e-5 here), and near the truth
    # up to the systematic error of the 0.2-pixel beam walk.
    assert abs(v["value"] - c["value"]) <= 3 * combined, (v, c)
    assert abs(v["value"] - truth) <= 4 * v["std"] + 5e-4
