"""The errors of the background subtraction and of the drift correction, drawn into bootstrap replicates.

A fitted row of the analysis is a sum (or one) of port readings, each corrected as
y = (v - b(t)) / (f(t) g) with b the interpolated background, f the drift factor and g the port
gain. The bootstrap draws reading noise around the fit; ``CorrectionNoise.perturb`` adds, for each
replicate, one draw of the background readings' noise (shared by every reading interpolated from
them) and one of the drift model's coefficients (shared by the whole run), mapped to the rows.
Cost per replicate: O(rows + background readings x ports), memory O(rows) (sparse maps) plus a
bounded block of draws.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse

from lightloom.sequencer.analysis.background import BackgroundModel
from lightloom.sequencer.analysis.drift import DriftModel

# Background-error draws held at once by ``CorrectionNoise.perturb`` (doubles; 2 MB).
DRAW_BLOCK_VALUES = 1 << 18


def interpolation_matrix(t_s: np.ndarray, knots_s: np.ndarray) -> sparse.csr_matrix:
    """Sparse (n, n_knots) linear-interpolation weights (constant outside the knots), as np.interp."""
    t = np.asarray(t_s, dtype=float)
    k = np.asarray(knots_s, dtype=float)
    n, m = t.size, k.size
    if m == 1:
        return sparse.csr_matrix((np.ones(n), (np.arange(n), np.zeros(n, dtype=int))), shape=(n, 1))
    j = np.clip(np.searchsorted(k, t, side="right") - 1, 0, m - 2)
    span = k[j + 1] - k[j]
    w = np.clip(np.where(span > 0, (t - k[j]) / np.where(span > 0, span, 1.0), 0.0), 0.0, 1.0)
    rows = np.concatenate([np.arange(n), np.arange(n)])
    cols = np.concatenate([j, j + 1])
    return sparse.csr_matrix((np.concatenate([1.0 - w, w]), (rows, cols)), shape=(n, m))


@dataclass(frozen=True)
class CorrectionNoise:
    """Maps of the correction errors onto the fitted rows.

    Attributes
    ----------
    background_map : sparse (rows, n_bg * n_ports). Row error = map @ (background reading errors).
    background_sigma : (n_bg * n_ports,) noise of each background reading (port-major within a reading).
    drift : the drift model; ``row_times_s`` (rows,) where its error is drawn.
    """

    background_map: sparse.csr_matrix | None
    background_sigma: np.ndarray
    drift: DriftModel
    row_times_s: np.ndarray

    def perturb(self, replicas: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Replicate readings (R, rows) with one draw of the correction errors each."""
        out = np.array(replicas, dtype=float)
        r = out.shape[0]
        if self.drift.applied:
            out *= self.drift.draw_ratios(self.row_times_s, r, rng)
        if self.background_map is not None and self.background_sigma.size:
            # A few replicates at a time: a night has thousands of background readings, and all
            # replicates' draws at once would be R x n_bg x ports doubles (tens of MB). Drawn in
            # order, the numbers are those of one (R, n_bg x ports) draw.
            step = max(1, DRAW_BLOCK_VALUES // self.background_sigma.size)
            for lo in range(0, r, step):
                hi = min(lo + step, r)
                e = rng.standard_normal((hi - lo, self.background_sigma.size)) * self.background_sigma[None, :]
                out[lo:hi] += (self.background_map @ e.T).T
        return out


def correction_noise(
    *,
    flat_times_s: np.ndarray,
    flat_ports: np.ndarray,
    flat_divisor: np.ndarray,
    flat_rows: np.ndarray,
    n_rows: int,
    row_times_s: np.ndarray,
    background: BackgroundModel,
    drift: DriftModel,
) -> CorrectionNoise:
    """Build the maps for port readings ``flat_*`` (each at a time, on a port, divided by a
    factor after background subtraction) that add up into ``n_rows`` fitted rows (``flat_rows``)."""
    bmap = None
    sigma = np.zeros(0)
    if background.applied and np.any(background.sigma > 0):
        n_bg = background.times_s.size
        n_ports = background.sigma.size
        w = interpolation_matrix(flat_times_s, background.times_s).tocoo()
        ports = np.asarray(flat_ports)[w.row]
        cols = w.col * n_ports + ports
        vals = -w.data / np.asarray(flat_divisor, dtype=float)[w.row]
        rows = np.asarray(flat_rows)[w.row]
        bmap = sparse.csr_matrix((vals, (rows, cols)), shape=(n_rows, n_bg * n_ports))
        sigma = np.tile(background.sigma, n_bg)
    return CorrectionNoise(bmap, sigma, drift, np.asarray(row_times_s, dtype=float))
