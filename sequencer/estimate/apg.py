"""Accelerated projected-gradient solvers, vectorised over a batch, for the Poisson and Gaussian tomography likelihoods."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from sequencer.estimate.blas import matmul_rows
from sequencer.estimate.hermitian import to_matrix, to_vector
from sequencer.estimate.projection import from_eigen, simplex_from_ascending

_STEP_SHRINK = 0.5
_STEP_GROWTH = 1.1
_BACKTRACK_LIMIT = 60
_SERIES_BELOW = 1e-4
_RESYNC_EVERY = 50


@dataclass(frozen=True)
class Solution:
    """Solver output for a batch: Hermitian coordinates x (batch, d*d), iterations (batch,), certified gap (batch,)."""

    x: np.ndarray
    iterations: np.ndarray
    gap: np.ndarray


def _eig_to_coordinates(vecs: np.ndarray, lam: np.ndarray) -> np.ndarray:
    return to_vector(from_eigen(vecs, lam))


def project_density_coordinates(x: np.ndarray) -> np.ndarray:
    """Closest density matrix (Smolin, Gambetta, Smith, PRL 108, 070502 (2012)), in Hermitian coordinates."""
    return _project_density_with_basis(x)[0]


def _project_density_with_basis(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The projection and the eigenvectors (batch, d, d) of the projected state."""
    w, v = np.linalg.eigh(to_matrix(x))
    return _eig_to_coordinates(v, simplex_from_ascending(w)), v


def project_positive_coordinates(x: np.ndarray) -> np.ndarray:
    """Closest positive semidefinite matrix (negative eigenvalues set to zero), in Hermitian coordinates."""
    w, v = np.linalg.eigh(to_matrix(x))
    return _eig_to_coordinates(v, np.maximum(w, 0.0))


def _rowdot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.einsum("ij,ij->i", a, b)


def _excess_log(u: np.ndarray) -> np.ndarray:
    """u - log(1 + u) for u > -1, row by row: by its series in rows where every |u| is small.

    The plain form cancels for tiny u; in a row with some |u| >= 1e-4 its absolute error,
    eps |u|, is negligible against the row's sum, which is at least of order max u^2.
    """
    out = np.empty_like(u)
    small = np.max(np.abs(u), axis=-1) < _SERIES_BELOW
    us = u[small]
    out[small] = us * us * (0.5 - us * (1.0 / 3.0 - us * 0.25))
    ul = u[~small]
    out[~small] = ul - np.log1p(ul)
    return out


class _Batch:
    """Working arrays of the data sets still iterating; finished rows are written out and dropped."""

    def __init__(self, size: int, dim: int, **arrays: np.ndarray) -> None:
        self.index = np.arange(size)
        self.arrays = dict(arrays)
        self.out_x = np.empty((size, dim))
        self.out_iterations = np.zeros(size, dtype=int)
        self.out_gap = np.full(size, np.inf)

    def __getitem__(self, name: str) -> np.ndarray:
        return self.arrays[name]

    def __setitem__(self, name: str, value: np.ndarray) -> None:
        self.arrays[name] = value

    @property
    def size(self) -> int:
        return int(self.index.size)

    def retire(self, finished: np.ndarray, x: np.ndarray, gap: np.ndarray, iterations: int) -> None:
        if not np.any(finished):
            return
        rows = self.index[finished]
        self.out_x[rows], self.out_gap[rows], self.out_iterations[rows] = x[finished], gap[finished], iterations
        keep = ~finished
        self.index = self.index[keep]
        self.arrays = {k: a[keep] for k, a in self.arrays.items()}

    def solution(self) -> Solution:
        return Solution(x=self.out_x, iterations=self.out_iterations, gap=self.out_gap)


def _inverse_probabilities(p: np.ndarray, used: np.ndarray) -> np.ndarray:
    """1 / p_i where f_i > 0, and 0 where f_i = 0 (those terms carry no weight and p_i may vanish)."""
    return np.divide(1.0, p, out=np.zeros_like(p), where=used)


def _poisson_ratio(p: np.ndarray, f: np.ndarray, used: np.ndarray) -> np.ndarray:
    return f * _inverse_probabilities(p, used)


