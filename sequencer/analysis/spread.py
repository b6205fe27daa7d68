"""The spread of a power reading, sigma^2 = a^2 + (b x)^2, fitted to repeated readings by maximum likelihood.

Repeated readings of one setting and port give a sum of squared deviations SS_g about their mean
m_g with n_g - 1 degrees of freedom, SS_g / var_g ~ chi^2(n_g - 1) for Gaussian noise, var_g =
a^2 + b^2 m_g^2. The background readings add SS_bg with their own degrees of freedom about a^2
alone. Maximising that likelihood (restricted maximum likelihood of a one-way layout, e.g. Searle,
Casella, McCulloch, Variance Components, 1992, ch. 6) uses each variance as a chi-square, where a
least-squares fit of squared deviations, with one degree of freedom each, lets a few large ones
trade the absolute term for a spurious relative one. The relative term is kept only when a
likelihood-ratio test at 95% asks for it.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import minimize

CHI2_1DOF_95 = 3.841


def fit_spread(ss: np.ndarray, dof: np.ndarray, means: np.ndarray, bg_ss: float = 0.0, bg_dof: int = 0) -> tuple[float, float]:
    """(a, b) of sigma^2 = a^2 + (b x)^2 from groups of repeated readings; see the module docstring.

    Parameters
    ----------
    ss : (g,) sums of squared deviations of each group about its mean (unit^2).
    dof : (g,) degrees of freedom of each group (readings - 1).
    means : (g,) group means (unit).
    bg_ss, bg_dof : the same for the background readings (about a^2 only).
    """
    ss = np.asarray(ss, dtype=float)
    dof = np.asarray(dof, dtype=float)
    m2 = np.asarray(means, dtype=float) ** 2
    total_dof = float(dof.sum() + bg_dof)
    if total_dof <= 0:
        return 0.0, 0.0
    scale = max(float((ss.sum() + bg_ss) / total_dof), 1e-300)
    m2_scale = max(float(np.max(m2)) if m2.size else 1.0, 1e-300)

    def nll(z: np.ndarray) -> float:
        a2 = math.exp(z[0]) * scale
        b2m2 = math.exp(z[1]) * scale * m2 / m2_scale
        var = a2 + b2m2
        out = float(np.sum(0.5 * dof * np.log(var) + 0.5 * ss / var))
        if bg_dof > 0:
            out += 0.5 * bg_dof * math.log(a2) + 0.5 * bg_ss / a2
        return out

    starts = ((0.0, -6.0), (-1.0, 0.0), (-6.0, 0.0), (0.0, -12.0))
    best = min((minimize(nll, np.array(z0), method="L-BFGS-B", bounds=[(-40.0, 10.0), (-40.0, 10.0)])
                for z0 in starts), key=lambda r: r.fun)
    # The relative term only where the data ask for it: likelihood-ratio test against b = 0 at 95%
    # (chi-square, 1 degree of freedom: 3.84). Where b x is far below a it is not measurable, and a
    # free b then only trades against a, leaving a too small in some runs.
    only_a = minimize(lambda z: nll(np.array([z[0], -40.0])), np.array([0.0]), method="L-BFGS-B",
                      bounds=[(-40.0, 10.0)])
    if 2.0 * (only_a.fun - best.fun) < CHI2_1DOF_95:
        return math.sqrt(math.exp(only_a.x[0]) * scale), 0.0
    a2 = math.exp(best.x[0]) * scale
    b2 = math.exp(best.x[1]) * scale / m2_scale
    return math.sqrt(a2), math.sqrt(b2)
