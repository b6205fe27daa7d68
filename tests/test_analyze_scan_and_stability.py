"""`analyze` of scan runs (readings against the scanned angle, the calibration model fitted, figures),
`calibrate --plots`, and the stability report (`--stability`, runs of the stability protocol)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from lightloom.sequencer.cli import main

# The sim table with an H-polarized h-mode input (the calibration input of the scans); its
# calibration holds the simulated table's values, so the fit must find them.
H_INPUT = """bench: sim-h-input
extends: sim
simulation:
  source:
    state:
      density_matrix: null
      ket: ["1", "0", "0", "0"]
"""

SHORT_STABILITY = """protocol: stability
description: A short drift run for tests
analyzes: [polarization, spatial]
measure:
  settings:
    - {polarization: H, spatial: h, label: "drift H,h"}
dwell_s: 0.2
repeats: 8
background: {every_points: 0, at_start: true, at_end: true, dwell_s: 0.2}
reference: {every_points: 1, dwell_s: 0.1}
order: as-written
sweep: {passes: 3, interval_s: 5}
"""


@pytest.fixture(scope="module")
def hwp_scan(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("scan")
    bench = folder / "h.yaml"
    bench.write_text(H_INPUT, encoding="utf-8")
    out = folder / "hwp.h5"
    assert main(["run", "waveplate-calibration-hwp", "--bench", str(bench), "--out", str(out), "--quiet"]) == 0
    return out


def test_analyze_of_a_wave_plate_scan_reports_the_scan_and_finds_the_table_values(hwp_scan: Path, capsys) -> None:
    assert main(["analyze", str(hwp_scan), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["determines"] == "scan"
    assert doc["run"]["status"] == "complete"
    scan = doc["scan"]
    assert scan["scanned_element"] == "half_wave_plate"
    n = len(scan["angle_deg"])
    assert n == 74  # 37 angles, 2 readings each
    assert set(scan["ports"]) == {"pm_hH", "pm_hV", "pm_vH", "pm_vV"}
    for port in scan["ports"].values():
        assert len(port["readings"]) == len(port["model"]) == len(port["residuals"]) == n
    params = scan["fit"]["parameters"]
    offset = params["calibration.half_wave_plate.fast_axis_offset_deg"]
    retardance = params["calibration.half_wave_plate.retardance_deg"]
    # the simulated table of `sim` (simulators/benches/sim.yaml): offset -0.2 deg, retardance 178.5 deg
    assert abs(offset["value"] - (-0.2)) < 5 * offset["std"] + 0.01
    assert abs(retardance["value"] - 178.5) < 5 * retardance["std"] + 0.05
    lo, hi = offset["interval"]
    assert lo < offset["value"] < hi
    # the model follows the readings: residuals small against the modulation of the bright port
    hh = scan["ports"]["pm_hH"]
    span = max(hh["readings"]) - min(hh["readings"])
    assert max(abs(r) for r in hh["residuals"]) < 0.02 * span
    # and no more than the scatter of repeated readings allows (a model fitted to these readings)
    fit = scan["fit"]
    assert fit["describes_readings"] is True and 0.5 < fit["residuals_over_repeat_scatter"] < 2.0, fit


def test_analyze_of_a_scan_draws_readings_model_and_residuals(hwp_scan: Path, tmp_path: Path, capsys) -> None:
    assert main(["analyze", str(hwp_scan), "--plots", str(tmp_path / "fig")]) == 0
    out = " ".join(capsys.readouterr().out.split())  # the terminal table wraps lines
    # a half-wave plate turned behind the parked quarter-wave plate also determines the input's
    # polarization state, printed above the scan: the scan's line says so rather than "no state"
    assert "a scan; its readings also determine the polarization state (above)" in out
    assert "a scan (no state)" not in out
    assert "half_wave_plate.retardance_deg" in out
    png = tmp_path / "fig" / "scan.png"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the state it also determines is drawn as any state is
    for name in ("density_matrix.png", "poincare.png", "scan_state.png"):
        assert (tmp_path / "fig" / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", name


def test_calibrate_draws_its_fit_per_run(hwp_scan: Path, tmp_path: Path) -> None:
    overlay = tmp_path / "overlay.yaml"
    assert main(["calibrate", str(hwp_scan), "--out", str(overlay), "--plots", str(tmp_path / "cal")]) == 0
    figures = sorted((tmp_path / "cal").glob("*.png"))
    assert [f.name for f in figures] == ["calibration-hwp.png"]
    assert figures[0].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_a_stability_run_reports_every_series_with_allan_deviation_and_a_figure(tmp_path: Path, capsys) -> None:
    protocol = tmp_path / "stability.yaml"
    protocol.write_text(SHORT_STABILITY, encoding="utf-8")
    out = tmp_path / "st.h5"
    assert main(["run", str(protocol), "--bench", "sim", "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["analyze", str(out), "--json", "--plots", str(tmp_path / "fig")]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["run"]["status"] == "complete"
    assert "not determined" in doc["state"]
    stab = doc["stability"]
    assert set(stab["ports"]) == {"pm_hH", "pm_hV", "pm_vH", "pm_vV"}
    for series in [stab["reference"], *stab["ports"].values()]:
        assert series["readings"] >= 24
        assert set(series["mean"]) == {"value", "std", "interval"}
        assert set(series["drift_per_hour"]) == {"value", "std", "interval"}
        allan = series["allan"]
        assert len(allan["tau_s"]) == len(allan["deviation"]) >= 2
        assert all(d > 0 for d in allan["deviation"])
    # every port sees the same source: its mean is the bright port's share of about 1 mW
    assert 1e-4 < stab["ports"]["pm_hH"]["mean"]["value"] < 1e-3
    assert (tmp_path / "fig" / "stability.png").exists()


def test_stability_option_adds_the_report_to_a_tomography(tmp_path: Path, capsys) -> None:
    out = tmp_path / "p4.h5"
    assert main(["run", "polarization-4", "--bench", "sim", "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["analyze", str(out), "--json", "--stability", "--bootstrap", "20"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert "purity" in doc and "stability" in doc
    assert doc["stability"]["reference"]["unit"] == "W"


def test_a_scan_stopped_before_its_first_reading_says_what_is_missing_as_a_list(tmp_path: Path, capsys) -> None:
    bench = tmp_path / "stuck.yaml"
    bench.write_text("extends: sim-uncalibrated\nsimulation:\n  faults:\n"
                     "    - {device: qwp_stage, kind: stuck, at_s: 0}\n", encoding="utf-8")
    out = tmp_path / "stuck.h5"
    assert main(["run", "waveplate-calibration-qwp", "--bench", str(bench), "--out", str(out), "--quiet"]) == 3
    capsys.readouterr()
    assert main(["analyze", str(out), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["run"]["status"] == "fault" and doc["run"]["steps_done"] == 0
    assert doc["scan"] is None and doc["missing"] == ["the scan has no measure readings yet"]
    assert main(["analyze", str(out), "--csv"]) == 0
    row = capsys.readouterr().out.splitlines()[1]
    assert row.endswith(",the scan has no measure readings yet"), row