def _poisson_gap(x: np.ndarray, f: np.ndarray, used: np.ndarray, n_tot: np.ndarray, design: np.ndarray,
                 identity: np.ndarray, screen: tuple[np.ndarray, np.ndarray, float] | None = None) -> np.ndarray:
    """Certificate n_tot log lambda_max(R) per row, computed afresh from the state coordinates x.

    With `screen` = (p, basis, tol), the running probabilities p and the eigenvectors of the state
    first give Rayleigh quotients of R - 1 (lower bounds on lambda_max - 1); rows whose bound already
    exceeds tol cannot stop yet, skip the eigenvalue solve and get +inf. Most iterations are such.
    """
    gap = np.full(x.shape[0], np.inf)
    if screen is None:
        todo = np.arange(x.shape[0])
    else:
        p, basis, tol = screen
        r = to_matrix(matmul_rows(_poisson_ratio(p, f, used), design) - identity)
        rayleigh = np.real(np.sum(np.conj(basis) * (r @ basis), axis=-2))
        lower = n_tot * np.log1p(np.maximum(np.max(rayleigh, axis=-1), 0.0))
        todo = np.flatnonzero(lower <= tol)
    if todo.size:
        p_exact = matmul_rows(x[todo], design.T)
        r_exact = to_matrix(matmul_rows(_poisson_ratio(p_exact, f[todo], used[todo]), design) - identity)
        lam = np.linalg.eigvalsh(r_exact)[:, -1]
        gap[todo] = n_tot[todo] * np.log1p(np.maximum(lam, 0.0))
    return gap


def _poisson_bregman(inverse_p: np.ndarray, dp: np.ndarray, f: np.ndarray) -> np.ndarray:
    """Second-order part of the change of -sum f log p for p -> p + dp: sum f (u - log1p u), u = dp / p.

    No cancellation, unlike a difference of objective values. The log sum p term of the scale-free
    objective adds nothing here: both points have unit trace, so sum dp = tr(delta) = 0. A step that
    takes any used p_i below half its value counts as failing (+inf), which also keeps p_i > 0.
    """
    u = dp * inverse_p
    value = np.sum(f * _excess_log(np.maximum(u, -0.5)), axis=1)
    value[np.any(u <= -0.5, axis=1)] = np.inf
    return value


def solve_poisson(design: np.ndarray, f: np.ndarray, n_tot: np.ndarray, x0: np.ndarray, tol: float,
                  max_iterations: int) -> Solution:
    """Maximise sum_i f_i log tr(sigma F_i) over density matrices sigma, for each row of f.

    Parameters
    ----------
    design : ndarray (n, d*d). Coordinates of F_i, which must sum to the identity.
    f : ndarray (batch, n). Relative frequencies (rows sum to 1).
    n_tot : ndarray (batch,). Total counts: the certificate is n_tot log lambda_max(R).
    x0 : ndarray (batch, d*d). Coordinates of unit-trace starting states inside the domain.

    The objective is used in its scale-free form -sum f log p + log sum p (equal on unit-trace
    states, gradient -(R - 1)), so that the trace rounding of each projection does not swamp the
    tiny changes near the optimum, and the line search compares only second-order terms.
    Accelerated projected gradient with backtracking after Shang, Zhang, Ng, PRA 95, 062336 (2017).
    """
    batch, dim = x0.shape
    d = int(round(np.sqrt(dim)))
    identity = to_vector(np.eye(d))
    p0 = matmul_rows(x0, design.T)
    work = _Batch(batch, dim, f=f, used=f > 0, n_tot=n_tot, x=x0.copy(), p=p0, y=x0.copy(), py=p0.copy(),
                  theta=np.ones(batch), step=np.ones(batch))
    gap = _poisson_gap(x0, f, f > 0, n_tot, design, identity)
    work.retire(gap <= tol, x0, gap, 0)
    iteration = 0
    while work.size and iteration < max_iterations:
        iteration += 1
        fw, used, x, p, y, py = work["f"], work["used"], work["x"], work["p"], work["y"], work["py"]
        outside = np.any(used & (py <= 0), axis=1)
        if np.any(outside):
            # the extrapolated point left the state space: restart the momentum from the iterate
            y, py = y.copy(), py.copy()
            y[outside], py[outside] = x[outside], p[outside]
            work["theta"][outside] = 1.0
        inverse_py = _inverse_probabilities(py, used)
        grad = matmul_rows(fw * inverse_py, design) - identity
        t = work["step"].copy()
        z, basis = _project_density_with_basis(y + t[:, None] * grad)
        delta = z - y
        dp = matmul_rows(delta, design.T)
        ok = _poisson_bregman(inverse_py, dp, fw) <= _rowdot(delta, delta) / (2.0 * t)
        pending = np.flatnonzero(~ok)
        for _trial in range(_BACKTRACK_LIMIT):
            if pending.size == 0:
                break
            t[pending] *= _STEP_SHRINK
            cand, cand_basis = _project_density_with_basis(y[pending] + t[pending, None] * grad[pending])
            dc = cand - y[pending]
            dpc = matmul_rows(dc, design.T)
            good = _poisson_bregman(inverse_py[pending], dpc, fw[pending]) <= _rowdot(dc, dc) / (2.0 * t[pending])
            z[pending[good]], dp[pending[good]], basis[pending[good]] = cand[good], dpc[good], cand_basis[good]
            pending = pending[~good]
        if pending.size:
            z[pending], dp[pending] = x[pending], p[pending] - py[pending]
            basis[pending] = np.linalg.eigh(to_matrix(x[pending]))[1]
        # the running probabilities follow the iterates by linear updates; resynchronise now and then
        pz = matmul_rows(z, design.T) if iteration % _RESYNC_EVERY == 0 else py + dp
        # gradient restart (O'Donoghue, Candes, Found. Comput. Math. 15, 715 (2015)): drop the momentum
        # once the step points against the gradient; it needs no objective values, which rounding blurs
        restart = _rowdot(grad, z - x) < 0
        theta = np.where(restart, 1.0, work["theta"])
        theta_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * theta**2))
        beta = np.where(restart, 0.0, (theta - 1.0) / theta_next)[:, None]
        work["y"] = z + beta * (z - x)
        work["py"] = pz + beta * (pz - p)
        work["x"], work["p"] = z, pz
        work["theta"] = np.where(restart, 1.0, theta_next)
        work["step"] = t * _STEP_GROWTH
        gap = _poisson_gap(z, fw, used, work["n_tot"], design, identity, (pz, basis, tol))
        work.retire(gap <= tol, z, gap, iteration)
    if work.size:
        work.retire(np.ones(work.size, dtype=bool), work["x"],
                    _poisson_gap(work["x"], work["f"], work["used"], work["n_tot"], design, identity), iteration)
    return work.solution()


