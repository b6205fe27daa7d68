"""From a run (its readings and the operators of every port reading) to states and figures of merit.

Pure: takes the RunData read from a file, returns plain results. The corrections, each recorded in
the result:

1. background: the shutter-closed readings of each port, interpolated in time, are subtracted;
   their spread enters the noise model;
2. port gains: divided out of power readings and of their operators alike (E = g K^dagger K in the
   file); counts keep gains in the operators, since counts cannot be rescaled;
3. drift: readings are divided by the smoothed pick-off reference (or by the reference steps'
   total power interpolated in time) relative to its mean;
4. normalisation per setting over complementary ports (optional, when the ports of a setting
   measure a complete set): each step's readings are divided by their sum, which cancels drift
   without a reference meter.

Single-factor protocols sum the readings of the ports (and expansion steps) that measure the same
projector on the analysed factor, then reduce the operators to that factor, Tr_other(E) / 2,
which is exact when the summed operator is A (x) I.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from lightloom.sequencer.analysis.estimate import (
    MleResult, linear_inversion, mle_gaussian, mle_poisson, parametric_bootstrap,
)
from lightloom.sequencer.analysis.estimate import merit
from lightloom.sequencer.optics.analyzer import complete_port_set
from lightloom.sequencer.optics.states import BASIS_LABELS, JOINT_KETS, partial_trace
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.model.records import RunData

FACTOR_BASIS = {"polarization": ("H", "V"), "spatial": ("h", "v")}
BOOTSTRAP_TOLERANCE = 1e-3
# Floor of the relative spread of a power reading when nothing measures it (no repeats).
MIN_RELATIVE_SPREAD = 1e-4


class AnalysisError(ValueError):
    """A run that cannot be analysed as asked (no measure readings, no signal, ...)."""


@dataclass(frozen=True)
class Prepared:
    """Readings ready for an estimator: one row per (combined) reading."""

    operators: np.ndarray  # (n, d, d)
    values: np.ndarray  # (n,) counts or W
    sigma: np.ndarray | None  # (n,) W for the Gaussian model
    model: str  # "poisson" | "gaussian"
    basis: tuple[str, ...]
    analyzes: tuple[str, ...]
    corrections: dict[str, Any]
    labels: tuple[str, ...] = ()
    times: np.ndarray = field(default_factory=lambda: np.zeros(0))


@dataclass(frozen=True)
class Estimate:
    """The result of an analysis: the state, its figures with uncertainties, and how it was made."""

    rho: np.ndarray
    rho_std: np.ndarray
    basis: tuple[str, ...]
    analyzes: tuple[str, ...]
    figures: dict[str, tuple[float, float]]  # name -> (value, std)
    stokes: dict[str, list[tuple[float, float]]]  # factor -> [S0..S3] (value, std)
    closest_mode: tuple[str, float, float] | None
    estimator: dict[str, Any]
    corrections: dict[str, Any]
    linear_rho: np.ndarray | None = None


def _smooth(t: np.ndarray, y: np.ndarray, window: int) -> np.ndarray:
    """Running mean in time order over ``window`` readings (the drift is slow; the meter is noisy)."""
    order = np.argsort(t)
    ys = y[order]
    k = max(1, min(window, len(ys)))
    pad = np.pad(ys, (k // 2, k - 1 - k // 2), mode="edge")
    sm = np.convolve(pad, np.ones(k) / k, mode="valid")
    out = np.empty_like(sm)
    out[order] = sm
    return out


def _background(run: RunData) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict[str, Any]]:
    """Per-reading background of every port (interpolated in time), its std per port, info."""
    r = run.readings
    bg = r.of_kind("background")
    n_ports = r.values.shape[1]
    t_mid = 0.5 * (r.t_start + r.t_end)
    if not bg.any():
        return np.zeros_like(r.values), np.zeros(n_ports), np.zeros(len(r)), {"applied": False, "readings": 0}
    tb = t_mid[bg]
    vb = r.values[bg]
    per_reading = np.column_stack([np.interp(t_mid, tb, vb[:, j]) for j in range(n_ports)])
    std = vb.std(axis=0, ddof=1) if bg.sum() > 1 else np.zeros(n_ports)
    ref_bg = np.interp(t_mid, tb, r.reference_w[bg]) if np.isfinite(r.reference_w[bg]).all() else np.zeros(len(r))
    info = {
        "applied": True,
        "readings": int(bg.sum()),
        "mean_per_port": [float(x) for x in vb.mean(axis=0)],
        "std_per_port": [float(x) for x in std],
    }
    return per_reading, std, ref_bg, info


def _drift_factor(run: RunData, ref_bg: np.ndarray, use_complete_sum: bool, gains: np.ndarray) -> tuple[np.ndarray, dict[str, Any]]:
    """Relative source power at every reading, from the pick-off meter or the reference steps."""
    r = run.readings
    lit = ~r.of_kind("background")
    t_mid = 0.5 * (r.t_start + r.t_end)
    ref = r.reference_w - ref_bg
    if lit.any() and np.isfinite(ref[lit]).all() and (ref[lit] > 0).all():
        window = max(5, int(lit.sum()) // 10)
        smooth = np.ones(len(r))
        smooth[lit] = _smooth(t_mid[lit], ref[lit], window)
        smooth[lit] /= smooth[lit].mean()
        return smooth, {
            "applied": True, "source": "pick-off reference meter", "smoothing_readings": window,
            "min": float(smooth[lit].min()), "max": float(smooth[lit].max()),
        }
    refsteps = r.of_kind("reference")
    if refsteps.sum() >= 2 and use_complete_sum:
        total = (r.values[refsteps] / gains).sum(axis=1)
        if (total > 0).all():
            f = np.interp(t_mid, t_mid[refsteps], total / total.mean())
            return f, {"applied": True, "source": "reference steps (total power, interpolated in time)",
                       "min": float(f.min()), "max": float(f.max())}
    return np.ones(len(r)), {"applied": False, "source": None}


def _complete_ports(run: RunData) -> bool:
    return complete_port_set([(p.sorter_port, p.splitter_port) for p in run.header.ports])


def _spread_model(values: np.ndarray, groups: np.ndarray, bg_std: float) -> tuple[float, float, str]:
    """(a, b) of sigma^2 = a^2 + (b v)^2 from repeated readings (groups), else fall-backs."""
    a = float(bg_std)
    uniq, inverse, counts = np.unique(groups, return_inverse=True, return_counts=True)
    rep = counts[inverse] >= 2
    if rep.sum() >= 4:
        means = np.bincount(inverse, weights=values) / counts
        dev = values - means[inverse]
        corr = counts[inverse] / np.maximum(counts[inverse] - 1, 1)  # unbiased variance per reading
        var = (dev**2 * corr)[rep]
        v2 = (means[inverse] ** 2)[rep]
        # least squares of var = a^2 + b^2 v^2 with a fixed from the background
        excess = np.clip(var - a * a, 0.0, None)
        b2 = float(np.sum(excess * v2) / max(np.sum(v2 * v2), 1e-300))
        return a, math.sqrt(max(b2, 0.0)), f"from {int(rep.sum())} repeated readings"
    return a, MIN_RELATIVE_SPREAD, "no repeats: background spread and a relative floor, rescaled by the fit residuals"


def prepare(run: RunData, *, normalize: bool = False, operators: np.ndarray | None = None) -> Prepared:
    """Readings of the ``measure`` kind, corrected, combined and reduced for the estimators.

    ``operators`` may replace the stored ones (e.g. recomputed with a new calibration).
    """
    h = run.header
    r = run.readings
    meas = r.of_kind("measure")
    if not meas.any():
        raise AnalysisError("the run has no measure readings yet; wait for the first setting to be measured")
    counts = h.port_units == "counts"
    gains = h.port_gains
    complete = _complete_ports(run)
    bg, bg_std, ref_bg, bg_info = _background(run)
    drift, drift_info = _drift_factor(run, ref_bg, complete, gains)
    ops_all = np.asarray(operators if operators is not None else r.operators)
    values = (r.values - bg)[meas]
    ops = ops_all[meas]
    f = drift[meas]
    steps = r.step_index[meas]
    plan = StepList.from_json(h.steps_json)
    labels_by_step = {s.index: s.port_labels for s in plan.steps}
    n, n_ports = values.shape
    corrections: dict[str, Any] = {"background": bg_info, "drift": drift_info}
    if counts:
        values = np.clip(np.round(values / f[:, None]), 0, None)
        corrections["port_gain"] = {"applied": True, "how": "kept in the operators (counts are not rescaled)",
                                    "gains": gains.tolist()}
        sig = None
    else:
        values = values / f[:, None] / gains[None, :]
        ops = ops / gains[None, :, None, None]
        sig_bg = np.broadcast_to(bg_std / gains, values.shape)
        corrections["port_gain"] = {"applied": True, "how": "divided out of readings and operators",
                                    "gains": gains.tolist()}
        sig = np.array(sig_bg)
    if normalize:
        if not complete:
            raise AnalysisError("normalisation per setting needs ports that measure a complete set (e.g. all four ports)")
        tot = values.sum(axis=1, keepdims=True)
        if (tot <= 0).any():
            raise AnalysisError("a setting has no signal at all; normalisation is impossible")
        values = values / tot
        if sig is not None:
            sig = sig / tot
        corrections["normalisation"] = {"applied": True, "how": "each setting's readings divided by their sum over the complementary ports"}
    else:
        corrections["normalisation"] = {"applied": False}
    # Flatten to one row per port reading, keyed for combination.
    flat_ops = ops.reshape(n * n_ports, 4, 4)
    flat_vals = values.reshape(-1)
    flat_sig = sig.reshape(-1) if sig is not None else None
    labels = [labels_by_step.get(int(s), ("",) * n_ports)[j] for s in steps for j in range(n_ports)]
    keys = []
    for i, (p, q, rep) in enumerate(zip(r.pass_index[meas], r.point_index[meas], r.repeat_index[meas])):
        for j in range(n_ports):
            keys.append((int(p), int(q), int(rep), labels[i * n_ports + j]))
    analyzes = h.analyzes
    t_rows = np.repeat(0.5 * (r.t_start + r.t_end)[meas], n_ports)
    if len(analyzes) == 1:
        index: dict[tuple, int] = {}
        group = np.array([index.setdefault(k, len(index)) for k in keys])
        m = len(index)
        g_ops = np.zeros((m, 4, 4), dtype=np.complex128)
        np.add.at(g_ops, group, flat_ops)
        g_vals = np.bincount(group, weights=flat_vals, minlength=m)
        g_sig = np.sqrt(np.bincount(group, weights=flat_sig**2, minlength=m)) if flat_sig is not None else None
        keep = analyzes[0]
        red = partial_trace(g_ops, keep) / 2.0
        out_labels = [None] * m
        for k, gi in index.items():
            out_labels[gi] = k[3]
        t_out = np.bincount(group, weights=t_rows, minlength=m) / np.bincount(group, minlength=m)
        ops_out, vals_out, sig_out, basis = red, g_vals, g_sig, FACTOR_BASIS[keep]
        rep_keys = [hash((k[0], k[1], k[3])) for k in sorted(index, key=index.get)]
        corrections["reduction"] = {"applied": True, "how": f"ports and expansion steps summed per projector, then Tr over the other factor / 2, keeping {keep}"}
    else:
        ops_out, vals_out, sig_out, basis = flat_ops, flat_vals, flat_sig, BASIS_LABELS
        out_labels = labels
        t_out = t_rows
        rep_keys = [hash((k[0], k[1], k[3])) for k in keys]
        corrections["reduction"] = {"applied": False}
    if sig_out is not None:
        a = float(np.sqrt(np.mean(sig_out**2))) if len(sig_out) else 0.0
        a_, b, how = _spread_model(vals_out, np.array(rep_keys), a)
        floor = 1e-6 * float(np.max(np.abs(vals_out))) if len(vals_out) else 0.0
        sig_out = np.sqrt(sig_out**2 + (b * np.abs(vals_out)) ** 2 + floor**2)
        corrections["noise_model"] = {"model": "gaussian", "absolute_w": a, "relative": b, "how": how}
    else:
        corrections["noise_model"] = {"model": "poisson"}
    return Prepared(
        operators=ops_out, values=vals_out, sigma=sig_out, model="poisson" if counts else "gaussian",
        basis=tuple(basis), analyzes=tuple(analyzes), corrections=corrections,
        labels=tuple(str(x) for x in out_labels), times=np.asarray(t_out),
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


def _rescale_sigma(prep: Prepared, fit: MleResult) -> tuple[np.ndarray, float]:
    """Scale the relative part of sigma so that chi^2 per degree of freedom is 1 (no repeats case)."""
    assert prep.sigma is not None
    pred = np.einsum("ij,nji->n", fit.intensity * fit.rho, prep.operators).real
    resid = prep.values - pred
    d = prep.operators.shape[-1]
    dof = max(1, len(prep.values) - d * d)
    chi2 = float(np.sum((resid / prep.sigma) ** 2))
    scale = math.sqrt(max(chi2 / dof, 1.0))
    return prep.sigma * scale, scale


def estimate(prep: Prepared, *, target: np.ndarray | None, rng: np.random.Generator, n_bootstrap: int = 200) -> Estimate:
    """Maximum likelihood with the run's noise model, figures of merit, bootstrap uncertainties."""
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
        sigma, scale = _rescale_sigma(prep, fit)
        if scale > 1.0:
            fit = mle_gaussian(prep.operators, prep.values, sigma)
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
    )
    figs = {k: (float(v.value), float(v.std)) for k, v in boot.figures.items()}
    rho_std = np.zeros((d, d), dtype=np.complex128)
    for i in range(d):
        for j in range(d):
            rho_std[i, j] = figs.pop(f"_re_{i}{j}")[1] + 1j * figs.pop(f"_im_{i}{j}")[1]
    stokes: dict[str, list[tuple[float, float]]] = {}
    for factor in prep.analyzes if len(prep.analyzes) == 1 else ("polarization", "spatial"):
        stokes[factor] = [(1.0, 0.0)] + [figs.pop(f"stokes_{factor}_{k}") for k in range(1, 4)]
    closest = None
    if len(prep.analyzes) == 2:
        fids = {name: figs.pop(f"fidelity_{name}") for name in JOINT_KETS}
        best = max(fids, key=lambda k: fids[k][0])
        closest = (best, fids[best][0], fids[best][1])
        figs.update({f"fidelity_to_{k}": v for k, v in fids.items()})
    corrections = dict(prep.corrections)
    if prep.model == "gaussian":
        corrections["noise_model"] = {**corrections["noise_model"], "residual_scale": scale}
    return Estimate(
        rho=fit.rho, rho_std=rho_std, basis=prep.basis, analyzes=prep.analyzes, figures=figs, stokes=stokes,
        closest_mode=closest,
        estimator={
            "method": "maximum likelihood, certified", "model": prep.model,
            "log_likelihood": fit.log_likelihood, "certified_gap": fit.certified_gap,
            "iterations": fit.iterations, "converged": bool(fit.converged), "intensity": fit.intensity,
            "bootstrap_resamples": boot.n_resamples, "bootstrap_converged": boot.n_converged,
            "readings": int(len(prep.values)),
        },
        corrections=corrections,
        linear_rho=lin.rho,
    )


