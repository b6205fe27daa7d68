"""Maximum-likelihood estimators: optimality against cvxpy, honest certificates, exact recovery, physical output."""

from __future__ import annotations

import warnings

import cvxpy as cp
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lightloom.sequencer.analysis.estimate import (
    EstimationError,
    mle_gaussian,
    mle_gaussian_batch,
    mle_poisson,
    mle_poisson_batch,
    predicted_readings,
)

R2 = 1 / np.sqrt(2)
KETS = [[1, 0], [0, 1], [R2, R2], [R2, -R2], [R2, 1j * R2], [R2, -1j * R2]]  # H V D A R L


def projector(ket) -> np.ndarray:
    k = np.asarray(ket, dtype=complex)
    return np.outer(k, k.conj())


SINGLE6 = np.array([projector(k) for k in KETS])
JOINT36 = np.array([projector(np.kron(a, b)) for a in KETS for b in KETS])
JOINT16 = np.array([projector(np.kron(KETS[a], KETS[b])) for a in (0, 1, 2, 4) for b in (0, 1, 2, 4)])
TRIPLE216 = np.array([projector(np.kron(np.kron(a, b), c)) for a in KETS for b in KETS for c in KETS])


def random_state(d: int, rng: np.random.Generator, rank: int | None = None) -> np.ndarray:
    g = rng.normal(size=(d, rank or d)) + 1j * rng.normal(size=(d, rank or d))
    rho = g @ g.conj().T
    return rho / np.trace(rho).real


def probabilities(operators: np.ndarray, t: np.ndarray) -> np.ndarray:
    return np.real(np.einsum("nij,ji->n", operators, t))


def poisson_log_likelihood(operators, t, counts) -> float:
    mu = probabilities(operators, t)
    used = counts > 0
    return float(np.sum(counts[used] * np.log(mu[used])) - np.sum(mu))


def gaussian_log_likelihood(operators, t, values, sigma) -> float:
    return float(-0.5 * np.sum(((values - probabilities(operators, t)) / sigma) ** 2))


def psd_part(m: np.ndarray) -> np.ndarray:
    w, v = np.linalg.eigh((m + m.conj().T) / 2)
    return (v * np.maximum(w, 0)) @ v.conj().T


