"""The advisor's optimisation: best local fidelity, the correction stack's settings, certificates."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import unitary_group

from lightloom.sequencer.analysis import advice as adv
from lightloom.sequencer.optics import jones
from lightloom.sequencer.optics.correction import (
    StackSettings, phase_distance, polarization_angles, polarization_stack, spatial_stack, stack_unitary,
)
from lightloom.sequencer.optics.states import JOINT_KETS, density

RNG = np.random.default_rng(20261203)


def random_ket() -> np.ndarray:
    k = RNG.normal(size=4) + 1j * RNG.normal(size=4)
    return k / np.linalg.norm(k)


def random_density(rank: int) -> np.ndarray:
    g = RNG.normal(size=(4, rank)) + 1j * RNG.normal(size=(4, rank))
    rho = g @ g.conj().T
    return rho / np.trace(rho).real


def random_local(n: int) -> np.ndarray:
    return np.array([np.kron(unitary_group.rvs(2, random_state=RNG), unitary_group.rvs(2, random_state=RNG))
                     for _ in range(n)])


def sampled_fidelities(rho: np.ndarray, target: np.ndarray, unitaries: np.ndarray) -> np.ndarray:
    k = np.einsum("nji,j->ni", unitaries.conj(), target)  # U^dagger |t>
    return np.einsum("ni,ij,nj->n", k.conj(), rho, k).real


def test_poincare_rotation_of_a_unitary_round_trips() -> None:
    for _ in range(20):
        u = unitary_group.rvs(2, random_state=RNG)
        o = adv.rotation_of(u)
        assert np.allclose(o @ o.T, np.eye(3), atol=1e-12) and np.isclose(np.linalg.det(o), 1.0)
        assert np.allclose(adv.rotation_of(adv.unitary_of(o)), o, atol=1e-10)


def test_bloch_form_of_the_fidelity_equals_the_direct_one() -> None:
    rho, t = random_density(2), random_ket()
    up, us = unitary_group.rvs(2, random_state=RNG), unitary_group.rvs(2, random_state=RNG)
    r, tt = adv.bloch_coefficients(rho), adv.bloch_coefficients(density(t))
    bloch = 0.25 * np.trace(tt.T @ adv._hat(adv.rotation_of(up)) @ r @ adv._hat(adv.rotation_of(us)).T)
    assert np.isclose(bloch, adv.fidelity_after(rho, t, np.kron(up, us)), atol=1e-13)


def test_procrustes_value_matches_the_rotation_it_finds() -> None:
    n = RNG.normal(size=(500, 3, 3))
    n[:50, :, 2] = n[:50, :, 1]  # singular matrices
    o, value = adv.procrustes(n)
    assert np.allclose(np.linalg.det(o), 1.0)
    assert np.allclose(np.einsum("nij,nji->n", o, n), value, atol=1e-12)
    assert np.allclose(adv.procrustes_value(n), value, atol=1e-12)
    # no random rotation does better (common practice, no source: a sampled check of the maximum)
    from scipy.spatial.transform import Rotation

    rots = Rotation.random(2000, random_state=RNG).as_matrix()
    sampled = np.einsum("rij,nji->nr", rots, n[:20]).max(axis=1)
    assert (sampled <= value[:20] + 1e-12).all()


@pytest.mark.parametrize("trial", range(6))
def test_best_local_fidelity_to_radial_of_a_pure_state_is_set_by_its_schmidt_coefficients(trial: int) -> None:
    # Fully entangled fraction of a pure state with Schmidt coefficients sqrt(l1), sqrt(l2):
    # (sqrt(l1) + sqrt(l2))^2 / 2 (Horodecki, Horodecki, Horodecki, PRA 60, 1888 (1999), from memory).
    psi = random_ket()
    l1, l2 = np.linalg.svd(psi.reshape(2, 2), compute_uv=False) ** 2
    expected = (np.sqrt(l1) + np.sqrt(l2)) ** 2 / 2
    for name in ("radial", "azimuthal", "hybrid_minus"):
        best = adv.best_local(density(psi), JOINT_KETS[name])
        assert best.value == pytest.approx(expected, abs=1e-12)
        assert best.upper_bound == pytest.approx(expected, abs=1e-12)
        reached = adv.fidelity_after(density(psi), JOINT_KETS[name], np.kron(best.polarization, best.spatial))
        assert reached == pytest.approx(expected, abs=1e-12)


@pytest.mark.parametrize("trial", range(4))
def test_best_local_of_a_pure_state_to_any_target_aligns_the_schmidt_coefficients(trial: int) -> None:
    # max |<t|(U (x) V)|psi>|^2 = (sum_k s_k(t) s_k(psi))^2 with both sets in decreasing order (von
    # Neumann's trace inequality, von Neumann 1937, from memory).
    psi, t = random_ket(), random_ket()
    s_psi = np.linalg.svd(psi.reshape(2, 2), compute_uv=False)
    s_t = np.linalg.svd(t.reshape(2, 2), compute_uv=False)
    expected = float(np.dot(s_psi, s_t) ** 2)
    best = adv.best_local(density(psi), t)
    assert best.value == pytest.approx(expected, abs=1e-12) and best.upper_bound == best.value
    reached = adv.fidelity_after(density(psi), t, np.kron(best.polarization, best.spatial))
    assert reached == pytest.approx(expected, abs=1e-12)
    assert sampled_fidelities(density(psi), t, random_local(2000)).max() <= expected + 1e-12


def test_radial_beam_turned_by_known_plates_is_brought_back_to_fidelity_one() -> None:
    turn = np.kron(polarization_stack(17.0, 131.0, 62.0), spatial_stack(None, None))
    source = turn @ JOINT_KETS["radial"]
    a = adv.advise(density(source), JOINT_KETS["radial"])
    assert a.fidelity == pytest.approx(1.0, abs=1e-9)
    assert a.best_local.value == pytest.approx(1.0, abs=1e-9)
    after = stack_unitary(a.settings) @ source
    assert abs(np.vdot(JOINT_KETS["radial"], after)) ** 2 == pytest.approx(1.0, abs=1e-9)


def test_radial_beam_turned_on_both_factors_is_brought_back_by_the_polarization_stack() -> None:
    # A spatial turn (converter and rotator) is undone on the polarization alone: for a maximally
    # entangled target a unitary on one factor suffices.
    turn = np.kron(polarization_stack(40.0, 10.0, 100.0), spatial_stack(33.0, 71.0))
    source = turn @ JOINT_KETS["radial"]
    a = adv.advise(density(source), JOINT_KETS["radial"])
    assert a.settings.mode_converter_deg is None and a.settings.image_rotator_deg is None
    after = stack_unitary(a.settings) @ source
    assert abs(np.vdot(JOINT_KETS["radial"], after)) ** 2 == pytest.approx(1.0, abs=1e-9)


def test_advised_angles_through_sympy_jones_matrices_reproduce_the_predicted_fidelity() -> None:
    sympy = pytest.importorskip("sympy")
    from sympy.physics.optics.polarization import half_wave_retarder, quarter_wave_retarder

    rho = 0.85 * density(np.kron(polarization_stack(5.0, 70.0, 120.0), np.eye(2)) @ JOINT_KETS["azimuthal"]) \
        + 0.15 * random_density(4)
    a = adv.advise(rho, JOINT_KETS["radial"])
    s = a.settings
    # sympy's retarders: quarter_wave_retarder(theta), half_wave_retarder(theta), fast axis at theta (rad)
    m = (quarter_wave_retarder(sympy.rad(s.quarter_wave_plate_2_deg))
         * half_wave_retarder(sympy.rad(s.half_wave_plate_deg))
         * quarter_wave_retarder(sympy.rad(s.quarter_wave_plate_1_deg)))
    m = np.array(m.evalf(30), dtype=complex)
    u = np.kron(m, spatial_stack(s.mode_converter_deg, s.image_rotator_deg))
    assert adv.fidelity_after(rho, JOINT_KETS["radial"], u) == pytest.approx(a.fidelity, abs=1e-12)
    assert a.fidelity == pytest.approx(a.best_local.value, abs=1e-12)


def test_quarter_half_quarter_stack_realises_any_polarization_unitary() -> None:
    # Simon and Mukunda, Phys. Lett. A 143, 165 (1990): the stack is universal for SU(2).
    for _ in range(25):
        u = unitary_group.rvs(2, random_state=RNG)
        angles = polarization_angles(u)
        assert all(0.0 <= a < 180.0 for a in angles)
        assert phase_distance(polarization_stack(*angles), u) < 1e-8


@pytest.mark.parametrize("trial", range(3))
def test_best_local_for_a_general_target_is_certified_and_not_beaten_by_sampling(trial: int) -> None:
    rho, t = random_density(2), random_ket()
    best = adv.best_local(rho, t)
    assert best.value <= best.upper_bound
    assert best.upper_bound - best.value <= 1.5e-3
    reached = adv.fidelity_after(rho, t, np.kron(best.polarization, best.spatial))
    assert reached == pytest.approx(best.value, abs=1e-12)
    sampled = sampled_fidelities(rho, t, random_local(3000))
    assert sampled.max() <= best.upper_bound + 1e-12
    assert sampled.max() <= best.value + 1e-9  # sampling finds nothing better than the optimum


def test_dual_bound_is_above_every_fidelity_on_the_local_orbit() -> None:
    rho, t = random_density(3), random_ket()
    c = adv.concurrence_of_ket(t)
    bound = adv.dual_bound(rho, c)
    assert sampled_fidelities(rho, t, random_local(3000)).max() <= bound + 1e-12


def test_spatial_element_angles_change_the_fidelity_no_faster_than_the_lipschitz_bound() -> None:
    # The search's certificate rests on |dF/d angle| <= 2 per rad for converter and rotator angles.
    for _ in range(4):
        rho, t = random_density(1), random_ket()
        r, tt = adv.bloch_coefficients(rho), adv.bloch_coefficients(density(t))
        angles = np.linspace(0, np.pi, 4001)
        for conv, rot in ((True, False), (False, True)):
            us = spatial_stack(np.degrees(angles) if conv else None, np.degrees(angles) if rot else None)
            f = adv._best_polarization_value(r, tt, adv.rotation_of(us))
            slope = np.abs(np.diff(f)) / np.diff(angles)
            assert slope.max() <= adv.LIPSCHITZ_PER_RAD + 1e-6


def test_coset_angles_change_the_fidelity_no_faster_than_half_per_radian() -> None:
    # The best-local certificate searches two Poincare-sphere rotation angles with |dF/d angle| <= 1/2.
    for _ in range(4):
        rho, t = random_density(1), random_ket()
        r, tt = adv.bloch_coefficients(rho), adv.bloch_coefficients(density(t))
        base = adv._align_s1_to(adv._spatial_schmidt_axis(t))
        a = np.linspace(0, 2 * np.pi, 4001)
        fixed = np.full_like(a, RNG.uniform(0, np.pi))
        for rows in (np.column_stack([a / 2, fixed * 2]), np.column_stack([fixed, a])):
            f = adv._best_polarization_value(r, tt, adv._coset_rotations(base, rows))
            step = np.abs(np.diff(rows, axis=0)).sum(axis=1)
            assert (np.abs(np.diff(f)) / step).max() <= 0.5 + 1e-6


def test_elements_that_cannot_reach_the_local_optimum_say_so_with_a_certified_bound() -> None:
    # Target H (x) l+, source H (x) an elliptical spatial mode: a rotator can turn the mode but the
    # converter-then-rotator pair only brings linear modes to l+, so the lab falls short of 1.
    spatial = np.array([np.cos(0.3), np.sin(0.3) * np.exp(0.7j)])
    source = np.kron([1.0, 0.0], spatial)
    target = np.kron([1.0, 0.0], np.array([1.0, 1j]) / np.sqrt(2))
    a = adv.advise(density(source), target)
    assert a.best_local.value == pytest.approx(1.0, abs=1e-9)
    assert a.fidelity < 1.0 - 1e-3
    assert a.fidelity <= a.fidelity_upper_bound < a.best_local.value
    # a fine grid over the elements the lab has never beats the certified bound
    th, al = np.meshgrid(np.linspace(0, 180, 181), np.linspace(0, 90, 91))
    grid = spatial_stack(th.ravel(), al.ravel())
    r, tt = adv.bloch_coefficients(density(source)), adv.bloch_coefficients(density(target))
    assert adv._best_polarization_value(r, tt, adv.rotation_of(grid)).max() <= a.fidelity_upper_bound + 1e-12
    after = stack_unitary(a.settings)
    assert adv.fidelity_after(density(source), target, after) == pytest.approx(a.fidelity, abs=1e-12)


def test_fixed_converter_axis_is_kept_in_the_advice() -> None:
    spatial = np.array([np.cos(0.3), np.sin(0.3) * np.exp(0.7j)])
    source = np.kron([1.0, 0.0], spatial)
    target = np.kron([1.0, 0.0], np.array([1.0, 1j]) / np.sqrt(2))
    a = adv.advise(density(source), target, converter_axis_deg=45.0)
    assert a.settings.mode_converter_deg in (None, 45.0)
    assert adv.fidelity_after(density(source), target, stack_unitary(a.settings)) == pytest.approx(a.fidelity, abs=1e-12)


def test_spatial_stack_matches_the_jones_elements() -> None:
    conv, rot = 27.0, 64.0
    expected = jones.image_rotator(np.radians(rot)) @ jones.mode_converter(np.radians(conv))
    assert np.allclose(spatial_stack(conv, rot), expected)
    s = StackSettings(10.0, 20.0, 30.0, conv, rot)
    assert np.allclose(stack_unitary(s), np.kron(polarization_stack(10.0, 20.0, 30.0), expected))
