"""Interior-point solver of the Gaussian likelihood over positive semidefinite matrices, with Newton polishing of a low-rank factor."""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from lightloom.sequencer.analysis.estimate.apg import GaussianProblem, Solution, WorkingBatch, rowdot
from lightloom.sequencer.analysis.estimate.blas import matmul_rows
from lightloom.sequencer.analysis.estimate.hermitian import to_matrix, to_vector
from lightloom.sequencer.analysis.estimate.projection import from_eigen

# interior start: the positive part of the linear inversion plus this fraction of its mean eigenvalue
# (or of the best fitting multiple of the identity, when that is larger) times the identity
_START_SHIFT = 1e-3
# in the Nesterov-Todd scaling, eigenvalues of X^1/2 G X^1/2 are kept above this fraction of mu
_DUAL_FLOOR = 0.1
# each step aims at this fraction of the duality measure, 2 (certified gap) / d, which is mu on the
# central path ...
_CENTRING = 0.1
# ... but lowers the barrier weight mu by at most this factor per step (faster cuts jam near the boundary)
_LARGEST_CUT = 0.05
# mu is lowered after a step this long or a Newton decrement below 1 (the iterate is then near the path)
_FULL_STEP = 0.8
# a step keeps every eigenvalue of X above this fraction of its value (rounding stays far below)
_BOUNDARY_KEEP = 1e-3
# safeguarded Newton iterations of the exact line search (it converges in a handful)
_LINE_ITERATIONS = 12
# mu need not fall below this fraction of tol / d: on the central path the certificate is about mu d / 2
_MU_FLOOR = 0.1
# a data set whose certificate (of its iterate or polished point) has not fallen by _STALL_GAIN within
# _STALL_AFTER steps is handed back to the caller
_STALL_AFTER = 8
_STALL_GAIN = 0.5
# Newton steps on the factor L (X = L L^dagger) tried after each interior-point step
_POLISH_STEPS = 3
# polishing starts once the interior iterate is certified within this (log-likelihood units)
_POLISH_BELOW = 10.0
# an eigen-direction of X counts as part of the optimal face when its size, measured in the metric of
# H, exceeds that of the gradient along it, measured in the metric of H^-1 (this ratio of the two)
_FACE_RATIO = 1.0


@lru_cache(maxsize=8)
def _basis_entries(d: int) -> tuple[np.ndarray, np.ndarray]:
    """Where the coordinate basis matrices B_k have their (at most two) entries, and the entries.

    Returns positions (2, d*d) into the row-major vec of a d x d matrix and values (2, d*d) complex:
    B_k = sum_s values[s, k] e(positions[s, k]), with a zero second value for diagonal k.
    """
    basis = to_matrix(np.eye(d * d)).reshape(d * d, d * d)
    order = np.argsort(-np.abs(basis), axis=1, kind="stable")[:, :2].T
    values = np.take_along_axis(basis.T, order, axis=0)
    order.setflags(write=False)
    values.setflags(write=False)
    return order, values


def _hermitian_adjoint(a: np.ndarray) -> np.ndarray:
    return np.conj(np.swapaxes(a, -1, -2))


def _congruence(w: np.ndarray) -> np.ndarray:
    """K (batch, m, m): the coordinates of the map Delta -> W Delta W for Hermitian W (batch, d, d).

    Row-major vec(W Delta W) = (W kron W^T) vec(Delta), and K = Re E^H (W kron W^T) E with E the
    vecs of the basis matrices; E has at most two entries per column, so its products are gathers.
    """
    b, d, _ = w.shape
    kron = (w[:, :, None, :, None] * np.swapaxes(w, 1, 2)[:, None, :, None, :]).reshape(b, d * d, d * d)
    where, value = _basis_entries(d)
    right = kron[:, :, where[0]] * value[0] + kron[:, :, where[1]] * value[1]
    return np.real(np.conj(value[0])[:, None] * right[:, where[0], :]
                   + np.conj(value[1])[:, None] * right[:, where[1], :])


