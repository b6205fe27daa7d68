"""Figures of merit against qutip, sympy, closed forms and brute-force maximisation."""

from __future__ import annotations

import numpy as np
import pytest
import qutip
from scipy.optimize import minimize
from sympy import I as sym_i
from sympy import Matrix, sqrt
from sympy.physics.optics.polarization import jones_2_stokes

from lightloom.sequencer.analysis.estimate import EstimationError
from lightloom.sequencer.analysis.estimate import merit

R2 = 1 / np.sqrt(2)
H, V = np.array([1, 0]), np.array([0, 1])
SINGLET = np.array([0, 1, -1, 0]) * R2


def random_state(d: int, rng: np.random.Generator, rank: int | None = None) -> np.ndarray:
    g = rng.normal(size=(d, rank or d)) + 1j * rng.normal(size=(d, rank or d))
    rho = g @ g.conj().T
    return rho / np.trace(rho).real


def ket_density(k) -> np.ndarray:
    k = np.asarray(k, dtype=complex)
    k = k / np.linalg.norm(k)
    return np.outer(k, k.conj())


def werner(p: float) -> np.ndarray:
    return p * ket_density(SINGLET) + (1 - p) * np.eye(4) / 4


def qobj(rho: np.ndarray) -> qutip.Qobj:
    return qutip.Qobj(rho, dims=[[2, 2], [2, 2]])


def test_concurrence_matches_qutip_on_random_full_rank_states():
    rng = np.random.default_rng(1)
    states = np.array([random_state(4, rng) for _ in range(20)])
    ours = merit.concurrence(states)
    for rho, c in zip(states, ours):
        assert c == pytest.approx(qutip.concurrence(qobj(rho)), abs=1e-9)  # qutip.concurrence


def test_concurrence_matches_qutip_on_random_low_rank_states():
    # qutip takes square roots of rounding-level eigenvalues for rank-deficient states (errors ~1e-8)
    rng = np.random.default_rng(2)
    for rank in (1, 2, 3):
        rho = random_state(4, rng, rank)
        assert merit.concurrence(rho) == pytest.approx(qutip.concurrence(qobj(rho)), abs=1e-6)  # qutip


@pytest.mark.parametrize("p", [0.0, 0.2, 1 / 3, 0.5, 0.8, 1.0])
def test_concurrence_of_werner_states(p):
    # Wootters, PRL 80, 2245 (1998): C = max(0, (3p - 1) / 2) for p singlet + (1 - p) 1/4
    assert merit.concurrence(werner(p)) == pytest.approx(max(0.0, (3 * p - 1) / 2), abs=1e-12)


def test_concurrence_of_pure_states_is_twice_the_determinant():
    # Wootters, PRL 80, 2245 (1998); common practice: C = 2 |ad - bc| for a|Hh> + b|Hv> + c|Vh> + d|Vv>
    rng = np.random.default_rng(3)
    for _ in range(10):
        a, b, c, d = (rng.normal(size=4) + 1j * rng.normal(size=4)) / 2
        norm = np.sqrt(abs(a) ** 2 + abs(b) ** 2 + abs(c) ** 2 + abs(d) ** 2)
        a, b, c, d = np.array([a, b, c, d]) / norm
        assert merit.concurrence(ket_density([a, b, c, d])) == pytest.approx(2 * abs(a * d - b * c), abs=1e-12)


def test_concurrence_is_vectorised_over_a_stack():
    stack = np.array([werner(p) for p in (0.1, 0.6, 0.9)])
    assert np.allclose(merit.concurrence(stack), [0.0, 0.4, 0.85], atol=1e-12)


def test_fidelity_is_the_square_of_qutips_root_fidelity():
    # qutip.fidelity returns tr sqrt(sqrt(rho) sigma sqrt(rho)), the root fidelity
    rng = np.random.default_rng(4)
    for d, rank in ((2, 2), (4, 4), (4, 1), (8, 3)):
        rho, sigma = random_state(d, rng, rank), random_state(d, rng)
        ref = qutip.fidelity(qutip.Qobj(rho), qutip.Qobj(sigma)) ** 2
        assert merit.fidelity(rho, sigma) == pytest.approx(ref, abs=1e-7)


def test_fidelity_to_a_pure_state_is_its_expectation_value():
    # Jozsa, J. Mod. Opt. 41, 2315 (1994): F(rho, |psi><psi|) = <psi|rho|psi>
    rng = np.random.default_rng(5)
    rho = random_state(4, rng)
    psi = rng.normal(size=4) + 1j * rng.normal(size=4)
    psi /= np.linalg.norm(psi)
    expected = np.real(psi.conj() @ rho @ psi)
    assert merit.fidelity(rho, ket_density(psi)) == pytest.approx(expected, abs=1e-12)
    assert merit.fidelity_to_ket(rho, psi) == pytest.approx(expected, abs=1e-12)


def test_fidelity_broadcasts_a_single_target_over_a_stack():
    rng = np.random.default_rng(6)
    stack = np.array([random_state(4, rng) for _ in range(3)])
    target = random_state(4, rng)
    assert np.allclose(merit.fidelity(stack, target), [merit.fidelity(s, target) for s in stack], atol=1e-12)


