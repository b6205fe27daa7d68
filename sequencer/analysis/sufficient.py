"""Readings combined into sufficient statistics per (segment, pass, setting, port), in bounded chunks.

After the per-reading corrections (background, drift, gains), readings taken at the same
commanded setting and port estimate the same quantity, so the likelihood depends on them only
through a few sums:

- Gaussian (power meters): sum_i (v_i - tr(T E))^2 / s_i^2 equals, up to a constant,
  (v_mean - tr(T E_mean))^2 / var(v_mean), with v_mean the mean of the readings and var(v_mean) =
  sum_i s_i^2 / k^2 (the small scatter of the read-back operators is averaged with them, which is
  exact for the linear model);
- Poisson (counters): sum_i n_i log tr(T f_i E_i) - tr(T f_i E_i) equals, up to a constant and to
  first order in the operators' scatter, N log tr(T E_sum) - tr(T E_sum) with N = sum_i n_i and
  E_sum = sum_i f_i E_i (drift f_i and dwell folded into the operators, not into the counts).

So the fit and every bootstrap replicate cost O(distinct settings x ports), and this module reads
the readings once, in chunks of rows, holding only the sums. Pure numpy, no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Rows of the reading table handled at once: bounds the temporaries (operators dominate:
# CHUNK_ROWS x ports x 16 complex numbers, about 4 MB with four ports).
CHUNK_ROWS = 4096
# Commanded settings equal to this many decimals (deg) are the same setting.
SETTING_DECIMALS = 6


@dataclass(frozen=True)
class Sums:
    """Sufficient statistics of measure readings, one row per (segment, pass, setting, port).

    Attributes
    ----------
    segment, pass_index, setting, port : ndarray (g,) int. The key of each row.
    count : ndarray (g,). Number of readings.
    sum_value, sum_value2 : ndarray (g,). Sum of corrected readings and of their squares.
    sum_operator : ndarray (g, d, d) complex. Sum of the operators (Gaussian: as read; Poisson:
        each multiplied by its drift factor and dwell, so intensities are counts/s).
    sum_base_variance : ndarray (g,). Sum of the per-reading variance known before the fit
        (background spread), W^2; zeros for counts.
    t_sum, t_min, t_max : ndarray (g,). Sum, first and last mid-reading time (UNIX s).
    """

    segment: np.ndarray
    pass_index: np.ndarray
    setting: np.ndarray
    port: np.ndarray
    count: np.ndarray
    sum_value: np.ndarray
    sum_value2: np.ndarray
    sum_operator: np.ndarray
    sum_base_variance: np.ndarray
    t_sum: np.ndarray
    t_min: np.ndarray
    t_max: np.ndarray

    def __len__(self) -> int:
        return int(self.count.size)

    def select(self, rows: np.ndarray) -> Sums:
        """The rows ``rows`` (mask or indices)."""
        return Sums(**{k: getattr(self, k)[rows] for k in self.__dataclass_fields__})

    def merged(self, keys: tuple[str, ...]) -> tuple[Sums, np.ndarray]:
        """Rows summed over everything but ``keys`` (e.g. ("segment", "setting", "port")).

        Returns the merged sums and, for each original row, the index of its merged row.
        """
        stacked = np.stack([getattr(self, k) for k in keys], axis=1) if len(self) else np.zeros((0, len(keys)), int)
        uniq, inverse = np.unique(stacked, axis=0, return_inverse=True)
        inverse = np.asarray(inverse).reshape(-1)
        m = len(uniq)

        def add(x: np.ndarray) -> np.ndarray:
            return np.bincount(inverse, weights=x, minlength=m)

        ops = np.zeros((m,) + self.sum_operator.shape[1:], dtype=np.complex128)
        np.add.at(ops, inverse, self.sum_operator)
        t_min = np.full(m, np.inf)
        t_max = np.full(m, -np.inf)
        np.minimum.at(t_min, inverse, self.t_min)
        np.maximum.at(t_max, inverse, self.t_max)
        fields = {k: np.zeros(m, dtype=np.int64) for k in ("segment", "pass_index", "setting", "port")}
        for j, k in enumerate(keys):
            fields[k] = uniq[:, j].astype(np.int64)
        for k in set(fields) - set(keys):
            fields[k] = np.full(m, -1, dtype=np.int64)
        merged = Sums(
            **fields, count=add(self.count), sum_value=add(self.sum_value), sum_value2=add(self.sum_value2),
            sum_operator=ops, sum_base_variance=add(self.sum_base_variance), t_sum=add(self.t_sum),
            t_min=t_min, t_max=t_max,
        )
        return merged, inverse


def setting_ids(commanded: np.ndarray) -> np.ndarray:
    """Index (n,) of each row's commanded setting among the distinct ones (NaN = element unused)."""
    c = np.round(np.where(np.isnan(commanded), np.inf, commanded), SETTING_DECIMALS)
    if c.shape[0] == 0:
        return np.zeros(0, dtype=np.int64)
    _, inverse = np.unique(c, axis=0, return_inverse=True)
    return np.asarray(inverse, dtype=np.int64).reshape(-1)


