"""Calibration fits on synthetic scans: offsets, retardances, gains, visibility, and honest uncertainties."""

from __future__ import annotations

import numpy as np
import pytest

from lightloom.sequencer.analysis import calibration as cal
from lightloom.sequencer.errors import InputError
from lightloom.sequencer.optics.analyzer import (
    CONVERTER, HWP, QWP, ROTATOR, AnalyzerModel, PlateModel, PortModel, RotatorModel, park_settings,
    port_operators, probabilities,
)

COLUMN = {"half_wave_plate": HWP, "quarter_wave_plate": QWP, "image_rotator": ROTATOR}
POWER_W = 1.0e-3
OFFSET_W = 2.0e-9
# Power-meter noise of the built-in sim bench at 0.5 s dwell: 5e-9 W and 0.2 % per 1 s, over sqrt(0.5 s).
NOISE_W, RELATIVE_NOISE = 7.0e-9, 2.8e-3

PBS_PORTS = (PortModel("pm_H", None, "H"), PortModel("pm_V", None, "V"))
TRUE_PLATES = AnalyzerModel(
    quarter_wave_plate=PlateModel(91.2, 0.3), half_wave_plate=PlateModel(178.5, -0.2), splitter_extinction=1e-3,
)
NOMINAL_PLATES = AnalyzerModel(
    quarter_wave_plate=PlateModel(90.0, 0.0), half_wave_plate=PlateModel(180.0, 0.0), splitter_extinction=1e-3,
)


