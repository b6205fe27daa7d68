"""From joint (polarization (x) spatial) operators to operators on the one factor a protocol analyses.

A port reading estimates tr(rho E) with E on the joint space. A single-factor protocol asks for the
reduced state rho_F = Tr_O(rho) of the analysed factor F, with nothing assumed about the other
factor O: its state may be anything, even entangled with F. A reading then speaks about rho_F
alone only through an operator of the form A (x) I_O, since tr(rho (A (x) I)) = tr(rho_F A).

So the readings are combined, never by the projector's label but by what the operators say:

1. readings (sufficient statistics per setting and port) whose F-parts Tr_O(E) / tr(E) agree are
   one cluster (the same projector on F, seen at different ports or settings: the two sorter
   outputs behind one splitter port, or the expansion steps that route h and then v to a port);
2. in each cluster, non-negative weights c_j make sum_j c_j E_j as close as possible to A (x) I
   (non-negative least squares on the O-parts Tr_F(E_j)); the weighted sum of the readings then
   estimates tr(rho_F A) with A = Tr_O(sum_j c_j E_j) / 2, exactly when the residual vanishes;
3. a cluster whose ports do not cover the other factor (a single detector behind one sorter
   output, say) cannot be made exact. If every cluster sees the other factor through the same
   filter B (the same port set throughout), the readings are tr(rho (A (x) B)) and the estimate is
   the state of F in the part of the beam that B passes (conditional state); it equals the reduced
   state whenever the source is a product state; the intensity is then the power B passes (the
   operator is Tr_O(E), B being of unit trace like a sorter output's filter).
   Otherwise the reduction takes Tr_O(E) / 2, which assumes the other factor unpolarized. When
   some clusters are exact and others not (a run stopped before a projector's partner setting),
   only the exact ones are used. The result says which case applied (``ReductionInfo``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import nnls

from lightloom.sequencer.optics.states import partial_trace

OTHER = {"polarization": "spatial", "spatial": "polarization"}
# Two F-parts (trace-normalised) closer than this in Frobenius norm are the same projector. Distinct
# projectors of a tomography set differ by about 0.7; read-back scatter moves one by about 0.01.
CLUSTER_TOLERANCE = 0.05
# Relative residual of sum c_j E_j against A (x) I below which a combination counts as exact.
EXACT_TOLERANCE = 2e-2

CASES = ("exact", "conditional", "assumed-unpolarized")


@dataclass(frozen=True)
class ReductionInfo:
    """How joint operators were reduced to one factor.

    Attributes
    ----------
    case : "exact" (every combination is A (x) I), "conditional" (one filter B on the other
        factor throughout: the state of F in the part of the beam B passes) or
        "assumed-unpolarized" (the other factor assumed maximally mixed where not covered).
    clusters : int. Projectors on F after combination.
    exact_clusters : int. Of those, combinations that are exactly A (x) I (when there are any,
        only these are used: the others lack their partners on the other factor).
    worst_residual : float. Largest relative residual among the combinations used.
    """

    case: str
    clusters: int
    exact_clusters: int
    worst_residual: float

    def describe(self, factor: str) -> str:
        other = OTHER[factor]
        if self.case == "exact":
            return (f"readings at ports and settings with the same {factor} projector combined so that "
                    f"the {other} factor is summed over (exact: Tr over {other}, nothing assumed about it)")
        if self.case == "conditional":
            return (f"every reading passes the same {other} filter: the result is the {factor} state of "
                    f"the light that filter passes (the reduced state if the source is a product state)")
        return (f"the ports do not cover the {other} factor for every {factor} projector: "
                f"Tr over {other} / 2, which assumes the {other} factor unpolarized")


def _traced_out(ops: np.ndarray, factor: str) -> np.ndarray:
    """Tr over the other factor: the F-part (…, 2, 2)."""
    return partial_trace(ops, factor)


def _kept_other(ops: np.ndarray, factor: str) -> np.ndarray:
    """Tr over F: the O-part (…, 2, 2)."""
    return partial_trace(ops, OTHER[factor])


def _coords2(m: np.ndarray) -> np.ndarray:
    """Real coordinates (…, 4) of 2x2 Hermitian matrices (Pauli components)."""
    return np.stack([(m[..., 0, 0] + m[..., 1, 1]).real, (m[..., 0, 0] - m[..., 1, 1]).real,
                     2 * m[..., 0, 1].real, -2 * m[..., 0, 1].imag], axis=-1)


def clusters_of(ops: np.ndarray, factor: str) -> np.ndarray:
    """Cluster index (m,) of each joint operator by its trace-normalised F-part."""
    part = _coords2(_traced_out(ops, factor))
    scale = part[:, :1]
    direction = np.divide(part, scale, out=np.zeros_like(part), where=np.abs(scale) > 0)
    labels = np.full(len(ops), -1, dtype=np.int64)
    reps: list[np.ndarray] = []
    for i in range(len(ops)):
        if reps:
            dist = np.linalg.norm(np.asarray(reps) - direction[i], axis=1)
            j = int(np.argmin(dist))
            if dist[j] <= CLUSTER_TOLERANCE:
                labels[i] = j
                continue
        labels[i] = len(reps)
        reps.append(direction[i])
    return labels


def _relative_residual(total: np.ndarray, factor: str) -> float:
    """||E - Tr_O(E)/2 (x) I|| / ||E|| for one joint operator E."""
    reduced = _traced_out(total, factor) / 2.0
    eye = np.eye(2)
    product = np.kron(reduced, eye) if factor == "polarization" else np.kron(eye, reduced)
    norm = float(np.linalg.norm(total))
    return float(np.linalg.norm(total - product)) / norm if norm > 0 else 0.0


def reduce_to_factor(
    ops: np.ndarray, values: np.ndarray, variance: np.ndarray | None, factor: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None, ReductionInfo, np.ndarray]:
    """Operators on ``factor`` and the combined readings they predict.

    Parameters
    ----------
    ops : ndarray (m, 4, 4). Joint operators of m readings (or sums of readings).
    values : ndarray (m,). The readings (W or counts).
    variance : ndarray (m,) or None. Variance of each reading (None for counts).
    factor : "polarization" or "spatial".

    Returns
    -------
    (operators (k, 2, 2), values (k,), variance (k,) or None, ReductionInfo, combination (k, m):
    the weight of each input row in each output row).
    """
    labels = clusters_of(ops, factor)
    n_clusters = int(labels.max()) + 1 if len(labels) else 0
    other_parts = _coords2(_kept_other(ops, factor))
    target = np.array([2.0, 0.0, 0.0, 0.0])
    weights = np.ones(len(ops))
    residuals = np.zeros(n_clusters)
    for c in range(n_clusters):
        members = np.flatnonzero(labels == c)
        coef, _ = nnls(other_parts[members].T, target)
        # Scaled so that the largest weight is one: counts stay counts where every weight is one.
        coef = coef / coef.max() if np.any(coef > 0) else np.ones(len(members))
        weights[members] = coef
        total = np.tensordot(coef, ops[members], axes=1)
        residuals[c] = _relative_residual(total, factor)
    exact = residuals <= EXACT_TOLERANCE
    if exact.any():
        # Projectors whose other-factor partners are not (yet) measured are left out rather than
        # biased by an assumption; the caller reports what the remaining ones determine.
        case = "exact"
        weights = np.where(exact[labels], weights, 0.0)
    else:
        directions = other_parts / np.where(np.abs(other_parts[:, :1]) > 0, other_parts[:, :1], 1.0)
        same_filter = np.ptp(directions, axis=0).max() <= CLUSTER_TOLERANCE if len(ops) else True
        case = "conditional" if same_filter else "assumed-unpolarized"
        # Without an exact combination, weights of one keep every reading (the plain sum per
        # cluster): the other factor's filter then only scales each cluster alike (conditional)
        # or is assumed unpolarized.
        weights = np.where(exact[labels], weights, 1.0)
    kept = np.flatnonzero(exact) if case == "exact" else np.arange(n_clusters)
    index = np.full(n_clusters, -1, dtype=np.int64)
    index[kept] = np.arange(len(kept))
    used = weights > 0
    rows = index[labels[used]]
    w_ops = ops[used] * weights[used][:, None, None]
    red_ops = np.zeros((len(kept), 4, 4), dtype=np.complex128)
    np.add.at(red_ops, rows, w_ops)
    red_vals = np.bincount(rows, weights=(weights * values)[used], minlength=len(kept))
    red_var = None
    if variance is not None:
        red_var = np.bincount(rows, weights=(weights**2 * variance)[used], minlength=len(kept))
    info = ReductionInfo(case, n_clusters, int(exact.sum()),
                         float(residuals[kept].max()) if len(kept) else 0.0)
    combination = np.zeros((len(kept), len(ops)))
    combination[rows, np.flatnonzero(used)] = weights[used]
    # A (x) I and the unpolarized assumption: Tr_O / 2 (tr(rho (A (x) I)) = tr(rho_F A)). One filter B
    # on O (a sorter output: trace 1, the two outputs summing to I): Tr_O(A (x) B) = A, so the fitted
    # intensity is the power of the light B passes, not twice it.
    divisor = 1.0 if case == "conditional" else 2.0
    return _traced_out(red_ops, factor) / divisor, red_vals, red_var, info, combination
