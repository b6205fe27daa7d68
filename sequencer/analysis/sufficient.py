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
the readings in chunks of rows, holding only the sums (power readings twice: the repeats for the
spread of a reading, then the fits' sums, a block of segments at a time). Pure numpy, no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Rows of the reading table handled at once: bounds the temporaries (operators dominate:
# CHUNK_ROWS x ports x 16 complex numbers, 2 MB with four ports, held two or three times).
CHUNK_ROWS = 2048
# Commanded settings equal to this many decimals (deg) are the same setting.
SETTING_DECIMALS = 6


@dataclass(frozen=True)
class Sums:
    """Sufficient statistics of measure readings, one row per key and port.

    Attributes
    ----------
    segment, pass_index, setting, port : ndarray (g,) int. The key of each row (-1 where the
        rows are summed over that key).
    count : ndarray (g,). Number of readings.
    sum_value, sum_value2 : ndarray (g,). Sum of corrected readings and of their squares.
    sum_operator : ndarray (g, d, d) complex, or None. Sum of the operators (Gaussian: as read;
        Poisson: each multiplied by its drift factor and dwell, so intensities are counts/s).
    sum_base_variance : ndarray (g,). Sum of the per-reading variance known before the fit
        (background spread), W^2; zeros for counts.
    t_sum, t_min, t_max : ndarray (g,). Sum of mid-reading times, first start and last end (UNIX s).
    """

    segment: np.ndarray
    pass_index: np.ndarray
    setting: np.ndarray
    port: np.ndarray
    count: np.ndarray
    sum_value: np.ndarray
    sum_value2: np.ndarray
    sum_operator: np.ndarray | None
    sum_base_variance: np.ndarray
    t_sum: np.ndarray
    t_min: np.ndarray
    t_max: np.ndarray

    def __len__(self) -> int:
        return int(self.count.size)

    def select(self, rows: np.ndarray) -> Sums:
        """The rows ``rows`` (mask or indices)."""
        return Sums(**{k: (None if getattr(self, k) is None else getattr(self, k)[rows])
                       for k in self.__dataclass_fields__})


@dataclass(frozen=True)
class Repeats:
    """Readings repeated at one (segment, pass, setting, port), for the spread of a reading: one row
    per group of two readings or more.

    Attributes
    ----------
    count : ndarray (g,). Number of readings (>= 2).
    sum_value, sum_value2 : ndarray (g,). Sum of the corrected readings and of their squares.
    """

    count: np.ndarray
    sum_value: np.ndarray
    sum_value2: np.ndarray


def setting_ids(commanded: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
    """Index of each row's commanded setting among the distinct ones (NaN = element unused).

    ``rows`` (optional) picks rows of ``commanded`` (n, n_elements). One 1-D sort per element
    column, then one of the combined codes: no copy of the table as rows.
    """
    n = commanded.shape[0] if rows is None else len(rows)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    combined = np.zeros(n, dtype=np.int64)
    for j in range(commanded.shape[1]):
        col = commanded[:, j] if rows is None else commanded[rows, j]
        col = np.round(np.where(np.isnan(col), np.inf, col), SETTING_DECIMALS)
        values, inverse = np.unique(col, return_inverse=True)
        combined = combined * len(values) + np.asarray(inverse, dtype=np.int64).reshape(-1)
    _, ids = np.unique(combined, return_inverse=True)
    return np.asarray(ids, dtype=np.int64).reshape(-1)


def _dense(*columns: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(id of each row's key, the distinct keys as rows) for integer key columns, by one 1-D sort."""
    combined = np.zeros(len(columns[0]), dtype=np.int64)
    parts = []
    for col in columns:
        values, inverse = np.unique(col, return_inverse=True)
        parts.append(values)
        combined = combined * len(values) + np.asarray(inverse, dtype=np.int64).reshape(-1)
    uniq, ids = np.unique(combined, return_inverse=True)
    keys = np.zeros((len(uniq), len(columns)), dtype=np.int64)
    rest = uniq.copy()
    for j in range(len(columns) - 1, -1, -1):
        keys[:, j] = parts[j][rest % len(parts[j])]
        rest //= len(parts[j])
    return np.asarray(ids, dtype=np.int64).reshape(-1), keys


class _Accumulator:
    """Running sums over rows of groups, touched a chunk at a time (cost per chunk: the chunk).

    With ``spread_only`` only the count and the sums of values and of their squares are kept (the
    groups per pass are many: a night has passes x settings x ports of them).
    """

    def __init__(self, n_groups: int, operator_shape: tuple[int, ...] | None, spread_only: bool = False) -> None:
        self.count = np.zeros(n_groups)
        self.s1 = np.zeros(n_groups)
        self.s2 = np.zeros(n_groups)
        self.spread_only = spread_only
        if not spread_only:
            self.base = np.zeros(n_groups)
            self.tsum = np.zeros(n_groups)
            self.tmin = np.full(n_groups, np.inf)
            self.tmax = np.full(n_groups, -np.inf)
        self.ops = None if operator_shape is None else np.zeros((n_groups, 2 * int(np.prod(operator_shape))))

    def add(self, gid: np.ndarray, v: np.ndarray, base: np.ndarray, t: np.ndarray, t_lo: np.ndarray,
            t_hi: np.ndarray, flat_ops: np.ndarray | None) -> None:
        u, local = np.unique(gid, return_inverse=True)
        m = len(u)

        def add(x: np.ndarray) -> np.ndarray:
            return np.bincount(local, weights=x, minlength=m)

        self.count[u] += np.bincount(local, minlength=m)
        self.s1[u] += add(v)
        self.s2[u] += add(v * v)
        if self.spread_only:
            return
        self.base[u] += add(base)
        self.tsum[u] += add(t)
        lo = np.full(m, np.inf)
        hi = np.full(m, -np.inf)
        np.minimum.at(lo, local, t_lo)
        np.maximum.at(hi, local, t_hi)
        self.tmin[u] = np.minimum(self.tmin[u], lo)
        self.tmax[u] = np.maximum(self.tmax[u], hi)
        if self.ops is not None and flat_ops is not None:
            for j in range(flat_ops.shape[1]):
                self.ops[u, j] += add(flat_ops[:, j])

    def repeats(self) -> Repeats:
        keep = self.count >= 2
        return Repeats(self.count[keep], self.s1[keep], self.s2[keep])

    def sums(self, keys: np.ndarray, n_ports: int, d: int, names: tuple[str, ...]) -> Sums:
        keep = np.flatnonzero(self.count > 0)
        key_row = keep // n_ports
        fields = {k: np.full(len(keep), -1, dtype=np.int64) for k in ("segment", "pass_index", "setting")}
        for j, name in enumerate(names):
            fields[name] = keys[key_row, j]
        operator = None if self.ops is None else self.ops[keep].view(np.complex128).reshape(-1, d, d)
        return Sums(**fields, port=keep % n_ports, count=self.count[keep], sum_value=self.s1[keep],
                    sum_value2=self.s2[keep], sum_operator=operator, sum_base_variance=self.base[keep],
                    t_sum=self.tsum[keep], t_min=self.tmin[keep], t_max=self.tmax[keep])


def _chunks(rows: np.ndarray):
    """(start, stop, lo, mask) for runs of ``rows`` (increasing table rows) within CHUNK_ROWS of
    each other: positions start..stop of ``rows`` are the table rows lo.. that ``mask`` selects."""
    n = len(rows)
    start = 0
    while start < n:
        lo = int(rows[start])
        stop = int(np.searchsorted(rows, lo + CHUNK_ROWS, side="left"))
        mask = np.zeros(int(rows[stop - 1]) - lo + 1, dtype=bool)
        mask[rows[start:stop] - lo] = True
        yield start, stop, lo, mask
        start = stop


def repeat_sums(
    *, rows: np.ndarray, segment: np.ndarray, pass_index: np.ndarray, setting: np.ndarray, values_of, n_ports: int,
) -> Repeats:
    """Count, sum and sum of squares of the corrected readings per (segment, pass, setting, port)
    read twice or more: the spread of a reading (pipeline._spread_model).

    ``rows`` are indices into the reading table, increasing; ``segment``, ``pass_index`` and
    ``setting`` are per measure reading (aligned with ``rows``); ``values_of(lo, hi, mask)``
    returns the corrected readings (k, P) of table rows lo..hi that ``mask`` selects. Table rows
    are read CHUNK_ROWS at a time; besides the sums, a few integers per reading are held.
    """
    if len(rows) == 0:
        return Repeats(np.zeros(0), np.zeros(0), np.zeros(0))
    group, keys = _dense(segment, pass_index, setting)
    acc = _Accumulator(len(keys) * n_ports, None, spread_only=True)
    del keys
    port = np.arange(n_ports)
    for start, stop, lo, mask in _chunks(rows):
        v = np.asarray(values_of(lo, lo + len(mask), mask), dtype=float).reshape(-1)
        acc.add((group[start:stop, None] * n_ports + port).reshape(-1), v, v, v, v, v, None)
    return acc.repeats()


def fit_sums(
    *,
    rows: np.ndarray,
    segment: np.ndarray,
    setting: np.ndarray,
    values_of,
    operators_of,
    base_variance: np.ndarray,
    t_start: np.ndarray,
    t_end: np.ndarray,
    d: int,
) -> tuple[Sums, np.ndarray]:
    """Sums per (segment, setting, port) with operators: the rows of the fits.

    ``rows``, ``segment``, ``setting`` and ``values_of`` as for :func:`repeat_sums`;
    ``t_start``, ``t_end`` per measure reading; ``operators_of(lo, hi, mask)`` the operators
    (k, P, d, d) of the selected table rows as the model uses them; ``base_variance`` (P,) each
    port's per-reading variance known before the fit. The sums come ordered by segment.

    Returns (the sums; the index (len(rows), P), int32, of each port reading's row in them).
    """
    n_ports = len(base_variance)
    if len(rows) == 0:
        empty_i = np.zeros(0, dtype=np.int64)
        empty = Sums(empty_i, empty_i, empty_i, empty_i, np.zeros(0), np.zeros(0), np.zeros(0),
                     np.zeros((0, d, d), complex), np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0))
        return empty, np.zeros((0, n_ports), dtype=np.int32)
    group, keys = _dense(segment, setting)
    acc = _Accumulator(len(keys) * n_ports, (d, d))
    port = np.arange(n_ports)
    for start, stop, lo, mask in _chunks(rows):
        v = np.asarray(values_of(lo, lo + len(mask), mask), dtype=float).reshape(-1)
        e = np.asarray(operators_of(lo, lo + len(mask), mask), dtype=np.complex128)
        flat = np.ascontiguousarray(e).reshape(len(v), d * d).view(np.float64)
        base = np.broadcast_to(base_variance, (stop - start, n_ports)).reshape(-1)
        t_lo = np.repeat(t_start[start:stop], n_ports)
        t_hi = np.repeat(t_end[start:stop], n_ports)
        acc.add((group[start:stop, None] * n_ports + port).reshape(-1), v, base, 0.5 * (t_lo + t_hi), t_lo, t_hi, flat)
    row_of_group = (np.cumsum(acc.count > 0) - 1).astype(np.int32)
    row_of_reading = row_of_group[group[:, None] * n_ports + port[None, :]]
    return acc.sums(keys, n_ports, d, ("segment", "setting")), row_of_reading
