"""From a run (its readings and the operators of every port reading) to states and figures of merit.

Pure: takes the RunData read from a file, returns plain results. The corrections, each applied
per reading and recorded in the result:

1. background: the shutter-closed readings of each port, interpolated in time, are subtracted;
   their spread enters the noise model;
2. port gains: divided out of power readings and of their operators alike (E = g K^dagger K in the
   file); counts keep gains in the operators, since counts cannot be rescaled;
3. drift: readings are divided by a smooth drift model fitted to the pick-off reference (or to
   the reference steps' total power), only where the reference shows a drift beyond its own
   noise (sequencer.analysis.drift); for counts the factor multiplies the operators instead;
4. normalisation per setting over complementary ports (optional, when the ports of a setting
   measure a complete set): each step's readings are divided by their sum, which cancels drift
   without a reference meter.

The errors of the background subtraction and of the drift model are drawn into every bootstrap
replicate (sequencer.analysis.propagation), and every figure gets a 95% interval inside its
physical range (sequencer.analysis.intervals).

Then the readings of each (setting, port) are combined into sufficient statistics
(sequencer.analysis.sufficient), so that the fits cost O(distinct operators). The per-port
operators stored in the file are the truth: single-factor protocols are reduced to their factor
by what the operators say, never by the projectors' labels (sequencer.analysis.reduction). What
the operators determine is checked first (sequencer.analysis.determines): a run that does not yet
determine the state gives the Stokes components it does determine, and says what is missing.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from lightloom.sequencer.analysis.estimate import (
    MleResult, linear_inversion, mle_gaussian, mle_poisson, parametric_bootstrap,
)
from lightloom.sequencer.analysis.estimate import merit
from lightloom.sequencer.analysis.background import BackgroundModel, background_info, background_model, pooled_reading_noise
from lightloom.sequencer.analysis.drift import DriftModel, fit_drift, no_drift
from lightloom.sequencer.analysis.intervals import figure_bounds, interval_widening
from lightloom.sequencer.analysis.propagation import CorrectionNoise, correction_noise
from lightloom.sequencer.analysis.spread import fit_spread
from lightloom.sequencer.analysis.estimate.errors import EstimationError
from lightloom.sequencer.analysis.estimate.hermitian import to_matrix, to_vector
from lightloom.sequencer.analysis.estimate.linear import least_squares_operator
from lightloom.sequencer.analysis.reduction import reduce_to_factor
from lightloom.sequencer.analysis.sufficient import CHUNK_ROWS, Repeats, Sums, fit_sums, repeat_sums, setting_ids
from lightloom.sequencer.optics.analyzer import complete_port_set
from lightloom.sequencer.optics.determination import STATE_KIND, Determination, determination
from lightloom.sequencer.optics.states import BASIS_LABELS, JOINT_KETS
from lightloom.sequencer.optics.stokes import PAULI
from lightloom.sequencer.model.records import RunData

FACTOR_BASIS = {"polarization": ("H", "V"), "spatial": ("h", "v")}
BOOTSTRAP_TOLERANCE = 1e-3
# Floor of the relative spread of a power reading when nothing measures it (no repeats).
MIN_RELATIVE_SPREAD = 1e-4
# Relative spread assumed for partial estimates when nothing measures the noise (no repeats and no
# redundant readings yet): deliberately wide, 1% a reading, and said so in the document.
UNMEASURED_RELATIVE_SPREAD = 1e-2
# Largest matrix side for counting the background's shared error in the residual chi^2 (a dense
# solve of this size takes about 0.5 s and 30 MB).
MAX_COVARIANCE_SIZE = 2000


class AnalysisError(ValueError):
    """A run that cannot be analysed as asked (no measure readings, no signal, ...)."""


@dataclass(frozen=True)
class Prepared:
    """Readings ready for an estimator: one row per distinct operator (sufficient statistics).

    ``values`` are mean readings (W) for the Gaussian model with ``sigma`` the std of that mean,
    or summed counts for the Poisson model (operators then summed too, in counts/s units).
    """

    operators: np.ndarray  # (n, d, d)
    values: np.ndarray  # (n,) counts or W
    sigma: np.ndarray | None  # (n,) W for the Gaussian model
    model: str  # "poisson" | "gaussian"
    basis: tuple[str, ...]
    analyzes: tuple[str, ...]
    corrections: dict[str, Any]
    times: np.ndarray = field(default_factory=lambda: np.zeros(0))
    readings: int = 0  # port readings behind the rows
    # chi^2 of the readings about their group means, and its degrees of freedom (Gaussian): with
    # the rows' own chi^2 it gives the per-reading chi^2 that the residual rescaling uses.
    within_chi2: float = 0.0
    within_dof: int = 0
    correction_noise: CorrectionNoise | None = None
    # variance of a row = a^2 x absolute_factor + (b x prediction)^2 x relative_factor (Gaussian):
    # 1/k for the mean of k readings; reduced rows combine several means
    absolute_factor: np.ndarray | None = None
    relative_factor: np.ndarray | None = None
    segment: dict[str, Any] = field(default_factory=dict)  # kind, index, t_start, t_end


@dataclass(frozen=True)
class Estimate:
    """The result of an analysis: the state, its figures with uncertainties, and how it was made."""

    rho: np.ndarray | None  # None when the readings do not determine the state (partial)
    rho_std: np.ndarray | None
    basis: tuple[str, ...]
    analyzes: tuple[str, ...]
    figures: dict[str, tuple]  # name -> (value, std, (lo, hi) 95% interval)
    stokes: dict[str, list[tuple | None]]  # factor -> [S0..S3] (value, std, interval), None if not determined
    closest_mode: tuple | None  # (name, value, std, interval)
    estimator: dict[str, Any]
    corrections: dict[str, Any]
    linear_rho: np.ndarray | None = None
    power: tuple | None = None  # (value, std, (lo, hi)): S0 in W or counts/s
    power_units: str = "W"
    determined: Determination | None = None
    partial: bool = False  # True: the state is not determined; only some Stokes components are
    segment: dict[str, Any] = field(default_factory=dict)


def _background(run: RunData) -> tuple[BackgroundModel, np.ndarray]:
    """The background model of the ports, and the background of the reference meter per reading."""
    r = run.readings
    bg = r.of_kind("background")
    t_mid = 0.5 * (r.t_start + r.t_end)
    model = background_model(t_mid[bg], r.values[bg])
    if not bg.any():
        return model, np.zeros(len(r))
    ref_bg = np.interp(t_mid, t_mid[bg], r.reference_w[bg]) if np.isfinite(r.reference_w[bg]).all() else np.zeros(len(r))
    return model, ref_bg


def _background_at(model: BackgroundModel, t_s: np.ndarray) -> np.ndarray:
    """(n, ports) background under readings at ``t_s``: the model's interpolation, one port at a
    time (O(n); the model's own weight matrix would be n x background readings)."""
    if not model.applied:
        return np.zeros((len(t_s), model.values.shape[1] if model.values.ndim == 2 else 0))
    return np.column_stack([np.interp(t_s, model.times_s, model.values[:, j]) for j in range(model.values.shape[1])])


def _drift_model(run: RunData, ref_bg: np.ndarray, use_complete_sum: bool, gains: np.ndarray) -> DriftModel:
    """Relative source power, from the pick-off meter or the reference steps (sequencer.analysis.drift)."""
    r = run.readings
    lit = ~r.of_kind("background")
    t_mid = 0.5 * (r.t_start + r.t_end)
    ref = r.reference_w - ref_bg
    if lit.any() and np.isfinite(ref[lit]).all():
        return fit_drift(t_mid[lit], ref[lit], source="pick-off reference meter")
    refsteps = r.of_kind("reference")
    if refsteps.sum() >= 2 and use_complete_sum:
        total = (r.values[refsteps] / gains).sum(axis=1)
        return fit_drift(t_mid[refsteps], total, source="reference steps (total power over complementary ports)")
    return no_drift(None, "no reference meter and no reference steps over a complete set of ports")


def _complete_ports(run: RunData) -> bool:
    return complete_port_set([(p.sorter_port, p.splitter_port) for p in run.header.ports])


def _port_gains(run: RunData) -> np.ndarray:
    h = run.header
    return np.asarray(h.port_gains, dtype=float)


def _spread_model(sums: Repeats, bg_std: float) -> tuple[float, float, str]:
    """(a, b) of sigma^2 = a^2 + (b v)^2 from repeated readings (rows of ``sums`` with count >= 2).

    Both terms are fitted by maximum likelihood of the rows' chi-square variances
    (sequencer.analysis.spread; the relative term only where a likelihood-ratio test asks for it),
    the background spread entering as one more observation of a^2 (weighted as 4 degrees of
    freedom, two backgrounds on four ports): a few background readings alone estimate the
    absolute noise, which dominates at low power, too poorly.
    """
    a = float(bg_std)
    rep = sums.count >= 2
    if sums.count[rep].sum() >= 4:
        k = sums.count[rep]
        mean = sums.sum_value[rep] / k
        ss = np.clip(sums.sum_value2[rep] - k * mean**2, 0.0, None)
        a_fit, b_fit = fit_spread(ss, k - 1, mean, bg_ss=a * a * 4 if a > 0 else 0.0, bg_dof=4 if a > 0 else 0)
        return a_fit, b_fit, f"from {int(k.sum())} repeated readings"
    return a, MIN_RELATIVE_SPREAD, "no repeats: background spread and a relative floor, rescaled by the fit residuals"


@dataclass(frozen=True)
class Segments:
    """How to cut a run for separate fits: one id per reading (-1: left out), and what each id is."""

    of_reading: np.ndarray  # (n,) int
    kind: str  # "run" | "pass" | "window"
    labels: tuple[int, ...]  # the pass index or window number of each segment id


def whole_run(n_readings: int) -> Segments:
    """Every reading in one segment."""
    return Segments(np.zeros(n_readings, dtype=np.int64), "run", (0,))


def by_pass(pass_index: np.ndarray) -> Segments:
    """One segment per outer pass (sweep) of the protocol."""
    labels, inverse = np.unique(pass_index, return_inverse=True)
    return Segments(np.asarray(inverse, dtype=np.int64).reshape(-1), "pass", tuple(int(x) for x in labels))


def by_window(t_mid: np.ndarray, window_s: float) -> Segments:
    """Consecutive time windows of ``window_s`` seconds from the first reading."""
    if window_s <= 0:
        raise AnalysisError("a time window must be longer than 0 s")
    if len(t_mid) == 0:
        return Segments(np.zeros(0, dtype=np.int64), "window", ())
    number = np.floor((t_mid - float(np.min(t_mid))) / window_s).astype(np.int64)
    labels, inverse = np.unique(number, return_inverse=True)
    return Segments(np.asarray(inverse, dtype=np.int64).reshape(-1), "window", tuple(int(x) for x in labels))


def prepare(run: RunData, *, normalize: bool = False, operators: np.ndarray | None = None) -> Prepared:
    """Readings of the ``measure`` kind, corrected and reduced to sufficient statistics for the estimators.

    ``operators`` may replace the stored ones (e.g. recomputed with a new calibration).
    """
    prepared = prepare_segments(run, whole_run(len(run.readings)), normalize=normalize, operators=operators)
    if not prepared:
        raise AnalysisError("the run has no measure readings yet; wait for the first setting to be measured")
    return prepared[0]


def prepare_segments(
    run: RunData, segments: Segments, *, normalize: bool = False, operators: np.ndarray | None = None,
) -> list[Prepared]:
    """One Prepared per segment that holds measure readings (corrections computed on the whole run);
    see :func:`iter_prepared`."""
    return list(iter_prepared(run, segments, normalize=normalize, operators=operators))


def iter_prepared(
    run: RunData, segments: Segments, *, normalize: bool = False, operators: np.ndarray | None = None,
) -> Iterator[Prepared]:
    """One Prepared per segment that holds measure readings, in order of segment, made as they are
    asked for (corrections computed on the whole run).

    Each reading is corrected on its own (background interpolated in time, drift, port gains,
    optional normalisation), then the readings of each (segment, setting, port) are summed into
    sufficient statistics (sequencer.analysis.sufficient): the estimators see one row per
    distinct operator, whatever the length of the night. The corrections are computed a chunk of
    rows at a time as the sums are made: besides the reading table, memory holds a few integers
    per measure reading, the sums and one chunk.
    """
    h = run.header
    r = run.readings
    counts = h.port_units == "counts"
    gains = _port_gains(run)
    complete = _complete_ports(run)
    meas = r.of_kind("measure") & (segments.of_reading >= 0)
    rows = np.flatnonzero(meas)
    del meas
    if rows.size == 0:
        return
    if normalize and not complete:
        raise AnalysisError("normalisation per setting needs ports that measure a complete set (e.g. all four ports)")
    bg_model, ref_bg = _background(run)
    bg_std = bg_model.sigma if bg_model.applied else np.zeros(len(gains))
    drift_model = _drift_model(run, ref_bg, complete, gains)
    del ref_bg
    t_start, t_end = np.asarray(r.t_start), np.asarray(r.t_end)

    def t_mid(lo: int, hi: int, mask: np.ndarray) -> np.ndarray:
        return 0.5 * (t_start[lo:hi][mask] + t_end[lo:hi][mask])

    corrections: dict[str, Any] = {"background": background_info(bg_model), "drift": drift_model.info}
    d = int(h.dimension)

    def corrected(lo: int, hi: int, mask: np.ndarray) -> np.ndarray:
        t = t_mid(lo, hi, mask)
        v = np.asarray(r.values[lo:hi])[mask] - _background_at(bg_model, t)
        if counts:
            return np.clip(np.round(v), 0, None)
        v = v / drift_model.factor(t)[:, None] / gains[None, :]
        if normalize:
            tot = v.sum(axis=1, keepdims=True)
            if (tot <= 0).any():
                raise AnalysisError("a setting has no signal at all; normalisation is impossible")
            v = v / tot
        return v

    def model_operators(lo: int, hi: int, mask: np.ndarray) -> np.ndarray:
        e = np.asarray(ops_source[lo:hi])[mask]
        if counts:
            # expected counts of a reading: drift x dwell x tr(T E), T in counts/s
            scale = drift_model.factor(t_mid(lo, hi, mask)) * np.asarray(r.dwell_s[lo:hi])[mask]
            return e * scale[:, None, None, None]
        return e / gains[None, :, None, None]

    ops_source = operators if operators is not None else r.operators
    if counts:
        base_var = np.zeros(len(gains))
        corrections["port_gain"] = {"applied": True, "how": "kept in the operators (counts are not rescaled)",
                                    "gains": gains.tolist()}
        if drift_model.applied:
            corrections["drift"] = {**drift_model.info, "how": "folded into the operators with the dwell (counts stay counts)"}
    else:
        base_var = (bg_std / gains) ** 2
        corrections["port_gain"] = {"applied": True, "how": "divided out of readings and operators",
                                    "gains": gains.tolist()}
    corrections["normalisation"] = (
        {"applied": True, "how": "each setting's readings divided by their sum over the complementary ports"}
        if normalize else {"applied": False}
    )
    seg_of = segments.of_reading[rows]
    setting = setting_ids(np.asarray(r.commanded), rows)
    noise: dict[str, Any] = {"model": "poisson"}
    a = b = 0.0
    if not counts:
        repeats = repeat_sums(rows=rows, segment=seg_of, pass_index=np.asarray(r.pass_index)[rows],
                              setting=setting, values_of=corrected, n_ports=len(gains))
        a = float(np.sqrt(np.mean(base_var))) if len(base_var) else 0.0
        a, b, how = _spread_model(repeats, a)
        noise = {"model": "gaussian", "absolute_w": a, "relative": b, "how": how}
        repeat_dof = int(np.sum(repeats.count - 1)) if "repeated" in how else 0
        del repeats
        if bg_model.applied and a > 0:
            # a is the absolute noise of one corrected reading (gain divided out)
            a_port = a * gains
            if bg_model.times_s.size < 2:
                bg_model = background_model(bg_model.times_s, bg_model.values, fallback_sigma=a_port)
            else:
                bg_model = pooled_reading_noise(bg_model, a_port, repeat_dof)
            corrections["background"] = {**background_info(bg_model), "reading_noise_how":
                                         "background spread pooled with the absolute noise of repeated readings"}
        # degrees of freedom behind the noise model: repeated readings about their means, and the
        # background readings about theirs (estimate() widens the intervals by t over z)
        bg_dof = len(gains) * max(bg_model.times_s.size - 1, 0) if bg_model.applied else 0
        noise["dof"] = repeat_dof + int(bg_dof)
    elif bg_model.applied and bg_model.times_s.size < 2:
        # One background reading of counts: its Poisson spread.
        bg_model = background_model(bg_model.times_s, bg_model.values,
                                    fallback_sigma=np.sqrt(np.clip(bg_model.values[0], 1.0, None)))
    # The fits' sums a block of segments at a time (a segment is never split): a night cut into
    # thousands of passes holds the sums of one block, and each segment's rows go to the caller
    # before the next block is summed.
    for block in _segment_blocks(seg_of):
        block_rows = rows[block]
        per_fit, row_of_reading = fit_sums(
            rows=block_rows, segment=seg_of[block], setting=setting[block], values_of=corrected,
            operators_of=model_operators, base_variance=base_var, t_start=t_start[block_rows],
            t_end=t_end[block_rows], d=d,
        )

        def divisor_of(t: np.ndarray, row: np.ndarray, per_fit: Sums = per_fit) -> np.ndarray:
            """What each port reading at times ``t`` (k,) in rows ``row`` (k, P) is divided by after
            the background subtraction: drift, gain and, the rows being means, the row's count."""
            if counts:
                return np.ones(row.shape)
            return drift_model.factor(t)[:, None] * gains[None, :] * per_fit.count[row]

        noise_map = _correction_noise(0.5 * (t_start[block_rows] + t_end[block_rows]), divisor_of, row_of_reading,
                                      per_fit, bg_model, drift_model)
        del row_of_reading
        # the sums come ordered by segment: each segment's rows are one slice
        labels, first = np.unique(per_fit.segment, return_index=True)
        bounds = [*first.tolist(), len(per_fit)]
        for seg, lo, hi in zip(labels.tolist(), bounds[:-1], bounds[1:]):
            part = per_fit.select(slice(lo, hi))
            yield _rows_for_fit(run, part, counts, a, b, dict(corrections, noise_model=dict(noise)),
                                segment=int(seg), segments=segments,
                                correction=_segment_noise(noise_map, lo, hi, keep_all=segments.kind == "run"))


def _segment_noise(noise: CorrectionNoise, lo: int, hi: int, *, keep_all: bool) -> CorrectionNoise:
    """The correction noise of rows lo..hi. Unless ``keep_all``, only the background readings those
    rows are interpolated from stay in the map: a pass touches two or three of a night's thousands,
    and each bootstrap replicate draws an error for every background reading in the map."""
    if noise.background_map is None:
        return dataclasses.replace(noise, row_times_s=noise.row_times_s[lo:hi])
    bmap = noise.background_map[lo:hi]
    sigma = noise.background_sigma
    if not keep_all:
        used = np.unique(bmap.indices)
        bmap, sigma = bmap[:, used], sigma[used]
    return dataclasses.replace(noise, background_map=bmap, background_sigma=sigma, row_times_s=noise.row_times_s[lo:hi])


# Measure readings whose fit sums are made at once when a run is cut into segments (a segment is
# never split): bounds the sums held, at most this many x ports rows of 40 numbers (10 MB).
BLOCK_READINGS = 8192


def _segment_blocks(seg_of: np.ndarray):
    """Positions (into ``seg_of``, increasing) of blocks of whole segments of about
    BLOCK_READINGS readings, in order of segment id."""
    if len(seg_of) == 0:
        return
    order = np.argsort(seg_of, kind="stable")
    ordered = seg_of[order]
    # where each segment's readings start in ``order``, and where blocks may end
    starts = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]])
    ends = [*starts[1:].tolist(), len(order)]
    lo = 0
    for end in ends:
        if end - lo >= BLOCK_READINGS or end == len(order):
            yield np.sort(order[lo:end])
            lo = end