def test_purity_and_linear_entropy_of_pure_and_maximally_mixed_states():
    # common practice, no source: tr rho^2 = 1 and 1/d; normalised linear entropy 0 and 1
    pure = ket_density([1, 1j, 0, 0])
    mixed = np.eye(4) / 4
    assert merit.purity(pure) == pytest.approx(1.0)
    assert merit.purity(mixed) == pytest.approx(0.25)
    assert merit.linear_entropy(pure) == pytest.approx(0.0, abs=1e-12)
    assert merit.linear_entropy(mixed) == pytest.approx(1.0)


def test_purity_matches_qutip():
    rho = random_state(4, np.random.default_rng(7))
    assert merit.purity(rho) == pytest.approx(qobj(rho).purity(), abs=1e-12)  # qutip.Qobj.purity


@pytest.mark.parametrize("keep, qutip_index", [("polarization", 0), ("spatial", 1)])
def test_reduced_state_matches_qutip_ptrace(keep, qutip_index):
    # qutip.ptrace keeping subsystem 0 (polarization, first kron factor) or 1 (spatial)
    rho = random_state(4, np.random.default_rng(8))
    assert np.allclose(merit.reduced_state(rho, keep), qobj(rho).ptrace(qutip_index).full(), atol=1e-12)


def test_reduced_stokes_of_a_product_state_match_sympy():
    # sympy.physics.optics.polarization.jones_2_stokes of the Jones vector (1, i)/sqrt2 (R) and (1, 0)
    r = np.array([1, 1j]) * R2
    rho = ket_density(np.kron(r, H))
    sympy_r = np.array(jones_2_stokes(Matrix([1 / sqrt(2), sym_i / sqrt(2)])), dtype=float).ravel()
    sympy_h = np.array(jones_2_stokes(Matrix([1, 0])), dtype=float).ravel()
    assert np.allclose(merit.reduced_stokes(rho, "polarization"), sympy_r, atol=1e-12)
    assert np.allclose(merit.reduced_stokes(rho, "spatial"), sympy_h, atol=1e-12)
    assert merit.reduced_degree_of_polarization(rho, "polarization") == pytest.approx(1.0)


def test_stokes_are_normalised_to_unit_s0():
    rho2 = 3.0 * ket_density([1, 0])
    assert np.allclose(merit.stokes(rho2), [1.0, 1.0, 0.0, 0.0])


@pytest.mark.parametrize(
    "name, ket",
    [
        ("radial", np.kron(H, H) + np.kron(V, V)),
        ("azimuthal", np.kron(V, H) - np.kron(H, V)),
        ("hybrid_plus", np.kron(H, H) - np.kron(V, V)),
        ("hybrid_minus", np.kron(H, V) + np.kron(V, H)),
    ],
)
def test_each_named_mode_is_found_closest_to_itself(name, ket):
    # kets of the named modes as written in the interface notes: (|Hh>+|Vv>)/sqrt2 etc.
    rho = ket_density(ket)
    scores = merit.mode_fidelities(rho)
    assert scores[name] == pytest.approx(1.0)
    assert all(scores[other] == pytest.approx(0.0, abs=1e-12) for other in scores if other != name)
    assert merit.closest_mode(0.9 * rho + 0.1 * np.eye(4) / 4) == (name, pytest.approx(0.925))


@pytest.mark.parametrize("name", ["radial", "azimuthal", "hybrid_plus", "hybrid_minus"])
def test_named_modes_are_maximally_non_separable(name):
    # common practice, no source: maximally entangled, so C = 1 and both reduced states unpolarized
    from lightloom.sequencer.optics.states import JOINT_KETS

    rho = ket_density(JOINT_KETS[name])
    assert merit.concurrence(rho) == pytest.approx(1.0, abs=1e-12)
    assert merit.fully_entangled_fraction(rho) == pytest.approx(1.0, abs=1e-12)
    for keep in ("polarization", "spatial"):
        assert merit.reduced_degree_of_polarization(rho, keep) == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("p", [0.0, 0.3, 0.7, 1.0])
def test_fully_entangled_fraction_of_werner_states(p):
    # common practice (from memory): FEF = p + (1 - p)/4 = (3p + 1)/4 for p singlet + (1 - p) 1/4
    assert merit.fully_entangled_fraction(werner(p)) == pytest.approx((3 * p + 1) / 4, abs=1e-12)


def test_fully_entangled_fraction_equals_a_brute_force_maximum():
    # every maximally entangled state is (1 x U)|Phi+> for a unitary U (common practice, no source):
    # maximise over U numerically (scipy Nelder-Mead, several starts) and compare
    rng = np.random.default_rng(10)
    phi_plus = np.array([1, 0, 0, 1]) * R2

    def overlap(params, rho):
        a, b, c = params
        u = np.array([[np.cos(a) * np.exp(1j * b), np.sin(a) * np.exp(1j * c)],
                      [-np.sin(a) * np.exp(-1j * c), np.cos(a) * np.exp(-1j * b)]])
        psi = np.kron(np.eye(2), u) @ phi_plus
        return -np.real(psi.conj() @ rho @ psi)

    for _ in range(3):
        rho = random_state(4, rng)
        best = min(
            minimize(overlap, rng.uniform(0, 2 * np.pi, 3), args=(rho,), method="Nelder-Mead",
                     options={"xatol": 1e-10, "fatol": 1e-13, "maxiter": 4000}).fun
            for _ in range(6)
        )
        assert merit.fully_entangled_fraction(rho) == pytest.approx(-best, abs=1e-8)


def test_joint_figures_refuse_a_2x2_state():
    with pytest.raises(EstimationError, match="4x4"):
        merit.concurrence(np.eye(2) / 2)
