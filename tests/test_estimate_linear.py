"""Linear inversion and the projections onto density matrices and onto the positive cone."""

from __future__ import annotations

import warnings

import cvxpy as cp
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lightloom.sequencer.analysis.estimate import EstimationError, closest_density_matrix, closest_positive, linear_inversion
from lightloom.sequencer.analysis.estimate.linear import linear_inversion_batch

R2 = 1 / np.sqrt(2)
# Kets written out here on purpose, independent of sequencer.optics.
POL = {"H": [1, 0], "V": [0, 1], "D": [R2, R2], "A": [R2, -R2], "R": [R2, 1j * R2], "L": [R2, -1j * R2]}
SPATIAL = {"h": [1, 0], "v": [0, 1], "d": [R2, R2], "a": [R2, -R2], "l+": [R2, 1j * R2], "l-": [R2, -1j * R2]}


def projector(ket) -> np.ndarray:
    k = np.asarray(ket, dtype=complex)
    return np.outer(k, k.conj())


def joint_set(pol_names, spatial_names) -> np.ndarray:
    return np.array([projector(np.kron(POL[p], SPATIAL[s])) for p in pol_names for s in spatial_names])


def random_state(d: int, rng: np.random.Generator, rank: int | None = None) -> np.ndarray:
    g = rng.normal(size=(d, rank or d)) + 1j * rng.normal(size=(d, rank or d))
    rho = g @ g.conj().T
    return rho / np.trace(rho).real


def exact_readings(operators: np.ndarray, rho: np.ndarray, intensity: float) -> np.ndarray:
    return intensity * np.real(np.einsum("nij,ji->n", operators, rho))


SETS = {
    # James, Kwiat, Munro, White, PRA 64, 052312 (2001): the 16 products of H, V, D, R (spatial analogues)
    "joint16": joint_set("HVDR", ["h", "v", "d", "l+"]),
    "joint36": joint_set("HVDARL", ["h", "v", "d", "a", "l+", "l-"]),
    "single4": np.array([projector(POL[n]) for n in "HVDR"]),
    "single6": np.array([projector(POL[n]) for n in "HVDARL"]),
    # d = 8: all products of three six-state analyzers
    "triple216": np.array(
        [projector(np.kron(np.kron(POL[a], POL[b]), POL[c])) for a in "HVDARL" for b in "HVDARL" for c in "HVDARL"]
    ),
}


@pytest.mark.parametrize("name", sorted(SETS))
def test_linear_inversion_reproduces_state_from_exact_probabilities(name):
    # James, Kwiat, Munro, White, PRA 64, 052312 (2001): exact data invert exactly for these sets
    ops = SETS[name]
    rng = np.random.default_rng(11)
    for rank in (1, ops.shape[1]):
        rho = random_state(ops.shape[1], rng, rank)
        est = linear_inversion(ops, exact_readings(ops, rho, 1.0))
        assert np.max(np.abs(est.rho - rho)) < 1e-10


def test_linear_inversion_returns_the_intensity_of_unnormalised_readings():
    ops = SETS["joint36"]
    rho = random_state(4, np.random.default_rng(2))
    est = linear_inversion(ops, exact_readings(ops, rho, 2.5e-6))
    assert est.intensity == pytest.approx(2.5e-6, rel=1e-10)
    assert np.max(np.abs(est.rho - rho)) < 1e-10


def test_linear_inversion_weighted_by_sigma_is_exact_on_exact_data():
    ops = SETS["joint16"]
    rho = random_state(4, np.random.default_rng(3))
    sigma = np.linspace(0.5, 3.0, 16)
    est = linear_inversion(ops, exact_readings(ops, rho, 10.0), sigma)
    assert np.max(np.abs(est.rho - rho)) < 1e-10


def test_linear_inversion_batch_matches_one_at_a_time():
    ops = SETS["single6"]
    rng = np.random.default_rng(4)
    values = rng.uniform(10, 100, size=(5, 6))
    batch = linear_inversion_batch(ops, values)
    for i in range(5):
        assert np.allclose(batch.rho[i], linear_inversion(ops, values[i]).rho, atol=1e-13)