def _correction_noise(t_mid: np.ndarray, divisor_of, row_of_reading: np.ndarray, per_fit: Sums,
                      background: BackgroundModel, drift: DriftModel) -> CorrectionNoise:
    """The correction errors mapped onto the rows (sequencer.analysis.propagation), built a chunk of
    readings at a time: the map is a sum over readings, so only its non-zero entries are ever held."""
    n_ports = row_of_reading.shape[1] if row_of_reading.ndim == 2 else 0
    n_rows = len(per_fit)
    row_times = per_fit.t_sum / np.maximum(per_fit.count, 1)
    total = None
    last = None
    for lo in range(0, len(t_mid), CHUNK_ROWS):
        hi = min(lo + CHUNK_ROWS, len(t_mid))
        k = hi - lo
        last = correction_noise(
            flat_times_s=np.repeat(t_mid[lo:hi], n_ports), flat_ports=np.tile(np.arange(n_ports), k),
            flat_divisor=divisor_of(t_mid[lo:hi], row_of_reading[lo:hi]).reshape(-1),
            flat_rows=row_of_reading[lo:hi].reshape(-1), n_rows=n_rows,
            row_times_s=row_times, background=background, drift=drift,
        )
        if last.background_map is not None:
            total = last.background_map if total is None else total + last.background_map
    if last is None:
        return CorrectionNoise(None, np.zeros(0), drift, row_times)
    return dataclasses.replace(last, background_map=total)


