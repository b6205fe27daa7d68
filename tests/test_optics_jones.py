"""Jones matrices and Stokes conventions against outside references."""

from __future__ import annotations

import numpy as np
import pytest
import sympy
from sympy.physics.optics import polarization as sp_pol

from lightloom.sequencer.optics import jones
from lightloom.sequencer.optics.states import POLARIZATION_KETS, SPATIAL_KETS
from lightloom.sequencer.optics.stokes import stokes_from_density, density_from_stokes
from lightloom.sequencer.optics.states import density, ket_from_stokes

RNG = np.random.default_rng(20261201)
ANGLES = RNG.uniform(-np.pi, np.pi, 6)


def _sym(m) -> np.ndarray:
    return np.array(sympy.N(m), dtype=np.complex128)


def _equal_up_to_phase(a: np.ndarray, b: np.ndarray) -> bool:
    k = np.unravel_index(np.argmax(np.abs(b)), b.shape)
    phase = a[k] / b[k]
    return abs(abs(phase) - 1) < 1e-12 and np.allclose(a, phase * b, atol=1e-12)


@pytest.mark.parametrize("theta", ANGLES)
def test_half_wave_plate_matches_sympy(theta: float) -> None:
    # Reference: sympy.physics.optics.polarization.half_wave_retarder
    assert _equal_up_to_phase(jones.half_wave_plate(theta), _sym(sp_pol.half_wave_retarder(theta)))


@pytest.mark.parametrize("theta", ANGLES)
def test_quarter_wave_plate_matches_sympy(theta: float) -> None:
    # Reference: sympy.physics.optics.polarization.quarter_wave_retarder
    assert _equal_up_to_phase(jones.quarter_wave_plate(theta), _sym(sp_pol.quarter_wave_retarder(theta)))


@pytest.mark.parametrize("theta,delta", list(zip(ANGLES, RNG.uniform(0, 2 * np.pi, 6))))
def test_retarder_matches_sympy_phase_retarder(theta: float, delta: float) -> None:
    # Reference: sympy.physics.optics.polarization.phase_retarder
    assert _equal_up_to_phase(jones.retarder(theta, delta), _sym(sp_pol.phase_retarder(theta, delta)))


@pytest.mark.parametrize("theta", ANGLES)
def test_ideal_polarizer_matches_sympy(theta: float) -> None:
    # Reference: sympy.physics.optics.polarization.linear_polarizer
    assert _equal_up_to_phase(jones.polarizer(theta), _sym(sp_pol.linear_polarizer(theta)))


def test_vectorised_retarder_equals_elementwise() -> None:
    stack = jones.retarder(ANGLES, 0.7)
    for k, theta in enumerate(ANGLES):
        assert np.allclose(stack[k], jones.retarder(theta, 0.7))


# sympy.physics.optics.polarization.stokes_vector(psi, chi): azimuth psi, ellipticity chi.
SYMPY_STOKES_ARGS = {
    "H": (0, 0), "V": (sympy.pi / 2, 0), "D": (sympy.pi / 4, 0), "A": (-sympy.pi / 4, 0),
    "R": (0, sympy.pi / 4), "L": (0, -sympy.pi / 4),
}


@pytest.mark.parametrize("name", list(SYMPY_STOKES_ARGS))
def test_stokes_of_named_states_match_sympy(name: str) -> None:
    # Reference: sympy.physics.optics.polarization.stokes_vector
    expected = np.array(sympy.N(sp_pol.stokes_vector(*SYMPY_STOKES_ARGS[name])), dtype=float).ravel()
    got = stokes_from_density(density(POLARIZATION_KETS[name]))
    assert np.allclose(got, expected, atol=1e-12)


@pytest.mark.parametrize("name", ["H", "V", "D", "A", "R", "L"])
def test_jones_vectors_match_sympy(name: str) -> None:
    # Reference: sympy.physics.optics.polarization.jones_vector(psi, chi), up to a global phase
    psi, chi = SYMPY_STOKES_ARGS[name]
    ref = np.array(sympy.N(sp_pol.jones_vector(psi, chi)), dtype=np.complex128).ravel()
    ours = POLARIZATION_KETS[name]
    assert abs(abs(np.vdot(ref, ours)) - 1) < 1e-12


