"""The reconstruct() entry point: dispatch by model and method, and clear refusals."""

from __future__ import annotations

import numpy as np
import pytest

from lightloom.sequencer.analysis.estimate import (
    EstimationError,
    LinearResult,
    MleResult,
    linear_inversion,
    mle_gaussian,
    mle_poisson,
    reconstruct,
)

R2 = 1 / np.sqrt(2)
KETS = [[1, 0], [0, 1], [R2, R2], [R2, -R2], [R2, 1j * R2], [R2, -1j * R2]]
SINGLE6 = np.array([np.outer(k, np.conj(k)) for k in np.array(KETS, dtype=complex)])
COUNTS = np.array([70.0, 30.0, 62.0, 38.0, 55.0, 45.0])


def test_default_is_poisson_maximum_likelihood():
    result = reconstruct(SINGLE6, COUNTS)
    assert isinstance(result, MleResult)
    assert result.log_likelihood == pytest.approx(mle_poisson(SINGLE6, COUNTS).log_likelihood)


def test_gaussian_model_uses_sigma():
    sigma = np.full(6, 3.0)
    result = reconstruct(SINGLE6, COUNTS, sigma, model="gaussian")
    assert result.log_likelihood == pytest.approx(mle_gaussian(SINGLE6, COUNTS, sigma).log_likelihood)


def test_linear_method_returns_the_linear_inversion():
    result = reconstruct(SINGLE6, COUNTS, method="linear")
    assert isinstance(result, LinearResult)
    assert np.allclose(result.rho, linear_inversion(SINGLE6, COUNTS).rho)


def test_gaussian_model_without_sigma_is_refused():
    with pytest.raises(EstimationError, match="sigma"):
        reconstruct(SINGLE6, COUNTS, model="gaussian")


@pytest.mark.parametrize("kwargs, word", [({"model": "normal"}, "model"), ({"method": "bayes"}, "method")])
def test_unknown_model_or_method_is_refused_with_the_choices(kwargs, word):
    with pytest.raises(EstimationError, match=word):
        reconstruct(SINGLE6, COUNTS, **kwargs)


def test_operators_of_the_wrong_shape_are_refused():
    with pytest.raises(EstimationError, match=r"\(n, d, d\)"):
        reconstruct(np.ones((6, 2, 3)), COUNTS)


def test_non_finite_readings_are_refused():
    bad = COUNTS.copy()
    bad[2] = np.nan
    with pytest.raises(EstimationError, match="NaN"):
        reconstruct(SINGLE6, bad)