def _rows_for_fit(run: RunData, part: Sums, counts: bool, absolute: float, relative: float,
                  corrections: dict[str, Any], *, segment: int, segments: Segments,
                  correction: CorrectionNoise) -> Prepared:
    """The estimator's rows of one segment: one per (setting, port), reduced to one factor if asked."""
    analyzes = run.header.analyzes
    k = part.count
    within_chi2, within_dof = 0.0, 0
    abs_factor = rel_factor = 1.0 / k
    if counts:
        ops, vals, var = part.sum_operator, part.sum_value, None
    else:
        mean = part.sum_value / k
        ops = part.sum_operator / k[:, None, None]
        floor = 1e-6 * float(np.max(np.abs(mean))) if len(mean) else 0.0
        # variance of the mean of k readings, each with sigma^2 = a^2 + (b v)^2 + floor^2
        var = (k * absolute**2 + relative**2 * part.sum_value2 + k * floor**2) / k**2
        vals = mean
        reading_var = var * k
        within_chi2 = float(np.sum(np.clip(part.sum_value2 - k * mean**2, 0.0, None) / reading_var))
        within_dof = int(np.sum(k - 1))
    times = part.t_sum / k
    if len(analyzes) == 1:
        keep = analyzes[0]
        joint_vals = vals
        ops, vals, var, info, comb = reduce_to_factor(ops, vals, var, keep)
        basis = FACTOR_BASIS[keep]
        corrections["reduction"] = {"applied": True, "case": info.case, "how": info.describe(keep),
                                    "projectors": info.clusters, "exact_projectors": info.exact_clusters,
                                    "worst_residual": info.worst_residual}
        weight = np.maximum(comb.sum(axis=1), np.finfo(float).tiny)
        times = (comb @ times) / weight
        abs_factor = (comb**2) @ (1.0 / k)
        summed = comb @ joint_vals
        rel_factor = ((comb**2) @ (joint_vals**2 / k)) / np.maximum(summed**2, np.finfo(float).tiny)
        if correction.background_map is not None:
            from scipy import sparse

            correction = dataclasses.replace(correction, background_map=sparse.csr_matrix(comb) @ correction.background_map)
        correction = dataclasses.replace(correction, row_times_s=times)
    else:
        basis = BASIS_LABELS
        corrections["reduction"] = {"applied": False}
    sig = None if var is None else np.sqrt(np.maximum(var, np.finfo(float).tiny))
    label = segments.labels[segment] if segment < len(segments.labels) else segment
    return Prepared(
        operators=ops, values=vals, sigma=sig, model="poisson" if counts else "gaussian",
        basis=tuple(basis), analyzes=tuple(analyzes), corrections=corrections,
        times=np.asarray(times), readings=int(k.sum()), within_chi2=within_chi2, within_dof=within_dof,
        segment={"kind": segments.kind, "index": int(label),
                 "t_start": float(part.t_min.min()), "t_end": float(part.t_max.max())},
        correction_noise=correction, absolute_factor=np.broadcast_to(abs_factor, np.shape(vals)).copy(),
        relative_factor=np.broadcast_to(rel_factor, np.shape(vals)).copy(),
    )


