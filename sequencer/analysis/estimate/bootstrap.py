"""Parametric-bootstrap uncertainties of any scalar functions of an estimated state."""

from __future__ import annotations

import math
from collections.abc import Callable, Collection, Mapping
from dataclasses import dataclass

import numpy as np

from lightloom.sequencer.analysis.intervals import LEVEL, inverted_test_interval, physical_interval, pivot_interval

from lightloom.sequencer.analysis.estimate.errors import EstimationError
from lightloom.sequencer.analysis.estimate.hermitian import check_operators
from lightloom.sequencer.analysis.estimate.mle import (
    DEFAULT_MAX_ITERATIONS,
    DEFAULT_TOLERANCE,
    MleResult,
    mle_gaussian,
    mle_gaussian_batch,
    mle_poisson,
    mle_poisson_batch,
)

StateFunction = Callable[[np.ndarray], np.ndarray]
# perturb(replicas (R, n), rng) -> (R, n): adds to replicate readings the errors of the corrections
# applied to the measured ones (background subtracted, drift divided out), which the noise model
# of a single reading does not hold.
Perturbation = Callable[[np.ndarray, np.random.Generator], np.ndarray]

_MAX_REDRAWS = 100
# Candidate truths of the third stage: rho(s) = (1 - s) rho + s |top><top| for s >= 0 (purer,
# towards the fit's dominant eigenvector), (1 + s) rho - s I/d for s < 0 (more mixed).
PATH = np.array([-0.6, -0.3, -0.15, 0.0, 0.1, 0.2, 0.35, 0.5, 0.7, 1.0])


@dataclass(frozen=True)
class Uncertain:
    """A figure with its uncertainty: value at the estimate, std over bootstrap replicates, and a 95%
    interval inside the figure's physical range (sequencer.analysis.intervals), all in one unit."""

    value: float
    std: float
    interval: tuple[float, float] = (-math.inf, math.inf)


@dataclass(frozen=True)
class BootstrapResult:
    """Point estimate, figures with uncertainties, and the replicate values behind them.

    Attributes
    ----------
    estimate : MleResult. The fit to the measured readings.
    figures : dict name -> Uncertain.
    samples : dict name -> ndarray (n_resamples,). The function on each replicate estimate.
    n_resamples : int. Replicates drawn.
    n_converged : int. Replicates whose fit reached the certified tolerance.
    """

    estimate: MleResult
    figures: dict[str, Uncertain]
    samples: dict[str, np.ndarray]
    n_resamples: int
    n_converged: int


def edge_centre(rho: np.ndarray, replicates: np.ndarray) -> np.ndarray:
    """``rho`` with its eigenvalues bias-corrected: 2 lambda - mean(lambda*), set to 0 where below two
    replicate stds (consistent with zero), renormalised.

    The sorted eigenvalues of a noisy estimate spread apart (the small ones up, the large one down)
    and the replicates' sorted eigenvalues (batch, d, d) spread further by about as much; the
    correction (Efron and Tibshirani 1993, ch. 10.4, applied to each sorted eigenvalue) moves the
    state back towards the edge of the state space where a nearly pure truth lies.
    """
    w, v = np.linalg.eigh(rho)
    rep = np.linalg.eigvalsh(replicates)
    shift = np.mean(rep, axis=0) - w
    keep = np.clip(w - shift, 0.0, None)
    # An eigenvalue within two replicate stds of zero is consistent with zero: a truth on the edge.
    keep[keep < 2.0 * np.std(rep, axis=0, ddof=1)] = 0.0
    if keep.sum() <= 0:
        return rho
    return (v * (keep / keep.sum())) @ v.conj().T


def path_states(rho: np.ndarray, path: np.ndarray = PATH) -> np.ndarray:
    """(k, d, d) candidate truths along the line through ``rho`` from the maximally mixed state to
    its dominant eigenvector (see PATH)."""
    d = rho.shape[0]
    _, vectors = np.linalg.eigh(rho)
    top = np.outer(vectors[:, -1], vectors[:, -1].conj())
    mixed = np.eye(d) / d
    return np.stack([(1.0 - s) * rho + s * top if s >= 0 else (1.0 + s) * rho - s * mixed for s in path])


def predicted_readings(operators: np.ndarray, fit: MleResult) -> np.ndarray:
    """Expected readings tr(T E_i) (n,) of the fitted T = intensity * rho."""
    e = check_operators(operators)
    return fit.intensity * np.real(np.einsum("nij,ji->n", e, fit.rho))


