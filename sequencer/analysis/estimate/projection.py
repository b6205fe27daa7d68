"""Euclidean projections onto the density matrices (unit trace, positive) and onto the positive semidefinite cone."""

from __future__ import annotations

import numpy as np

from lightloom.sequencer.analysis.estimate.hermitian import hermitian_part


def simplex_from_ascending(w: np.ndarray) -> np.ndarray:
    """Euclidean projection onto the probability simplex of rows (..., d) sorted ascending, as eigh returns them.

    Held, Wolfe, Crowder, Math. Program. 6, 62 (1974).
    """
    d = w.shape[-1]
    u = w[..., ::-1]
    css = np.cumsum(u, axis=-1) - 1.0
    keep = u * np.arange(1, d + 1) > css
    # the last index where the condition holds (it always holds at index 0)
    r = d - 1 - np.argmax(keep[..., ::-1], axis=-1)
    theta = np.take_along_axis(css, r[..., None], axis=-1) / (r[..., None] + 1)
    return np.maximum(w - theta, 0.0)


def from_eigen(vectors: np.ndarray, values: np.ndarray) -> np.ndarray:
    """V diag(values) V^dagger over the last two axes."""
    return (vectors * values[..., None, :]) @ np.conj(np.swapaxes(vectors, -1, -2))


def closest_density_matrix(matrices: np.ndarray) -> np.ndarray:
    """The density matrix nearest in Frobenius norm to each Hermitian matrix (..., d, d).

    Smolin, Gambetta, Smith, PRL 108, 070502 (2012): keep the eigenvectors and project the
    eigenvalues onto the probability simplex. For a unit-trace input this is their algorithm
    (drop the most negative eigenvalues and share their weight equally among the rest); for
    any other trace it is the same Euclidean projection onto {rho >= 0, tr rho = 1}.
    """
    w, v = np.linalg.eigh(hermitian_part(np.asarray(matrices, dtype=complex)))
    return from_eigen(v, simplex_from_ascending(w))


def closest_positive(matrices: np.ndarray) -> np.ndarray:
    """The positive semidefinite matrix nearest in Frobenius norm to each Hermitian matrix (..., d, d).

    Negative eigenvalues set to zero (Higham, Linear Algebra Appl. 103, 103 (1988)).
    """
    w, v = np.linalg.eigh(hermitian_part(np.asarray(matrices, dtype=complex)))
    return from_eigen(v, np.maximum(w, 0.0))
