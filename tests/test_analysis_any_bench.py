"""The per-port operators in the file are the truth: single-factor estimates from explicit element
settings and from scans, on benches with one, two or four detector ports, agree with each other
and with the simulated source."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from sympy import N, pi
from sympy.physics.optics.polarization import jones_vector, stokes_vector

from lightloom.sequencer.cli import main
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.optics.stokes import reduced_stokes

# An elliptical polarization state (azimuth pi/7, ellipticity angle pi/9) in the h mode: a product
# state, so the polarization state of the light in any spatial mode is the reduced state. Its Jones
# vector and Stokes parameters come from sympy.physics.optics.polarization (jones_vector,
# stokes_vector), independently of lightloom's optics model.
PSI, CHI = pi / 7, pi / 9
JONES = [complex(N(x)) for x in jones_vector(PSI, CHI)]
TRUE_STOKES = [float(N(x)) for x in stokes_vector(PSI, CHI)]

QWP_SCAN = """\
protocol: rotating-qwp-polarimeter
description: A quarter-wave plate turned in front of the splitter, half-wave plate parked
analyzes: [polarization]
measure:
  scan:
    element: quarter_wave_plate
    from_deg: 0
    to_deg: 165
    step_deg: 15
    fixed: {half_wave_plate_deg: 0, mode_converter: out, image_rotator_deg: 0}
dwell_s: 0.2
repeats: 2
background: {at_start: true, at_end: true}
order: as-written
"""

SPATIAL_THREE = """\
protocol: spatial-three-elements
description: Spatial tomography from three explicit analyzer settings
analyzes: [spatial]
measure:
  settings:
    - {elements: {mode_converter: out, image_rotator_deg: 0}}
    - {elements: {mode_converter: out, image_rotator_deg: 22.5}}
    - {elements: {mode_converter: in, image_rotator_deg: 0}}
dwell_s: 0.5
repeats: 2
background: {at_start: true, at_end: true}
order: as-written
"""

SOURCE = """\
simulation:
  source:
    state:
      ket: ["{a}", "0", "{b}", "0"]
      density_matrix: null
"""

TWO_PORTS = """\
devices:
  pm_hV: {driver: sim.power_meter, overhead_s: 0.002}
roles:
  detectors:
    - {device: pm_hH, sorter_port: h, splitter_port: H}
    - {device: pm_hV, sorter_port: h, splitter_port: V}
calibration:
  port_gain: {pm_hV: 0.97}
simulation:
  table:
    port_gain: {pm_hV: 0.97}
