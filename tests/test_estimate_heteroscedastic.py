"""Gaussian maximum likelihood on badly conditioned, heteroscedastic power readings of a near-pure state."""

from __future__ import annotations

import warnings

import cvxpy as cp
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lightloom.sequencer.analysis.estimate import mle_gaussian, mle_gaussian_batch, parametric_bootstrap
from lightloom.sequencer.analysis.estimate import merit
from lightloom.sequencer.analysis.estimate.apg import GaussianProblem, solve_gaussian
from lightloom.sequencer.analysis.estimate.hermitian import to_vector

R2 = 1 / np.sqrt(2)
KETS = [np.array(k, dtype=complex) for k in ([1, 0], [0, 1], [R2, R2], [R2, -R2], [R2, 1j * R2], [R2, -1j * R2])]
OTHER_PORT = [1, 0, 3, 2, 5, 4]  # H<->V, D<->A, R<->L: the second port of each polarization analyzer


def projector(ket: np.ndarray) -> np.ndarray:
    return np.outer(ket, ket.conj())


# the joint 36 settings, each read at both ports of the polarization analyzer: 72 readings
JOINT36_TWO_PORTS = np.array(
    [projector(np.kron(KETS[p], KETS[s])) for p in range(6) for s in range(6)]
    + [projector(np.kron(KETS[OTHER_PORT[p]], KETS[s])) for p in range(6) for s in range(6)]
)
POWER_W = 5e-4
OFFSET_NOISE_W = 5e-9
RELATIVE_NOISE = 2e-3


def predicted(operators: np.ndarray, t: np.ndarray) -> np.ndarray:
    return np.real(np.einsum("nij,ji->n", operators, t))


def spread(mean_w: np.ndarray) -> np.ndarray:
    # power-meter noise: an offset floor and a part proportional to the reading (common practice, no source)
    return np.sqrt(OFFSET_NOISE_W**2 + (RELATIVE_NOISE * mean_w) ** 2)


