"""Maximum-likelihood state estimates (Poisson counts, Gaussian power readings) with certified stopping."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lightloom.sequencer.analysis.estimate.apg import (
    GaussianProblem,
    project_density_coordinates,
    project_positive_coordinates,
    solve_gaussian,
    solve_poisson,
)
from lightloom.sequencer.analysis.estimate.barrier import solve_gaussian_barrier
from lightloom.sequencer.analysis.estimate.blas import matmul_rows
from lightloom.sequencer.analysis.estimate.errors import EstimationError
from lightloom.sequencer.analysis.estimate.hermitian import check_operators, check_values, to_matrix, to_vector
from lightloom.sequencer.analysis.estimate.linear import least_squares_operator

DEFAULT_TOLERANCE = 1e-6
DEFAULT_MAX_ITERATIONS = 20000
_START_MIXING = 1e-3


@dataclass(frozen=True)
class MleResult:
    """Maximum-likelihood estimate of one data set.

    Attributes
    ----------
    rho : ndarray (d, d) complex. The estimated density matrix (Hermitian, PSD, unit trace).
    intensity : float. N with T = N rho: the expected reading of a unit-trace operator
        (counts, or W).
    log_likelihood : float. Poisson: sum_i n_i log tr(T E_i) - tr(T G) (the n_i! term dropped).
        Gaussian: -chi^2 / 2 = -sum_i (v_i - tr(T E_i))^2 / (2 sigma_i^2) (constants dropped).
    iterations : int. Solver steps taken: gradient steps (Poisson); interior-point Newton steps,
        then any projected-gradient steps of the finisher (Gaussian).
    certified_gap : float. Proven upper bound on (maximum log-likelihood - log_likelihood).
    converged : bool. certified_gap <= the requested tolerance.
    """

    rho: np.ndarray
    intensity: float
    log_likelihood: float
    iterations: int
    certified_gap: float
    converged: bool


@dataclass(frozen=True)
class MleBatchResult:
    """Maximum-likelihood estimates of many data sets; the fields of `MleResult` with a leading batch axis."""

    rho: np.ndarray
    intensity: np.ndarray
    log_likelihood: np.ndarray
    iterations: np.ndarray
    certified_gap: np.ndarray
    converged: np.ndarray

    def __len__(self) -> int:
        return int(self.rho.shape[0])

    def item(self, index: int) -> MleResult:
        """The estimate of data set `index` as an `MleResult`."""
        return MleResult(
            rho=self.rho[index],
            intensity=float(self.intensity[index]),
            log_likelihood=float(self.log_likelihood[index]),
            iterations=int(self.iterations[index]),
            certified_gap=float(self.certified_gap[index]),
            converged=bool(self.converged[index]),
        )


def _neg_mean_log(p: np.ndarray, f: np.ndarray) -> np.ndarray:
    """-sum_i f_i log p_i per row (0 log 0 = 0)."""
    used = f > 0
    return -np.sum(f * np.log(np.where(used, p, 1.0)), axis=1)


def _poisson_setup(operators: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    e = check_operators(operators)
    g = np.sum(e, axis=0)
    w, v = np.linalg.eigh(g)
    if w[0] <= 1e-12 * w[-1]:
        raise EstimationError(
            "the measurement operators add up to a singular matrix: some state is never detected by any "
            "setting, so its weight cannot be estimated; check the operator table (missing settings or ports)"
        )
    g_inv_half = (v / np.sqrt(w)) @ np.conj(v.T)
    normalised = g_inv_half @ e @ g_inv_half
    design = to_vector(normalised)
    solve, _rank = least_squares_operator(design)
    return e, g_inv_half, design, solve


def mle_poisson_batch(
    operators: np.ndarray,
    counts: np.ndarray,
    *,
    tol: float = DEFAULT_TOLERANCE,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
) -> MleBatchResult:
    """Poisson maximum likelihood with unknown intensity, for many count vectors at once.

    Maximises l(T) = sum_i n_i log tr(T E_i) - tr(T G) over T >= 0, G = sum_i E_i. Maximising
    over the scale of T first (tr(T G) = n_tot) leaves max sum_i n_i log tr(sigma F_i) over unit-trace
    sigma >= 0, with F_i = G^-1/2 E_i G^-1/2 (sum F_i = 1) and T = n_tot G^-1/2 sigma G^-1/2. That
    problem is solved by accelerated projected gradient with restart (Shang, Zhang, Ng, PRA 95,
    062336 (2017)), projecting with Smolin, Gambetta, Smith, PRL 108, 070502 (2012), started from
    the projected linear-inversion estimate.

    Stopping certificate: with p_i = tr(sigma F_i), f_i = n_i / n_tot and R = sum_i (f_i / p_i) F_i,
    for the optimum sigma*: l* - l = n_tot sum_i f_i log(p*_i / p_i) <= n_tot log sum_i f_i p*_i / p_i
    (Jensen) = n_tot log tr(sigma* R) <= n_tot log lambda_max(R). Iteration stops once this bound is
    <= tol (log-likelihood units).

    Parameters
    ----------
    operators : ndarray (n, d, d). POVM elements E_i as measured (need not sum to the identity).
    counts : ndarray (batch, n) or (n,). Non-negative counts.
    tol : float. Required certified log-likelihood gap.
    max_iterations : int. Gradient steps at most per data set.
    """
    e, g_inv_half, design, solve = _poisson_setup(operators)
    n, d = e.shape[0], e.shape[1]
    c = check_values(counts, n, "counts")
    if np.any(c < 0):
        raise EstimationError(
            "Poisson maximum likelihood needs non-negative counts; readings after background subtraction "
            "can be negative: use model='gaussian' with their spread"
        )
    blind = np.real(np.trace(e, axis1=-2, axis2=-1)) <= 1e-12 * np.max(np.real(np.trace(e, axis1=-2, axis2=-1)))
    if np.any(c[:, blind] > 0):
        bad = int(np.flatnonzero(blind & np.any(c > 0, axis=0))[0])
        raise EstimationError(
            f"measurement operator {bad} is zero (that port sees nothing) yet its reading has counts; "
            "the operator table does not match the readings"
        )
    n_tot = c.sum(axis=1)
    if np.any(n_tot <= 0):
        bad = int(np.argmax(n_tot <= 0))
        raise EstimationError(f"data set {bad} has no counts at all; check that the beam and detectors were on")
    f = c / n_tot[:, None]
    # a little of the maximally mixed state keeps every predicted probability > 0 at the start
    start = project_density_coordinates(matmul_rows(f, solve.T))
    start = (1.0 - _START_MIXING) * start + _START_MIXING * to_vector(np.eye(d) / d)[None, :]
    sol = solve_poisson(design, f, n_tot, start, tol, max_iterations)
    x, iterations, gap = sol.x, sol.iterations, sol.gap
    phi = _neg_mean_log(matmul_rows(x, design.T), f)
    t = n_tot[:, None, None] * (g_inv_half @ to_matrix(x) @ g_inv_half)
    intensity = np.real(np.trace(t, axis1=-2, axis2=-1))
    rho = t / intensity[:, None, None]
    log_likelihood = n_tot * (np.log(n_tot) - 1.0) - n_tot * phi
    return MleBatchResult(
        rho=rho,
        intensity=intensity,
        log_likelihood=log_likelihood,
        iterations=iterations,
        certified_gap=gap,
        converged=gap <= tol,
    )


def mle_poisson(
    operators: np.ndarray,
    counts: np.ndarray,
    *,
    tol: float = DEFAULT_TOLERANCE,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
) -> MleResult:
    """Poisson maximum likelihood of one count vector (n,); see `mle_poisson_batch`."""
    c = np.asarray(counts, dtype=float)
    if c.ndim != 1:
        raise EstimationError(f"counts of one data set must have shape (n,); got {c.shape}")
    return mle_poisson_batch(operators, c, tol=tol, max_iterations=max_iterations).item(0)


def mle_gaussian_batch(
    operators: np.ndarray,
    values: np.ndarray,
    sigma: np.ndarray,
    *,
    tol: float = DEFAULT_TOLERANCE,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
) -> MleBatchResult:
    """Gaussian maximum likelihood (weighted least squares over T >= 0), for many reading vectors at once.

    Minimises chi^2(T) = sum_i (v_i - tr(T E_i))^2 / sigma_i^2 over positive semidefinite T;
    rho = T / tr T. Solver: an interior-point method with Newton polishing of a low-rank factor
    (`sequencer.estimate.barrier.solve_gaussian_barrier`), started from the positive part of the
    weighted linear-inversion estimate. Its step count does not grow with the spread of the weights
    1 / sigma_i^2, which on readings of a near-pure state span decades and slow a gradient method
    down to thousands of steps. A data set on which it stalls is finished by accelerated projected
    gradient (`sequencer.estimate.apg.solve_gaussian`) from its best point.

    Stopping certificate (Lagrange duality): write chi^2 = x.H x - 2 c.x + b.b in Hermitian
    coordinates x of T. For any Z >= 0, g(Z) = min_x [chi^2(x) - tr(Z X)] <= min_{X >= 0} chi^2 = chi^2*
    since tr(Z X) >= 0. The minimiser is u = H^-1 (c + z/2), and chi^2(x) - g(Z) = (x - u).H(x - u)
    + tr(X Z) >= chi^2(x) - chi^2*. With Z the positive part of the gradient at the returned point
    (exact at the optimum by the KKT conditions), half of this bound is the certified log-likelihood
    gap; `sequencer.estimate.apg.GaussianProblem.certificate` also tries scaled and compressed
    variants of that Z and reports the smallest of these bounds.

    Parameters
    ----------
    operators : ndarray (n, d, d). Measurement operators E_i as measured.
    values : ndarray (batch, n) or (n,). Readings (W, or any unit), background-subtracted.
    sigma : ndarray (n,). Spread of each reading, same units (shared by the batch).
    tol : float. Required certified log-likelihood gap.
    max_iterations : int. Solver steps at most per data set.
    """
    e = check_operators(operators)
    n, d = e.shape[0], e.shape[1]
    v = check_values(values, n)
    s = np.asarray(sigma, dtype=float)
    if s.shape != (n,):
        raise EstimationError(f"sigma must have one entry per measurement operator, shape ({n},); got {s.shape}")
    if not np.all(np.isfinite(s)) or np.any(s <= 0):
        raise EstimationError("every sigma (spread of a reading) must be finite and > 0; check the noise estimates")
    weights = 1.0 / s**2
    scale = float(np.max(np.abs(v)))
    if scale == 0.0:
        raise EstimationError("every reading is zero; check that the beam and detectors were on")
    design = to_vector(e)
    # readings and spreads divided by one common scale: chi^2 is unchanged and T comes out O(1)
    vs = v / scale
    ws = weights * scale**2
    hess = matmul_rows(design.T, design * ws[:, None])
    hw, hv = np.linalg.eigh(hess)
    if hw[0] <= 1e-12 * hw[-1]:
        raise EstimationError(
            f"the {n} measurement operators do not determine a {d}x{d} state (not informationally complete); "
            "the Gaussian estimator needs a complete set of settings"
        )
    problem = GaussianProblem(design=design, weights=ws, hess=hess, hess_inv=(hv / hw) @ hv.T)
    c0 = matmul_rows(vs * ws[None, :], design)
    start = project_positive_coordinates(matmul_rows(c0, problem.hess_inv))
    sol = solve_gaussian_barrier(problem, vs, start, tol, max_iterations)
    x, iterations, gap = sol.x.copy(), sol.iterations.copy(), sol.gap.copy()
    stalled = np.flatnonzero((gap > tol) & (iterations < max_iterations))
    if stalled.size:
        budget = max_iterations - int(iterations[stalled].max())
        finish = solve_gaussian(problem, vs[stalled], x[stalled], tol, budget)
        better = finish.gap < gap[stalled]
        x[stalled[better]], gap[stalled[better]] = finish.x[better], finish.gap[better]
        iterations[stalled] += finish.iterations
    # chi^2 from the residuals themselves: the expanded quadratic form cancels badly at high signal-to-noise
    q = problem.chi_squared(x, vs)
    t = to_matrix(x) * scale
    intensity = np.real(np.trace(t, axis1=-2, axis2=-1))
    if np.any(intensity <= 0):
        bad = int(np.argmax(intensity <= 0))
        raise EstimationError(
            f"data set {bad}: the best positive state has zero intensity (readings all at or below zero); "
            "check background subtraction and that the beam was on"
        )
    return MleBatchResult(
        rho=t / intensity[:, None, None],
        intensity=intensity,
        log_likelihood=-0.5 * q,
        iterations=iterations,
        certified_gap=gap,
        converged=gap <= tol,
    )


def mle_gaussian(
    operators: np.ndarray,
    values: np.ndarray,
    sigma: np.ndarray,
    *,
    tol: float = DEFAULT_TOLERANCE,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
) -> MleResult:
    """Gaussian maximum likelihood of one reading vector (n,); see `mle_gaussian_batch`."""
    v = np.asarray(values, dtype=float)
    if v.ndim != 1:
        raise EstimationError(f"values of one data set must have shape (n,); got {v.shape}")
    return mle_gaussian_batch(operators, v, sigma, tol=tol, max_iterations=max_iterations).item(0)
