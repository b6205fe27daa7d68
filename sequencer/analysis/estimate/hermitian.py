"""Real-vector representation of Hermitian matrices and validation of measurement operators and readings."""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from lightloom.sequencer.analysis.estimate.blas import matmul_rows
from lightloom.sequencer.analysis.estimate.errors import EstimationError

_SQRT2 = np.sqrt(2.0)


@lru_cache(maxsize=16)
def _indices(d: int) -> tuple[np.ndarray, np.ndarray]:
    iu, ju = np.triu_indices(d, k=1)
    iu.setflags(write=False)
    ju.setflags(write=False)
    return iu, ju


@lru_cache(maxsize=16)
def _maps(d: int) -> tuple[np.ndarray, np.ndarray]:
    """Real matrices taking interleaved (re, im) matrix entries (2 d^2) to coordinates (d^2), and back."""
    iu, ju = _indices(d)
    k = iu.size
    to_coords = np.zeros((2 * d * d, d * d))
    to_entries = np.zeros((d * d, 2 * d * d))
    for j in range(d):
        to_coords[2 * (j * d + j), j] = 1.0
        to_entries[j, 2 * (j * d + j)] = 1.0
    for m, (j, l) in enumerate(zip(iu, ju)):
        upper, lower = j * d + l, l * d + j
        to_coords[2 * upper, d + m] = _SQRT2
        to_coords[2 * upper + 1, d + k + m] = _SQRT2
        to_entries[d + m, 2 * upper] = to_entries[d + m, 2 * lower] = 1.0 / _SQRT2
        to_entries[d + k + m, 2 * upper + 1] = 1.0 / _SQRT2
        to_entries[d + k + m, 2 * lower + 1] = -1.0 / _SQRT2
    to_coords.setflags(write=False)
    to_entries.setflags(write=False)
    return to_coords, to_entries


def to_vector(matrices: np.ndarray) -> np.ndarray:
    """Coordinates of Hermitian matrices in the orthonormal matrix-unit basis.

    Parameters
    ----------
    matrices : ndarray (..., d, d), Hermitian.

    Returns
    -------
    ndarray (..., d*d), real: the d diagonal entries, then sqrt(2) Re M_jk and sqrt(2) Im M_jk
    for j < k (row-major upper triangle). The basis is orthonormal in the Hilbert-Schmidt inner
    product, so tr(A B) = to_vector(A) @ to_vector(B) for Hermitian A, B.
    """
    m = np.ascontiguousarray(matrices, dtype=complex)
    d = m.shape[-1]
    entries = m.reshape(m.shape[:-2] + (d * d,)).view(np.float64)
    return matmul_rows(entries, _maps(d)[0])


def to_matrix(vectors: np.ndarray) -> np.ndarray:
    """Hermitian matrices (..., d, d) from their coordinates (..., d*d); the inverse of `to_vector`."""
    x = np.asarray(vectors, dtype=float)
    d = int(round(np.sqrt(x.shape[-1])))
    if d * d != x.shape[-1]:
        raise EstimationError(f"a Hermitian coordinate vector has d*d entries; got {x.shape[-1]}")
    entries = np.ascontiguousarray(matmul_rows(x, _maps(d)[1]))
    return entries.view(np.complex128).reshape(x.shape[:-1] + (d, d))


def hermitian_part(matrices: np.ndarray) -> np.ndarray:
    """(M + M^dagger) / 2, over the last two axes."""
    m = np.asarray(matrices)
    return 0.5 * (m + np.conj(np.swapaxes(m, -1, -2)))


def check_operators(operators: np.ndarray) -> np.ndarray:
    """Validate measurement operators: shape (n, d, d), finite, Hermitian and positive semidefinite.

    Returns the operators as a complex array, made exactly Hermitian. Raises EstimationError
    with what is wrong otherwise (tolerance 1e-8 of the largest eigenvalue).
    """
    e = np.asarray(operators)
    if e.ndim != 3 or e.shape[1] != e.shape[2] or e.shape[0] == 0:
        raise EstimationError(
            f"measurement operators must be an array of shape (n, d, d); got shape {e.shape}"
        )
    if not np.all(np.isfinite(e)):
        raise EstimationError("measurement operators contain NaN or infinity; check the file's operator table")
    e = e.astype(complex)
    scale = max(float(np.max(np.abs(e))), np.finfo(float).tiny)
    skew = float(np.max(np.abs(e - np.conj(np.swapaxes(e, -1, -2)))))
    if skew > 1e-8 * scale:
        raise EstimationError(
            f"measurement operators must be Hermitian; the largest |E - E^dagger| entry is {skew:.3g}"
        )
    e = hermitian_part(e)
    low = np.linalg.eigvalsh(e)[:, 0]
    worst = int(np.argmin(low))
    if low[worst] < -1e-8 * scale:
        raise EstimationError(
            f"measurement operator {worst} has a negative eigenvalue {low[worst]:.3g}; "
            "operators must be positive semidefinite (recompute them from the calibration)"
        )
    return e


def check_values(values: np.ndarray, n: int, name: str = "values") -> np.ndarray:
    """Validate readings of shape (n,) or (batch, n), all finite; returns them as floats of shape (batch, n)."""
    v = np.asarray(values, dtype=float)
    if v.ndim == 1:
        v = v[None, :]
    if v.ndim != 2 or v.shape[1] != n:
        raise EstimationError(
            f"{name} must have one entry per measurement operator (shape ({n},) or (batch, {n})); "
            f"got shape {np.shape(values)}"
        )
    if not np.all(np.isfinite(v)):
        raise EstimationError(f"{name} contain NaN or infinity; check the readings in the file")
    return v
