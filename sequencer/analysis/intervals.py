"""95% intervals of figures of merit from bootstrap replicates, kept inside each figure's physical range.

Three published constructions, combined:

- the bias-corrected percentile interval (BC; Efron and Tibshirani, An Introduction to the
  Bootstrap, 1993, ch. 14.3, the BCa interval with acceleration a = 0): percentiles
  Phi(2 z0 +- z_alpha) of the replicates, with z0 = Phi^-1(share of replicates below the
  estimate). It follows a skewed, transformation-respecting spread and corrects a median bias;
- the basic bootstrap interval (Davison and Hinkley, Bootstrap Methods and their Application,
  1997, sec. 5.2, eq. 5.6): [2 t - q(1 - alpha/2), 2 t - q(alpha/2)] with q the replicates'
  quantiles. It reflects the replicates' bias about the estimate, which is what is needed where
  the estimate sits on the edge of the state space (a pure state's purity and concurrence come
  out low, and their replicates lower still; a product state's concurrence piles up at 0), where
  the BC interval fails because almost every replicate lies on one side of the estimate;
- the percentile interval (Efron and Tibshirani 1993, ch. 13.3): [q(alpha/2), q(1 - alpha/2)].
  Where a noisy fit lands on the edge (a nearly pure truth estimated as pure), both others
  end at the estimate, while the truth is inside the edge; the percentile interval reaches in.

Rule (measured in tests/benchmarks/bench_interval_coverage.py and README): for the figures of the
distance from the edge of the state space (purity, concurrence, fidelities, degrees of
polarization) the reported interval is the union (hull) of the three above and two more built in
sequencer.analysis.estimate.bootstrap (a pivot interval around a bias-corrected centre, a test
inversion along lines of candidate truths), clipped to the physical range of the figure (purity
[1/d, 1], concurrence [0, 1], ...), so it may be asymmetric and may touch a bound (a separable
state's concurrence interval starts at 0). Where the replicates are well behaved they agree and
the union is any of them; near the edge, or where the estimate is biased, at least one of them
follows the truth and the union keeps it: in our trials at 100 counts a setting the BC interval
alone covered a pure state's concurrence in 0 of 150 runs, the basic one alone an interior
value's in 85%, their union 92-100% throughout. A Stokes component is a direction inside the
state space, not a distance from its edge: it gets the union of the BC and basic intervals only
(reach_in=False), which covered 0.954 on average over the benchmark's 48 Stokes cells where the
union of all five covered 0.975 (seeds 1-120).
"""

from __future__ import annotations

import math

import numpy as np
# The standard normal's distribution function and its inverse (what scipy.stats.norm calls, without
# importing scipy.stats: 20 MB and 0.7 s an analysis).
from scipy.special import ndtr, ndtri, stdtrit

LEVEL = 0.95

Bounds = tuple[float, float]


def bias_corrected_percentile(value: float, samples: np.ndarray, level: float = LEVEL) -> tuple[float, float]:
    """BC percentile interval (Efron and Tibshirani 1993, ch. 14.3 with a = 0), same unit as ``value``.

    Ties with the estimate count half below, so that replicates equal to it (a figure held at a
    bound) give z0 = 0 rather than an infinite correction.
    """
    s = np.asarray(samples, dtype=float)
    n = s.size
    share = (np.sum(s < value) + 0.5 * np.sum(s == value)) / n
    share = min(max(share, 0.5 / n), 1.0 - 0.5 / n)
    z0 = ndtri(share)
    z = ndtri(0.5 + level / 2.0)
    lo_p, hi_p = ndtr(2.0 * z0 - z), ndtr(2.0 * z0 + z)
    lo, hi = np.quantile(s, [lo_p, hi_p])
    return float(lo), float(hi)


def percentile_interval(samples: np.ndarray, level: float = LEVEL) -> tuple[float, float]:
    """Percentile interval: the replicates' alpha/2 and 1 - alpha/2 quantiles (Efron and Tibshirani
    1993, ch. 13.3), same unit as the samples."""
    alpha = 1.0 - level
    q_lo, q_hi = np.quantile(np.asarray(samples, dtype=float), [alpha / 2.0, 1.0 - alpha / 2.0])
    return float(q_lo), float(q_hi)


def basic_interval(value: float, samples: np.ndarray, level: float = LEVEL) -> tuple[float, float]:
    """Basic bootstrap interval 2 t - q (Davison and Hinkley 1997, sec. 5.2), same unit as ``value``."""
    alpha = 1.0 - level
    q_lo, q_hi = np.quantile(np.asarray(samples, dtype=float), [alpha / 2.0, 1.0 - alpha / 2.0])
    return float(2.0 * value - q_hi), float(2.0 * value - q_lo)


def pivot_interval(value: float, centre_value: float, samples: np.ndarray, level: float = LEVEL) -> tuple[float, float]:
    """Basic (pivot) interval from replicates drawn around another centre: the spread of
    samples - centre_value taken as that of estimate - truth (Davison and Hinkley 1997, sec. 5.2)."""
    alpha = 1.0 - level
    q_lo, q_hi = np.quantile(np.asarray(samples, dtype=float), [alpha / 2.0, 1.0 - alpha / 2.0])
    return float(value - (q_hi - centre_value)), float(value - (q_lo - centre_value))