def _functions(analyzes: tuple[str, ...], target: np.ndarray | None):
    fns: dict[str, Any] = {"purity": merit.purity, "linear_entropy": merit.linear_entropy}
    if len(analyzes) == 2:
        fns["concurrence"] = merit.concurrence
        for factor in ("polarization", "spatial"):
            for k in range(1, 4):
                fns[f"stokes_{factor}_{k}"] = (lambda rho, f=factor, k=k: merit.reduced_stokes(rho, f)[..., k])
            fns[f"dop_{factor}"] = (lambda rho, f=factor: merit.reduced_degree_of_polarization(rho, f))
        for name in JOINT_KETS:
            fns[f"fidelity_{name}"] = (lambda rho, k=JOINT_KETS[name]: merit.fidelity_to_ket(rho, k))
        fns["fully_entangled_fraction"] = merit.fully_entangled_fraction
    else:
        for k in range(1, 4):
            fns[f"stokes_{analyzes[0]}_{k}"] = (lambda rho, k=k: merit.stokes(rho)[..., k] / merit.stokes(rho)[..., 0])
        fns[f"dop_{analyzes[0]}"] = (
            lambda rho: np.linalg.norm(merit.stokes(rho)[..., 1:], axis=-1) / merit.stokes(rho)[..., 0]
        )
    if target is not None:
        fns["fidelity"] = (lambda rho, t=target: merit.fidelity(rho, np.broadcast_to(t, rho.shape)))
    return fns