def test_spatial_kets_use_the_same_stokes_convention() -> None:
    # DESIGN.md: spatial Stokes are h - v, d - a, l+ - l-, the analogues of the polarization ones
    expected = {"h": [1, 1, 0, 0], "v": [1, -1, 0, 0], "d": [1, 0, 1, 0], "a": [1, 0, -1, 0],
                "l+": [1, 0, 0, 1], "l-": [1, 0, 0, -1]}
    for name, s in expected.items():
        assert np.allclose(stokes_from_density(density(SPATIAL_KETS[name])), s, atol=1e-12)


def test_stokes_round_trip_through_kets_and_matrices() -> None:
    for _ in range(20):
        s = RNG.normal(size=3)
        s /= np.linalg.norm(s)
        assert np.allclose(stokes_from_density(density(ket_from_stokes(s)))[1:], s, atol=1e-12)
        r = 0.8 * s
        assert np.allclose(stokes_from_density(density_from_stokes(r))[1:], r, atol=1e-12)


@pytest.mark.parametrize("theta", np.linspace(0, np.pi, 13))
def test_malus_law(theta: float) -> None:
    # Hecht, Optics (4th ed.), sec. 8.2: I = I0 cos^2(theta) behind a polarizer at theta to the light
    out = jones.polarizer(theta) @ POLARIZATION_KETS["H"]
    assert np.isclose(np.vdot(out, out).real, np.cos(theta) ** 2, atol=1e-12)


@pytest.mark.parametrize("theta", np.linspace(0, np.pi / 2, 10))
def test_half_wave_plate_between_crossed_polarizers(theta: float) -> None:
    # Hecht, Optics (4th ed.), sec. 8.7 (retarders): I = I0 sin^2(2 theta) at plate angle theta
    out = jones.polarizer(np.pi / 2) @ jones.half_wave_plate(theta) @ jones.polarizer(0.0) @ POLARIZATION_KETS["H"]
    assert np.isclose(np.vdot(out, out).real, np.sin(2 * theta) ** 2, atol=1e-12)


def test_polarizer_extinction_leaks_the_blocked_axis() -> None:
    # common practice, no source: extinction ratio = transmitted power of the blocked axis
    out = jones.polarizer(0.0, extinction=1e-3) @ POLARIZATION_KETS["V"]
    assert np.isclose(np.vdot(out, out).real, 1e-3)


@pytest.mark.parametrize("sign,target", [(+1, "l+"), (-1, "l-")])
def test_pi_half_converter_turns_the_45_degree_mode_into_a_laguerre_gauss_mode(sign: int, target: str) -> None:
    # Beijersbergen et al., Opt. Commun. 96, 123 (1993); Padgett and Courtial, Opt. Lett. 24, 430 (1999):
    # the pi/2 converter turns the HG mode at +-45 deg to its cylinder axis into LG of charge +-1.
    hg45 = (SPATIAL_KETS["h"] + sign * SPATIAL_KETS["v"]) / np.sqrt(2)
    out = jones.mode_converter(0.0) @ hg45
    assert np.isclose(abs(np.vdot(SPATIAL_KETS[target], out)), 1.0, atol=1e-12)
    # and an HG mode along the axis passes unchanged (up to phase)
    assert np.isclose(abs(np.vdot(SPATIAL_KETS["h"], jones.mode_converter(0.0) @ SPATIAL_KETS["h"])), 1.0)


@pytest.mark.parametrize("alpha", np.radians([0, 10, 22.5, 45, 60, 90, 135]))
def test_image_rotator_turns_the_h_mode_by_twice_its_angle(alpha: float) -> None:
    # Padgett and Courtial, Opt. Lett. 24, 430 (1999): a Dove prism at alpha rotates the image by 2 alpha
    out = jones.image_rotator(alpha) @ SPATIAL_KETS["h"]
    expected = np.array([np.cos(2 * alpha), np.sin(2 * alpha)])
    assert np.allclose(out, expected, atol=1e-12)


def test_image_rotator_flips_the_charge() -> None:
    # Padgett and Courtial, Opt. Lett. 24, 430 (1999): the image rotator is the half-wave-plate analogue
    out = jones.image_rotator(0.3) @ SPATIAL_KETS["l+"]
    assert np.isclose(abs(np.vdot(SPATIAL_KETS["l-"], out)), 1.0, atol=1e-12)
