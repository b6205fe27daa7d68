"""State estimation: linear inversion, maximum likelihood, figures of merit and bootstrap uncertainties (pure numpy)."""

from __future__ import annotations

import numpy as np

from lightloom.sequencer.analysis.estimate.bootstrap import BootstrapResult, Uncertain, parametric_bootstrap, predicted_readings
from lightloom.sequencer.analysis.estimate.errors import EstimationError
from lightloom.sequencer.analysis.estimate.linear import (
    LinearBatchResult,
    LinearResult,
    closest_density_matrix,
    closest_positive,
    linear_inversion,
    linear_inversion_batch,
)
from lightloom.sequencer.analysis.estimate.mle import (
    DEFAULT_MAX_ITERATIONS,
    DEFAULT_TOLERANCE,
    MleBatchResult,
    MleResult,
    mle_gaussian,
    mle_gaussian_batch,
    mle_poisson,
    mle_poisson_batch,
)

MODELS = ("poisson", "gaussian")
METHODS = ("mle", "linear")

__all__ = [
    "BootstrapResult",
    "EstimationError",
    "LinearBatchResult",
    "LinearResult",
    "METHODS",
    "MODELS",
    "MleBatchResult",
    "MleResult",
    "Uncertain",
    "closest_density_matrix",
    "closest_positive",
    "linear_inversion",
    "linear_inversion_batch",
    "mle_gaussian",
    "mle_gaussian_batch",
    "mle_poisson",
    "mle_poisson_batch",
    "parametric_bootstrap",
    "predicted_readings",
    "reconstruct",
]


def reconstruct(
    operators: np.ndarray,
    values: np.ndarray,
    sigma: np.ndarray | None = None,
    model: str = "poisson",
    method: str = "mle",
    *,
    tol: float = DEFAULT_TOLERANCE,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
) -> MleResult | LinearResult:
    """Estimate the state behind one set of readings.

    Parameters
    ----------
    operators : ndarray (n, d, d). Measurement operator of each reading.
    values : ndarray (n,). Counts ("poisson") or background-corrected readings in W ("gaussian").
    sigma : ndarray (n,), optional. Spread of each reading (required for "gaussian"; for
        method "linear" it weights the least squares).
    model : "poisson" or "gaussian". The noise model of the readings.
    method : "mle" (maximum likelihood: always a density matrix, MleResult) or "linear"
        (linear inversion: may have negative eigenvalues, LinearResult).
    tol, max_iterations : stopping rule of the maximum-likelihood solver.
    """
    if model not in MODELS:
        raise EstimationError(f"model must be one of {', '.join(MODELS)}; got {model!r}")
    if method not in METHODS:
        raise EstimationError(f"method must be one of {', '.join(METHODS)}; got {method!r}")
    if method == "linear":
        return linear_inversion(operators, values, sigma)
    if model == "poisson":
        return mle_poisson(operators, values, tol=tol, max_iterations=max_iterations)
    if sigma is None:
        raise EstimationError("the Gaussian model needs sigma, the measured spread of each reading")
    return mle_gaussian(operators, values, sigma, tol=tol, max_iterations=max_iterations)