"""


def _complex_text(z: complex) -> str:
    return f"{z.real:.12f}{z.imag:+.12f}j"


def _bench(tmp_path: Path, base: str, extra: str = "") -> Path:
    path = tmp_path / f"{base}-{len(extra)}.yaml"
    source = SOURCE.format(a=_complex_text(JONES[0]), b=_complex_text(JONES[1]))
    text = f"bench: test-{base}\nextends: {base}\n" + source
    if extra:
        # merge the extra simulation keys into the one simulation section
        dev, sim_extra = extra.split("simulation:\n")
        text = f"bench: test-{base}\nextends: {base}\n" + dev + source + sim_extra
    path.write_text(text, encoding="utf-8")
    return path


def _analyse(tmp_path: Path, protocol_text: str, bench: Path | str, name: str, capsys) -> dict:
    protocol = tmp_path / f"{name}.yaml"
    protocol.write_text(protocol_text, encoding="utf-8")
    out = tmp_path / f"{name}.h5"
    assert main(["run", str(protocol), "--bench", str(bench), "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["analyze", str(out), "--json", "--bootstrap", "60"]) == 0
    return json.loads(capsys.readouterr().out)


def test_spatial_state_from_three_explicit_element_settings_on_four_ports(tmp_path: Path, capsys) -> None:
    doc = _analyse(tmp_path, SPATIAL_THREE, "sim", "spatial", capsys)
    assert doc["determines"] == "spatial-state" and doc["missing"] == []
    assert doc["corrections"]["reduction"]["case"] == "exact"
    # The reduced spatial state of the sim source is nearly unpolarized: its normalised linear entropy
    # (d / (d - 1)) (1 - tr rho^2) is near 1, and its interval holds it and stays inside [0, 1]
    entropy = doc["linear_entropy"]
    assert entropy["value"] > 0.9 and 0.0 <= entropy["interval"][0] <= entropy["value"] <= entropy["interval"][1] <= 1.0, entropy
    # The built-in sim source's spatial Stokes parameters, from its density matrix (partial trace)
    truth = reduced_stokes(load_bench("sim").simulation.source.density(), "spatial")
    for k in (1, 2, 3):
        got = doc["stokes"]["spatial"][k]
        assert abs(got["value"] - truth[k]) <= 5 * got["std"] + 2e-3, (k, got, truth[k])


@pytest.mark.parametrize("bench", ["sim-single", "two-ports", "sim"])
def test_rotating_quarter_wave_plate_gives_the_source_stokes_on_any_port_set(tmp_path: Path, capsys, bench: str) -> None:
    path = {
        "sim-single": lambda: _bench(tmp_path, "sim-single"),
        "two-ports": lambda: _bench(tmp_path, "sim-single", TWO_PORTS),
        "sim": lambda: _bench(tmp_path, "sim"),
    }[bench]()
    doc = _analyse(tmp_path, QWP_SCAN, path, f"qwp-{bench}", capsys)
    # a scan (fitted as one, `scan`) whose operators also determine the polarization state
    assert doc["determines"] == "scan" and doc["state_determined"] == "polarization-state", doc.get("missing")
    for k in (1, 2, 3):
        got = doc["stokes"]["polarization"][k]
        # 5 std plus the table's residual imperfections beyond the calibration (none on sim: the
        # calibration equals the simulated table, so only the splitter's finite extinction is left)
        assert abs(got["value"] - TRUE_STOKES[k]) <= 5 * got["std"] + 3e-3, (bench, k, got, TRUE_STOKES[k])
    # S0: the power reaching the detectors (1 mW from the source of `sim`, all in the h mode). Behind
    # one sorter output it is the power that output passes: (1 + visibility) / 2 of it at the
    # visibility 0.97 of `sim`, not twice that (common practice, no source).
    passed = {"sim": 1.0, "sim-single": 0.985, "two-ports": 0.985}[bench] * 1e-3
    assert abs(doc["power"]["value"] - passed) <= 5 * doc["power"]["std"] + 0.01 * passed, (bench, doc["power"])
    # the scan's calibration model assumes the input |H,h>: for this elliptical input it cannot fit,
    # and the scan section says so instead of offering its parameters as if they meant something
    fit = doc["scan"]["fit"]
    assert fit["describes_readings"] is False and fit["residuals_over_repeat_scatter"] > 10, (bench, fit)
    assert any("does not describe these readings" in note for note in fit["notes"])
    # the model the scan does describe: its readings, summed over the other factor's outputs, against
    # the state they determine, within a few reading noises (0.2 % relative on `sim`, drift 2 %)
    model = doc["scan"]["state_model"]
    assert model["factor"] == "polarization"
    expected = {"sim": {"pm_hH+pm_vH", "pm_hV+pm_vV"}, "sim-single": {"pm_hH"}, "two-ports": {"pm_hH", "pm_hV"}}[bench]
    assert set(model["outputs"]) == expected
    for out in model["outputs"].values():
        peak = max(out["readings"])
        assert max(abs(r) for r in out["residuals"]) < 0.03 * peak, (bench, out["residuals"])
    if bench == "sim-single":
        assert doc["corrections"]["reduction"]["case"] == "conditional"
    if bench == "sim":
        assert doc["corrections"]["reduction"]["case"] == "exact"


def test_the_text_of_a_polarimeter_scan_says_which_model_describes_it(tmp_path: Path, capsys) -> None:
    doc = _analyse(tmp_path, QWP_SCAN, _bench(tmp_path, "sim"), "qwp-text", capsys)
    assert doc["scan"]["fit"]["describes_readings"] is False
    assert main(["analyze", str(tmp_path / "qwp-text.h5"), "--bootstrap", "20"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "the calibration model below does not describe these readings" in text
    assert "the state above is what they determine" in text
    assert "against the polarization state (outputs summed over the other factor): residual rms pm_hH+pm_vH" in text
