"""Parametric-bootstrap uncertainties of any scalar functions of an estimated state."""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from lightloom.sequencer.analysis.intervals import physical_interval

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

    Returns
    -------
    BootstrapResult. figures[name].value is the function at the estimate, .std the replicates' spread.
    """
    if n_resamples < 2:
        raise EstimationError(f"a bootstrap needs at least 2 resamples; got n_resamples={n_resamples}")
    if model == "poisson":
        estimate = fit if fit is not None else mle_poisson(operators, values, tol=tol, max_iterations=max_iterations)
        replicas = _draw_counts(predicted_readings(operators, estimate), n_resamples, rng)
        if perturb is not None:
            replicas = np.clip(perturb(replicas, rng), 0.0, None)
            replicas[replicas.sum(axis=1) <= 0, 0] = 1.0
        batch = mle_poisson_batch(operators, replicas, tol=tol, max_iterations=max_iterations)
    elif model == "gaussian":
        if sigma is None:
            raise EstimationError("the Gaussian bootstrap needs sigma, the measured spread of each reading")
        s = np.asarray(sigma, dtype=float)
        estimate = (
            fit if fit is not None else mle_gaussian(operators, values, s, tol=tol, max_iterations=max_iterations)
        )
        expected = predicted_readings(operators, estimate)
        replicas = expected[None, :] + s[None, :] * rng.standard_normal((n_resamples, expected.size))
        if perturb is not None:
            replicas = perturb(replicas, rng)
        batch = mle_gaussian_batch(operators, replicas, s, tol=tol, max_iterations=max_iterations)
    else:
        raise EstimationError(f"model must be 'poisson' or 'gaussian'; got {model!r}")
    at_estimate = _evaluate(functions, estimate.rho[None, :, :])
    samples = _evaluate(functions, batch.rho)
    bounds = bounds or {}
    figures = {
        name: Uncertain(
            value=float(at_estimate[name][0]),
            std=float(np.std(samples[name], ddof=1)),
            interval=physical_interval(float(at_estimate[name][0]), samples[name],
                                       bounds.get(name, (-math.inf, math.inf))),
        )
        for name in functions
    }
    return BootstrapResult(
        estimate=estimate,
        figures=figures,
        samples=samples,
        n_resamples=n_resamples,
        n_converged=int(np.sum(batch.converged)),
    )
