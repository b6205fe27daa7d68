"""Stokes parameters of 2x2 states (polarization or spatial factor) and back.

S1 = H - V, S2 = D - A, S3 = R - L (spatial: h - v, d - a, l+ - l-). For a 2x2 density matrix
rho, S0 = tr rho, S1 = tr(rho Z), S2 = tr(rho X), S3 = tr(rho Y) with the Pauli matrices in the
H/V basis; (1, i)/sqrt2 has S3 = +1 (sympy.physics.optics.polarization's handedness).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from lightloom.sequencer.optics.states import partial_trace

PAULI = np.array(
    [
        [[1, 0], [0, 1]],
        [[1, 0], [0, -1]],
        [[0, 1], [1, 0]],
        [[0, -1j], [1j, 0]],
    ],
    dtype=np.complex128,
)


def stokes_from_density(rho: ArrayLike) -> NDArray[np.float64]:
    """[S0, S1, S2, S3] of a 2x2 density matrix (or a stack (..., 2, 2)); S0 = tr rho."""
    r = np.asarray(rho, dtype=np.complex128)
    return np.einsum("kji,...ij->...k", PAULI, r).real


def density_from_stokes(stokes: ArrayLike) -> NDArray[np.complex128]:
    """The 2x2 matrix (S0 I + S1 Z + S2 X + S3 Y) / 2 from [S0, S1, S2, S3] (or [S1, S2, S3], S0 = 1)."""
    s = np.asarray(stokes, dtype=float)
    if s.shape[-1] == 3:
        s = np.concatenate([np.ones(s.shape[:-1] + (1,)), s], axis=-1)
    return 0.5 * np.einsum("...k,kij->...ij", s, PAULI)


def degree_of_polarization(stokes: ArrayLike) -> NDArray[np.float64] | float:
    """sqrt(S1^2 + S2^2 + S3^2) / S0."""
    s = np.asarray(stokes, dtype=float)
    return np.linalg.norm(s[..., 1:], axis=-1) / s[..., 0]


def reduced_stokes(rho4: ArrayLike, factor: str) -> NDArray[np.float64]:
    """Normalised Stokes vector [1, S1, S2, S3] of one factor of a joint 4x4 state."""
    s = stokes_from_density(partial_trace(rho4, factor))
    return s / s[..., :1]