def test_linear_inversion_rejects_an_incomplete_set():
    ops = np.array([projector(POL[n]) for n in "HVD"])
    with pytest.raises(EstimationError, match="informationally complete"):
        linear_inversion(ops, [1.0, 1.0, 1.0])


def test_linear_inversion_rejects_readings_of_the_wrong_length():
    with pytest.raises(EstimationError, match="one entry per measurement operator"):
        linear_inversion(SETS["single4"], [1.0, 2.0, 3.0])


def test_closest_density_matrix_reproduces_the_published_example():
    # Smolin, Gambetta, Smith, PRL 108, 070502 (2012), worked example (from memory):
    # eigenvalues 3/5, 1/2, 7/20, 1/10, -11/20 -> 9/20, 7/20, 1/5, 0, 0
    rng = np.random.default_rng(5)
    q, _ = np.linalg.qr(rng.normal(size=(5, 5)) + 1j * rng.normal(size=(5, 5)))
    mu = (q * np.array([3 / 5, 1 / 2, 7 / 20, 1 / 10, -11 / 20])) @ q.conj().T
    rho = closest_density_matrix(mu)
    assert np.allclose(np.linalg.eigvalsh(rho)[::-1], [9 / 20, 7 / 20, 1 / 5, 0, 0], atol=1e-12)
    assert np.allclose(rho @ q[:, 0], (9 / 20) * q[:, 0], atol=1e-12)


def test_closest_density_matrix_agrees_with_a_convex_solver():
    # reference: the same Frobenius-norm projection solved by cvxpy (CLARABEL)
    rng = np.random.default_rng(6)
    for _ in range(3):
        a = rng.normal(size=(4, 4)) + 1j * rng.normal(size=(4, 4))
        mu = (a + a.conj().T) / 4 + np.eye(4) / 4
        x = cp.Variable((4, 4), hermitian=True)
        problem = cp.Problem(cp.Minimize(cp.sum_squares(x - mu)), [x >> 0, cp.real(cp.trace(x)) == 1])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            problem.solve(solver="CLARABEL", tol_gap_abs=1e-9, tol_gap_rel=1e-9, tol_feas=1e-9)
        assert np.max(np.abs(closest_density_matrix(mu) - x.value)) < 1e-6


@settings(max_examples=40, deadline=None)
@given(
    d=st.sampled_from([2, 4, 8]),
    seed=st.integers(0, 2**32 - 1),
    scale=st.floats(1e-3, 1e3),
)
def test_closest_density_matrix_is_a_density_matrix_no_farther_than_any_other(d, seed, scale):
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))
    mu = scale * (a + a.conj().T)
    rho = closest_density_matrix(mu)
    assert np.allclose(rho, rho.conj().T, atol=1e-12)
    assert np.linalg.eigvalsh(rho)[0] > -1e-12
    assert np.trace(rho).real == pytest.approx(1.0, abs=1e-12)
    # no random density matrix is closer to mu than the projection
    others = [random_state(d, rng, r) for r in (1, d)]
    best = np.linalg.norm(rho - mu)
    assert all(np.linalg.norm(o - mu) >= best - 1e-9 * max(1.0, best) for o in others)


@settings(max_examples=30, deadline=None)
@given(d=st.sampled_from([2, 4]), seed=st.integers(0, 2**32 - 1))
def test_closest_density_matrix_leaves_a_density_matrix_unchanged(d, seed):
    rho = random_state(d, np.random.default_rng(seed), rank=1 + seed % d)
    assert np.max(np.abs(closest_density_matrix(rho) - rho)) < 1e-12


def test_closest_positive_clips_negative_eigenvalues_only():
    # Higham, Linear Algebra Appl. 103, 103 (1988): nearest PSD matrix in Frobenius norm
    rng = np.random.default_rng(7)
    q, _ = np.linalg.qr(rng.normal(size=(3, 3)) + 1j * rng.normal(size=(3, 3)))
    m = (q * np.array([2.0, -1.0, 0.5])) @ q.conj().T
    assert np.allclose(closest_positive(m), (q * np.array([2.0, 0.0, 0.5])) @ q.conj().T, atol=1e-12)
