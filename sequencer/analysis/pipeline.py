"""From a run (its readings and the operators of every port reading) to states and figures of merit.

Pure: takes the RunData read from a file, returns plain results. The corrections, each recorded in
the result:

1. background: the shutter-closed readings of each port, interpolated in time, are subtracted;
   their spread enters the noise model;
2. port gains: divided out of power readings and of their operators alike (E = g K^dagger K in the
   file); counts keep gains in the operators, since counts cannot be rescaled;
3. drift: readings are divided by a smooth drift model fitted to the pick-off reference (or to
   the reference steps' total power), only where the reference shows a drift beyond its own
   noise (sequencer.analysis.drift);
4. normalisation per setting over complementary ports (optional, when the ports of a setting
   measure a complete set): each step's readings are divided by their sum, which cancels drift
   without a reference meter.

The errors of the background subtraction and of the drift model are drawn into every bootstrap
replicate (sequencer.analysis.propagation), and every figure gets a 95% interval inside its
physical range (sequencer.analysis.intervals).

Single-factor protocols sum the readings of the ports (and expansion steps) that measure the same
projector on the analysed factor, then reduce the operators to that factor, Tr_other(E) / 2,
which is exact when the summed operator is A (x) I.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from lightloom.sequencer.analysis.estimate import (
    MleResult, linear_inversion, mle_gaussian, mle_poisson, parametric_bootstrap,
)
from lightloom.sequencer.analysis.estimate import merit
from lightloom.sequencer.analysis.background import BackgroundModel, background_info, background_model, pooled_reading_noise
from lightloom.sequencer.analysis.drift import DriftModel, fit_drift, no_drift
from lightloom.sequencer.analysis.intervals import figure_bounds
from lightloom.sequencer.analysis.propagation import CorrectionNoise, correction_noise
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
    correction_noise: CorrectionNoise | None = None


@dataclass(frozen=True)
class Estimate:
    """The result of an analysis: the state, its figures with uncertainties, and how it was made."""

    rho: np.ndarray
    rho_std: np.ndarray
    basis: tuple[str, ...]
    analyzes: tuple[str, ...]
    figures: dict[str, tuple[float, float, tuple[float, float]]]  # name -> (value, std, 95% interval)
    stokes: dict[str, list[tuple[float, float, tuple[float, float]]]]  # factor -> [S0..S3] (value, std, interval)
    closest_mode: tuple[str, float, float, tuple[float, float]] | None
    estimator: dict[str, Any]
    corrections: dict[str, Any]
    linear_rho: np.ndarray | None = None


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


def _spread_model(values: np.ndarray, groups: np.ndarray, bg_std: float) -> tuple[float, float, str]:
    """(a, b) of sigma^2 = a^2 + (b v)^2 from repeated readings (groups), else fall-backs.

    With repeats both terms are fitted (non-negative least squares on the unbiased variances),
    the background spread entering as one more observation of a^2: a few background readings
    alone estimate the absolute noise, which dominates at low power, too poorly.
    """
    a = float(bg_std)
    uniq, inverse, counts = np.unique(groups, return_inverse=True, return_counts=True)
    rep = counts[inverse] >= 2
    if rep.sum() >= 4:
        means = np.bincount(inverse, weights=values) / counts
        dev = values - means[inverse]
        corr = counts[inverse] / np.maximum(counts[inverse] - 1, 1)  # unbiased variance per reading
        var = (dev**2 * corr)[rep]
        v2 = (means[inverse] ** 2)[rep]
        from scipy.optimize import nnls

        # var = a^2 + b^2 v^2, weighted by 1 / model variance^2 (the spread of a variance estimate
        # grows with the variance), with the background spread as one more observation of a^2.
        v_scale = max(float(np.median(v2)), 1e-300)
        design = np.column_stack([np.ones(var.size), v2 / v_scale])
        rhs = var
        if a > 0:
            design = np.vstack([design, [1.0, 0.0]])
            rhs = np.concatenate([var, [a * a]])
        model_var = np.full(rhs.size, max(float(rhs.mean()), 1e-300))
        for _ in range(3):
            w = 1.0 / model_var
            sol, _ = nnls(design * w[:, None], rhs * w)
            model_var = np.maximum(design @ sol, 1e-3 * max(float(rhs.mean()), 1e-300))
        a2, b2 = float(sol[0]), float(sol[1]) / v_scale
        return math.sqrt(max(a2, 0.0)), math.sqrt(max(b2, 0.0)), f"from {int(rep.sum())} repeated readings"
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
    bg_model, ref_bg = _background(run)
    bg_info = background_info(bg_model)
    bg_std = bg_model.sigma if bg_model.applied else np.zeros(r.values.shape[1])
    drift_model = _drift_model(run, ref_bg, complete, gains)
    drift_info = drift_model.info
    t_all = 0.5 * (r.t_start + r.t_end)
    ops_all = np.asarray(operators if operators is not None else r.operators)
    values = (r.values - bg_model.at(t_all))[meas]
    ops = ops_all[meas]
    f = drift_model.factor(t_all)[meas]
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
    # Where each port reading goes: its row of the fit, its time, port and divisor (drift x gain).
    flat_rows = group if len(analyzes) == 1 else np.arange(n * n_ports)
    flat_div = (f[:, None] * (np.ones(n_ports) if counts else gains)[None, :]).reshape(-1)
    if sig_out is not None:
        a = float(np.sqrt(np.mean(sig_out**2))) if len(sig_out) else 0.0
        a, b, how = _spread_model(vals_out, np.array(rep_keys), a)
        floor = 1e-6 * float(np.max(np.abs(vals_out))) if len(vals_out) else 0.0
        sig_out = np.sqrt(a * a + (b * np.abs(vals_out)) ** 2 + floor**2)
        corrections["noise_model"] = {"model": "gaussian", "absolute_w": a, "relative": b, "how": how}
        if bg_model.applied and a > 0:
            # a is the absolute noise of a fitted row; a row sums `members` port readings.
            members = max(len(flat_rows) / max(len(vals_out), 1), 1.0)
            _, group_sizes = np.unique(np.array(rep_keys), return_counts=True)
            repeat_dof = int(np.sum(group_sizes[group_sizes >= 2] - 1)) if "repeated" in how else 0
            a_port = a / math.sqrt(members) * gains
            if bg_model.times_s.size < 2:
                bg_model = background_model(bg_model.times_s, bg_model.values, fallback_sigma=a_port)
            else:
                bg_model = pooled_reading_noise(bg_model, a_port, repeat_dof)
            corrections["background"] = {**background_info(bg_model), "reading_noise_how":
                                         "background spread pooled with the absolute noise of repeated readings"}
    else:
        corrections["noise_model"] = {"model": "poisson"}
        if bg_model.applied and bg_model.times_s.size < 2:
            # One background reading of counts: its Poisson spread.
            bg_model = background_model(bg_model.times_s, bg_model.values,
                                        fallback_sigma=np.sqrt(np.clip(bg_model.values[0], 1.0, None)))
    noise = correction_noise(
        flat_times_s=np.repeat(t_all[meas], n_ports), flat_ports=np.tile(np.arange(n_ports), n),
        flat_divisor=flat_div, flat_rows=flat_rows, n_rows=len(vals_out), row_times_s=np.asarray(t_out),
        background=bg_model, drift=drift_model,
    )
    return Prepared(
        operators=ops_out, values=vals_out, sigma=sig_out, model="poisson" if counts else "gaussian",
        basis=tuple(basis), analyzes=tuple(analyzes), corrections=corrections,
        labels=tuple(str(x) for x in out_labels), times=np.asarray(t_out), correction_noise=noise,
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
        nm = prep.corrections.get("noise_model", {})
        if nm.get("relative", 0.0) > 0:
            # The relative part of the spread from the fitted readings rather than the measured
            # ones: weights that follow each reading's own noise bias the fit (a reading that
            # fluctuates up is down-weighted), and the bootstrap, whose sigma is fixed, would not
            # show that bias (iteratively reweighted least squares, common practice, no source).
            pred = np.clip(np.einsum("ij,nji->n", fit.intensity * fit.rho, prep.operators).real, 0.0, None)
            floor = 1e-6 * float(np.max(np.abs(prep.values)))
            refined = np.sqrt(nm["absolute_w"] ** 2 + (nm["relative"] * pred) ** 2 + floor**2)
            prep = dataclasses.replace(prep, sigma=refined)
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
        bounds={name: figure_bounds(name, d) for name in fns},
        perturb=prep.correction_noise.perturb if prep.correction_noise is not None else None,
    )
    figs = {k: (float(v.value), float(v.std), v.interval) for k, v in boot.figures.items()}
    rho_std = np.zeros((d, d), dtype=np.complex128)
    for i in range(d):
        for j in range(d):
            rho_std[i, j] = figs.pop(f"_re_{i}{j}")[1] + 1j * figs.pop(f"_im_{i}{j}")[1]
    stokes: dict[str, list[tuple[float, float]]] = {}
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
    def vs(fig: tuple) -> dict[str, Any]:
        out = {"value": float(fig[0]), "std": float(fig[1])}
        if len(fig) > 2:
            out["interval"] = [float(fig[2][0]), float(fig[2][1])]
        return out

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
        name, *fig = est.closest_mode
        out["closest_vector_mode"] = {"name": name, "fidelity": vs(tuple(fig))}
        out["vector_mode_fidelities"] = {
            k[len("fidelity_to_"):]: vs(v) for k, v in est.figures.items() if k.startswith("fidelity_to_")
        }
    return out