def near_pure_readings(seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Readings (W) of a random pure state at 0.5 mW, and their spreads: readings span ~4 decades."""
    rng = np.random.default_rng(seed)
    ket = rng.normal(size=4) + 1j * rng.normal(size=4)
    ket /= np.linalg.norm(ket)
    mean = POWER_W * predicted(JOINT36_TWO_PORTS, projector(ket))
    sigma = spread(mean)
    return mean + sigma * rng.standard_normal(mean.size), sigma


VALUES, SIGMA = near_pure_readings(4)


def log_likelihood(t: np.ndarray, values: np.ndarray, sigma: np.ndarray) -> float:
    return float(-0.5 * np.sum(((values - predicted(JOINT36_TWO_PORTS, t)) / sigma) ** 2))


def cvxpy_log_likelihood(values: np.ndarray, sigma: np.ndarray) -> float:
    # reference optimum: cvxpy with CLARABEL at tight tolerances, on readings and spreads scaled to O(1)
    scale = float(np.max(np.abs(values)))
    v, s = values / scale, sigma / scale
    n = len(v)
    x = cp.Variable((4, 4), hermitian=True)
    mu = cp.real(JOINT36_TWO_PORTS.transpose(0, 2, 1).reshape(n, 16) @ cp.vec(x, order="C"))
    problem = cp.Problem(cp.Minimize(cp.sum_squares(cp.multiply(1 / s, mu - v))), [x >> 0])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        problem.solve(solver="CLARABEL", tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10, max_iter=400)
    w, u = np.linalg.eigh((x.value + x.value.conj().T) / 2)
    return log_likelihood(scale * (u * np.maximum(w, 0)) @ u.conj().T, values, sigma)


def test_the_readings_are_badly_conditioned():
    # the premise of this file: weights 1 / sigma^2 spread over decades, so H is far from a multiple of 1
    design = to_vector(JOINT36_TWO_PORTS)
    hess = design.T @ (design / SIGMA[:, None] ** 2)
    eigenvalues = np.linalg.eigvalsh(hess)
    assert np.max(SIGMA) / np.min(SIGMA) > 100
    assert eigenvalues[-1] / eigenvalues[0] > 1e3


def test_fit_is_certified_and_at_least_as_likely_as_cvxpys():
    fit = mle_gaussian(JOINT36_TWO_PORTS, VALUES, SIGMA)
    assert fit.converged
    assert fit.certified_gap <= 1e-6
    assert fit.log_likelihood >= cvxpy_log_likelihood(VALUES, SIGMA) - 1e-6
    # the reported log-likelihood is the objective at the returned T = N rho
    assert fit.log_likelihood == pytest.approx(log_likelihood(fit.intensity * fit.rho, VALUES, SIGMA), abs=1e-8)


def test_fit_takes_few_steps():
    # a fixed-step projected gradient needs thousands of steps here (its rate follows the conditioning)
    fit = mle_gaussian(JOINT36_TWO_PORTS, VALUES, SIGMA)
    assert fit.converged
    assert fit.iterations < 100


def test_certificate_after_one_step_bounds_what_cvxpy_finds_above_us():
    rough = mle_gaussian(JOINT36_TWO_PORTS, VALUES, SIGMA, max_iterations=1)
    assert cvxpy_log_likelihood(VALUES, SIGMA) <= rough.log_likelihood + rough.certified_gap + 1e-9


def replicates(count: int, seed: int) -> np.ndarray:
    fit = mle_gaussian(JOINT36_TWO_PORTS, VALUES, SIGMA)
    expected = predicted(JOINT36_TWO_PORTS, fit.intensity * fit.rho)
    return expected + SIGMA * np.random.default_rng(seed).standard_normal((count, expected.size))


def test_batch_of_replicates_matches_one_at_a_time():
    many = replicates(8, 5)
    batch = mle_gaussian_batch(JOINT36_TWO_PORTS, many, SIGMA, tol=1e-9)
    assert batch.converged.all()
    for i in range(len(many)):
        one = mle_gaussian(JOINT36_TWO_PORTS, many[i], SIGMA, tol=1e-9)
        assert batch.log_likelihood[i] == pytest.approx(one.log_likelihood, abs=1e-8)
        assert np.max(np.abs(batch.rho[i] - one.rho)) < 1e-6


def test_batch_of_replicates_is_certified_in_few_steps_at_the_bootstrap_tolerance():
    batch = mle_gaussian_batch(JOINT36_TWO_PORTS, replicates(100, 6), SIGMA, tol=1e-3)
    assert batch.converged.all()
    assert batch.certified_gap.max() <= 1e-3
    assert batch.iterations.max() < 100


def test_gaussian_bootstrap_certifies_every_replicate():
    result = parametric_bootstrap(JOINT36_TWO_PORTS, VALUES, {"purity": merit.purity}, rng=np.random.default_rng(7),
                                  sigma=SIGMA, model="gaussian", n_resamples=40, tol=1e-3)
    assert result.n_converged == 40


def test_fit_of_noise_free_readings_of_a_pure_state_is_that_state():
    rng = np.random.default_rng(11)
    ket = rng.normal(size=4) + 1j * rng.normal(size=4)
    ket /= np.linalg.norm(ket)
    exact = POWER_W * predicted(JOINT36_TWO_PORTS, projector(ket))
    fit = mle_gaussian(JOINT36_TWO_PORTS, exact, spread(exact))
    assert fit.converged
    assert np.max(np.abs(fit.rho - projector(ket))) < 1e-6
    assert fit.intensity == pytest.approx(POWER_W, rel=1e-6)


def scaled_problem(values: np.ndarray, sigma: np.ndarray) -> tuple[GaussianProblem, np.ndarray]:
    scale = float(np.max(np.abs(values)))
    design = to_vector(JOINT36_TWO_PORTS)
    weights = (scale / sigma) ** 2
    hess = design.T @ (design * weights[:, None])
    problem = GaussianProblem(design=design, weights=weights, hess=hess, hess_inv=np.linalg.inv(hess))
    return problem, values[None, :] / scale


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), rank=st.integers(1, 4))
def test_certificate_bounds_the_gap_at_any_positive_point(seed, rank):
    # Lagrange duality: every multiplier the certificate tries gives a bound above (q(x) - min q) / 2
    problem, v = scaled_problem(VALUES, SIGMA)
    best = mle_gaussian(JOINT36_TWO_PORTS, VALUES, SIGMA, tol=1e-10)
    q_best = -2.0 * best.log_likelihood
    rng = np.random.default_rng(seed)
    factor = rng.normal(size=(4, rank)) + 1j * rng.normal(size=(4, rank))
    t = best.intensity * best.rho / np.max(np.abs(VALUES))
    t = t + 10.0 ** rng.uniform(-8, -1) * factor @ factor.conj().T
    x = to_vector(t)[None, :]
    bound = problem.certificate(x, problem.gradient(x, v))[0]
    assert 0.5 * (problem.chi_squared(x, v)[0] - q_best) <= bound + 1e-9


def test_projected_gradient_finisher_reaches_the_certified_optimum():
    # the finisher for data sets on which the interior-point solver stalls, run here on its own
    problem, v = scaled_problem(VALUES, SIGMA)
    fit = mle_gaussian(JOINT36_TWO_PORTS, VALUES, SIGMA, tol=1e-9)
    x_fit = to_vector(fit.intensity * fit.rho / np.max(np.abs(VALUES)))[None, :]
    start = x_fit + 1e-3 * to_vector(np.eye(4))[None, :]
    finished = solve_gaussian(problem, v, start, 1e-3, 20000)
    assert finished.gap[0] <= 1e-3
    assert -0.5 * problem.chi_squared(finished.x, v)[0] >= fit.log_likelihood - 1e-3
