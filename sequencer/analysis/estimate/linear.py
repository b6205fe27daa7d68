"""Linear-inversion state estimate (weighted least squares over Hermitian matrices), with the projections re-exported."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lightloom.sequencer.analysis.estimate.blas import matmul_rows
from lightloom.sequencer.analysis.estimate.errors import EstimationError
from lightloom.sequencer.analysis.estimate.hermitian import check_operators, check_values, to_matrix, to_vector
from lightloom.sequencer.analysis.estimate.projection import closest_density_matrix, closest_positive

__all__ = [
    "LinearBatchResult",
    "LinearResult",
    "closest_density_matrix",
    "closest_positive",
    "design_matrix",
    "least_squares_operator",
    "linear_inversion",
    "linear_inversion_batch",
]


@dataclass(frozen=True)
class LinearResult:
    """Linear-inversion estimate of one data set.

    Attributes
    ----------
    rho : ndarray (d, d) complex. T / tr T; Hermitian with unit trace, but it may have negative
        eigenvalues (use `closest_density_matrix` or the maximum-likelihood estimators).
    intensity : float. tr T, the overall scale of the readings (counts or W per unit-trace state).
    """

    rho: np.ndarray
    intensity: float


@dataclass(frozen=True)
class LinearBatchResult:
    """Linear-inversion estimates of many data sets: rho (batch, d, d), intensity (batch,)."""

    rho: np.ndarray
    intensity: np.ndarray


def design_matrix(operators: np.ndarray) -> np.ndarray:
    """Real matrix A (n, d*d) with A @ to_vector(T) = [tr(T E_i)] for Hermitian T."""
    return to_vector(operators)


def least_squares_operator(design: np.ndarray, weights: np.ndarray | None = None) -> tuple[np.ndarray, int]:
    """Weighted least-squares solution operator P (d*d, n) with x = P @ v, and the rank of the design.

    Minimises sum_i w_i (v_i - (A x)_i)^2; with a rank-deficient design, the minimum-norm solution.
    Solved through the eigen-decomposition of the small Gram matrix A^T W A (d*d x d*d), which is
    cheap and, for tomographic designs, well conditioned.
    """
    w = np.ones(design.shape[0]) if weights is None else np.asarray(weights, dtype=float)
    gram = matmul_rows(design.T, design * w[:, None])
    lam, vec = np.linalg.eigh(gram)
    kept = lam > 1e-12 * max(float(lam[-1]), np.finfo(float).tiny)
    inverse = (vec[:, kept] / lam[kept]) @ vec[:, kept].T
    return matmul_rows(inverse, design.T * w[None, :]), int(np.count_nonzero(kept))


def _weights_from_sigma(sigma: np.ndarray | None, n: int) -> np.ndarray | None:
    if sigma is None:
        return None
    s = np.asarray(sigma, dtype=float)
    if s.shape != (n,):
        raise EstimationError(f"sigma must have one entry per measurement operator, shape ({n},); got {s.shape}")
    if not np.all(np.isfinite(s)) or np.any(s <= 0):
        raise EstimationError("every sigma (spread of a reading) must be finite and > 0; check the noise estimates")
    return 1.0 / s**2


def linear_inversion_batch(
    operators: np.ndarray, values: np.ndarray, sigma: np.ndarray | None = None
) -> LinearBatchResult:
    """Linear inversion of many data sets taken with the same operators.

    Solves min_T sum_i w_i (v_i - tr(T E_i))^2 over Hermitian T (w_i = 1 / sigma_i^2, or 1 without
    sigma), then rho = T / tr T, intensity = tr T. James, Kwiat, Munro, White, PRA 64, 052312 (2001)
    for the two-qubit case.

    Parameters
    ----------
    operators : ndarray (n, d, d). Measurement operators E_i (positive semidefinite).
    values : ndarray (batch, n) or (n,). Readings (counts, or W).
    sigma : ndarray (n,), optional. Spread of each reading, same units as values.

    Raises
    ------
    EstimationError
        if the operators do not determine a d x d state (rank < d*d) or tr T <= 0.
    """
    e = check_operators(operators)
    n, d = e.shape[0], e.shape[1]
    v = check_values(values, n)
    solve, rank = least_squares_operator(design_matrix(e), _weights_from_sigma(sigma, n))
    if rank < d * d:
        raise EstimationError(
            f"the {n} measurement operators determine only {rank} of the {d * d} real parameters of a "
            f"{d}x{d} state; linear inversion needs an informationally complete set (use more settings, "
            "or the maximum-likelihood estimator)"
        )
    t = to_matrix(matmul_rows(v, solve.T))
    intensity = np.real(np.trace(t, axis1=-2, axis2=-1))
    if np.any(intensity <= 0):
        bad = int(np.argmax(intensity <= 0))
        raise EstimationError(
            f"data set {bad}: the readings give a state of zero or negative total intensity "
            f"({intensity[bad]:.3g}); check background subtraction and that the beam was on"
        )
    return LinearBatchResult(rho=t / intensity[:, None, None], intensity=intensity)


def linear_inversion(operators: np.ndarray, values: np.ndarray, sigma: np.ndarray | None = None) -> LinearResult:
    """Linear inversion of one data set; see `linear_inversion_batch`. values : ndarray (n,)."""
    v = np.asarray(values, dtype=float)
    if v.ndim != 1:
        raise EstimationError(f"values of one data set must have shape (n,); got {v.shape}")
    batch = linear_inversion_batch(operators, v, sigma)
    return LinearResult(rho=batch.rho[0], intensity=float(batch.intensity[0]))