def rows_chi2(resid: np.ndarray, sigma: np.ndarray, shared=None) -> float:
    """r^T S^-1 r for rows with independent errors ``sigma`` (n,) plus shared ones: S = diag(sigma^2)
    + B B^T, ``shared`` = B a sparse (n, m) matrix (None: diagonal only). Solved in the smaller of
    the two sides (Woodbury's identity when m < n); when both exceed MAX_COVARIANCE_SIZE the
    diagonal part alone is used (larger, i.e. the safe side for a residual check)."""
    r = np.asarray(resid, dtype=float)
    sig2 = np.asarray(sigma, dtype=float) ** 2
    w = r / sig2
    diagonal = float(r @ w)
    if shared is None or shared.shape[1] == 0:
        return diagonal
    b = shared.tocsc()
    n_rows, m = b.shape
    if m <= n_rows and m <= MAX_COVARIANCE_SIZE:
        # r^T S^-1 r = r^T D^-1 r - (B^T D^-1 r)^T (I + B^T D^-1 B)^-1 (B^T D^-1 r)
        bt_w = np.asarray(b.T @ w).ravel()
        inner = np.eye(m) + (b.T @ b.multiply(1.0 / sig2[:, None])).toarray()
        return diagonal - float(bt_w @ np.linalg.solve(inner, bt_w))
    if n_rows <= MAX_COVARIANCE_SIZE:
        return float(r @ np.linalg.solve(np.diag(sig2) + (b @ b.T).toarray(), r))
    return diagonal


def _rescale_sigma(prep: Prepared, fit: MleResult) -> tuple[np.ndarray, float]:
    """Scale sigma so that the per-reading chi^2 per degree of freedom is at least 1.

    The per-reading chi^2 is the rows' chi^2 about the fit plus that of the readings about their
    row means (Prepared.within_chi2), so aggregation does not change the rule. The rows' chi^2
    counts the background subtraction's error, which the rows share, in their covariance
    (sigma^2 on the diagonal plus B B^T, B the background map times the background readings'
    noise; rows_chi2): that error is drawn into the replicates anyway, and a residual it explains
    must not widen sigma as well.
    """
    assert prep.sigma is not None
    pred = np.einsum("ij,nji->n", fit.intensity * fit.rho, prep.operators).real
    resid = prep.values - pred
    d = prep.operators.shape[-1]
    dof = max(1, len(prep.values) - d * d + prep.within_dof)
    noise = prep.correction_noise
    shared = None
    if noise is not None and noise.background_map is not None and noise.background_sigma.size:
        shared = noise.background_map.multiply(noise.background_sigma[None, :]).tocsr()
    chi2 = rows_chi2(resid, prep.sigma, shared) + prep.within_chi2
    scale = math.sqrt(max(chi2 / dof, 1.0))
    return prep.sigma * scale, scale


def _noise_dof(prep: Prepared) -> int:
    """Degrees of freedom of the Gaussian noise model: repeats and background, else the residuals."""
    nm = prep.corrections.get("noise_model", {})
    dof = int(nm.get("dof", 0))
    if dof < 1:
        d = prep.operators.shape[-1]
        dof = len(prep.values) - d * d + prep.within_dof
    return max(dof, 0)


def _power_std(prep: Prepared, fit: MleResult, sigma: np.ndarray | None) -> float:
    """Std of tr(T) (W or counts/s) by linear propagation through the least-squares estimator."""
    design = to_vector(prep.operators)
    if sigma is None:
        var = np.maximum(fit.intensity * np.real(np.einsum("nij,ji->n", prep.operators, fit.rho)), 1.0)
    else:
        var = np.asarray(sigma) ** 2
    solve, _ = least_squares_operator(design, 1.0 / var)
    d = prep.operators.shape[-1]
    trace_row = solve[:d].sum(axis=0)  # the first d coordinates are the diagonal of T
    return float(np.sqrt(np.sum(trace_row**2 * var)))


def _power_units(prep: Prepared) -> str:
    return "counts/s" if prep.model == "poisson" else "W"


