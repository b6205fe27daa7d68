"""Stability figures: the Allan deviation through allantools against a published example and a closed form."""

from __future__ import annotations

import numpy as np
import pytest

from lightloom.sequencer.analysis.stability import overlapping_allan, series_stability


def test_overlapping_allan_matches_the_published_nine_point_example() -> None:
    # W. J. Riley, "The Calculation of Time Domain Frequency Stability" (test suite, also in NIST SP
    # 1065, 2008, near p. 107): frequency data 892, 809, 823, 798, 671, 644, 883, 903, 677 give an
    # overlapping Allan deviation of 91.22945 at tau = 1 and 85.95287 at tau = 2 (values as quoted
    # in the allantools test suite, tests/nbs14).
    y = np.array([892.0, 809.0, 823.0, 798.0, 671.0, 644.0, 883.0, 903.0, 677.0])
    taus, dev, _ = overlapping_allan(y, 1.0)
    assert taus[:2] == pytest.approx([1.0, 2.0])
    assert dev[:2] == pytest.approx([91.22945, 85.95287], rel=1e-5)


def test_white_noise_allan_deviation_falls_as_inverse_square_root_of_tau() -> None:
    # Closed form: for uncorrelated readings of standard deviation s taken every tau0, the Allan
    # variance at tau = m tau0 is s^2 / m, so sigma(tau) = s (tau0 / tau)^(1/2) (NIST SP 1065,
    # Riley 2008, sec. 5.2.2 and table of power-law slopes: white FM, mu = -1; from memory).
    rng = np.random.default_rng(7)
    s, tau0 = 1e-3, 0.5
    y = 1.0 + s * rng.standard_normal(2**15)
    taus, dev, err = overlapping_allan(y, tau0)
    expected = s * np.sqrt(tau0 / taus)
    short = taus <= 64 * tau0  # many independent samples: a few per cent scatter
    assert np.all(np.abs(dev[short] / expected[short] - 1.0) < 0.06)
    slope = np.polyfit(np.log(taus[short]), np.log(dev[short]), 1)[0]
    assert slope == pytest.approx(-0.5, abs=0.03)
    assert np.all(err > 0)


def test_linear_drift_is_found_per_hour_with_its_standard_error() -> None:
    rng = np.random.default_rng(3)
    t = 1.7e9 + np.arange(0.0, 7200.0, 2.0)  # two hours, a reading every 2 s
    drift = 0.01  # +1 % per hour
    v = 2e-3 * (1.0 + drift * (t - t[0]) / 3600.0) * (1.0 + 1e-3 * rng.standard_normal(t.size))
    s = series_stability("pm", "W", t, v)
    assert s is not None
    # the relative slope is per hour relative to the mean, which is 1 % higher than the start
    assert abs(s.drift_per_hour - drift / 1.01) < 4 * s.drift_per_hour_std
    assert s.drift_per_hour_std < 2e-4
    assert s.mean == pytest.approx(2e-3 * 1.01, rel=1e-3)
    assert s.tau0_s == pytest.approx(2.0)
    # drift makes the Allan deviation rise again at long tau
    assert s.allan_deviation[-1] > s.allan_deviation.min() * 2


def test_several_settings_give_one_relative_series_per_port() -> None:
    t = np.arange(40.0)
    groups = np.tile([0, 1], 20)
    v = np.where(groups == 0, 1.0, 5.0) * (1.0 + 1e-3 * np.sin(t))
    s = series_stability("pm", "W", t, v, groups)
    assert s is not None
    assert np.all(np.abs(s.relative - 1.0) < 2e-3)


def test_too_few_readings_give_no_figures() -> None:
    assert series_stability("pm", "W", np.arange(3.0), np.ones(3)) is None