def physical_interval(value: float, samples: np.ndarray, bounds: Bounds = (-math.inf, math.inf),
                      level: float = LEVEL, *, reach_in: bool = True) -> tuple[float, float]:
    """The reported interval: the union of the BC, basic and (``reach_in``) percentile intervals,
    clipped to ``bounds`` (module docstring).

    Parameters
    ----------
    value : the figure at the estimate.
    samples : (n,) the figure on the bootstrap replicates (n >= 2).
    bounds : (lo, hi) the physical range of the figure.
    level : coverage probability, 0.95 by default.
    reach_in : include the percentile interval, for the figures of the distance from the edge of
        the state space (a fit on the edge). A Stokes component is not one: there the union of
        three was conservative (tests/benchmarks/bench_interval_coverage.py: 0.975 on average over
        the benchmark's Stokes components, 0.954 without it and the pivot interval).

    Returns
    -------
    (lo, hi) with bounds[0] <= lo <= hi <= bounds[1]; the estimate itself is always inside.
    """
    s = np.asarray(samples, dtype=float)
    s = s[np.isfinite(s)]
    lo_b, hi_b = bounds
    if s.size < 2:
        v = min(max(value, lo_b), hi_b)
        return float(v), float(v)
    bc_lo, bc_hi = bias_corrected_percentile(value, s, level)
    b_lo, b_hi = basic_interval(value, s, level)
    p_lo, p_hi = percentile_interval(s, level) if reach_in else (value, value)
    lo, hi = min(bc_lo, b_lo, p_lo, value), max(bc_hi, b_hi, p_hi, value)
    return float(min(max(lo, lo_b), hi_b)), float(max(min(hi, hi_b), lo_b))


def inverted_test_interval(value: float, path: np.ndarray, figure_on_path: np.ndarray,
                           replicate_quantiles: np.ndarray, fine: int = 400) -> tuple[float, float] | None:
    """Test inversion along a line of candidate truths (Neyman's construction; Casella and Berger,
    Statistical Inference, 2nd ed. 2002, sec. 9.2.1): the figure's values at the candidates whose
    replicates' central range (quantiles, e.g. 2.5 and 97.5 %) holds the observed ``value``.

    Parameters
    ----------
    value : the figure at the estimate.
    path : (k,) increasing coordinates of the candidates along the line.
    figure_on_path : (k,) the figure at each candidate.
    replicate_quantiles : (k, 2) the low and high quantile of the figure over replicates drawn
        around each candidate.
    fine : points at which the three curves are interpolated linearly between the candidates.

    Returns
    -------
    (lo, hi) the hull of the accepted candidates' figure, or None when none is accepted.
    """
    x = np.asarray(path, dtype=float)
    grid = np.linspace(x[0], x[-1], fine)
    q = np.asarray(replicate_quantiles, dtype=float)
    lo_q, hi_q = np.interp(grid, x, q[:, 0]), np.interp(grid, x, q[:, 1])
    fig = np.interp(grid, x, np.asarray(figure_on_path, dtype=float))
    tol = 1e-12 * max(1.0, abs(value))
    ok = (lo_q <= value + tol) & (value - tol <= hi_q)
    if not ok.any():
        return None
    return float(fig[ok].min()), float(fig[ok].max())


def figure_bounds(name: str, dimension: int) -> Bounds:
    """Physical range of a figure of merit by its name in the analysis (purity, concurrence, ...)."""
    if name == "purity":
        return (1.0 / dimension, 1.0)
    if name == "linear_entropy":
        # normalised by d / (d - 1) (estimate.merit.linear_entropy): [0, 1] whatever d
        return (0.0, 1.0)
    if name.startswith("stokes_"):
        return (-1.0, 1.0)
    if name.startswith(("concurrence", "fidelity", "dop_", "fully_entangled_fraction")):
        return (0.0, 1.0)
    if name in ("power", "intensity"):
        return (0.0, math.inf)
    return (-math.inf, math.inf)


def normal_interval(value: float, std: float, bounds: Bounds = (-math.inf, math.inf),
                    level: float = LEVEL) -> tuple[float, float]:
    """value +- z std clipped to ``bounds``: for a figure with no replicates (e.g. a fitted parameter)."""
    z = float(ndtri(0.5 + level / 2.0))
    lo, hi = value - z * std, value + z * std
    return float(min(max(lo, bounds[0]), bounds[1])), float(max(min(hi, bounds[1]), bounds[0]))


def interval_widening(dof: int, level: float = LEVEL) -> float:
    """t_dof / z at ``level`` (dimensionless, >= 1): the factor on an interval's distances from the
    estimate when the readings' noise is itself estimated with ``dof`` degrees of freedom
    (Student's t quantile in place of the normal one; Student 1908, Biometrika 6, 1). The
    replicates are drawn with the estimated spread, so they miss that spread's own error: with
    the 40 degrees of freedom of joint-36 on `sim` the factor is 1.031. 1 for dof < 1."""
    if dof < 1:
        return 1.0
    p = 0.5 + level / 2.0
    return float(stdtrit(dof, p) / ndtri(p))


def widened(value: float, interval: tuple[float, float], factor: float) -> tuple[float, float]:
    """``interval`` with its distances from ``value`` multiplied by ``factor`` (same unit)."""
    lo, hi = interval
    return value - factor * (value - lo), value + factor * (hi - value)