def settings_of_scan(element: str, step_deg: float = 5.0, repeats: int = 2, n_dark: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Element settings of a 0..180 deg scan (others parked) with dark readings first and last."""
    angles = np.repeat(np.arange(0.0, 180.0 + 1e-9, step_deg), repeats)
    s = park_settings(len(angles) + 2 * n_dark)
    s[n_dark: len(s) - n_dark, COLUMN[element]] = angles
    dark = np.zeros(len(s), dtype=bool)
    dark[:n_dark] = dark[len(s) - n_dark:] = True
    return s, dark


def noisy(mean_w: np.ndarray, dark: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    mean_w = np.where(dark[:, None], 0.0, mean_w)
    sigma = np.sqrt(NOISE_W**2 + (RELATIVE_NOISE * mean_w) ** 2)
    return mean_w + OFFSET_W + sigma * rng.standard_normal(mean_w.shape)


def synthetic_scan(truth: AnalyzerModel, ports, element: str, rng: np.random.Generator, label: str = "scan",
                   converter_in: bool = False) -> cal.ScanReadings:
    """A scan simulated with the optics model itself: |H,h> in, the true analyzer, meter noise."""
    s, dark = settings_of_scan(element)
    if converter_in:
        s[:, CONVERTER] = 1.0
    mean = POWER_W * probabilities(cal.CALIBRATION_INPUT, port_operators(truth, ports, s))
    return cal.ScanReadings(label, element, s, noisy(mean, dark, rng), dark)


def within(fit: cal.CalibrationFit, name: str, true: float, sigmas: float = 4.0) -> bool:
    return abs(fit.value(name) - true) < sigmas * fit.std_of(name)


def test_half_wave_plate_offset_from_a_shifted_cos2_curve_between_parallel_polarizers() -> None:
    # A half-wave plate at theta between parallel polarizers transmits I0 cos^2(2 theta) (Hecht, Optics,
    # ch. 8, the half-wave plate turning linear light by twice its angle). Data from that formula
    # alone, shifted by a known 3.7 deg, must give back the shift as the fast-axis offset.
    rng = np.random.default_rng(11)
    shift_deg = 3.7
    s, dark = settings_of_scan("half_wave_plate")
    theta = np.radians(s[:, HWP] + shift_deg)
    mean = POWER_W * np.cos(2 * theta) ** 2
    values = noisy(mean[:, None], dark, rng)
    model = AnalyzerModel(half_wave_plate=PlateModel(180.0, 0.0), splitter_extinction=0.0)
    port = (PortModel("pm", None, "H"),)
    fit = cal.fit_calibration([cal.ScanReadings("hecht", "half_wave_plate", s, values, dark)], model, port,
                              free=(cal.HWP_OFFSET,))
    assert within(fit, cal.HWP_OFFSET, shift_deg)
    assert fit.std_of(cal.HWP_OFFSET) < 0.01


def test_joint_plate_scans_recover_both_offsets_and_retardances() -> None:
    rng = np.random.default_rng(5)
    scans = [synthetic_scan(TRUE_PLATES, PBS_PORTS, "half_wave_plate", rng, "hwp"),
             synthetic_scan(TRUE_PLATES, PBS_PORTS, "quarter_wave_plate", rng, "qwp")]
    fit = cal.fit_calibration(scans, NOMINAL_PLATES, PBS_PORTS)
    truth = {cal.QWP_OFFSET: 0.3, cal.QWP_RETARDANCE: 91.2, cal.HWP_OFFSET: -0.2, cal.HWP_RETARDANCE: 178.5}
    assert {n: within(fit, n, v) for n, v in truth.items()} == {n: True for n in truth}
    assert max(fit.std_of(n) for n in truth) < 0.1


def test_quarter_wave_scan_alone_measures_its_offset_less_the_parked_half_wave_offset() -> None:
    # Identifiability: with the half-wave plate parked at an uncalibrated offset h, the quarter-wave
    # scan's phase is that of cos 4(theta + q - h) (Mueller calculus of the two plates, Goldstein,
    # Polarized Light, ch. 4), so the lone fit returns q - h; the joint fit above separates them.
    rng = np.random.default_rng(6)
    fit = cal.fit_plate_scan(synthetic_scan(TRUE_PLATES, PBS_PORTS, "quarter_wave_plate", rng), NOMINAL_PLATES,
                             PBS_PORTS)
    assert abs(fit.value(cal.QWP_OFFSET) - (0.3 - (-0.2))) < 0.02
    assert not within(fit, cal.QWP_OFFSET, 0.3)


def test_reported_offset_std_matches_the_spread_over_repeated_noisy_scans() -> None:
    rng = np.random.default_rng(2024)
    names = (cal.QWP_OFFSET, cal.HWP_OFFSET, cal.QWP_RETARDANCE)
    values, stds = [], []
    for _ in range(30):
        scans = [synthetic_scan(TRUE_PLATES, PBS_PORTS, "half_wave_plate", rng, "hwp"),
                 synthetic_scan(TRUE_PLATES, PBS_PORTS, "quarter_wave_plate", rng, "qwp")]
        fit = cal.fit_calibration(scans, NOMINAL_PLATES, PBS_PORTS)
        values.append([fit.value(n) for n in names])
        stds.append([fit.std_of(n) for n in names])
    spread = np.std(values, axis=0, ddof=1)
    reported = np.sqrt(np.mean(np.square(stds), axis=0))
    ratio = spread / reported
    assert np.all((ratio > 1 / 1.5) & (ratio < 1.5)), dict(zip(names, ratio))


def test_relative_port_gain_from_complementary_splitter_ports() -> None:
    rng = np.random.default_rng(8)
    true_ports = (PortModel("pm_H", None, "H", 1.1), PortModel("pm_V", None, "V", 1.1 * 0.93))
    scan = synthetic_scan(TRUE_PLATES, true_ports, "half_wave_plate", rng)
    fit = cal.fit_port_gains([scan], NOMINAL_PLATES, PBS_PORTS)
    assert within(fit, cal.GAIN_PREFIX + "pm_V", 0.93)
    assert fit.std_of(cal.GAIN_PREFIX + "pm_V") < 0.005


def test_sorter_visibility_and_rotator_offset_from_a_rotator_scan() -> None:
    rng = np.random.default_rng(9)
    ports = (PortModel("pm_h", "h", None), PortModel("pm_v", "v", None))
    truth = AnalyzerModel(image_rotator=RotatorModel(0.7), sorter_visibility=0.95)
    believed = AnalyzerModel(image_rotator=RotatorModel(0.0), sorter_visibility=1.0)
    fit = cal.fit_sorter_visibility(synthetic_scan(truth, ports, "image_rotator", rng), believed, ports)
    assert within(fit, cal.SORTER_VISIBILITY, 0.95) and within(fit, cal.ROTATOR_OFFSET, 0.7)
    assert fit.std_of(cal.SORTER_VISIBILITY) < 1e-3


def test_fit_finds_offsets_far_from_the_bench_values() -> None:
    rng = np.random.default_rng(10)
    truth = AnalyzerModel(quarter_wave_plate=PlateModel(91.2, 17.0), half_wave_plate=PlateModel(178.5, -23.0),
                          splitter_extinction=1e-3)
    scans = [synthetic_scan(truth, PBS_PORTS, "half_wave_plate", rng, "hwp"),
             synthetic_scan(truth, PBS_PORTS, "quarter_wave_plate", rng, "qwp")]
    fit = cal.fit_calibration(scans, NOMINAL_PLATES, PBS_PORTS)
    assert within(fit, cal.QWP_OFFSET, 17.0) and within(fit, cal.HWP_OFFSET, -23.0)


def test_half_wave_retardance_sign_left_open_by_a_lone_plate_is_noted_and_covered_by_its_std() -> None:
    # Between linear polarizers with nothing else in the beam, 180 - e and 180 + e give the same
    # readings (conjugating the Jones matrix changes no intensity): the fit must say so.
    rng = np.random.default_rng(12)
    truth = AnalyzerModel(half_wave_plate=PlateModel(178.5, -0.2), splitter_extinction=1e-3)
    believed = AnalyzerModel(half_wave_plate=PlateModel(180.0, 0.0), splitter_extinction=1e-3)
    fit = cal.fit_plate_scan(synthetic_scan(truth, PBS_PORTS, "half_wave_plate", rng), believed, PBS_PORTS)
    assert any("sign of its error" in n for n in fit.notes)
    assert abs(abs(fit.value(cal.HWP_RETARDANCE) - 180.0) - 1.5) < 0.2
    assert fit.std_of(cal.HWP_RETARDANCE) >= 1.4


def test_gains_are_linked_only_through_scans_that_move_light_between_ports() -> None:
    ports = tuple(PortModel(f"pm_{s}{p}", s, p) for s in "hv" for p in "HV")
    s, dark = settings_of_scan("half_wave_plate")
    plate = cal.ScanReadings("p", "half_wave_plate", s, np.zeros((len(s), 4)), dark)
    rotator = cal.ScanReadings("r", "image_rotator", settings_of_scan("image_rotator")[0], np.zeros((len(s), 4)), dark)
    assert cal.gain_ports([plate], ports) == (1,)
    assert cal.gain_ports([rotator], ports) == (2,)
    assert cal.gain_ports([plate, rotator], ports) == (1, 2, 3)


def test_prepare_scan_divides_out_drift_seen_by_the_reference() -> None:
    drift = 1.0 + 0.05 * np.sin(np.linspace(0, 3, 6))
    kind = np.array(["background", "measure", "measure", "measure", "measure", "background"])
    values = np.outer(drift, [2e-4, 1e-4])
    values[kind == "background"] = 1e-9
    reference = np.where(kind == "background", 1e-10, 1e-5 * drift)
    settings = park_settings(6)
    scan = cal.prepare_scan("d", "half_wave_plate", kind, settings, settings, values, reference)
    light = scan.values[~scan.dark]
    assert np.allclose(light / light[0], 1.0)
    assert np.allclose(scan.values[scan.dark], 1e-9)


def test_too_few_readings_for_the_parameters_is_an_input_error() -> None:
    s, dark = settings_of_scan("half_wave_plate", step_deg=90.0, repeats=1, n_dark=0)
    scan = cal.ScanReadings("tiny", "half_wave_plate", s, np.full((len(s), 2), 1e-4), dark)
    with pytest.raises(InputError, match="cannot determine"):
        cal.fit_calibration([scan], NOMINAL_PLATES, PBS_PORTS)
