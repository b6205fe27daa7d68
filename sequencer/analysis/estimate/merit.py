"""Figures of merit of estimated states: purity, entropy, fidelity, concurrence, entangled fraction, reduced Stokes, named-mode overlaps."""

from __future__ import annotations

import numpy as np

from lightloom.sequencer.analysis.estimate.errors import EstimationError
from lightloom.sequencer.optics.states import FACTORS, JOINT_KETS, partial_trace
from lightloom.sequencer.optics.stokes import degree_of_polarization, stokes_from_density

_SIGMA_Y_SIGMA_Y = np.kron(np.array([[0, -1j], [1j, 0]]), np.array([[0, -1j], [1j, 0]]))

_S = 1.0 / np.sqrt(2.0)
# Columns: the magic basis of Hill and Wootters, PRL 78, 5022 (1997), in |00>,|01>,|10>,|11> order.
_MAGIC = np.array(
    [
        [_S, 1j * _S, 0, 0],
        [0, 0, 1j * _S, _S],
        [0, 0, 1j * _S, -_S],
        [_S, -1j * _S, 0, 0],
    ]
)


def _as_states(rho: np.ndarray, dim: int | None = None) -> np.ndarray:
    r = np.asarray(rho, dtype=complex)
    if r.ndim < 2 or r.shape[-1] != r.shape[-2]:
        raise EstimationError(f"a density matrix (stack) must have shape (..., d, d); got {r.shape}")
    if dim is not None and r.shape[-1] != dim:
        raise EstimationError(f"this figure of merit needs {dim}x{dim} states; got {r.shape[-2]}x{r.shape[-1]}")
    return r


def _dagger(m: np.ndarray) -> np.ndarray:
    return np.conj(np.swapaxes(m, -1, -2))


def _factor(rho: np.ndarray) -> np.ndarray:
    """X with rho = X X^dagger; eigenvalues at rounding level (or below zero) are set to zero.

    Working with X keeps rank-deficient states accurate: square roots of rounding-level
    eigenvalues would otherwise add errors of order 1e-8.
    """
    w, v = np.linalg.eigh(rho)
    floor = 1e-14 * np.max(np.abs(w), axis=-1, keepdims=True)
    return v * np.sqrt(np.where(w > floor, w, 0.0))[..., None, :]


def purity(rho: np.ndarray) -> np.ndarray:
    """tr(rho^2) of density matrices (..., d, d); 1 for pure states, 1/d for the maximally mixed state."""
    r = _as_states(rho)
    return np.sum(np.abs(r) ** 2, axis=(-2, -1))


def linear_entropy(rho: np.ndarray) -> np.ndarray:
    """Normalised linear entropy (d / (d - 1)) (1 - tr rho^2): 0 for pure states, 1 for the maximally mixed state."""
    r = _as_states(rho)
    d = r.shape[-1]
    return d / (d - 1.0) * (1.0 - purity(r))