def estimate(prep: Prepared, *, target: np.ndarray | None, rng: np.random.Generator, n_bootstrap: int = 200) -> Estimate:
    """Maximum likelihood with the run's noise model, figures of merit, bootstrap uncertainties.

    When the rows do not determine the state (a run part way, an incomplete protocol), the
    Stokes components they do determine are estimated by least squares instead (``partial``).
    """
    determined = _determination(prep)
    if determined.kind != STATE_KIND[tuple(prep.analyzes)]:
        return _partial_estimate(prep, determined, rng=rng, n_bootstrap=n_bootstrap)
    if prep.model == "poisson":
        if prep.values.sum() <= 0:
            raise AnalysisError("no counts above background in the measure readings")
        fit = mle_poisson(prep.operators, prep.values)
        sigma = None
        scale = 1.0
    else:
        if not np.any(prep.values > 0):
            raise AnalysisError("no power above background in the measure readings: was the beam on?")
        fit = mle_gaussian(prep.operators, prep.values, prep.sigma)
        nm = prep.corrections.get("noise_model", {})
        if nm.get("relative", 0.0) > 0 and prep.absolute_factor is not None:
            # The relative part of the spread from the fitted readings rather than the measured
            # ones: weights that follow each reading's own noise bias the fit (a reading that
            # fluctuates up is down-weighted), and the bootstrap, whose sigma is fixed, would not
            # show that bias (iteratively reweighted least squares, common practice, no source).
            pred = np.clip(np.einsum("ij,nji->n", fit.intensity * fit.rho, prep.operators).real, 0.0, None)
            floor = 1e-6 * float(np.max(np.abs(prep.values)))
            refined = np.sqrt(nm["absolute_w"] ** 2 * prep.absolute_factor
                              + (nm["relative"] * pred) ** 2 * prep.relative_factor + floor**2 * prep.absolute_factor)
            prep = dataclasses.replace(prep, sigma=np.maximum(refined, np.finfo(float).tiny))
            fit = mle_gaussian(prep.operators, prep.values, prep.sigma)
        sigma, scale = _rescale_sigma(prep, fit)
        if scale > 1.0:
            fit = mle_gaussian(prep.operators, prep.values, sigma)
    # Counts have their Poisson spread; Gaussian readings a spread estimated from the run, whose
    # own uncertainty widens the intervals (interval_widening).
    noise_dof = _noise_dof(prep) if prep.model == "gaussian" else 0
    widen = 1.0 if prep.model == "poisson" else interval_widening(noise_dof)
    lin = linear_inversion(prep.operators, prep.values, sigma)
    fns = _functions(prep.analyzes, target)
    d = prep.operators.shape[-1]
    for i in range(d):
        for j in range(d):
            fns[f"_re_{i}{j}"] = (lambda rho, i=i, j=j: rho[..., i, j].real)
            fns[f"_im_{i}{j}"] = (lambda rho, i=i, j=j: rho[..., i, j].imag)
    # Replicates only need to be solved to well within their statistical spread (a log-likelihood
    # change of 1e-3 moves the figures by far less than their bootstrap std).
    boot = parametric_bootstrap(
        prep.operators, prep.values, fns, rng=rng, sigma=sigma, model=prep.model,
        n_resamples=n_bootstrap, fit=fit, tol=BOOTSTRAP_TOLERANCE,
        bounds={name: figure_bounds(name, d) for name in fns},
        perturb=prep.correction_noise.perturb if prep.correction_noise is not None else None,
        widen=widen,
        edge=[name for name in fns if not name.startswith(("stokes_", "_re_", "_im_"))],
        separable=["concurrence"], factor_dims=(2, 2) if d == 4 and len(prep.analyzes) == 2 else None,
    )
    figs = {k: (float(v.value), float(v.std), v.interval) for k, v in boot.figures.items()}
    rho_std = np.zeros((d, d), dtype=np.complex128)
    for i in range(d):
        for j in range(d):
            rho_std[i, j] = figs.pop(f"_re_{i}{j}")[1] + 1j * figs.pop(f"_im_{i}{j}")[1]
    stokes: dict[str, list[tuple[float, float] | None]] = {}
    for factor in prep.analyzes if len(prep.analyzes) == 1 else ("polarization", "spatial"):
        stokes[factor] = [(1.0, 0.0, (1.0, 1.0))] + [figs.pop(f"stokes_{factor}_{k}") for k in range(1, 4)]
    closest = None
    if len(prep.analyzes) == 2:
        fids = {name: figs.pop(f"fidelity_{name}") for name in JOINT_KETS}
        best = max(fids, key=lambda k: fids[k][0])
        closest = (best, fids[best][0], fids[best][1], fids[best][2])
        figs.update({f"fidelity_to_{k}": v for k, v in fids.items()})
    corrections = dict(prep.corrections)
    if prep.model == "gaussian":
        corrections["noise_model"] = {**corrections["noise_model"], "residual_scale": scale,
                                      "dof": noise_dof, "interval_widening": widen}
    return Estimate(
        rho=fit.rho, rho_std=rho_std, basis=prep.basis, analyzes=prep.analyzes, figures=figs, stokes=stokes,
        closest_mode=closest,
        estimator={
            "method": "maximum likelihood, certified", "model": prep.model,
            "log_likelihood": fit.log_likelihood, "certified_gap": fit.certified_gap,
            "iterations": fit.iterations, "converged": bool(fit.converged), "intensity": fit.intensity,
            "bootstrap_resamples": boot.n_resamples, "bootstrap_converged": boot.n_converged,
            "readings": int(prep.readings), "distinct_operators": int(len(prep.values)),
        },
        corrections=corrections,
        linear_rho=lin.rho,
        power=_with_interval(float(fit.intensity), _power_std(prep, fit, sigma), 0.0, np.inf),
        power_units=_power_units(prep),
        determined=determined,
        segment=dict(prep.segment),
    )


def _factors(prep: Prepared) -> tuple[str, ...]:
    """The factors of the rows' space: the analysed one (2x2 rows) or both (4x4)."""
    return tuple(prep.analyzes) if prep.operators.shape[-1] == 2 else ("polarization", "spatial")


