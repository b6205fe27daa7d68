"""Simulated power meter and photon counter: light sampling, noise statistics, zero, Poisson counts."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from lightloom.drivers.errors import LimitViolation
from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import SimPhotonCounter, SimPowerMeter, SimShutter

POWER_W = 2.0e-4


def meter(clock: SimClock, seed: int = 1, light=lambda: POWER_W, **kw: float) -> SimPowerMeter:
    return SimPowerMeter("pm_hH", clock, light, np.random.default_rng(seed), **kw)  # type: ignore[arg-type]


def dispersion_p_value(counts: np.ndarray) -> float:
    """Two-sided p-value of the index-of-dispersion test: sum((x - mean)^2) / mean ~ chi2(n - 1) for
    Poisson samples (common practice, no source)."""
    n = counts.size
    statistic = float(np.sum((counts - counts.mean()) ** 2) / counts.mean())
    cdf = float(stats.chi2.cdf(statistic, n - 1))
    return 2 * min(cdf, 1 - cdf)


def test_mean_reading_matches_the_light_within_noise_over_sqrt_n() -> None:
    clock = SimClock(0.0)
    pm = meter(clock, noise_w=1e-6, relative_noise=0.01)
    n = 2000
    readings = np.array([pm.read_power_w(0.1) for _ in range(n)])
    sigma = math.hypot(1e-6, 0.01 * POWER_W) / math.sqrt(0.1)
    assert abs(readings.mean() - POWER_W) < 4 * sigma / math.sqrt(n)


@pytest.mark.parametrize("integration_s", [0.25, 4.0])
def test_reading_spread_matches_configured_noise_scaled_by_integration_time(integration_s: float) -> None:
    clock = SimClock(0.0)
    pm = meter(clock, noise_w=2e-6, relative_noise=0.02)
    readings = np.array([pm.read_power_w(integration_s) for _ in range(4000)])
    expected = math.hypot(2e-6, 0.02 * POWER_W) / math.sqrt(integration_s)
    # The sample std of 4000 Gaussian draws is within ~1.1 % (1/sqrt(2n)) of the truth; 5 % is > 4 sigma.
    assert readings.std(ddof=1) == pytest.approx(expected, rel=0.05)


def test_zero_with_the_shutter_closed_removes_the_offset() -> None:
    clock = SimClock(0.0)
    shutter = SimShutter("shutter", clock, initially_open=True)
    pm = meter(clock, light=lambda: POWER_W if shutter.transmits() else 0.0, offset_w=5e-6, noise_w=1e-9)
    assert pm.read_power_w(1.0) == pytest.approx(POWER_W + 5e-6, abs=1e-8)
    shutter.close_beam()
    pm.zero()
    shutter.open()
    assert pm.read_power_w(1.0) == pytest.approx(POWER_W, abs=1e-8)


def test_zero_with_the_shutter_open_takes_the_beam_as_dark() -> None:
    clock = SimClock(0.0)
    pm = meter(clock, offset_w=5e-6, noise_w=1e-9)
    pm.zero()
    assert pm.read_power_w(1.0) == pytest.approx(0.0, abs=1e-8)


def test_reading_spends_the_integration_time_and_averages_the_light_over_it() -> None:
    clock = SimClock(0.0, start_s=10.0)
    pm = meter(clock, light=lambda: 1e-3 * clock.now())  # a power ramp: its mean is its midpoint value
    value = pm.read_power_w(2.0)
    assert clock.now() == 12.0
    assert value == pytest.approx(1e-3 * 11.0, rel=1e-12)


def test_same_seed_gives_identical_readings() -> None:
    runs = []
    for _ in range(2):
        pm = meter(SimClock(0.0), seed=42, noise_w=1e-6, relative_noise=0.01)
        runs.append([pm.read_power_w(0.1) for _ in range(20)])
    other = meter(SimClock(0.0), seed=43, noise_w=1e-6, relative_noise=0.01)
    assert runs[0] == runs[1]
    assert runs[0] != [other.read_power_w(0.1) for _ in range(20)]


def test_a_set_range_saturates_readings_and_auto_range_does_not() -> None:
    clock = SimClock(0.0)
    pm = meter(clock)
    pm.set_range_w(1e-4)
    assert pm.read_power_w(0.1) == 1e-4
    pm.set_range_w(None)
    assert pm.read_power_w(0.1) == pytest.approx(POWER_W)


def test_wavelength_outside_the_meter_band_is_refused() -> None:
    pm = meter(SimClock(0.0))
    pm.set_wavelength_nm(633.0)
    assert pm.wavelength_nm == 633.0
    with pytest.raises(LimitViolation, match="wavelength"):
        pm.set_wavelength_nm(2000.0)


def test_non_positive_integration_time_is_refused() -> None:
    with pytest.raises(LimitViolation, match="integration time"):
        meter(SimClock(0.0)).read_power_w(0.0)


def counter(clock: SimClock, seed: int = 3, **kw: float) -> SimPhotonCounter:
    params = dict(counts_per_w=1e6, dark_counts_per_s=50.0)
    params.update(kw)
    return SimPhotonCounter("apd_h", clock, lambda: 1e-4, np.random.default_rng(seed), **params)  # type: ignore[arg-type]


def test_counter_mean_is_efficiency_times_power_times_gate_plus_dark() -> None:
    clock = SimClock(0.0)
    c = counter(clock)
    gate = 0.5
    counts = np.array([c.read_counts(gate) for _ in range(2000)])
    mean = (1e6 * 1e-4 + 50.0) * gate  # 75 counts
    assert abs(counts.mean() - mean) < 4 * math.sqrt(mean / counts.size)
    assert clock.now() == pytest.approx(2000 * gate)


def test_counter_variance_equals_its_mean_as_for_poisson_counts() -> None:
    c = counter(SimClock(0.0))
    counts = np.array([c.read_counts(1.0) for _ in range(4000)], dtype=float)
    assert counts.var(ddof=1) / counts.mean() == pytest.approx(1.0, abs=0.1)
    assert dispersion_p_value(counts) > 1e-3


def test_dispersion_check_rejects_gaussian_counts_of_double_variance() -> None:
    # The same check must fail for counts that are not Poisson (here variance = 2 x mean).
    rng = np.random.default_rng(7)
    fake = np.round(rng.normal(150.0, math.sqrt(300.0), size=4000))
    assert not fake.var(ddof=1) / fake.mean() == pytest.approx(1.0, abs=0.1)
    assert dispersion_p_value(fake) < 1e-3


def test_counter_same_seed_gives_identical_counts() -> None:
    a = counter(SimClock(0.0), seed=9)
    b = counter(SimClock(0.0), seed=9)
    assert [a.read_counts(0.1) for _ in range(50)] == [b.read_counts(0.1) for _ in range(50)]