def _jacobi_solve(matrix: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve matrix @ x = rhs per row, symmetrically scaled to a unit diagonal first (the diagonal spans decades).

    Rows whose matrix is singular in floating point (only after rounding broke an iterate) come back
    as NaN, which the caller treats as a stall.
    """
    s = 1.0 / np.sqrt(np.abs(np.einsum("bii->bi", matrix)))
    scaled = matrix * s[:, :, None] * s[:, None, :]
    try:
        return s * np.linalg.solve(scaled, (rhs * s)[..., None])[..., 0]
    except np.linalg.LinAlgError:
        return np.full(rhs.shape, np.nan)


def _newton_direction(problem: GaussianProblem, lam: np.ndarray, vec: np.ndarray, grad: np.ndarray,
                      mu: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Step towards the barrier minimiser of q(x) - mu log det X, and its Newton decrement.

    The Hessian of the barrier, mu X^-1 (x) X^-1, is replaced by the Nesterov-Todd scaling
    W^-1 (x) W^-1 with W Z W = X (Nesterov, Todd, Math. Oper. Res. 22, 1 (1997); Todd, Toh, Tutuncu,
    SIAM J. Optim. 8, 769 (1998)) for the dual estimate Z = G, the gradient of q (clamped to stay
    positive). Both agree on the central path (G = mu X^-1); off it the scaled
    matrix knows how far the complementarity X G is from mu, so that a cut of mu is followed in about
    one step, where the pure primal direction overshoots and needs several. Either matrix is positive
    definite, so the step descends on the barrier function of this mu.
    """
    root = np.sqrt(lam)
    x_half = from_eigen(vec, root)
    x_minus_half = from_eigen(vec, 1.0 / root)
    s_w, s_v = np.linalg.eigh(x_half @ to_matrix(grad) @ x_half)
    s_w = np.maximum(s_w, _DUAL_FLOOR * mu[:, None])
    w_inv = x_minus_half @ from_eigen(s_v, np.sqrt(s_w)) @ x_minus_half
    matrix = 2.0 * problem.hess[None, :, :] + _congruence(w_inv)
    rhs = mu[:, None] * to_vector(from_eigen(vec, 1.0 / lam)) - grad
    step = _jacobi_solve(matrix, rhs)
    decrement = np.sqrt(np.maximum(rowdot(step, rhs), 0.0) / mu)
    return step, decrement


def _barrier_step_length(problem: GaussianProblem, lam: np.ndarray, vec: np.ndarray, grad: np.ndarray,
                         step: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """Exact minimiser t of the barrier function along x + t dx, kept inside the cone.

    Along the line, q changes by a t + b t^2 (a = G.dx, b = dx.H.dx) and -mu log det X by
    -mu sum_j log(1 + t nu_j), nu the eigenvalues of X^-1/2 dX X^-1/2 (Boyd, Vandenberghe, Convex
    Optimization (2004), sec. 3.1.5): a convex function of one variable, minimised by Newton's method
    inside the bracket [0, t_max) where X + t dX stays positive definite.
    """
    delta = _hermitian_adjoint(vec) @ to_matrix(step) @ vec
    nu = np.linalg.eigvalsh(delta / np.sqrt(lam[:, :, None] * lam[:, None, :]))
    a = rowdot(grad, step)
    b = rowdot(matmul_rows(step, problem.hess), step)
    lowest = nu[:, 0]
    shrinking = lowest < 0
    reach = np.full(lowest.shape, np.inf)
    reach[shrinking] = -1.0 / lowest[shrinking]
    low = np.zeros_like(a)
    high = reach.copy()
    t = np.where(reach > 1.0, 1.0, 0.5 * reach)
    for _ in range(_LINE_ITERATIONS):
        ratio = nu / (1.0 + t[:, None] * nu)
        slope = a + 2.0 * b * t - mu * np.sum(ratio, axis=1)
        curvature = 2.0 * b + mu * np.sum(ratio * ratio, axis=1)
        rising = slope > 0
        high = np.where(rising, t, high)
        low = np.where(rising, low, t)
        newton = t - slope / curvature
        fallback = np.where(np.isfinite(high), 0.5 * (low + high), 2.0 * t)
        t = np.where((newton > low) & (newton < high), newton, fallback)
    return np.minimum(t, (1.0 - _BOUNDARY_KEEP) * reach)


def _face_rank(problem: GaussianProblem, lam: np.ndarray, vec: np.ndarray, grad: np.ndarray) -> np.ndarray:
    """Estimated rank of the optimum from an interior iterate, by complementarity (batch,), in [1, d - 1].

    At the optimum X G = 0: along each eigenvector u of X either the eigenvalue lam or the curvature
    gamma = u^dagger G u vanishes. Compared in the metrics that make the two scale-free,
    lam sqrt(z.H z) against gamma sqrt(z.H^-1 z) with z the coordinates of u u^dagger, a direction
    belongs to the face where the first dominates.
    """
    d = lam.shape[1]
    gamma = np.real(np.einsum("zai,zac,zci->zi", np.conj(vec), to_matrix(grad), vec))
    z = to_vector(vec.transpose(0, 2, 1)[:, :, :, None] * np.conj(vec.transpose(0, 2, 1))[:, :, None, :])
    size_x = lam * np.sqrt(np.sum(matmul_rows(z, problem.hess) * z, axis=2))
    size_g = np.maximum(gamma, 0.0) * np.sqrt(np.sum(matmul_rows(z, problem.hess_inv) * z, axis=2))
    return np.clip(np.sum(size_x > _FACE_RATIO * size_g, axis=1), 1, d - 1)


@lru_cache(maxsize=16)
def _hermitian_units(r: int) -> np.ndarray:
    """The r*r coordinate basis matrices of r x r Hermitian matrices, (r*r, r, r)."""
    units = to_matrix(np.eye(r * r))
    units.setflags(write=False)
    return units


def _factor_changes(vec: np.ndarray, r: int) -> np.ndarray:
    """A basis (batch, 2 d r - r^2, d, r) of the changes of L = V_r Lam_r^1/2 that are not gauge changes.

    dL = V_r A + V_perp B with A Hermitian (r^2 real parameters) and B any complex (d - r) x r
    matrix: together with the gauge changes L -> L Omega (Omega anti-Hermitian) they span every dL.
    """
    b, d, _ = vec.shape
    inside = vec[:, None, :, d - r:] @ _hermitian_units(r)[None, :, :, :]
    across = np.einsum("bia,kl->bakil", vec[:, :, : d - r], np.eye(r)).reshape(b, (d - r) * r, d, r)
    return np.concatenate([inside, across, 1j * across], axis=1)


def _factor_newton_step(problem: GaussianProblem, values: np.ndarray, lam: np.ndarray, vec: np.ndarray,
                        r: int) -> np.ndarray:
    """One Newton step on q(L L^dagger) over the factor L = V_r Lam_r^1/2 of X's leading r eigenpairs.

    Returns the coordinates (batch, m) of the new L L^dagger. The Cholesky-factor parametrisation of
    James, Kwiat, Munro, White, PRA 64, 052312 (2001), kept at the rank r of the optimum (Burer,
    Monteiro, Math. Program. 95, 329 (2003)): L L^dagger is positive semidefinite for any L, and near
    an optimum of that rank Newton's method converges quadratically. Along changes dL = sum_k xi_k D_k
    (`_factor_changes`, which leave out the gauge L -> L U that does not change X), with P_k the
    coordinates of D_k L^dagger + L D_k^dagger, q changes to second order by
    (P g).xi + xi.(P H P^T + C) xi, C_kl = Re tr(D_k^dagger G D_l) (G the gradient matrix, g its
    coordinates), so the step solves (P H P^T + C) xi = -P g / 2.
    """
    b, d = lam.shape
    changes = _factor_changes(vec, r)
    factor = vec[:, :, d - r:] * np.sqrt(lam[:, None, d - r:])
    moved = changes @ _hermitian_adjoint(factor)[:, None, :, :]
    p = to_vector(moved + _hermitian_adjoint(moved))
    x = to_vector(factor @ _hermitian_adjoint(factor))
    grad = problem.gradient(x, values)
    count = changes.shape[1]
    flat = changes.reshape(b, count, d * r)
    turned = (to_matrix(grad)[:, None, :, :] @ changes).reshape(b, count, d * r)
    matrix = matmul_rows(p, problem.hess) @ np.swapaxes(p, 1, 2) + np.real(np.conj(flat) @ np.swapaxes(turned, 1, 2))
    rhs = -0.5 * np.einsum("bkm,bm->bk", p, grad)
    xi = _jacobi_solve(matrix, rhs)
    factor = factor + np.einsum("bk,bkir->bir", xi, changes)
    return to_vector(factor @ _hermitian_adjoint(factor))


def _polish(problem: GaussianProblem, values: np.ndarray, lam: np.ndarray, vec: np.ndarray,
            rank: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A point (batch, m) after a few factor Newton steps, and its certificate (batch,; +inf if it failed).

    The factor starts from the leading `rank` eigenpairs of the interior iterate, L = V_r Lam_r^1/2,
    and is refactored that way after each step.
    """
    b, d = lam.shape
    out_x = np.zeros((b, d * d))
    out_gap = np.full(b, np.inf)
    for r in np.unique(rank[rank >= 1]):
        rows = np.flatnonzero(rank == r)
        lam_r, vec_r, v = lam[rows], vec[rows], values[rows]
        with np.errstate(all="ignore"):
            for _ in range(_POLISH_STEPS):
                x = _factor_newton_step(problem, v, lam_r, vec_r, int(r))
                usable = np.all(np.isfinite(x), axis=1)
                rows, x, v = rows[usable], x[usable], v[usable]
                lam_r, vec_r = np.linalg.eigh(to_matrix(x))
        if rows.size:
            out_x[rows] = x
            out_gap[rows] = problem.certificate(x, problem.gradient(x, v), (lam_r, vec_r))
    return out_x, out_gap


def solve_gaussian_barrier(problem: GaussianProblem, values: np.ndarray, x0: np.ndarray, tol: float,
                           max_iterations: int) -> Solution:
    """Minimise q(x) over positive semidefinite X for each row of `values`, from positive semidefinite x0.

    A primal interior-point method: Newton steps on q(x) - mu log det X (Nesterov-Todd scaled, see
    `_newton_direction`) with an exact line search, lowering mu towards a tenth of the duality
    measure 2 (certified gap) / d, which is about mu on the central path and, off it, keeps mu from
    falling faster than the iterate approaches the optimum (Boyd, Vandenberghe, Convex Optimization
    (2004), ch. 11; Nesterov, Nemirovskii, Interior-Point Polynomial Algorithms in Convex Programming
    (1994); all sources in this module cited from memory). Newton's method is invariant under linear
    changes of variables, so its step count does not follow the conditioning of H, which slows
    projected gradient down on heteroscedastic readings (O(sqrt(kappa)) steps even with acceleration).

    Once an iterate is certified within 10 (log-likelihood units), a few Newton steps on a low-rank
    factor of it (`_factor_newton_step`, rank from `_face_rank`) try to land on the optimal face
    exactly. The returned point of each row is the best certified one seen (x0, the iterates, the
    polished points), with `GaussianProblem.certificate`. A row stops when that is <= tol, and also,
    with gap > tol and fewer than max_iterations steps, when it stalls (its certificate not halved
    in 8 steps, or rounding at the boundary of the cone), so that the caller can finish it by
    another method.
    """
    batch, m = x0.shape
    d = problem.dim
    identity = to_vector(np.eye(d))
    gap0 = problem.certificate(x0, problem.gradient(x0, values))
    c = matmul_rows(values * problem.weights, problem.design)
    fitted_identity = np.abs(c @ identity) / float(identity @ problem.hess @ identity)
    shift = _START_SHIFT * np.maximum(np.maximum(x0 @ identity / d, fitted_identity), np.finfo(float).tiny)
    x = x0 + shift[:, None] * identity[None, :]
    lam, vec = np.linalg.eigh(to_matrix(x))
    grad = problem.gradient(x, values)
    gap = problem.certificate(x, grad, (lam, vec))
    start_better = gap < gap0
    best_x = np.where(start_better[:, None], x, x0)
    best_gap = np.where(start_better, gap, gap0)
    mu_floor = _MU_FLOOR * tol / d
    # on the central path every eigenvalue of X^1/2 G X^1/2 equals mu: start from their median size
    x_half = from_eigen(vec, np.sqrt(lam))
    complementarity = np.linalg.eigvalsh(x_half @ to_matrix(grad) @ x_half)
    mu = np.maximum(np.median(np.abs(complementarity), axis=1), mu_floor)
    work = WorkingBatch(batch, m, v=values, x=x, lam=lam, vec=vec, grad=grad, mu=mu, best_x=best_x,
                        best_gap=best_gap, mark=gap, since=np.zeros(batch, dtype=int))
    work.retire(best_gap <= tol, best_x, best_gap, 0)
    iteration = 0
    while work.size and iteration < max_iterations:
        iteration += 1
        v, x, lam, vec, grad, mu = work["v"], work["x"], work["lam"], work["vec"], work["grad"], work["mu"]
        with np.errstate(all="ignore"):
            step, decrement = _newton_direction(problem, lam, vec, grad, mu)
            t = _barrier_step_length(problem, lam, vec, grad, step, mu)
        moved = x + t[:, None] * step
        inside = np.all(np.isfinite(moved), axis=1)
        x = np.where(inside[:, None], moved, x)
        lam, vec = np.linalg.eigh(to_matrix(x))
        grad = problem.gradient(x, v)
        gap = problem.certificate(x, grad, (lam, vec))
        inside &= np.isfinite(gap) & (lam[:, 0] > 0)
        # on the central path the certificate is mu d / 2; off it, it still bounds the duality gap
        target = np.clip(_CENTRING * 2.0 * gap / d, _LARGEST_CUT * mu, mu)
        polished_x, polished_gap = np.zeros_like(x), np.full(gap.shape, np.inf)
        near = np.flatnonzero(inside & (gap <= _POLISH_BELOW))
        if near.size:
            polished_x[near], polished_gap[near] = _polish(problem, v[near], lam[near], vec[near],
                                                           _face_rank(problem, lam[near], vec[near], grad[near]))
        use_polished = polished_gap < gap
        candidate = np.where(use_polished[:, None], polished_x, x)
        gap = np.where(use_polished, polished_gap, gap)
        best_x, best_gap = work["best_x"], work["best_gap"]
        better = gap < best_gap
        best_x = np.where(better[:, None], candidate, best_x)
        best_gap = np.where(better, gap, best_gap)
        halved = gap <= _STALL_GAIN * work["mark"]
        work["mark"] = np.where(halved, gap, work["mark"])
        work["since"] = np.where(halved, 0, work["since"] + 1)
        centred = (decrement < 1.0) | (t > _FULL_STEP)
        work["mu"] = np.maximum(np.where(centred, target, mu), mu_floor)
        work["x"], work["lam"], work["vec"], work["grad"] = x, lam, vec, grad
        work["best_x"], work["best_gap"] = best_x, best_gap
        finished = (best_gap <= tol) | ~inside | (work["since"] >= _STALL_AFTER)
        work.retire(finished, best_x, best_gap, iteration)
    if work.size:
        work.retire(np.ones(work.size, dtype=bool), work["best_x"], work["best_gap"], iteration)
    return work.solution()