def _determination(prep: Prepared) -> Determination:
    """What the rows determine (sequencer.optics.determination, shared with validate and dry-run)."""
    return determination(prep.operators, _factors(prep), prep.analyzes)


def _observables(prep: Prepared) -> dict[str, list[np.ndarray]]:
    """Per factor, the observables [s0, s1, s2, s3] of its Stokes parameters in the rows' space."""
    if prep.operators.shape[-1] == 2:
        return {prep.analyzes[0]: [PAULI[k] for k in range(4)]}
    eye = PAULI[0]
    return {"polarization": [np.kron(PAULI[k], eye) for k in range(4)],
            "spatial": [np.kron(eye, PAULI[k]) for k in range(4)]}


def _partial_estimate(prep: Prepared, determined: Determination, *, rng: np.random.Generator,
                      n_bootstrap: int) -> Estimate:
    """The Stokes components the rows determine, by weighted least squares (minimum-norm solution:
    every determined functional has the same value on all solutions), std from replicate readings."""
    d = prep.operators.shape[-1]
    design = to_vector(prep.operators)
    v = np.asarray(prep.values, dtype=float)
    noise = "Poisson counts"
    if prep.model == "poisson":
        var = np.maximum(v, 1.0)
        solve, rank = least_squares_operator(design, 1.0 / var)
        x = solve @ v
        replicas = rng.poisson(np.maximum(v, 0.0), size=(n_bootstrap, v.size)).astype(float)
    else:
        var = np.asarray(prep.sigma) ** 2
        solve, rank = least_squares_operator(design, 1.0 / var)
        x = solve @ v
        # the same residual rule as the full fit: per-reading chi^2 per degree of freedom at least 1
        dof = len(v) - rank + prep.within_dof
        chi2 = float(np.sum((v - design @ x) ** 2 / var)) + prep.within_chi2
        if dof > 0:
            var = var * max(chi2 / dof, 1.0)
            noise = f"Gaussian, rescaled by the residuals ({dof} degrees of freedom)"
        else:
            var = np.maximum(var, (UNMEASURED_RELATIVE_SPREAD * v) ** 2 / max(prep.readings / len(v), 1.0))
            noise = (f"not measured yet (no repeats, no redundant readings): {UNMEASURED_RELATIVE_SPREAD:.0%} "
                     "a reading assumed")
        replicas = v[None, :] + np.sqrt(var)[None, :] * rng.standard_normal((n_bootstrap, v.size))
    xs = replicas @ solve.T
    stokes: dict[str, list[tuple[float, float] | None]] = {}
    figures: dict[str, tuple[float, float]] = {}
    power = None
    for factor, obs in _observables(prep).items():
        flags = determined.stokes.get(factor, (False,) * 4)
        fixed = tuple(k for k in (1, 2, 3) if flags[0] and flags[k])
        if not fixed:
            continue
        coords = to_vector(np.asarray(obs))
        s0, s0s = coords[0] @ x, xs @ coords[0]
        entry: list[tuple | None] = [(1.0, 0.0, (1.0, 1.0))]
        for k in (1, 2, 3):
            if k in fixed:
                reps = (xs @ coords[k]) / s0s
                entry.append((float(coords[k] @ x / s0), float(np.std(reps, ddof=1)),
                              _percentile_interval(reps, -1.0, 1.0)))
            else:
                entry.append(None)
        stokes[factor] = entry
        if len(fixed) == 3:
            dop = np.sqrt(sum((xs @ coords[k] / s0s) ** 2 for k in (1, 2, 3)))
            figures[f"dop_{factor}"] = (float(np.sqrt(sum(entry[k][0] ** 2 for k in (1, 2, 3)))),
                                        float(np.std(dop, ddof=1)), _percentile_interval(dop, 0.0, 1.0))
        if power is None:
            power = (float(s0), float(np.std(s0s, ddof=1)), _percentile_interval(s0s, 0.0, np.inf))
    rank_info = f"{determined.rank} of {determined.full_rank} parameters determined"
    return Estimate(
        rho=None, rho_std=None, basis=prep.basis, analyzes=prep.analyzes, figures=figures, stokes=stokes,
        closest_mode=None,
        estimator={
            "method": "weighted least squares on the determined components (the state is not determined)",
            "model": prep.model, "determined": rank_info, "noise": noise, "bootstrap_resamples": int(n_bootstrap),
            "readings": int(prep.readings), "distinct_operators": int(len(v)),
        },
        corrections=dict(prep.corrections), power=power, power_units=_power_units(prep),
        determined=determined, partial=True, segment=dict(prep.segment),
    )


def target_of(run: RunData) -> np.ndarray | None:
    """The protocol's target state for fidelity, in the dimension of the analysis."""
    h = run.header
    if len(h.analyzes) == 2:
        return None if h.target_state is None else np.asarray(h.target_state)
    return None if h.factor_target_state is None else np.asarray(h.factor_target_state)


def _vs(fig: tuple | None) -> dict[str, Any] | None:
    """{value, std, interval} of a figure (value, std, (lo, hi))."""
    if fig is None:
        return None
    out: dict[str, Any] = {"value": float(fig[0]), "std": float(fig[1])}
    if len(fig) > 2 and fig[2] is not None:
        out["interval"] = [float(fig[2][0]), float(fig[2][1])]
    return out


def _with_interval(value: float, std: float, lo: float, hi: float) -> tuple[float, float, tuple[float, float]]:
    """(value, std, interval): value +- 1.96 std cut to the physical range [lo, hi] (normal
    approximation, for quantities estimated linearly)."""
    return value, std, (float(max(lo, value - 1.96 * std)), float(min(hi, value + 1.96 * std)))


def _percentile_interval(samples: np.ndarray, lo: float, hi: float) -> tuple[float, float]:
    """The 2.5% and 97.5% points of replicate values, inside [lo, hi]."""
    a, b = np.percentile(samples, [2.5, 97.5])
    return float(np.clip(a, lo, hi)), float(np.clip(b, lo, hi))


