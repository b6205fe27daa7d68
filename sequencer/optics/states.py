"""States of the joint polarization (x) spatial-mode space: named kets, density matrices, partial traces.

Basis order |H,h>, |H,v>, |V,h>, |V,v> (``np.kron(polarization, spatial)``). h is the first-order
Hermite-Gauss mode with its two lobes along x, v the one with lobes along y; l+- = (h +- i v)/sqrt(2)
are the Laguerre-Gauss modes of charge +-1, the spatial analogues of R and L.
"""

from __future__ import annotations

import re

import numpy as np
from numpy.typing import ArrayLike, NDArray

from lightloom.sequencer.errors import OpticsError

Complex = NDArray[np.complex128]

BASIS_LABELS: tuple[str, str, str, str] = ("H,h", "H,v", "V,h", "V,v")
FACTORS: tuple[str, str] = ("polarization", "spatial")

_S = 1.0 / np.sqrt(2.0)


def _ket(a: complex, b: complex) -> Complex:
    k = np.array([a, b], dtype=np.complex128)
    k.setflags(write=False)
    return k


POLARIZATION_KETS: dict[str, Complex] = {
    "H": _ket(1, 0),
    "V": _ket(0, 1),
    "D": _ket(_S, _S),
    "A": _ket(_S, -_S),
    "R": _ket(_S, 1j * _S),
    "L": _ket(_S, -1j * _S),
}

SPATIAL_KETS: dict[str, Complex] = {
    "h": _ket(1, 0),
    "v": _ket(0, 1),
    "d": _ket(_S, _S),
    "a": _ket(_S, -_S),
    "l+": _ket(_S, 1j * _S),
    "l-": _ket(_S, -1j * _S),
}

# Each target's orthogonal partner: the state sent to the other output of a splitter or sorter.
ORTHOGONAL_NAME: dict[str, str] = {
    "H": "V", "V": "H", "D": "A", "A": "D", "R": "L", "L": "R",
    "h": "v", "v": "h", "d": "a", "a": "d", "l+": "l-", "l-": "l+",
}


def _joint(*amplitudes: complex) -> Complex:
    k = np.array(amplitudes, dtype=np.complex128) * _S
    k.setflags(write=False)
    return k


# The maximally non-separable (vector) modes. Radial: polarization along the radius at every lobe.
JOINT_KETS: dict[str, Complex] = {
    "radial": _joint(1, 0, 0, 1),
    "azimuthal": _joint(0, -1, 1, 0),
    "hybrid_plus": _joint(1, 0, 0, -1),
    "hybrid_minus": _joint(0, 1, 1, 0),
}

_COMPLEX_RE = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")


def parse_complex(text: str | float | int | complex) -> complex:
    """Parse a complex number written as in files: ``"0.6"``, ``"0.8j"``, ``"0.1-0.2j"``, ``"-i"``.

    Raises
    ------
    ValueError
        With a message saying what was expected.
    """
    if isinstance(text, bool):
        raise ValueError(f"expected a complex number such as '0.6' or '0.1-0.2j', got {text!r}")
    if isinstance(text, (int, float, complex)):
        value = complex(text)
    else:
        cleaned = str(text).strip().replace(" ", "").replace("i", "j")
        if not cleaned or any(word in cleaned.lower() for word in ("nan", "inf")):
            raise ValueError(f"expected a finite complex number such as '0.6' or '0.1-0.2j', got {text!r}")
        if cleaned in ("j", "+j"):
            cleaned = "1j"
        elif cleaned == "-j":
            cleaned = "-1j"
        try:
            value = complex(cleaned)
        except ValueError:
            raise ValueError(
                f"expected a complex number such as '0.6', '0.8j' or '0.1-0.2j', got {text!r}"
            ) from None
    if not (np.isfinite(value.real) and np.isfinite(value.imag)):
        raise ValueError(f"expected a finite complex number, got {text!r}")
    return value


def normalize_ket(ket: ArrayLike) -> Complex:
    """Return ``ket / |ket|``; raises OpticsError for a zero or non-finite vector."""
    k = np.asarray(ket, dtype=np.complex128)
    norm = float(np.linalg.norm(k))
    if not np.isfinite(norm) or norm < 1e-12:
        raise OpticsError("a state vector must be finite and not zero")
    return k / norm


def density(ket: ArrayLike) -> Complex:
    """The density matrix |k><k| of a (normalised) ket; works on stacks (..., d)."""
    k = np.asarray(ket, dtype=np.complex128)
    k = k / np.linalg.norm(k, axis=-1, keepdims=True)
    return k[..., :, None] * k[..., None, :].conj()


def normalize_density(rho: ArrayLike, tol: float = 1e-9) -> Complex:
    """Check that ``rho`` is Hermitian and positive semidefinite, and scale it to unit trace.

    Raises
    ------
    OpticsError
        If the matrix is not square, not Hermitian, has a negative eigenvalue or zero trace.
    """
    m = np.asarray(rho, dtype=np.complex128)
    if m.ndim != 2 or m.shape[0] != m.shape[1]:
        raise OpticsError(f"a density matrix must be square, got shape {m.shape}")
    scale = max(1.0, float(np.abs(m).max()))
    if np.abs(m - m.conj().T).max() > tol * scale:
        raise OpticsError("a density matrix must be Hermitian (equal to its conjugate transpose)")
    m = 0.5 * (m + m.conj().T)
    eig = np.linalg.eigvalsh(m)
    if eig.min() < -tol * scale:
        raise OpticsError(f"a density matrix must be positive semidefinite; smallest eigenvalue {eig.min():.3g}")
    tr = float(np.trace(m).real)
    if tr <= tol:
        raise OpticsError("a density matrix must have a positive trace")
    return m / tr


def as_density(state: ArrayLike) -> Complex:
    """A ket (d,) or density matrix (d, d) as a density matrix of unit trace."""
    s = np.asarray(state, dtype=np.complex128)
    if s.ndim == 1:
        return density(normalize_ket(s))
    return normalize_density(s)


def partial_trace(rho: ArrayLike, keep: str) -> Complex:
    """Reduced 2x2 state of the joint 4x4 ``rho``, keeping ``"polarization"`` or ``"spatial"``.

    Works on stacks (..., 4, 4).
    """
    r = np.asarray(rho, dtype=np.complex128).reshape(*np.shape(rho)[:-2], 2, 2, 2, 2)
    if keep == "polarization":
        return np.einsum("...isjs->...ij", r)
    if keep == "spatial":
        return np.einsum("...pipj->...ij", r)
    raise ValueError(f"keep must be 'polarization' or 'spatial', got {keep!r}")


def ket_from_stokes(stokes: ArrayLike) -> Complex:
    """The pure state on the Poincare sphere at the unit vector (S1, S2, S3).

    Uses S1 = |a|^2 - |b|^2, S2 = 2 Re(a* b), S3 = 2 Im(a* b) for the ket (a, b), so that (1, i)/sqrt2
    has S3 = +1 (the handedness of sympy.physics.optics.polarization).
    """
    s = np.asarray(stokes, dtype=float)
    n = float(np.linalg.norm(s))
    if s.shape != (3,) or not np.isfinite(n) or n < 1e-12:
        raise OpticsError("a Stokes vector target needs three finite numbers [S1, S2, S3], not all zero")
    s1, s2, s3 = s / n
    theta = np.arccos(np.clip(s1, -1.0, 1.0))  # polar angle from S1
    phi = np.arctan2(s3, s2)  # relative phase of b against a
    return np.array([np.cos(theta / 2), np.sin(theta / 2) * np.exp(1j * phi)], dtype=np.complex128)
