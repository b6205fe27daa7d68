"""What a set of measurement operators determines: the whole state, single Stokes components, or less.

Pure linear algebra over the operators alone (no readings): a real functional tr(T X) of the
unknown (unnormalised) state T is fixed by noise-free readings tr(T E_i) exactly when X lies in
the real span of the E_i. A normalised Stokes component S_k = tr(T s_k) / tr(T s_0) therefore
needs both s_k and s_0 in the span; the whole d x d state needs the span to be all d*d Hermitian
matrices. The same test serves a protocol before it runs (operators from the compiled steps) and
a run part way through (operators of the readings recorded so far).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lightloom.sequencer.analysis.estimate.hermitian import to_vector
from lightloom.sequencer.optics.stokes import PAULI

FACTORS = ("polarization", "spatial")
# The basis pair whose two projectors measure each Stokes component, per factor (DESIGN.md).
BASIS_PAIRS = {
    "polarization": ("H/V", "D/A", "R/L"),
    "spatial": ("h/v", "d/a", "l+/l-"),
}
# Relative residual of the projection onto the span below which an operator counts as inside it.
SPAN_TOLERANCE = 1e-6


@dataclass(frozen=True)
class Determined:
    """What the operators fix.

    Attributes
    ----------
    state : bool. The whole d x d state (informationally complete).
    stokes : dict factor -> tuple of the Stokes indices k in 1..3 whose normalised S_k is fixed.
    parameters : int. Number of real parameters of the (unnormalised) state fixed (rank).
    dimension : int. d.
    correlations_missing : tuple of (j, k) pairs, j, k in 0..3, of joint correlations
        tr(T s_j (x) s_k) not fixed (joint space only).
    """

    state: bool
    stokes: dict[str, tuple[int, ...]]
    parameters: int
    dimension: int
    correlations_missing: tuple[tuple[int, int], ...] = ()

    @property
    def kind(self) -> str:
        """One of joint-state, polarization-state, spatial-state or partial (the dry-run vocabulary)."""
        if self.state:
            if self.dimension == 4:
                return "joint-state"
            return f"{next(iter(self.stokes))}-state"
        return "partial"

    def missing(self, analyzes: tuple[str, ...]) -> list[str]:
        """Plain statements of what the operators still lack, for the factors analysed."""
        if self.state:
            return []
        out: list[str] = []
        if self.dimension == 4 and len(analyzes) == 2:
            out.append(
                f"the joint 4x4 state: the readings fix {self.parameters} of its 16 real parameters"
            )
            named = [
                f"{BASIS_PAIRS['polarization'][j - 1]} x {BASIS_PAIRS['spatial'][k - 1]}"
                for j, k in self.correlations_missing if j > 0 and k > 0
            ]
            if named:
                out.append("joint settings lacking (polarization basis x spatial basis): " + ", ".join(named))
        elif self.dimension == 2:
            out.append(f"the 2x2 {analyzes[0]} state: the readings fix {self.parameters} of its 4 real parameters")
        for factor in analyzes:
            have = self.stokes.get(factor, ())
            lacking = [k for k in (1, 2, 3) if k not in have]
            if lacking:
                out.append(
                    f"{factor} Stokes " + ", ".join(f"S{k}" for k in lacking) + ": no complete "
                    + " or ".join(BASIS_PAIRS[factor][k - 1] for k in lacking) + " basis measured yet"
                )
        return out


def _in_span(basis: np.ndarray, x: np.ndarray) -> bool:
    """Whether vector x lies in the row space spanned by the orthonormal rows of ``basis``."""
    norm = float(np.linalg.norm(x))
    if norm == 0.0:
        return True
    residual = x - basis.T @ (basis @ x) if basis.size else x
    return float(np.linalg.norm(residual)) <= SPAN_TOLERANCE * norm


def _row_space(operators: np.ndarray) -> np.ndarray:
    """Orthonormal rows spanning the real span of the operators (as Hermitian coordinates)."""
    a = to_vector(np.asarray(operators, dtype=np.complex128))
    if a.shape[0] == 0:
        return np.zeros((0, a.shape[-1]))
    _, s, vt = np.linalg.svd(a, full_matrices=False)
    keep = s > SPAN_TOLERANCE * max(float(s[0]), np.finfo(float).tiny)
    return vt[keep]


def factor_observable(factor: str, k: int) -> np.ndarray:
    """The joint 4x4 observable s_k (x) I (polarization) or I (x) s_k (spatial)."""
    if factor == "polarization":
        return np.kron(PAULI[k], PAULI[0])
    if factor == "spatial":
        return np.kron(PAULI[0], PAULI[k])
    raise ValueError(f"factor must be 'polarization' or 'spatial', got {factor!r}")


def determined_by(operators: np.ndarray, analyzes: tuple[str, ...]) -> Determined:
    """What the measurement operators (n, d, d) fix, d = 4 (joint space) or 2 (one factor).

    For d = 2, ``analyzes`` names the single factor the 2x2 operators act on.
    """
    ops = np.asarray(operators, dtype=np.complex128)
    d = int(ops.shape[-1]) if ops.ndim == 3 else (2 if len(analyzes) == 1 else 4)
    if ops.ndim != 3 or ops.shape[0] == 0:
        return Determined(False, {f: () for f in analyzes}, 0, d, ())
    basis = _row_space(ops)
    rank = int(basis.shape[0])
    if d == 2:
        factor = analyzes[0]
        vec = to_vector(PAULI)
        fixed = tuple(k for k in (1, 2, 3) if _in_span(basis, vec[0]) and _in_span(basis, vec[k]))
        return Determined(rank == 4, {factor: fixed}, rank, 2, ())
    stokes: dict[str, tuple[int, ...]] = {}
    total = to_vector(np.eye(4, dtype=np.complex128))
    has_total = _in_span(basis, total)
    for factor in FACTORS:
        stokes[factor] = tuple(
            k for k in (1, 2, 3) if has_total and _in_span(basis, to_vector(factor_observable(factor, k)))
        )
    missing = tuple(
        (j, k) for j in range(4) for k in range(4)
        if not _in_span(basis, to_vector(np.kron(PAULI[j], PAULI[k])))
    )
    return Determined(rank == 16, stokes, rank, 4, missing)