def run_section(run: RunData) -> dict[str, Any]:
    """The ``run`` section of the document: status and progress."""
    return {
        "status": run.status,
        "steps_done": int(run.steps_done),
        "steps_total": int(run.header.steps_total),
        "message": run.message,
        "protocol": run.header.protocol_name,
        "bench": run.header.bench_name,
    }


def empty_document(run: RunData, reason: str) -> dict[str, Any]:
    """The document of a run that has nothing to estimate yet (no measure readings, no signal)."""
    basis = FACTOR_BASIS[run.header.analyzes[0]] if len(run.header.analyzes) == 1 else BASIS_LABELS
    return {"basis": list(basis), "determines": "partial", "missing": [reason], "run": run_section(run)}


def result_json(run: RunData, est: Estimate) -> dict[str, Any]:
    """The fixed ``analyze --json`` document (DESIGN.md), plus extras."""
    out: dict[str, Any] = {"basis": list(est.basis)}
    if est.rho is not None:
        out["density_matrix"] = {"real": est.rho.real.tolist(), "imag": est.rho.imag.tolist()}
        out["density_matrix_std"] = {"real": est.rho_std.real.tolist(), "imag": est.rho_std.imag.tolist()}
        out["purity"] = _vs(est.figures["purity"])
        out["linear_entropy"] = _vs(est.figures["linear_entropy"])
    out["stokes"] = {f: [_vs(x) for x in s] for f, s in est.stokes.items()}
    out["degree_of_polarization"] = {f: _vs(est.figures[f"dop_{f}"]) for f in est.stokes if f"dop_{f}" in est.figures}
    if est.power is not None:
        out["power"] = {**_vs(est.power), "units": est.power_units}
    if est.linear_rho is not None:
        out["linear_inversion"] = {
            "real": est.linear_rho.real.tolist(), "imag": est.linear_rho.imag.tolist(),
            "min_eigenvalue": float(np.linalg.eigvalsh(est.linear_rho).min()),
        }
    determined = est.determined
    out["determines"] = determined.kind if determined is not None else "partial"
    out["missing"] = list(determined.missing) if determined is not None else []
    if est.partial and determined is not None and determined.rank < determined.full_rank:
        out["missing"].append(
            f"the {'joint 4x4' if len(est.analyzes) == 2 else '2x2 ' + est.analyzes[0]} state: the readings "
            f"fix {determined.rank} of its {determined.full_rank} real parameters")
    out["run"] = run_section(run)
    out["estimator"] = est.estimator
    out["corrections"] = est.corrections
    if "concurrence" in est.figures:
        out["concurrence"] = _vs(est.figures["concurrence"])
        out["fully_entangled_fraction"] = _vs(est.figures["fully_entangled_fraction"])
    if "fidelity" in est.figures:
        out["fidelity"] = _vs(est.figures["fidelity"])
        out["target"] = run.header.target_label
    if est.closest_mode is not None:
        name, *fig = est.closest_mode
        out["closest_vector_mode"] = {"name": name, "fidelity": _vs(tuple(fig))}
        out["vector_mode_fidelities"] = {
            k[len("fidelity_to_"):]: _vs(v) for k, v in est.figures.items() if k.startswith("fidelity_to_")
        }
    if est.segment.get("kind") in ("pass", "window"):
        out[est.segment["kind"]] = est.segment["index"]
        out["t_start"] = est.segment["t_start"]
        out["t_end"] = est.segment["t_end"]
    return out


def _document(run: RunData, prep: Prepared, *, target: np.ndarray | None, rng: np.random.Generator,
              n_bootstrap: int) -> tuple[dict[str, Any], Estimate | None]:
    """The document of one Prepared; an estimation that cannot proceed says why in ``missing``."""
    try:
        est = estimate(prep, target=target, rng=rng, n_bootstrap=n_bootstrap)
    except (AnalysisError, EstimationError) as exc:
        doc = empty_document(run, str(exc))
        doc["corrections"] = prep.corrections
        if prep.segment.get("kind") in ("pass", "window"):
            doc.update({prep.segment["kind"]: prep.segment["index"], "t_start": prep.segment["t_start"],
                        "t_end": prep.segment["t_end"]})
        return doc, None
    return result_json(run, est), est


def analyse_run(
    run: RunData, *, rng: np.random.Generator, n_bootstrap: int = 200, normalize: bool = False,
    operators: np.ndarray | None = None, segments: Segments | None = None, segment_estimates: bool = True,
) -> tuple[dict[str, Any], Estimate | None, list[tuple[dict[str, Any], Estimate | None]]]:
    """The whole-run document (always one, whatever the state of the run) and, with ``segments``,
    one document per segment (pass or time window) that holds measure readings.

    Returns (document, its Estimate or None, [(segment document, Estimate or None), ...]). With
    ``segment_estimates`` False the segments' Estimates are not kept (None): a night of thousands
    of passes then holds only their documents.
    """
    target = target_of(run)
    whole = prepare_segments(run, whole_run(len(run.readings)), normalize=normalize, operators=operators)
    if whole:
        doc, est = _document(run, whole[0], target=target, rng=rng, n_bootstrap=n_bootstrap)
    else:
        doc, est = empty_document(run, "no measure readings yet: the first analyzer setting has not been read"), None
    parts: list[tuple[dict[str, Any], Estimate | None]] = []
    if segments is not None:
        for part_doc, part_est in segment_documents(run, segments, rng=rng, n_bootstrap=n_bootstrap,
                                                    normalize=normalize, operators=operators):
            parts.append((part_doc, part_est if segment_estimates else None))
    return doc, est, parts


def segment_documents(
    run: RunData, segments: Segments, *, rng: np.random.Generator, n_bootstrap: int = 200,
    normalize: bool = False, operators: np.ndarray | None = None,
) -> Iterator[tuple[dict[str, Any], Estimate | None]]:
    """(document, Estimate or None) of each segment that holds measure readings, made as asked
    for (what :func:`analyse_run` lists after the whole run, from the same ``rng``)."""
    target = target_of(run)
    for prep in iter_prepared(run, segments, normalize=normalize, operators=operators):
        yield _document(run, prep, target=target, rng=rng, n_bootstrap=n_bootstrap)
