"""Bootstrap intervals inside the physical range, drift correction only where informative, and the
errors of the corrections drawn into bootstrap replicates."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import binom

from lightloom.sequencer.analysis.background import BackgroundModel, background_model
from lightloom.sequencer.analysis.drift import fit_drift
from lightloom.sequencer.analysis.intervals import (
    basic_interval, bias_corrected_percentile, figure_bounds, inverted_test_interval, percentile_interval,
    physical_interval,
)
from lightloom.sequencer.analysis.propagation import correction_noise, interpolation_matrix


def test_bias_corrected_percentile_of_symmetric_replicates_is_the_plain_percentile_interval() -> None:
    # Efron and Tibshirani (1993), ch. 14.3: with z0 = 0 (half the replicates below the estimate)
    # the BC interval is the 2.5-97.5 % percentile interval.
    s = np.linspace(-1.0, 1.0, 2001)
    lo, hi = bias_corrected_percentile(0.0, s)
    assert (lo, hi) == pytest.approx(tuple(np.quantile(s, [0.025, 0.975])), abs=2e-3)


def test_bias_corrected_percentile_moves_up_when_the_replicates_lie_below_the_estimate() -> None:
    s = np.linspace(0.0, 1.0, 1001)
    lo, hi = bias_corrected_percentile(0.7, s)  # 70 % below: z0 = 0.524
    z0 = 0.5244
    from scipy.stats import norm

    assert lo == pytest.approx(norm.cdf(2 * z0 - 1.96), abs=2e-3)
    assert hi == pytest.approx(norm.cdf(2 * z0 + 1.96), abs=2e-3)


def test_basic_interval_reflects_the_replicates_about_the_estimate() -> None:
    # Davison and Hinkley (1997), eq. 5.6: [2 t - q(0.975), 2 t - q(0.025)]
    s = np.linspace(0.0, 1.0, 1001)
    assert basic_interval(0.8, s) == pytest.approx((1.6 - 0.975, 1.6 - 0.025))


def test_percentile_interval_is_the_replicates_quantiles() -> None:
    # Efron and Tibshirani (1993), ch. 13.3: [q(0.025), q(0.975)]
    s = np.linspace(0.0, 1.0, 1001)
    assert percentile_interval(s) == pytest.approx((0.025, 0.975))


def test_a_fit_on_the_edge_gets_an_interval_reaching_into_the_state_space() -> None:
    # A nearly pure truth estimated as pure (purity 1): the replicates around the fit lie below it,
    # so the BC and basic intervals both end at 1; the percentile interval reaches down to them.
    s = 1.0 - np.abs(np.linspace(-0.1, 0.1, 401))
    assert bias_corrected_percentile(1.0, s)[0] > 0.99
    assert basic_interval(1.0, s)[0] >= 1.0
    lo, hi = physical_interval(1.0, s, (0.25, 1.0))
    assert lo == pytest.approx(np.quantile(s, 0.025)) and hi == 1.0


def test_without_reaching_in_the_interval_is_the_union_of_the_bc_and_basic_ones() -> None:
    # the rule for a Stokes component: BC (Efron and Tibshirani 1993, ch. 14.3) and basic (Davison
    # and Hinkley 1997, sec. 5.2) only; on skewed replicates the percentile interval differs
    s = np.random.default_rng(3).gamma(2.0, 0.05, 400) - 0.05
    value = 0.02
    bc, basic = bias_corrected_percentile(value, s), basic_interval(value, s)
    lo, hi = physical_interval(value, s, (-1.0, 1.0), reach_in=False)
    assert (lo, hi) == pytest.approx((min(bc[0], basic[0], value), max(bc[1], basic[1], value)))
    assert physical_interval(value, s, (-1.0, 1.0)) != pytest.approx((lo, hi))
    # a fit on the edge: no reaching in
    edge = 1.0 - np.abs(np.linspace(-0.1, 0.1, 401))
    assert physical_interval(1.0, edge, (-1.0, 1.0), reach_in=False)[0] >= 0.99


def test_test_inversion_keeps_the_candidates_whose_replicates_hold_the_estimate() -> None:
    # Neyman's construction (Casella and Berger 2002, sec. 9.2.1) for a normal mean with unit
    # spread: candidates mu, replicates' 95 % range mu +- 1.96; the accepted mu are x +- 1.96.
    mu = np.linspace(-5.0, 5.0, 11)
    q = np.column_stack([mu - 1.96, mu + 1.96])
    lo, hi = inverted_test_interval(0.3, mu, mu, q, fine=10001)
    assert (lo, hi) == pytest.approx((0.3 - 1.96, 0.3 + 1.96), abs=2e-3)
    # a biased estimator (its mean 0.1 below the truth, common practice, no source): the interval
    # moves up by the bias
    lo, hi = inverted_test_interval(0.3, mu, mu, q - 0.1, fine=10001)
    assert (lo, hi) == pytest.approx((0.4 - 1.96, 0.4 + 1.96), abs=2e-3)
    # no candidate holds an estimate far outside them all
    assert inverted_test_interval(50.0, mu, mu, q) is None


def test_physical_interval_stays_in_range_and_holds_the_estimate() -> None:
    rng = np.random.default_rng(0)
    for value, spread in ((0.999, 0.01), (0.001, 0.01), (0.5, 0.2)):
        s = value - 0.003 + spread * rng.standard_normal(300)
        lo, hi = physical_interval(value, s, (0.0, 1.0))
        assert 0.0 <= lo <= value <= hi <= 1.0


def test_a_figure_held_at_its_bound_gets_an_interval_touching_it() -> None:
    lo, hi = physical_interval(0.0, np.zeros(200), (0.0, 1.0))
    assert (lo, hi) == (0.0, 0.0)
    # a separable state's concurrence: estimate 0.001, replicates piling up at 0
    s = np.concatenate([np.zeros(150), np.linspace(0.0, 0.004, 50)])
    lo, hi = physical_interval(0.001, s, (0.0, 1.0))
    assert lo == 0.0 and hi >= 0.001


def test_figure_bounds_name_the_physical_ranges() -> None:
    assert figure_bounds("purity", 4) == (0.25, 1.0)
    assert figure_bounds("concurrence", 4) == (0.0, 1.0)
    assert figure_bounds("stokes_polarization_2", 4) == (-1.0, 1.0)
    # the normalised linear entropy d/(d-1) (1 - tr rho^2) spans [0, 1] (common practice, no source)
    assert figure_bounds("linear_entropy", 2) == figure_bounds("linear_entropy", 4) == (0.0, 1.0)


def test_intervals_cover_a_binomial_probability_at_the_stated_rate() -> None:
    # Parametric bootstrap of p = k / n around the estimate; truth known exactly (common practice,
    # no source). 400 experiments: coverage 0.95 +- 0.011 (binomial standard error).
    rng = np.random.default_rng(11)
    n, p_true, hits, trials = 200, 0.03, 0, 400
    for _ in range(trials):
        p_hat = rng.binomial(n, p_true) / n
        reps = rng.binomial(n, p_hat, size=400) / n
        lo, hi = physical_interval(p_hat, reps, (0.0, 1.0))
        hits += lo <= p_true <= hi
    assert 0.92 <= hits / trials <= 0.99
    assert binom.pmf(0, n, p_true) > 0  # near the bound: zero counts happen (about 0.2 %)


def test_drift_of_pure_noise_is_not_divided_out() -> None:
    rng = np.random.default_rng(2)
    t = 1.7e9 + np.arange(40.0) * 3.0
    ref = 2e-9 + 7e-9 * rng.standard_normal(t.size)  # a 1 % pick-off of 0.2 uW under 7 nW of noise
    model = fit_drift(t, ref, source="pick-off")
    assert not model.applied
    assert np.all(model.factor(t) == 1.0)
    assert model.info["reason"]


def test_an_informative_drift_is_applied_with_its_uncertainty() -> None:
    rng = np.random.default_rng(4)
    t = 1.7e9 + np.arange(60.0) * 5.0
    truth = 1.0 + 0.02 * (t - t.mean()) / (t.max() - t.min())  # 2 % over the run
    ref = 1e-5 * truth * (1.0 + 1e-3 * rng.standard_normal(t.size))
    model = fit_drift(t, ref, source="pick-off")
    assert model.applied and model.info["degree"] >= 1
    f, sd = model.factor(t), model.factor_std(t)
    assert np.all(np.abs(f - truth / truth.mean()) < 4 * sd + 1e-4)
    draws = model.draw_ratios(t, 4000, rng)
    # relative error of the applied factor, drawn: its spread matches the model's std (first order)
    assert np.std(draws[:, 0]) == pytest.approx(sd[0] / f[0], rel=0.2)


def test_background_noise_is_pooled_over_ports() -> None:
    v = np.array([[1.0, 10.0], [3.0, 14.0]])  # per-port variances 2 and 8: pooled sqrt(5)
    assert background_model(np.array([0.0, 1.0]), v).sigma == pytest.approx([np.sqrt(5.0)] * 2)


def test_interpolation_matrix_is_np_interp() -> None:
    knots = np.array([0.0, 10.0, 30.0])
    t = np.array([-5.0, 0.0, 5.0, 10.0, 20.0, 30.0, 40.0])
    w = interpolation_matrix(t, knots).toarray()
    for k in range(3):
        assert w[:, k] == pytest.approx(np.interp(t, knots, np.eye(3)[k]))


def test_background_errors_reach_each_row_with_the_interpolated_spread() -> None:
    # two background readings (t = 0 and 100 s) of noise 5 nW each; a reading at t = 50 s shares
    # half of each: its background error has std 5 / sqrt(2) nW, divided by its gain 0.5.
    bg = BackgroundModel(np.array([0.0, 100.0]), np.array([[1e-9, 2e-9], [3e-9, 1e-9]]), np.array([5e-9, 5e-9]))
    drift = fit_drift(np.array([0.0]), np.array([1.0]), source="none")
    noise = correction_noise(
        flat_times_s=np.array([0.0, 50.0]), flat_ports=np.array([0, 1]), flat_divisor=np.array([1.0, 0.5]),
        flat_rows=np.array([0, 1]), n_rows=2, row_times_s=np.array([0.0, 50.0]), background=bg, drift=drift,
    )
    rng = np.random.default_rng(5)
    draws = noise.perturb(np.zeros((20000, 2)), rng)
    assert np.std(draws[:, 0]) == pytest.approx(5e-9, rel=0.03)
    assert np.std(draws[:, 1]) == pytest.approx(5e-9 / np.sqrt(2) / 0.5, rel=0.03)


def test_spread_model_recovers_absolute_and_relative_noise() -> None:
    # Gaussian readings in pairs with sigma^2 = a^2 + (b x)^2; maximum likelihood on the pairs'
    # chi-square variances (Searle, Casella, McCulloch 1992, ch. 6) recovers a and b.
    from lightloom.sequencer.analysis.spread import fit_spread

    rng = np.random.default_rng(8)
    a, b = 7e-9, 0.01
    means = rng.uniform(0.0, 1e-6, 400)
    x = means[:, None] + np.sqrt(a**2 + (b * means[:, None]) ** 2) * rng.standard_normal((400, 2))
    ss = np.sum((x - x.mean(axis=1, keepdims=True)) ** 2, axis=1)
    a_fit, b_fit = fit_spread(ss, np.ones(400), x.mean(axis=1))
    assert a_fit == pytest.approx(a, rel=0.15)
    assert b_fit == pytest.approx(b, rel=0.15)


def test_spread_model_leaves_out_a_relative_term_the_data_cannot_see() -> None:
    from lightloom.sequencer.analysis.spread import fit_spread

    rng = np.random.default_rng(9)
    a = 7e-9
    means = rng.uniform(0.0, 5e-7, 36)  # 1 uW on four ports: a 0.2 % relative term is 1 nW at most
    x = means[:, None] + np.sqrt(a**2 + (0.002 * means[:, None]) ** 2) * rng.standard_normal((36, 2))
    ss = np.sum((x - x.mean(axis=1, keepdims=True)) ** 2, axis=1)
    a_fit, b_fit = fit_spread(ss, np.ones(36), x.mean(axis=1))
    assert b_fit == 0.0
    assert a_fit == pytest.approx(a, rel=0.3)


def test_rows_chi2_counts_shared_errors_in_the_covariance_on_either_side() -> None:
    # r^T (D + B B^T)^-1 r by a dense solve, against Woodbury's identity (few shared columns) and
    # the direct solve (many shared columns): linear algebra, common practice, no source.
    from scipy import sparse

    from lightloom.sequencer.analysis.pipeline import rows_chi2

    rng = np.random.default_rng(4)
    for n, m in ((30, 6), (8, 40)):
        r = rng.standard_normal(n)
        sigma = 0.5 + rng.random(n)
        b = sparse.random(n, m, density=0.3, random_state=5, format="csr")
        dense = float(r @ np.linalg.solve(np.diag(sigma**2) + (b @ b.T).toarray(), r))
        assert rows_chi2(r, sigma, b) == pytest.approx(dense, rel=1e-10)
        assert rows_chi2(r, sigma, b) < rows_chi2(r, sigma, None)


def test_interval_widening_is_students_t_over_the_normal_quantile() -> None:
    # scipy.stats.t and scipy.stats.norm as the reference (a general-purpose library)
    from scipy.stats import norm, t

    from lightloom.sequencer.analysis.intervals import interval_widening, widened

    for dof in (1, 5, 40, 1000):
        assert interval_widening(dof) == pytest.approx(t.ppf(0.975, dof) / norm.ppf(0.975), rel=1e-10)
    assert interval_widening(0) == 1.0
    assert widened(0.5, (0.4, 0.7), 1.5) == pytest.approx((0.35, 0.8))


def test_a_widened_bootstrap_interval_moves_each_end_away_from_the_estimate_by_the_factor() -> None:
    from lightloom.sequencer.analysis.estimate import parametric_bootstrap

    r2 = 1 / np.sqrt(2)
    kets = [[1, 0], [0, 1], [r2, r2], [r2, -r2], [r2, 1j * r2], [r2, -1j * r2]]
    ops = np.array([np.outer(k, np.conj(k)) for k in np.asarray(kets, dtype=complex)])
    rho = np.array([[0.7, 0.2], [0.2, 0.3]], dtype=complex)
    values = 500.0 * np.real(np.einsum("nij,ji->n", ops, rho))
    s1 = {"s1": lambda r: np.real(r[:, 0, 0] - r[:, 1, 1])}
    plain = parametric_bootstrap(ops, values, s1, rng=np.random.default_rng(2), n_resamples=100, edge=())
    wide = parametric_bootstrap(ops, values, s1, rng=np.random.default_rng(2), n_resamples=100, edge=(), widen=1.2)
    v, (lo, hi) = plain.figures["s1"].value, plain.figures["s1"].interval
    assert wide.figures["s1"].interval == pytest.approx((v - 1.2 * (v - lo), v + 1.2 * (hi - v)))