def target_of(run: RunData) -> np.ndarray | None:
    """The protocol's target state for fidelity, in the dimension of the analysis."""
    h = run.header
    if len(h.analyzes) == 2:
        return None if h.target_state is None else np.asarray(h.target_state)
    return None if h.factor_target_state is None else np.asarray(h.factor_target_state)


def result_json(run: RunData, est: Estimate) -> dict[str, Any]:
    """The fixed ``analyze --json`` document (DESIGN.md), plus extras."""
    def vs(pair: tuple[float, float]) -> dict[str, float]:
        return {"value": float(pair[0]), "std": float(pair[1])}

    out: dict[str, Any] = {
        "basis": list(est.basis),
        "density_matrix": {"real": est.rho.real.tolist(), "imag": est.rho.imag.tolist()},
        "density_matrix_std": {"real": est.rho_std.real.tolist(), "imag": est.rho_std.imag.tolist()},
        "purity": vs(est.figures["purity"]),
        "linear_entropy": vs(est.figures["linear_entropy"]),
        "stokes": {f: [vs(x) for x in s] for f, s in est.stokes.items()},
        "degree_of_polarization": {f: vs(est.figures[f"dop_{f}"]) for f in est.stokes},
        "run": {
            "status": run.status,
            "steps_done": int(run.steps_done),
            "steps_total": int(run.header.steps_total),
            "message": run.message,
            "protocol": run.header.protocol_name,
            "bench": run.header.bench_name,
        },
        "estimator": est.estimator,
        "corrections": est.corrections,
    }
    if "concurrence" in est.figures:
        out["concurrence"] = vs(est.figures["concurrence"])
        out["fully_entangled_fraction"] = vs(est.figures["fully_entangled_fraction"])
    if "fidelity" in est.figures:
        out["fidelity"] = vs(est.figures["fidelity"])
        out["target"] = run.header.target_label
    if est.closest_mode is not None:
        name, f, s = est.closest_mode
        out["closest_vector_mode"] = {"name": name, "fidelity": {"value": f, "std": s}}
        out["vector_mode_fidelities"] = {
            k[len("fidelity_to_"):]: vs(v) for k, v in est.figures.items() if k.startswith("fidelity_to_")
        }
    return out
