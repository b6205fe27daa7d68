"""Per-pixel Stokes maps, integrated Stokes parameters and the degree of non-separability.

Outside references: qutip's concurrence (a general-purpose quantum library) for the identity
V = concurrence on pure states; sympy.physics.optics.polarization for the Stokes vectors of the
ideal projectors behind which synthetic frames are computed.
"""

from __future__ import annotations

import numpy as np
import pytest
import qutip
from sympy.physics.optics.polarization import jones_vector, stokes_vector

from lightloom.sequencer.analysis.imaging import (
    analyze_frames, design_matrix, integrated_stokes, inversion_matrix, nonseparability,
    polarization_povms, stokes_maps,
)
from lightloom.sequencer.optics.transverse import grid, local_stokes


def projector(psi_deg: float, chi_deg: float) -> np.ndarray:
    """|e><e| of the fully polarized state with orientation psi and ellipticity chi, built from
    sympy's Jones vector (reference for the handedness: (1, i)/sqrt2 has S3 = +1)."""
    j = np.array(jones_vector(np.radians(psi_deg), np.radians(chi_deg)).evalf(), dtype=complex).reshape(2)
    return np.outer(j, j.conj())


SETTINGS = {"H": (0, 0), "V": (90, 0), "D": (45, 0), "A": (-45, 0), "R": (0, 45), "L": (0, -45)}


def test_design_matrix_rows_are_half_the_sympy_stokes_vectors_of_the_projectors():
    povms = np.array([projector(*SETTINGS[k]) for k in SETTINGS])
    a = design_matrix(povms)
    for row, (psi, chi) in zip(a, SETTINGS.values()):
        ref = np.array(stokes_vector(np.radians(psi), np.radians(chi)).evalf(), dtype=float).reshape(4)
        np.testing.assert_allclose(row, ref / 2, atol=1e-12)


def test_povm_of_a_polarization_only_port_is_its_polarization_factor():
    e = projector(30, 10)
    assert np.allclose(polarization_povms(np.kron(e, np.eye(2))[None])[0], e)


def random_ket(rng) -> np.ndarray:
    k = rng.normal(size=4) + 1j * rng.normal(size=4)
    return k / np.linalg.norm(k)


def test_integrated_local_stokes_give_the_concurrence_of_pure_states():
    # The grid covers +-4 waists: the first-order modes leave < 1e-12 of their power outside.
    rng = np.random.default_rng(5)
    x, y = grid(4.0, 161)
    for _ in range(12):
        ket = random_ket(rng)
        s = local_stokes(ket, x, y).sum(axis=(0, 1))
        reference = qutip.concurrence(qutip.Qobj(ket.reshape(4, 1), dims=[[2, 2], [1, 1]]))
        assert nonseparability(s) == pytest.approx(reference, abs=1e-6)


def synthetic_frames(state, names, x, y, scale=1000.0):
    """Ideal frames behind the projectors ``names`` (mean values, no noise), and their POVMs."""
    s = local_stokes(state, x, y)
    povms = np.array([projector(*SETTINGS[n]) for n in names])
    a = design_matrix(povms)
    return scale * np.einsum("kj,...j->k...", a, s), povms, scale * np.moveaxis(s, -1, 0)


@pytest.mark.parametrize("names", [("H", "V", "D", "R"), ("H", "V", "D", "A", "R", "L")])
def test_stokes_maps_recover_the_local_stokes_of_the_source_pixel_by_pixel(names):
    x, y = grid(2.5, 33)
    state = np.array([0.6, 0.1j, 0.2, 0.77])
    frames, povms, truth = synthetic_frames(state, names, x, y)
    maps = stokes_maps(frames + 5.0, povms, dark=np.full(x.shape, 5.0))
    np.testing.assert_allclose(maps.stokes, truth, atol=1e-9)


def test_too_few_settings_are_refused_with_what_to_image():
    with pytest.raises(ValueError, match="at least four settings"):
        inversion_matrix(np.array([projector(0, 0), projector(90, 0), projector(45, 0)]))


def test_saturated_pixels_are_masked_and_left_out_of_the_integral():
    x, y = grid(2.5, 21)
    frames, povms, truth = synthetic_frames(np.array([1, 0, 0, 1]) / np.sqrt(2), "HVDR", x, y)
    saturated = np.zeros(frames.shape, bool)
    saturated[2, 10, 12] = True
    maps = stokes_maps(frames, povms, saturated=saturated)
    assert np.isnan(maps.stokes[:, 10, 12]).all() and maps.saturated.sum() == 1
    kept = truth.copy()
    kept[:, 10, 12] = 0
    np.testing.assert_allclose(integrated_stokes(maps), kept.sum(axis=(1, 2)), rtol=1e-9, atol=1e-9)


def test_derived_maps_of_a_radial_beam():
    # Radial: (|H,h> + |V,v>)/sqrt2; at (x, y) the local polarization is linear along (x, y).
    x, y = grid(2.0, 41)
    frames, povms, _ = synthetic_frames(np.array([1, 0, 0, 1]) / np.sqrt(2), "HVDR", x, y)
    maps = stokes_maps(frames, povms)
    bright = np.hypot(x, y) > 0.3
    np.testing.assert_allclose(maps.dop[bright], 1.0, atol=1e-9)
    np.testing.assert_allclose(maps.ellipticity_deg[bright], 0.0, atol=1e-6)
    expected = np.degrees(np.arctan2(y, x))
    diff = (maps.orientation_deg - expected + 90) % 180 - 90
    np.testing.assert_allclose(diff[bright], 0.0, atol=1e-6)


def test_bootstrap_interval_holds_the_value_inside_zero_one_and_shrinks_with_more_repeats():
    rng = np.random.default_rng(3)
    x, y = grid(3.0, 31)
    state = np.array([0.8, 0, 0, 0.6j])  # concurrence 0.96 (Wootters: 2|ad - bc|)
    mean, povms, _ = synthetic_frames(state, "HVDR", x, y, scale=2000.0)

    def result(repeats):
        frames = np.concatenate([rng.poisson(mean) + 10.0 for _ in range(repeats)]).astype(float)
        darks = rng.normal(10.0, 1.0, size=(4,) + x.shape)
        return analyze_frames(frames, np.tile(povms, (repeats, 1, 1)), np.tile(np.arange(4), repeats),
                              darks, rng=np.random.default_rng(1), replicates=200)

    few, many = result(3), result(12)
    for r in (few, many):
        lo, hi = r.nonseparability.interval
        assert 0.0 <= lo <= r.nonseparability.value <= hi <= 1.0
        assert r.nonseparability.value == pytest.approx(0.96, abs=4 * r.nonseparability.std + 2e-3)
    assert many.nonseparability.std < few.nonseparability.std