def cvxpy_poisson(operators, counts) -> np.ndarray:
    n, d, _ = operators.shape
    x = cp.Variable((d, d), hermitian=True)
    mu = cp.real(operators.transpose(0, 2, 1).reshape(n, d * d) @ cp.vec(x, order="C"))
    objective = cp.sum(cp.multiply(counts, cp.log(mu))) - cp.real(cp.trace(operators.sum(0) @ x))
    problem = cp.Problem(cp.Maximize(objective), [x >> 0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        problem.solve(solver="CLARABEL", tol_gap_abs=1e-9, tol_gap_rel=1e-9, tol_feas=1e-9, max_iter=400)
    return psd_part(x.value)


def cvxpy_gaussian(operators, values, sigma) -> np.ndarray:
    # readings and spreads scaled together to O(1) (chi^2 unchanged): the conic solver fails on W-sized numbers
    scale = float(np.max(np.abs(values)))
    values, sigma = values / scale, sigma / scale
    n, d, _ = operators.shape
    x = cp.Variable((d, d), hermitian=True)
    mu = cp.real(operators.transpose(0, 2, 1).reshape(n, d * d) @ cp.vec(x, order="C"))
    problem = cp.Problem(cp.Minimize(cp.sum_squares(cp.multiply(1 / sigma, mu - values))), [x >> 0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        problem.solve(solver="CLARABEL", tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10, max_iter=400)
    return scale * psd_part(x.value)


def poisson_cases():
    # (operators, counts) with true states of full and of low rank, so that some optima lie on the boundary
    rng = np.random.default_rng(2024)
    cases = []
    for ops, per_setting in ((SINGLE6, 40), (JOINT16, 60), (JOINT36, 30)):
        d = ops.shape[1]
        for rank in (1, d):
            rho = random_state(d, rng, rank)
            cases.append((ops, rng.poisson(per_setting * d * probabilities(ops, rho)).astype(float)))
    return cases


POISSON_CASES = poisson_cases()


@pytest.mark.parametrize("case", range(len(POISSON_CASES)))
def test_poisson_mle_log_likelihood_is_at_least_cvxpys(case):
    # reference optimum: cvxpy with CLARABEL at tight tolerances (exponential and PSD cones)
    ops, counts = POISSON_CASES[case]
    ours = mle_poisson(ops, counts)
    t_ref = cvxpy_poisson(ops, counts)
    assert ours.converged
    assert ours.log_likelihood >= poisson_log_likelihood(ops, t_ref, counts) - 1e-6
    # the reported log-likelihood is the objective evaluated at the returned T = N rho
    assert ours.log_likelihood == pytest.approx(
        poisson_log_likelihood(ops, ours.intensity * ours.rho, counts), abs=1e-8
    )


@pytest.mark.parametrize("case", range(len(POISSON_CASES)))
def test_poisson_certified_gap_bounds_what_cvxpy_finds_above_us(case):
    ops, counts = POISSON_CASES[case]
    rough = mle_poisson(ops, counts, max_iterations=3)
    t_ref = cvxpy_poisson(ops, counts)
    # any feasible point, cvxpy's included, lies at most certified_gap above the estimate
    assert poisson_log_likelihood(ops, t_ref, counts) <= rough.log_likelihood + rough.certified_gap + 1e-9
    assert rough.certified_gap > 0


def gaussian_cases():
    rng = np.random.default_rng(77)
    cases = []
    for ops in (SINGLE6, JOINT36):
        d = ops.shape[1]
        for rank in (1, d):
            truth = 3e-6 * random_state(d, rng, rank)
            sigma = 2e-8 * (1 + rng.uniform(size=len(ops)))
            values = probabilities(ops, truth) + sigma * rng.standard_normal(len(ops))
            cases.append((ops, values, sigma))
    return cases


GAUSSIAN_CASES = gaussian_cases()


@pytest.mark.parametrize("case", range(len(GAUSSIAN_CASES)))
def test_gaussian_mle_log_likelihood_is_at_least_cvxpys(case):
    # reference optimum: cvxpy with CLARABEL at tight tolerances
    ops, values, sigma = GAUSSIAN_CASES[case]
    ours = mle_gaussian(ops, values, sigma)
    t_ref = cvxpy_gaussian(ops, values, sigma)
    assert ours.converged
    assert ours.log_likelihood >= gaussian_log_likelihood(ops, t_ref, values, sigma) - 1e-6
    assert ours.log_likelihood == pytest.approx(
        gaussian_log_likelihood(ops, ours.intensity * ours.rho, values, sigma), abs=1e-8
    )


@pytest.mark.parametrize("case", range(len(GAUSSIAN_CASES)))
def test_gaussian_certified_gap_bounds_what_cvxpy_finds_above_us(case):
    ops, values, sigma = GAUSSIAN_CASES[case]
    rough = mle_gaussian(ops, values, sigma, max_iterations=2)
    t_ref = cvxpy_gaussian(ops, values, sigma)
    assert gaussian_log_likelihood(ops, t_ref, values, sigma) <= rough.log_likelihood + rough.certified_gap + 1e-9


def test_unconverged_result_says_so():
    ops, counts = POISSON_CASES[-1]
    result = mle_poisson(ops, counts, max_iterations=1, tol=1e-9)
    assert result.iterations == 1
    assert not result.converged
    assert result.certified_gap > 1e-9


@pytest.mark.parametrize(
    "ops", [SINGLE6, JOINT16, JOINT36, TRIPLE216], ids=["single6", "joint16", "joint36", "d8_216"]
)
@pytest.mark.parametrize("rank", [1, 2, 4])
def test_poisson_mle_of_noise_free_data_reproduces_the_state(ops, rank):
    d = ops.shape[1]
    rho = random_state(d, np.random.default_rng(rank), min(rank, d))
    result = mle_poisson(ops, 5000.0 * probabilities(ops, rho))
    assert result.converged
    assert np.max(np.abs(result.rho - rho)) < 1e-6
    assert result.intensity == pytest.approx(5000.0, rel=1e-6)


def test_poisson_mle_recovers_the_state_through_imperfect_unbalanced_operators():
    # port gains and finite extinction: the operators no longer sum to a multiple of the identity
    rng = np.random.default_rng(9)
    gains = rng.uniform(0.6, 1.4, size=len(JOINT36))
    leak = 0.02
    ops = gains[:, None, None] * ((1 - leak) * JOINT36 + leak * (np.eye(4) - JOINT36) / 3)
    rho = random_state(4, rng, 2)
    result = mle_poisson(ops, 1e4 * probabilities(ops, rho))
    assert np.max(np.abs(result.rho - rho)) < 1e-6
    assert result.intensity == pytest.approx(1e4, rel=1e-6)


def test_poisson_mle_fit_predicts_the_total_count():
    # at the optimum over the intensity, tr(T G) = n_tot (stationarity in the scale of T)
    ops, counts = POISSON_CASES[2]
    fit = mle_poisson(ops, counts)
    assert predicted_readings(ops, fit).sum() == pytest.approx(counts.sum(), rel=1e-9)


def test_gaussian_mle_of_noise_free_data_reproduces_the_state():
    rho = random_state(4, np.random.default_rng(5), 1)
    sigma = np.full(36, 1e-9)
    result = mle_gaussian(JOINT36, 2e-6 * probabilities(JOINT36, rho), sigma)
    assert np.max(np.abs(result.rho - rho)) < 1e-6
    assert result.intensity == pytest.approx(2e-6, rel=1e-6)


def test_poisson_batch_matches_one_at_a_time():
    rng = np.random.default_rng(12)
    rho = random_state(4, rng, 2)
    counts = rng.poisson(50 * probabilities(JOINT36, rho), size=(6, 36)).astype(float)
    batch = mle_poisson_batch(JOINT36, counts, tol=1e-9)
    for i in range(6):
        one = mle_poisson(JOINT36, counts[i], tol=1e-9)
        assert batch.item(i).log_likelihood == pytest.approx(one.log_likelihood, abs=1e-8)
        assert np.max(np.abs(batch.rho[i] - one.rho)) < 1e-5


def test_gaussian_batch_matches_one_at_a_time():
    rng = np.random.default_rng(13)
    ops, values, sigma = GAUSSIAN_CASES[3]
    many = values[None, :] + sigma[None, :] * rng.standard_normal((4, len(values)))
    batch = mle_gaussian_batch(ops, many, sigma, tol=1e-9)
    for i in range(4):
        one = mle_gaussian(ops, many[i], sigma, tol=1e-9)
        assert batch.log_likelihood[i] == pytest.approx(one.log_likelihood, abs=1e-8)


def random_operators(rng: np.random.Generator, d: int, n: int) -> np.ndarray:
    b = rng.normal(size=(n, d, 2)) + 1j * rng.normal(size=(n, d, 2))
    return b @ np.conj(np.swapaxes(b, -1, -2)) * rng.uniform(0.1, 2.0, size=(n, 1, 1))


def assert_density_matrix(rho: np.ndarray) -> None:
    assert np.allclose(rho, rho.conj().T, atol=1e-12)
    assert np.linalg.eigvalsh(rho)[0] >= -1e-10
    assert np.trace(rho).real == pytest.approx(1.0, abs=1e-10)


@settings(max_examples=15, deadline=None)
@given(d=st.sampled_from([2, 4, 8]), seed=st.integers(0, 2**32 - 1), extra=st.integers(0, 20))
def test_poisson_mle_always_returns_a_density_matrix(d, seed, extra):
    rng = np.random.default_rng(seed)
    ops = random_operators(rng, d, d * d + extra)
    counts = rng.poisson(rng.uniform(0, 30, size=len(ops))).astype(float)
    counts[0] += 1
    result = mle_poisson(ops, counts, max_iterations=200)
    assert_density_matrix(result.rho)
    assert result.intensity > 0


@settings(max_examples=15, deadline=None)
@given(d=st.sampled_from([2, 4, 8]), seed=st.integers(0, 2**32 - 1), extra=st.integers(0, 20))
def test_gaussian_mle_always_returns_a_density_matrix(d, seed, extra):
    rng = np.random.default_rng(seed)
    ops = random_operators(rng, d, d * d + extra)
    truth = random_state(d, rng, 1 + seed % d)
    sigma = rng.uniform(0.01, 0.2, size=len(ops))
    values = probabilities(ops, truth) + sigma * rng.standard_normal(len(ops))
    result = mle_gaussian(ops, values, sigma, max_iterations=200)
    assert_density_matrix(result.rho)


def test_negative_counts_are_refused_with_advice():
    with pytest.raises(EstimationError, match="gaussian"):
        mle_poisson(SINGLE6, [10, 5, -1, 3, 4, 4])


def test_an_all_zero_count_vector_is_refused():
    with pytest.raises(EstimationError, match="no counts"):
        mle_poisson(SINGLE6, np.zeros(6))


def test_operators_that_never_see_some_state_are_refused():
    ops = np.array([projector([1, 0]), projector([1, 0])])
    with pytest.raises(EstimationError, match="singular"):
        mle_poisson(ops, [3.0, 4.0])


def test_non_positive_operators_are_refused():
    ops = SINGLE6.copy()
    ops[0] = np.diag([1.0, -0.5])
    with pytest.raises(EstimationError, match="positive semidefinite"):
        mle_poisson(ops, np.ones(6))


def test_gaussian_log_likelihood_is_accurate_at_high_signal_to_noise():
    # readings 1e5 sigma above zero: chi^2 must come from residuals, not from a cancelling quadratic form
    rng = np.random.default_rng(21)
    truth = 1e-6 * random_state(4, rng, 2)
    sigma = np.full(36, 2e-12)
    values = probabilities(JOINT36, truth) + sigma * rng.standard_normal(36)
    result = mle_gaussian(JOINT36, values, sigma)
    assert result.log_likelihood == pytest.approx(
        gaussian_log_likelihood(JOINT36, result.intensity * result.rho, values, sigma), abs=1e-7
    )


def test_counts_on_a_zero_operator_are_refused():
    ops = np.concatenate([SINGLE6, np.zeros((1, 2, 2))])
    with pytest.raises(EstimationError, match="operator 6 is zero"):
        mle_poisson(ops, [10, 5, 6, 9, 7, 8, 3])