def fidelity(rho: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Fidelity F = (tr sqrt(sqrt(rho) sigma sqrt(rho)))^2 between density matrices (broadcast over leading axes).

    The squared (Uhlmann-Jozsa) convention, Jozsa, J. Mod. Opt. 41, 2315 (1994): F = <psi|rho|psi>
    for a pure sigma = |psi><psi|. (qutip.fidelity returns sqrt(F).) Negative eigenvalues, as a
    linear-inversion estimate may have, are treated as zero.
    """
    r, s = _as_states(rho), _as_states(sigma)
    # tr sqrt(sqrt(rho) sigma sqrt(rho)) is the sum of the singular values of X^dagger W (rho = XX^dagger, sigma = WW^dagger)
    singular = np.linalg.svd(_dagger(_factor(r)) @ _factor(s), compute_uv=False)
    return np.sum(singular, axis=-1) ** 2


def fidelity_to_ket(rho: np.ndarray, ket: np.ndarray) -> np.ndarray:
    """<psi|rho|psi> / <psi|psi>: the fidelity of density matrices (..., d, d) to a pure state (d,)."""
    r = _as_states(rho)
    k = np.asarray(ket, dtype=complex)
    if k.shape != (r.shape[-1],):
        raise EstimationError(f"the target ket must have {r.shape[-1]} entries; got shape {k.shape}")
    k = k / np.linalg.norm(k)
    return np.real(np.einsum("i,...ij,j->...", np.conj(k), r, k))


def concurrence(rho: np.ndarray) -> np.ndarray:
    """Concurrence of two-qubit states (..., 4, 4), Wootters, PRL 80, 2245 (1998).

    C = max(0, l1 - l2 - l3 - l4) with l_i, in decreasing order, the square roots of the eigenvalues
    of sqrt(rho) rho~ sqrt(rho), rho~ = (sigma_y x sigma_y) rho* (sigma_y x sigma_y). Negative
    eigenvalues of rho (a non-physical estimate) are treated as zero.
    """
    r = _as_states(rho, 4)
    # with rho = X X^dagger the l_i are the singular values of X^T (sigma_y x sigma_y) X, which avoids
    # square roots of rounding-level eigenvalues for rank-deficient states
    x = _factor(r)
    lam = np.linalg.svd(np.swapaxes(x, -1, -2) @ _SIGMA_Y_SIGMA_Y @ x, compute_uv=False)
    return np.maximum(0.0, lam[..., 0] - lam[..., 1] - lam[..., 2] - lam[..., 3])


def fully_entangled_fraction(rho: np.ndarray) -> np.ndarray:
    """Largest fidelity of two-qubit states (..., 4, 4) to any maximally entangled state.

    The maximally entangled states are, up to a global phase, the real unit combinations of the
    magic basis (Hill, Wootters, PRL 78, 5022 (1997)), so the maximum of c^T rho_M c over real unit
    c is the largest eigenvalue of Re(rho_M), rho_M = rho in the magic basis.
    """
    r = _as_states(rho, 4)
    in_magic = _dagger(_MAGIC) @ r @ _MAGIC
    return np.linalg.eigvalsh(np.real(in_magic))[..., -1]


def _check_factor(keep: str) -> None:
    if keep not in FACTORS:
        raise EstimationError(f"keep must be one of {', '.join(FACTORS)}; got {keep!r}")


def reduced_state(rho: np.ndarray, keep: str) -> np.ndarray:
    """The 2x2 state of one factor ("polarization" or "spatial") of joint states (..., 4, 4)."""
    _check_factor(keep)
    return partial_trace(_as_states(rho, 4), keep)


def stokes(rho2: np.ndarray) -> np.ndarray:
    """Normalised Stokes vectors [1, S1, S2, S3] of 2x2 states (..., 2, 2) (conventions of sequencer.optics.stokes)."""
    s = stokes_from_density(_as_states(rho2, 2))
    return s / s[..., :1]


def reduced_stokes(rho: np.ndarray, keep: str) -> np.ndarray:
    """Normalised Stokes vectors [1, S1, S2, S3] of one factor of joint states (..., 4, 4)."""
    return stokes(reduced_state(rho, keep))


def reduced_degree_of_polarization(rho: np.ndarray, keep: str) -> np.ndarray:
    """sqrt(S1^2 + S2^2 + S3^2) / S0 of one factor of joint states (..., 4, 4); 0 for a maximally non-separable mode."""
    return np.asarray(degree_of_polarization(reduced_stokes(rho, keep)))


def mode_fidelities(rho: np.ndarray) -> dict[str, np.ndarray]:
    """Fidelity of joint states (..., 4, 4) to each named maximally non-separable mode (radial, azimuthal, hybrid_plus, hybrid_minus)."""
    r = _as_states(rho, 4)
    return {name: fidelity_to_ket(r, ket) for name, ket in JOINT_KETS.items()}


def closest_mode(rho: np.ndarray) -> tuple[str, float]:
    """The named mode with the highest fidelity to one joint state (4, 4), and that fidelity."""
    r = _as_states(rho, 4)
    if r.ndim != 2:
        raise EstimationError(f"closest_mode takes one 4x4 state; got shape {r.shape}")
    scores = mode_fidelities(r)
    name = max(scores, key=lambda k: float(scores[k]))
    return name, float(scores[name])
