"""Transverse fields of the first-order modes and the local polarization of joint states."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import eval_hermite

from lightloom.sequencer.optics import transverse as tv
from lightloom.sequencer.optics.states import JOINT_KETS, density, partial_trace
from lightloom.sequencer.optics.stokes import stokes_from_density

RNG = np.random.default_rng(20261202)
# A fine grid wide enough that the modes carry < 1e-10 of their power outside it.
X, Y = tv.grid(5.0, 201)
CELL = (X[0, 1] - X[0, 0]) ** 2
# Points with non-negligible intensity: above 1% of the peak.
def lit(s0: np.ndarray) -> np.ndarray:
    return s0 > 1e-2 * s0.max()


def hermite_gauss_1d(n: int, x: np.ndarray) -> np.ndarray:
    """Siegman, Lasers (1986), ch. 16 (from memory): u_n = (2/pi)^(1/4) (2^n n!)^(-1/2) H_n(sqrt2 x) e^(-x^2)
    at w0 = 1, with scipy's physicists' Hermite polynomials as the independent evaluation."""
    return (2 / np.pi) ** 0.25 / math.sqrt(2**n * math.factorial(n)) * eval_hermite(n, np.sqrt(2) * x) * np.exp(-x**2)


def random_density(rank: int) -> np.ndarray:
    g = RNG.normal(size=(4, rank)) + 1j * RNG.normal(size=(4, rank))
    rho = g @ g.conj().T
    return rho / np.trace(rho).real


def test_first_order_modes_are_the_handbook_hermite_gauss_products() -> None:
    u = tv.first_order_modes(X, Y)
    assert np.allclose(u[..., 0], hermite_gauss_1d(1, X) * hermite_gauss_1d(0, Y), atol=1e-14)
    assert np.allclose(u[..., 1], hermite_gauss_1d(0, X) * hermite_gauss_1d(1, Y), atol=1e-14)


def test_first_order_modes_are_orthonormal_over_the_plane() -> None:
    u = tv.first_order_modes(X, Y)
    flat = u.reshape(-1, 2)
    gram = flat.T @ flat * CELL
    assert np.allclose(gram, np.eye(2), atol=1e-9)


def test_h_has_its_lobes_along_x_and_v_along_y() -> None:
    u = tv.first_order_modes([1.0, 0.0, -1.0], [0.0, 1.0, 0.0])
    assert u[0, 0] > 0 and u[2, 0] < 0 and u[1, 0] == 0.0
    assert u[1, 1] > 0 and u[0, 1] == 0.0


def test_radial_beam_is_polarized_along_the_azimuth_everywhere() -> None:
    # Radial: (|H,h> + |V,v>)/sqrt2, E ~ (x, y) exp(-r^2), the field along the radius (the usual
    # decomposition of the radially polarized beam into HG10 x-polarized plus HG01 y-polarized;
    # Zhan, Adv. Opt. Photon. 1, 1 (2009), from memory).
    s = tv.local_stokes(JOINT_KETS["radial"], X, Y)
    on = lit(s[..., 0])
    azimuth = np.degrees(np.arctan2(Y, X))
    diff = np.mod(tv.orientation_deg(s) - azimuth + 90.0, 180.0) - 90.0
    assert np.abs(diff[on]).max() < 1e-9
    assert np.abs(tv.ellipticity_deg(s)[on]).max() < 1e-9
    assert np.allclose(tv.degree_of_polarization(s)[on], 1.0)


def test_azimuthal_beam_is_polarized_at_the_azimuth_plus_90_degrees() -> None:
    # Azimuthal: (|V,h> - |H,v>)/sqrt2, E ~ (-y, x) exp(-r^2) (Zhan 2009, from memory).
    s = tv.local_stokes(JOINT_KETS["azimuthal"], X, Y)
    on = lit(s[..., 0])
    azimuth = np.degrees(np.arctan2(Y, X))
    diff = np.mod(tv.orientation_deg(s) - (azimuth + 90.0) + 90.0, 180.0) - 90.0
    assert np.abs(diff[on]).max() < 1e-9


def test_product_state_has_uniform_polarization() -> None:
    pol = np.array([0.8, 0.36 + 0.48j])  # an elliptical polarization
    spatial = np.array([0.6, 0.8j])
    s = tv.local_stokes(np.kron(pol, spatial), X, Y)
    on = lit(s[..., 0])
    normalised = s[on][:, 1:] / s[on][:, :1]
    expected = stokes_from_density(np.outer(pol, pol.conj()))[1:]
    assert np.allclose(normalised, expected, atol=1e-12)
    assert np.ptp(tv.orientation_deg(s)[on]) < 1e-9


@pytest.mark.parametrize("rank", [1, 2, 4])
def test_integrated_local_stokes_equal_the_reduced_polarization_stokes_times_power(rank: int) -> None:
    rho = random_density(rank)
    power = 2.5e-3  # W: the maps scale with the beam power
    s = tv.local_stokes(rho, X, Y) * power
    integral = s.sum(axis=(0, 1)) * CELL
    assert np.allclose(integral, power * stokes_from_density(partial_trace(rho, "polarization")), atol=1e-12)


def test_pure_state_coherency_is_the_outer_product_of_its_field() -> None:
    ket = RNG.normal(size=4) + 1j * RNG.normal(size=4)
    e = tv.field(ket, X, Y)
    j = tv.coherency(ket, X, Y)
    assert np.allclose(j, e[..., :, None] * e[..., None, :].conj(), atol=1e-14)


def test_mixed_state_stokes_come_from_the_density_matrix_not_a_pure_state_shortcut() -> None:
    # An equal mixture of radial and azimuthal: at every point the two fields are orthogonal and
    # equally bright, so the light is locally unpolarized. The shortcut (the field of the dominant
    # eigenvector, here either mode) would claim full polarization.
    rho = 0.5 * density(JOINT_KETS["radial"]) + 0.5 * density(JOINT_KETS["azimuthal"])
    s = tv.local_stokes(rho, X, Y)
    on = lit(s[..., 0])
    assert np.abs(tv.degree_of_polarization(s)[on]).max() < 1e-12
    top = np.linalg.eigh(rho)[1][:, -1]
    shortcut = tv.local_stokes(top, X, Y)
    assert np.allclose(tv.degree_of_polarization(shortcut)[on], 1.0)
    # and linearity: the maps of a mixture are the mixture of the maps
    w = 0.3
    mix = w * density(JOINT_KETS["radial"]) + (1 - w) * density(JOINT_KETS["hybrid_minus"])
    lhs = tv.local_stokes(mix, X, Y)
    rhs = w * tv.local_stokes(JOINT_KETS["radial"], X, Y) + (1 - w) * tv.local_stokes(JOINT_KETS["hybrid_minus"], X, Y)
    assert np.allclose(lhs, rhs, atol=1e-14)


def test_right_circular_polarization_has_positive_s3_and_ellipticity() -> None:
    # (1, i)/sqrt2 is right-handed with S3 = +1 in sympy.physics.optics.polarization's convention.
    ket = np.kron(np.array([1, 1j]) / np.sqrt(2), np.array([1.0, 0.0]))
    s = tv.local_stokes(ket, X, Y)
    on = lit(s[..., 0])
    assert np.allclose(s[on][:, 3] / s[on][:, 0], 1.0)
    assert np.allclose(tv.ellipticity_deg(s)[on], 45.0)
    assert (tv.handedness(s)[on] == 1).all()


def test_polarizer_patterns_match_sympy_jones_polarizers() -> None:
    sympy = pytest.importorskip("sympy")
    from sympy.physics.optics.polarization import linear_polarizer

    ket = RNG.normal(size=4) + 1j * RNG.normal(size=4)
    xs, ys = np.array([0.3, -0.7, 1.1]), np.array([0.5, 0.2, -0.9])
    e = tv.field(ket, xs, ys)
    s = tv.local_stokes(ket, xs, ys)
    for angle in tv.POLARIZER_ANGLES_DEG:
        p = np.array(linear_polarizer(sympy.rad(angle)).evalf(), dtype=complex)
        expected = np.sum(np.abs(e @ p.T) ** 2, axis=-1)
        assert np.allclose(tv.polarizer_intensity(s, angle), expected, atol=1e-14)


def test_radial_beam_behind_a_horizontal_polarizer_shows_two_lobes_along_x() -> None:
    s = tv.local_stokes(JOINT_KETS["radial"], X, Y)
    i0 = tv.polarizer_intensity(s, 0.0)
    assert np.allclose(i0, tv.first_order_modes(X, Y)[..., 0] ** 2 / 2, atol=1e-14)


def test_intensity_behind_a_quarter_wave_plate_and_polarizer_is_the_right_circular_part() -> None:
    # A quarter-wave plate at 45 deg then a polarizer at 0 deg passes R = (1, i)/sqrt2 whole, so the
    # intensity is (S0 + S3)/2; the matrices are sympy's (sympy.physics.optics.polarization).
    sympy = pytest.importorskip("sympy")
    from sympy.physics.optics.polarization import linear_polarizer, quarter_wave_retarder

    m = np.array((linear_polarizer(0) * quarter_wave_retarder(sympy.pi / 4)).evalf(), dtype=complex)
    rho = random_density(2)
    s = tv.local_stokes(rho, X, Y)
    got = tv.analyzed_intensity(rho, m, X, Y)
    assert np.allclose(got, 0.5 * (s[..., 0] + s[..., 3]), atol=1e-14)
    for angle in tv.POLARIZER_ANGLES_DEG:
        p = np.array(linear_polarizer(sympy.rad(angle)).evalf(), dtype=complex)
        assert np.allclose(tv.analyzed_intensity(rho, p, X, Y), tv.polarizer_intensity(s, angle), atol=1e-14)
