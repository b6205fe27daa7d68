"""Source drift from a reference: a smooth model fitted with its own uncertainty, applied only where informative.

A reference (pick-off meter beside every reading, or the total of complementary ports at the
reference steps) measures the source power through its own noise. Dividing every reading by the
raw or lightly smoothed reference injects that noise into the readings: at 0.2 uW on the `sim`
bench the 1% pick-off is below its meter's noise and such a "correction" moves readings by factors
0.3-2.5 while the laser drifts 0.2%. Instead the relative power is fitted as a polynomial in
time (Legendre basis on the run's time span), its degree 0..K chosen by the Bayesian information
criterion (Schwarz, Ann. Statist. 6, 461 (1978)); degree 0 means the reference shows no change
beyond its noise, and then nothing is divided out. A fitted drift is applied only when it is
informative, i.e. when dividing it out is expected to leave a smaller error than leaving it in:
the mean square of (f - 1) over the readings, estimated without bias as mean((f_hat - 1)^2 -
var f_hat), must exceed the mean variance of f_hat that the correction brings (common practice,
no source: a shrink-or-keep rule), and f_hat must be known to better than MAX_FACTOR_STD. When
applied, the coefficients' covariance (ordinary least squares) gives the uncertainty of the factor
at every reading, which the bootstrap draws (``draw_ratios``), so the error bars include the
reference's noise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.polynomial import legendre

# Highest polynomial degree tried, and readings needed per coefficient.
MAX_DEGREE = 8
READINGS_PER_COEFFICIENT = 6
# A drift factor known to worse than this (relative std at some reading) is never divided out.
MAX_FACTOR_STD = 0.05
# Readings handled at once by the fit (bounds its temporaries: a few MB whatever the night).
FIT_CHUNK = 32768


@dataclass(frozen=True)
class DriftModel:
    """Relative source power f(t) (mean 1 over the fitted readings) with its uncertainty.

    Attributes
    ----------
    t_center_s, t_half_span_s : map of time to the Legendre variable x = (t - center) / half_span.
    coef : (k + 1,) Legendre coefficients of the reference (its unit), degree k.
    cov : (k + 1, k + 1) their covariance.
    norm : mean of the fitted reference over the fitted readings (its unit).
    applied : whether readings are divided by f (degree >= 1).
    info : what was found, for the result document.
    """

    t_center_s: float
    t_half_span_s: float
    coef: np.ndarray
    cov: np.ndarray
    norm: float
    applied: bool
    info: dict[str, Any]

    def _x(self, t_s: np.ndarray) -> np.ndarray:
        return np.clip((np.asarray(t_s, dtype=float) - self.t_center_s) / self.t_half_span_s, -1.0, 1.0)

    def factor(self, t_s: np.ndarray) -> np.ndarray:
        """Relative power at times ``t_s`` (UNIX s): 1 everywhere unless a drift is applied."""
        t = np.asarray(t_s, dtype=float)
        if not self.applied:
            return np.ones(t.shape)
        return legendre.legval(self._x(t), self.coef) / self.norm

    def factor_std(self, t_s: np.ndarray) -> np.ndarray:
        """Standard uncertainty of ``factor`` at ``t_s`` (first order, the norm held fixed)."""
        t = np.asarray(t_s, dtype=float)
        if not self.applied:
            return np.zeros(t.shape)
        v = legendre.legvander(self._x(t), len(self.coef) - 1)
        return np.sqrt(np.einsum("ni,ij,nj->n", v, self.cov, v)) / self.norm

    def draw_ratios(self, t_s: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
        """(n, len(t)) draws of f_true / f_applied at ``t_s``: the relative error a reading keeps
        after the correction (ones when nothing is applied)."""
        t = np.asarray(t_s, dtype=float)
        if not self.applied:
            return np.ones((n, t.size))
        v = legendre.legvander(self._x(t), len(self.coef) - 1)
        draws = rng.multivariate_normal(self.coef, self.cov, size=n, method="eigh")
        curve = draws @ v.T
        fitted = legendre.legval(self._x(t), self.coef)
        # The same normalisation as the applied factor (mean over the fitted readings), so that a
        # common scale, which the fitted intensity absorbs, is not counted as an error.
        ratio = curve / fitted[None, :]
        return ratio / ratio.mean(axis=1, keepdims=True)


def no_drift(source: str | None, reason: str) -> DriftModel:
    """The model that divides nothing out, with the reason recorded."""
    return DriftModel(0.0, 1.0, np.ones(1), np.zeros((1, 1)), 1.0, False,
                      {"applied": False, "source": source, "reason": reason})


def fit_drift(t_s: np.ndarray, reference: np.ndarray, *, source: str, max_degree: int = MAX_DEGREE) -> DriftModel:
    """Fit the relative source power to reference readings; see the module docstring.

    Parameters
    ----------
    t_s : (n,) times of the reference readings, UNIX s.
    reference : (n,) background-corrected reference readings (W or counts).
    source : what the reference is, for the result document.
    max_degree : highest polynomial degree tried.
    """
    t = np.asarray(t_s, dtype=float)
    y = np.asarray(reference, dtype=float)
    ok = np.isfinite(t) & np.isfinite(y)
    t, y = t[ok], y[ok]
    n = y.size
    if n < 3:
        return no_drift(source, f"only {n} reference reading{'' if n == 1 else 's'}")
    mean = float(y.mean())
    noise = float(y.std(ddof=1))
    if mean <= 0 or mean < 2.0 * noise / math.sqrt(n):
        return no_drift(source, f"the reference ({mean:.3g}) is not above its own noise ({noise:.3g} a reading)")
    center = 0.5 * (t.max() + t.min())
    half = max(0.5 * (t.max() - t.min()), 1e-9)
    x = (t - center) / half
    top = int(max(min(max_degree, n // READINGS_PER_COEFFICIENT - 1), 0))
    # Least squares of every degree from the moments of the Legendre basis, summed a chunk of
    # readings at a time: a night's (n, degree + 1) design matrix is never held. The reference is
    # centred first so that the residual sum of squares (its square minus the fitted part) keeps
    # its digits.
    gram = np.zeros((top + 1, top + 1))
    moment = np.zeros(top + 1)
    centred = y - mean
    for lo in range(0, n, FIT_CHUNK):
        v = legendre.legvander(x[lo:lo + FIT_CHUNK], top)
        gram += v.T @ v
        moment += v.T @ centred[lo:lo + FIT_CHUNK]
    total2 = float(centred @ centred)
    best = None
    for k in range(0, top + 1):
        coef = np.linalg.lstsq(gram[:k + 1, :k + 1], moment[:k + 1], rcond=None)[0]
        rss = max(total2 - float(moment[:k + 1] @ coef), 0.0)
        bic = n * math.log(max(rss / n, 1e-300)) + (k + 1) * math.log(n)
        if best is None or bic < best[0]:
            best = (bic, k, coef, rss)
    assert best is not None
    _, k, coef, rss = best
    coef = coef.copy()
    coef[0] += mean  # the constant Legendre polynomial is 1
    sigma2 = rss / max(n - (k + 1), 1)
    relative_noise = math.sqrt(sigma2) / mean
    if k == 0:
        return no_drift(source, f"no change beyond the reference's noise ({relative_noise:.2%} a reading, "
                                f"{n} readings; polynomial degree 0 chosen by BIC)")
    cov = sigma2 * np.linalg.inv(gram[:k + 1, :k + 1])
    norm = float(gram[0, :k + 1] @ coef) / n  # mean of the fitted curve: sum_i P_j(x_i) = gram[0, j]
    model = DriftModel(float(center), float(half), coef, cov, norm, True, {})
    f_lo, f_hi, f_std_max, change2, cost2 = np.inf, -np.inf, 0.0, 0.0, 0.0
    for lo in range(0, n, FIT_CHUNK):
        f = model.factor(t[lo:lo + FIT_CHUNK])
        f_std = model.factor_std(t[lo:lo + FIT_CHUNK])
        f_lo, f_hi, f_std_max = min(f_lo, float(f.min())), max(f_hi, float(f.max())), max(f_std_max, float(f_std.max()))
        change2 += float(np.sum((f - 1.0) ** 2 - f_std**2)) / n
        cost2 += float(np.sum(f_std**2)) / n
    if change2 <= cost2 or f_std_max > MAX_FACTOR_STD:
        return no_drift(source, f"a degree-{k} drift fitted (factor {f_lo:.4f}..{f_hi:.4f}) is not known "
                                f"better than it is large (std up to {f_std_max:.2%}): dividing it out would add "
                                "more noise than it removes")
    info = {
        "applied": True, "source": source,
        "model": f"Legendre polynomial of degree {k} in time (chosen by BIC), fitted by least squares",
        "degree": k, "readings": n, "reference_noise_relative": relative_noise,
        "min": f_lo, "max": f_hi, "factor_std_max": f_std_max,
        "propagated": "the fit's covariance is drawn in every bootstrap replicate",
    }
    return DriftModel(float(center), float(half), coef, cov, norm, True, info)