def _evaluate(functions: Mapping[str, StateFunction], rho: np.ndarray) -> dict[str, np.ndarray]:
    out: dict[str, np.ndarray] = {}
    for name, func in functions.items():
        value = np.asarray(func(rho), dtype=float)
        if value.shape != (rho.shape[0],):
            raise EstimationError(
                f"bootstrap function {name!r} must map a stack of states (batch, d, d) to one number per "
                f"state, shape ({rho.shape[0]},); it returned shape {value.shape}"
            )
        out[name] = value
    return out


def _draw_counts(expected: np.ndarray, n_resamples: int, rng: np.random.Generator) -> np.ndarray:
    draws = rng.poisson(expected, size=(n_resamples, expected.size)).astype(float)
    for _ in range(_MAX_REDRAWS):
        empty = draws.sum(axis=1) == 0
        if not np.any(empty):
            return draws
        draws[empty] = rng.poisson(expected, size=(int(empty.sum()), expected.size))
    raise EstimationError(
        "the fitted state predicts almost no counts, so bootstrap replicates come out empty; "
        "measure longer (dwell) before quoting uncertainties"
    )


def parametric_bootstrap(
    operators: np.ndarray,
    values: np.ndarray,
    functions: Mapping[str, StateFunction],
    *,
    rng: np.random.Generator,
    sigma: np.ndarray | None = None,
    model: str = "poisson",
    n_resamples: int = 200,
    fit: MleResult | None = None,
    tol: float = DEFAULT_TOLERANCE,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
    bounds: Mapping[str, tuple[float, float]] | None = None,
    perturb: Perturbation | None = None,
    inverted: Collection[str] | None = None,
) -> BootstrapResult:
    """Uncertainties of scalar functions of the maximum-likelihood state by parametric bootstrap.

    Replicate readings are drawn from the noise model around the readings the *fitted* state
    predicts, tr(T E_i) (Poisson counts, or Gaussian with the measured sigma), refitted with the
    batched estimator, and each function is evaluated on every replicate state (Efron, Tibshirani,
    An Introduction to the Bootstrap (1993), ch. 6). Drawing around the fit rather than around the
    raw readings lets settings with few or zero counts fluctuate as the model says they should;
    resampling the raw readings freezes zero-count settings at zero and shrinks the spread at low
    counts. Each figure also gets a 95% interval from its replicates, inside its physical range
    ``bounds`` and not necessarily symmetric (sequencer.analysis.intervals: bias-corrected
    percentile, Efron and Tibshirani 1993 ch. 14.3, or the basic interval where the estimate is on
    the boundary; tests/benchmarks/bench_interval_coverage.py measures their coverage).

    Corrections applied to the readings before the fit (background subtracted, drift divided out)
    have errors of their own, shared by many readings; ``perturb`` adds a draw of those errors to
    every replicate so that the spread and the intervals include them.

    Parameters
    ----------
    operators : ndarray (n, d, d). Measurement operators.
    values : ndarray (n,). Counts (model "poisson") or readings (model "gaussian").
    functions : mapping name -> function taking a stack of density matrices (batch, d, d) and
        returning (batch,), e.g. those of sequencer.estimate.merit.
    rng : numpy Generator. The only source of randomness (same seed, same result).
    sigma : ndarray (n,). Spread of each reading; required for "gaussian".
    model : "poisson" or "gaussian".
    n_resamples : int, >= 2.
    fit : MleResult, optional. The estimate from these readings, if already computed.
    bounds : mapping name -> (lo, hi), optional. Physical range of each figure (default unbounded).
    perturb : optional. Adds the errors of the corrections to the replicate readings (see above).
    inverted : names of the figures whose interval also takes the test inversion along the line
        from more mixed to purer states (default: every figure). It is meant for figures of the
        state's distance from the edge (purity, concurrence, fidelities); a direction such as a
        Stokes component hardly moves along that line and is covered by the other intervals.

    Returns
    -------
    BootstrapResult. figures[name].value is the function at the estimate, .std the replicates' spread.
    """
    if n_resamples < 2:
        raise EstimationError(f"a bootstrap needs at least 2 resamples; got n_resamples={n_resamples}")
    if model == "poisson":
        estimate = fit if fit is not None else mle_poisson(operators, values, tol=tol, max_iterations=max_iterations)
    elif model == "gaussian":
        if sigma is None:
            raise EstimationError("the Gaussian bootstrap needs sigma, the measured spread of each reading")
        estimate = (
            fit if fit is not None
            else mle_gaussian(operators, values, np.asarray(sigma, dtype=float), tol=tol, max_iterations=max_iterations)
        )
    else:
        raise EstimationError(f"model must be 'poisson' or 'gaussian'; got {model!r}")

    def replicate(rho: np.ndarray, count: int):
        expected = estimate.intensity * np.real(np.einsum("nij,ji->n", check_operators(operators), rho))
        if model == "poisson":
            draws = _draw_counts(np.clip(expected, 0.0, None), count, rng)
            if perturb is not None:
                draws = np.clip(perturb(draws, rng), 0.0, None)
                draws[draws.sum(axis=1) <= 0, 0] = 1.0
            return mle_poisson_batch(operators, draws, tol=tol, max_iterations=max_iterations)
        s = np.asarray(sigma, dtype=float)
        draws = expected[None, :] + s[None, :] * rng.standard_normal((count, expected.size))
        if perturb is not None:
            draws = perturb(draws, rng)
        return mle_gaussian_batch(operators, draws, s, tol=tol, max_iterations=max_iterations)

    batch = replicate(estimate.rho, n_resamples)
    at_estimate = _evaluate(functions, estimate.rho[None, :, :])
    samples = _evaluate(functions, batch.rho)
    # Second stage, for the edge of the state space. The estimator's bias depends on how close the
    # truth is to the edge, and the fit is further inside than a nearly pure truth, so replicates
    # around the fit show less bias than the estimate has. Replicates are drawn as well around the
    # fit with its eigenvalues bias-corrected (edge_centre), and their pivot interval (Davison and
    # Hinkley 1997, sec. 5.2) joins the reported one: the interval then holds a truth at the edge
    # as well as one inside.
    centre = edge_centre(estimate.rho, batch.rho)
    second = replicate(centre, max(2, n_resamples // 2))
    at_centre = _evaluate(functions, centre[None, :, :])
    pivots = _evaluate(functions, second.rho)
    # Third stage, for the long tail of a biased estimator (at low power a nearly pure state's
    # maximum-likelihood purity now and then comes out far more mixed than its replicates around
    # the fit suggest): candidate truths on a line through the fit, from more mixed to its
    # dominant eigenvector, each with replicates of its own; a candidate whose replicates' central
    # 95 % holds the estimate is kept, and the figure's range over the kept ones joins the
    # interval (inverted_test_interval).
    tested = {name: func for name, func in functions.items() if inverted is None or name in inverted}
    candidates = path_states(estimate.rho)
    per_candidate = max(20, n_resamples // 4)
    alpha = (1.0 - LEVEL) / 2.0
    on_path = _evaluate(tested, candidates) if tested else {}
    path_q = {name: np.empty((len(candidates), 2)) for name in tested}
    for k, candidate in enumerate(candidates if tested else ()):
        rep = _evaluate(tested, replicate(candidate, per_candidate).rho)
        q = np.quantile(np.stack([rep[name] for name in tested]), [alpha, 1.0 - alpha], axis=1)
        for j, name in enumerate(tested):
            path_q[name][k] = q[:, j]
    bounds = bounds or {}
    figures = {}
    for name in functions:
        value = float(at_estimate[name][0])
        lim = bounds.get(name, (-math.inf, math.inf))
        lo, hi = physical_interval(value, samples[name], lim)
        p_lo, p_hi = pivot_interval(value, float(at_centre[name][0]), pivots[name])
        lo, hi = min(lo, p_lo), max(hi, p_hi)
        if name in tested:
            kept = inverted_test_interval(value, PATH, on_path[name], path_q[name])
            if kept is not None:
                lo, hi = min(lo, kept[0]), max(hi, kept[1])
        lo = max(lo, lim[0])
        hi = min(hi, lim[1])
        figures[name] = Uncertain(value=value, std=float(np.std(samples[name], ddof=1)), interval=(float(lo), float(hi)))
    return BootstrapResult(
        estimate=estimate,
        figures=figures,
        samples=samples,
        n_resamples=n_resamples,
        n_converged=int(np.sum(batch.converged)),
    )
