"""The advisor on the simulated bench: a known local turn of the azimuthal mode is measured, advised
towards radial, corrected through the optics model, measured again; and the `advise` and
`analyze --field-maps --plots` command lines."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from lightloom.sequencer.cli import main
from lightloom.sequencer.optics import transverse
from lightloom.sequencer.optics.correction import StackSettings, polarization_stack, spatial_stack, stack_unitary
from lightloom.sequencer.optics.states import JOINT_KETS

# Our scenario: the azimuthal beam leaves its source through a stray wave-plate stack and a
# Dove prism at 30 deg.
TURN = np.kron(polarization_stack(20.0, 65.0, 140.0), spatial_stack(None, 30.0))
SOURCE = TURN @ JOINT_KETS["azimuthal"]


def _bench(path: Path, ket: np.ndarray) -> Path:
    amps = ", ".join(f'"{z.real:.12f}{z.imag:+.12f}j"' for z in ket)
    path.write_text(
        "bench: turned-source\nextends: sim\nsimulation:\n  source:\n    state:\n"
        f"      density_matrix: null\n      ket: [{amps}]\n",
        encoding="utf-8",
    )
    return path


def _run(tmp: Path, name: str, ket: np.ndarray) -> Path:
    out = tmp / f"{name}.h5"
    assert main(["run", "joint-36", "--bench", str(_bench(tmp / f"{name}.yaml", ket)), "--out", str(out), "--quiet"]) == 0
    return out


def _json(capsys, argv: list[str]) -> dict:
    capsys.readouterr()
    assert main(argv) == 0
    return json.loads(capsys.readouterr().out)


@pytest.fixture(scope="module")
def measured(tmp_path_factory) -> Path:
    return _run(tmp_path_factory.mktemp("advise"), "turned", SOURCE)


def test_advised_stack_brings_the_simulated_source_to_the_predicted_fidelity(measured: Path, capsys, tmp_path) -> None:
    doc = _json(capsys, ["advise", str(measured), "--target", "radial", "--json"])
    s = doc["settings"]
    f, std = doc["fidelity"]["value"], doc["fidelity"]["std"]
    assert std is not None and 0 < std < 0.01
    lo, hi = doc["fidelity"]["interval"]
    assert 0.0 <= lo <= f <= hi <= 1.0
    settings = StackSettings(s["quarter_wave_plate_1_deg"], s["half_wave_plate_deg"], s["quarter_wave_plate_2_deg"],
                             s["mode_converter_deg"], s["image_rotator_deg"])
    corrected = stack_unitary(settings) @ SOURCE
    # through the optics model, as the simulator would: the true fidelity after the stack
    true_f = abs(np.vdot(JOINT_KETS["radial"], corrected)) ** 2
    assert abs(true_f - f) <= 3 * std + 1e-4
    # for a maximally entangled target the settings reach the best local fidelity (closed form)
    assert doc["best_local_fidelity"]["value"] == pytest.approx(f, abs=1e-9)
    assert doc["remaining_error"] == "source"
    assert doc["fidelity_without_correction"]["value"] < 0.5
    # and measured again on the simulated bench with the stack applied to the source
    again = _json(capsys, ["analyze", str(_run(tmp_path, "corrected", corrected)), "--json"])
    assert again["target"] == "radial"
    f2, std2 = again["fidelity"]["value"], again["fidelity"]["std"]
    assert abs(f2 - f) <= 3 * np.hypot(std, std2) + 1e-4


def test_field_maps_and_portrait_of_the_measured_beam_match_the_true_source(measured: Path, capsys, tmp_path) -> None:
    doc = _json(capsys, ["analyze", str(measured), "--json", "--field-maps", "--plots", str(tmp_path / "figs")])
    assert (tmp_path / "figs" / "portrait.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    maps = doc["field_maps"]
    x, y = np.meshgrid(maps["grid"]["x"], maps["grid"]["y"])
    truth = transverse.local_stokes(SOURCE, x, y)
    s0 = np.array(maps["S0"], dtype=float)
    bright = truth[..., 0] > 0.05 * truth[..., 0].max()
    assert np.allclose(s0[bright], truth[..., 0][bright], rtol=0.05)
    got = np.array(maps["orientation_deg"], dtype=float)
    diff = np.mod(got - transverse.orientation_deg(truth) + 90.0, 180.0) - 90.0
    assert np.abs(diff[bright]).max() < 3.0
    for a in ("0", "45", "90", "135"):
        assert np.shape(maps["polarizer"][a]) == s0.shape


def test_advise_reads_a_saved_analysis_document(measured: Path, capsys, tmp_path) -> None:
    saved = tmp_path / "analysis.json"
    saved.write_text(json.dumps(_json(capsys, ["analyze", str(measured), "--json", "--bootstrap", "2"])))
    from_json = _json(capsys, ["advise", str(saved), "--target", "radial", "--json"])
    from_run = _json(capsys, ["advise", str(measured), "--target", "radial", "--json", "--bootstrap", "2"])
    assert from_json["source"]["kind"] == "analysis" and from_json["fidelity"]["std"] is None
    assert from_json["fidelity"]["value"] == pytest.approx(from_run["fidelity"]["value"], abs=1e-9)
    bad = tmp_path / "bad.json"
    bad.write_text('{"purity": 1}')
    assert main(["advise", str(bad), "--target", "radial"]) == 2
    assert "density_matrix" in capsys.readouterr().err


def test_advise_takes_a_state_on_the_command_line(capsys) -> None:
    doc = _json(capsys, ["advise", "azimuthal", "--target", "radial", "--json"])
    assert doc["source"] == {"kind": "state", "state": "azimuthal"}
    assert doc["fidelity"]["value"] == pytest.approx(1.0, abs=1e-9)
    assert doc["fidelity"]["std"] is None
    assert set(doc["settings"]) >= {"quarter_wave_plate_1_deg", "half_wave_plate_deg", "quarter_wave_plate_2_deg",
                                    "mode_converter", "image_rotator"}


def test_advise_refuses_an_unknown_target_in_one_line(capsys) -> None:
    assert main(["advise", "radial", "--target", "radialish"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--target" in err and "radial" in err