def solve_gaussian(hess: np.ndarray, hess_inv: np.ndarray, c0: np.ndarray, x0: np.ndarray, tol: float,
                   max_iterations: int) -> Solution:
    """Minimise q(x) = x.H x - 2 c0.x + const over positive semidefinite X, for each row of c0.

    The certified gap (log-likelihood units, q / 2) is half the duality gap (x - u).H(x - u) + tr(X Z)
    with Z the positive part of the gradient at x and u = H^-1 (c0 + z/2); see `mle_gaussian_batch`.
    Accelerated projected gradient with constant step 1 / L, L = 2 lambda_max(H).
    """
    batch, dim = x0.shape
    step = 1.0 / (2.0 * float(np.linalg.eigvalsh(hess)[-1]))

    def certificate(x: np.ndarray, c: np.ndarray) -> np.ndarray:
        z = project_positive_coordinates(2.0 * (matmul_rows(x, hess) - c))
        diff = x - matmul_rows(c + 0.5 * z, hess_inv)
        return 0.5 * (_rowdot(matmul_rows(diff, hess), diff) + _rowdot(x, z))

    work = _Batch(batch, dim, c=c0, x=x0.copy(), y=x0.copy(), theta=np.ones(batch))
    gap = certificate(x0, c0)
    work.retire(gap <= tol, x0, gap, 0)
    iteration = 0
    while work.size and iteration < max_iterations:
        iteration += 1
        c, x, y = work["c"], work["x"], work["y"]
        grad = 2.0 * (matmul_rows(y, hess) - c)
        z = project_positive_coordinates(y - step * grad)
        restart = _rowdot(grad, z - x) > 0
        theta = np.where(restart, 1.0, work["theta"])
        theta_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * theta**2))
        beta = np.where(restart, 0.0, (theta - 1.0) / theta_next)[:, None]
        work["y"] = z + beta * (z - x)
        work["x"] = z
        work["theta"] = np.where(restart, 1.0, theta_next)
        gap = certificate(z, c)
        work.retire(gap <= tol, z, gap, iteration)
    if work.size:
        work.retire(np.ones(work.size, dtype=bool), work["x"], certificate(work["x"], work["c"]), iteration)
    return work.solution()