def accumulate(
    *,
    rows: np.ndarray,
    segment: np.ndarray,
    pass_index: np.ndarray,
    setting: np.ndarray,
    values_of,
    operators_of,
    base_variance: np.ndarray,
    t_mid: np.ndarray,
    d: int,
) -> Sums:
    """Sums over the measure readings ``rows`` (indices into the reading table, increasing).

    ``segment``, ``pass_index``, ``setting`` and ``t_mid`` are per measure reading (aligned with
    ``rows``); ``values_of(lo, hi, mask)`` returns the corrected readings (k, P) of table rows lo..hi
    that ``mask`` selects, ``operators_of(lo, hi, mask)`` their operators (k, P, d, d) as the model
    uses them; ``base_variance`` (P,) is each port's per-reading variance known before the fit.
    Table rows are read CHUNK_ROWS at a time.
    """
    n = len(rows)
    if n == 0:
        empty = np.zeros(0, dtype=np.int64)
        return Sums(empty, empty, empty, empty, np.zeros(0), np.zeros(0), np.zeros(0),
                    np.zeros((0, d, d), complex), np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0))
    probe = values_of(int(rows[0]), int(rows[0]) + 1, np.ones(1, bool))
    n_ports = probe.shape[1]
    key = np.stack([segment, pass_index, setting], axis=1)
    uniq, inverse = np.unique(key, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).reshape(-1)
    g = len(uniq) * n_ports
    count = np.zeros(g)
    s1 = np.zeros(g)
    s2 = np.zeros(g)
    sbv = np.zeros(g)
    tsum = np.zeros(g)
    tmin = np.full(g, np.inf)
    tmax = np.full(g, -np.inf)
    ops = np.zeros((g, d * d * 2))
    port = np.arange(n_ports)
    start = 0
    while start < n:
        lo = int(rows[start])
        hi = lo + CHUNK_ROWS
        stop = int(np.searchsorted(rows, hi, side="left"))
        local = rows[start:stop] - lo
        mask = np.zeros(min(CHUNK_ROWS, int(rows[stop - 1]) - lo + 1), dtype=bool)
        mask[local] = True
        v = np.asarray(values_of(lo, lo + len(mask), mask), dtype=float)
        e = np.asarray(operators_of(lo, lo + len(mask), mask), dtype=np.complex128)
        gid = (inverse[start:stop, None] * n_ports + port[None, :]).reshape(-1)
        t = np.repeat(t_mid[start:stop], n_ports)
        vv = v.reshape(-1)
        count += np.bincount(gid, minlength=g)
        s1 += np.bincount(gid, weights=vv, minlength=g)
        s2 += np.bincount(gid, weights=vv * vv, minlength=g)
        sbv += np.bincount(gid, weights=np.broadcast_to(base_variance, v.shape).reshape(-1), minlength=g)
        tsum += np.bincount(gid, weights=t, minlength=g)
        np.minimum.at(tmin, gid, t)
        np.maximum.at(tmax, gid, t)
        flat = e.reshape(len(gid), d * d).view(np.float64)
        for j in range(flat.shape[1]):
            ops[:, j] += np.bincount(gid, weights=flat[:, j], minlength=g)
        start = stop
    seen = count > 0
    operator = ops.view(np.complex128).reshape(g, d, d)
    rep = np.repeat(uniq, n_ports, axis=0)
    return Sums(
        segment=rep[:, 0], pass_index=rep[:, 1], setting=rep[:, 2], port=np.tile(port, len(uniq)),
        count=count, sum_value=s1, sum_value2=s2, sum_operator=operator, sum_base_variance=sbv,
        t_sum=tsum, t_min=tmin, t_max=tmax,
    ).select(seen)
