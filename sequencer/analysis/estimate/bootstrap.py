"""Parametric-bootstrap uncertainties of any scalar functions of an estimated state."""

from __future__ import annotations

import math
from collections.abc import Callable, Collection, Mapping
from dataclasses import dataclass

import numpy as np

from lightloom.sequencer.analysis.intervals import LEVEL, inverted_test_interval, physical_interval, pivot_interval, widened

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
# A second line for the figures whose edge is the separable states (concurrence): rho(s) = (1 - s)
# rho + s |a b><a b| towards the product vector nearest the fit's dominant eigenvector, s > 0 (s = 0
# is the fit, shared with PATH). A product truth measured at low counts gives estimates with a
# small concurrence (at 100 counts a setting 0.03 on average, 0.05 at the 95th percentile), which
# candidates on PATH, all as entangled as the fit's top vector or more mixed, do not reproduce.
PRODUCT_PATH = np.array([0.0, 0.2, 0.4, 0.6, 0.8, 1.0])


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


def nearest_product_ket(rho: np.ndarray, dims: tuple[int, int]) -> np.ndarray:
    """The product vector a (x) b (d,) nearest the dominant eigenvector of ``rho`` (d = dims[0] *
    dims[1], the first factor's index major): its leading Schmidt term, normalised."""
    _, vectors = np.linalg.eigh(rho)
    u, _, vh = np.linalg.svd(vectors[:, -1].reshape(dims))
    return np.kron(u[:, 0], vh[0, :])


def product_path_states(rho: np.ndarray, dims: tuple[int, int], path: np.ndarray = PRODUCT_PATH) -> np.ndarray:
    """(k, d, d) candidate truths (1 - s) rho + s |ab><ab| on the line from ``rho`` to the product
    state nearest it (see PRODUCT_PATH)."""
    ket = nearest_product_ket(rho, dims)
    product = np.outer(ket, ket.conj())
    return np.stack([(1.0 - s) * rho + s * product for s in path])


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
    edge: Collection[str] | None = None,
    separable: Collection[str] = (),
    factor_dims: tuple[int, int] | None = None,
    widen: float = 1.0,
) -> BootstrapResult:
    """Uncertainties of scalar functions of the maximum-likelihood state by parametric bootstrap.

    Replicate readings are drawn from the noise model around the readings the *fitted* state
    predicts, tr(T E_i) (Poisson counts, or Gaussian with the measured sigma), refitted with the
    batched estimator, and each function is evaluated on every replicate state (Efron, Tibshirani,
    An Introduction to the Bootstrap (1993), ch. 6). Drawing around the fit rather than around the
    raw readings lets settings with few or zero counts fluctuate as the model says they should;
    resampling the raw readings freezes zero-count settings at zero and shrinks the spread at low
    counts. Each figure also gets a 95% interval from its replicates, inside its physical range
    ``bounds`` and not necessarily symmetric: the union of the bias-corrected percentile and basic
    intervals (sequencer.analysis.intervals), and for the ``edge`` figures three more constructions
    that follow a truth on or near the edge of the state space (see the stages below);
    tests/benchmarks/bench_interval_coverage.py measures their coverage.

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
    edge : names of the figures of the state's distance from the edge of the state space (purity,
        concurrence, fidelities, degrees of polarization; default: every figure). Their interval
        is the union of all five constructions (sequencer.analysis.intervals and below); any other
        figure (a Stokes component) gets the BC and basic intervals of the first replicates only.
    separable, factor_dims : names of edge figures whose edge is the separable states
        (concurrence), tested as well along the line to the nearest product state of a joint state
        of two factors of dimensions ``factor_dims`` (none without it).
    widen : factor (>= 1) on every interval's distances from the estimate before it is clipped
        to the physical range: sequencer.analysis.intervals.interval_widening of the degrees of
        freedom behind an estimated ``sigma``; 1 for counts.

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
    tested = {name: func for name, func in functions.items() if edge is None or name in edge}
    # Second stage, for the figures of the distance from the edge of the state space. The
    # estimator's bias depends on how close the truth is to the edge, and the fit is further
    # inside than a nearly pure truth, so replicates around the fit show less bias than the
    # estimate has. Replicates are drawn as well around the fit with its eigenvalues
    # bias-corrected (edge_centre), and their pivot interval (Davison and Hinkley 1997, sec. 5.2)
    # joins the reported one: the interval then holds a truth at the edge as well as one inside.
    if tested:
        centre = edge_centre(estimate.rho, batch.rho)
        second = replicate(centre, max(2, n_resamples // 2))
        at_centre = _evaluate(tested, centre[None, :, :])
        pivots = _evaluate(tested, second.rho)
    # Third stage, for the long tail of a biased estimator (at low power a nearly pure state's
    # maximum-likelihood purity now and then comes out far more mixed than its replicates around
    # the fit suggest): candidate truths on a line through the fit, from more mixed to its
    # dominant eigenvector (and, for concurrence, on a line to the nearest product state), each
    # with replicates of its own; a candidate whose replicates' central 95 % holds the estimate is
    # kept, and the figure's range over the kept ones joins the interval (inverted_test_interval).
    per_candidate = max(20, n_resamples // 4)
    alpha = (1.0 - LEVEL) / 2.0

    def on_line(states: np.ndarray, funcs: Mapping[str, StateFunction]) -> tuple[dict, dict]:
        """The figures at each candidate, and their replicates' low and high quantiles (k, 2)."""
        if not funcs:
            return {}, {}
        quantiles = {name: np.empty((len(states), 2)) for name in funcs}
        for k, candidate in enumerate(states):
            rep = _evaluate(funcs, replicate(candidate, per_candidate).rho)
            q = np.quantile(np.stack([rep[name] for name in funcs]), [alpha, 1.0 - alpha], axis=1)
            for j, name in enumerate(funcs):
                quantiles[name][k] = q[:, j]
        return _evaluate(funcs, states), quantiles

    on_path, path_q = on_line(path_states(estimate.rho), tested)
    lines = {name: [(PATH, on_path[name], path_q[name])] for name in tested}
    toward_product = {name: tested[name] for name in separable if name in tested} if factor_dims else {}
    if toward_product:
        assert factor_dims is not None
        zero = int(np.flatnonzero(PATH == 0.0)[0])
        on_product, product_q = on_line(product_path_states(estimate.rho, factor_dims, PRODUCT_PATH[1:]), toward_product)
        for name in toward_product:
            lines[name].append((PRODUCT_PATH, np.concatenate([on_path[name][zero:zero + 1], on_product[name]]),
                                np.concatenate([path_q[name][zero:zero + 1], product_q[name]])))
    bounds = bounds or {}
    figures = {}
    for name in functions:
        value = float(at_estimate[name][0])
        lim = bounds.get(name, (-math.inf, math.inf))
        lo, hi = physical_interval(value, samples[name], lim, reach_in=name in tested)
        if name in tested:
            p_lo, p_hi = pivot_interval(value, float(at_centre[name][0]), pivots[name])
            lo, hi = min(lo, p_lo), max(hi, p_hi)
            for coords, figure_on_line, quantiles in lines[name]:
                kept = inverted_test_interval(value, coords, figure_on_line, quantiles)
                if kept is not None:
                    lo, hi = min(lo, kept[0]), max(hi, kept[1])
        lo, hi = widened(value, (lo, hi), widen)
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
