"""Accelerated projected-gradient solvers, vectorised over a batch, for the Poisson and Gaussian tomography likelihoods, and the Gaussian certificate."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lightloom.sequencer.analysis.estimate.blas import matmul_rows
from lightloom.sequencer.analysis.estimate.hermitian import to_matrix, to_vector
from lightloom.sequencer.analysis.estimate.projection import from_eigen, simplex_from_ascending

_STEP_SHRINK = 0.5
_STEP_GROWTH = 1.1
_BACKTRACK_LIMIT = 60
_SERIES_BELOW = 1e-4
_RESYNC_EVERY = 50
# eigenvalues of X below this fraction of its largest count as its null space in the Gaussian certificate
_NULL_BELOW = 1e-9


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


def rowdot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Dot product of matching rows of a and b (batch, k) -> (batch,)."""
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


class WorkingBatch:
    """Working arrays of the data sets still iterating; finished rows are written out and dropped.

    Every array given at construction (or set later) has the batch on its first axis, so that the
    solvers run on ever smaller batches as data sets finish.
    """

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
        """Write out the rows `finished` (mask over the current rows) with their x and gap, and drop them."""
        if not np.any(finished):
            return
        rows = self.index[finished]
        self.out_x[rows], self.out_gap[rows], self.out_iterations[rows] = x[finished], gap[finished], iterations
        keep = ~finished
        self.index = self.index[keep]
        self.arrays = {k: a[keep] for k, a in self.arrays.items()}

    def solution(self) -> Solution:
        """Everything written out, in the original order of the data sets."""
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
    work = WorkingBatch(batch, dim, f=f, used=f > 0, n_tot=n_tot, x=x0.copy(), p=p0, y=x0.copy(), py=p0.copy(),
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
        ok = _poisson_bregman(inverse_py, dp, fw) <= rowdot(delta, delta) / (2.0 * t)
        pending = np.flatnonzero(~ok)
        for _trial in range(_BACKTRACK_LIMIT):
            if pending.size == 0:
                break
            t[pending] *= _STEP_SHRINK
            cand, cand_basis = _project_density_with_basis(y[pending] + t[pending, None] * grad[pending])
            dc = cand - y[pending]
            dpc = matmul_rows(dc, design.T)
            good = _poisson_bregman(inverse_py[pending], dpc, fw[pending]) <= rowdot(dc, dc) / (2.0 * t[pending])
            z[pending[good]], dp[pending[good]], basis[pending[good]] = cand[good], dpc[good], cand_basis[good]
            pending = pending[~good]
        if pending.size:
            z[pending], dp[pending] = x[pending], p[pending] - py[pending]
            basis[pending] = np.linalg.eigh(to_matrix(x[pending]))[1]
        # the running probabilities follow the iterates by linear updates; resynchronise now and then
        pz = matmul_rows(z, design.T) if iteration % _RESYNC_EVERY == 0 else py + dp
        # gradient restart (O'Donoghue, Candes, Found. Comput. Math. 15, 715 (2015)): drop the momentum
        # once the step points against the gradient; it needs no objective values, which rounding blurs
        restart = rowdot(grad, z - x) < 0
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


@dataclass(frozen=True)
class GaussianProblem:
    """Weighted least squares q(x) = sum_i w_i (v_i - (A x)_i)^2 over positive semidefinite X (coordinates x).

    Attributes
    ----------
    design : ndarray (n, m). A, the coordinates of the measurement operators (m = d*d).
    weights : ndarray (n,). w_i = 1 / sigma_i^2, in the units of the readings.
    hess : ndarray (m, m). H = A^T W A: q(x) = x.H x - 2 c.x + v.W v with c = A^T W v.
    hess_inv : ndarray (m, m). H^-1 (H is positive definite for an informationally complete set).

    One problem serves a batch of reading vectors (rows of `values` in the methods).
    """

    design: np.ndarray
    weights: np.ndarray
    hess: np.ndarray
    hess_inv: np.ndarray

    @property
    def dim(self) -> int:
        """d, the size of the matrices."""
        return int(round(np.sqrt(self.design.shape[1])))

    def residuals(self, x: np.ndarray, values: np.ndarray) -> np.ndarray:
        """v_i - tr(X E_i), (batch, n)."""
        return values - matmul_rows(x, self.design.T)

    def chi_squared(self, x: np.ndarray, values: np.ndarray) -> np.ndarray:
        """q(x) per row, from the residuals (the expanded quadratic form cancels at high signal-to-noise)."""
        r = self.residuals(x, values)
        return np.sum(self.weights * r * r, axis=1)

    def gradient(self, x: np.ndarray, values: np.ndarray) -> np.ndarray:
        """Coordinates of the gradient G = 2 (H x - c) = -2 sum_i w_i r_i E_i, from the residuals r."""
        return -2.0 * matmul_rows(self.weights * self.residuals(x, values), self.design)

    def certificate(self, x: np.ndarray, grad: np.ndarray,
                    eigen: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
        """Proven bound on (q(x) - min q) / 2, the log-likelihood gap, at positive semidefinite X.

        Lagrange duality: for any Z >= 0, g(Z) = min_x [q(x) - tr(Z X)] <= min_{X >= 0} q, since
        tr(Z X) >= 0 there. The minimiser is u = H^-1 (c + z/2), and q(x) - g(Z) = (x - u).H(x - u)
        + tr(X Z) = tr(X Z) + (G - Z).H^-1.(G - Z) / 4 with G the gradient at x (Boyd, Vandenberghe,
        Convex Optimization (2004), ch. 5). Z = G_+, the positive part of G, is exact at the optimum
        by the KKT conditions. Two families of multipliers are tried and the smallest bound kept,
        each a * Z with a in [0, 1] minimising the (quadratic) bound: Z = G_+, and Z the positive
        part of G compressed to the eigenvectors where X is below 1e-9 of its largest eigenvalue
        (the rounding in G along the range of X then stays out of tr(X Z)). a = 1 with Z = G_+ is
        the plain choice; every one is a valid bound, so the smallest is too. G comes from the
        residuals, so no term is a difference of large numbers.

        Parameters
        ----------
        x, grad : ndarray (batch, m). The point and the gradient of q there (`gradient`).
        eigen : optional (eigenvalues (batch, d), eigenvectors (batch, d, d)) of X, if known.
        """
        lam, vec = eigen if eigen is not None else np.linalg.eigh(to_matrix(x))
        g_matrix = to_matrix(grad)
        w, v = np.linalg.eigh(g_matrix)
        plain = _eig_to_coordinates(v, np.maximum(w, 0.0))
        null = (lam <= _NULL_BELOW * lam[:, -1:]).astype(float)
        compressed = (vec * null[:, None, :]) @ np.conj(np.swapaxes(vec, -1, -2))
        wc, vc = np.linalg.eigh(compressed @ g_matrix @ compressed)
        face = _eig_to_coordinates(vc, np.maximum(wc, 0.0))
        h_grad = matmul_rows(grad, self.hess_inv)
        best = 0.25 * rowdot(grad, h_grad)
        for z in (plain, face):
            h_z = matmul_rows(z, self.hess_inv)
            square = rowdot(z, h_z)
            safe = np.where(square > 0, square, 1.0)
            a = np.clip((rowdot(z, h_grad) - 2.0 * rowdot(x, z)) / safe, 0.0, 1.0) * (square > 0)
            # the residual G - a Z directly: expanding its square would cancel near the optimum
            rest = grad - a[:, None] * z
            bound = a * rowdot(x, z) + 0.25 * rowdot(matmul_rows(rest, self.hess_inv), rest)
            best = np.minimum(best, bound)
        return 0.5 * best


def solve_gaussian(problem: GaussianProblem, values: np.ndarray, x0: np.ndarray, tol: float,
                   max_iterations: int) -> Solution:
    """Minimise q(x) over positive semidefinite X for each row of `values`, from positive semidefinite x0.

    Accelerated projected gradient with constant step 1 / L, L = 2 lambda_max(H), and gradient
    restart (O'Donoghue, Candes, Found. Comput. Math. 15, 715 (2015)); stops once the certified gap
    `GaussianProblem.certificate` (log-likelihood units) is <= tol. Its rate depends on the
    conditioning of H, so it serves as the finisher when the interior-point solver of
    `sequencer.estimate.barrier` stalls.
    """
    batch, dim = x0.shape
    step = 1.0 / (2.0 * float(np.linalg.eigvalsh(problem.hess)[-1]))
    c0 = matmul_rows(values * problem.weights, problem.design)
    work = WorkingBatch(batch, dim, v=values, c=c0, x=x0.copy(), y=x0.copy(), theta=np.ones(batch))
    gap = problem.certificate(x0, problem.gradient(x0, values))
    work.retire(gap <= tol, x0, gap, 0)
    iteration = 0
    while work.size and iteration < max_iterations:
        iteration += 1
        c, x, y = work["c"], work["x"], work["y"]
        grad = 2.0 * (matmul_rows(y, problem.hess) - c)
        z = project_positive_coordinates(y - step * grad)
        restart = rowdot(grad, z - x) > 0
        theta = np.where(restart, 1.0, work["theta"])
        theta_next = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * theta**2))
        beta = np.where(restart, 0.0, (theta - 1.0) / theta_next)[:, None]
        work["y"] = z + beta * (z - x)
        work["x"] = z
        work["theta"] = np.where(restart, 1.0, theta_next)
        gap = problem.certificate(z, problem.gradient(z, work["v"]))
        work.retire(gap <= tol, z, gap, iteration)
    if work.size:
        x = work["x"]
        work.retire(np.ones(work.size, dtype=bool), x, problem.certificate(x, problem.gradient(x, work["v"])),
                    iteration)
    return work.solution()
