"""Sufficient statistics per (setting, port): the fit sees one row per distinct operator, and the
estimates agree with a fit of every reading on its own."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from lightloom.sequencer.analysis.estimate import mle_gaussian
from lightloom.sequencer.analysis.pipeline import (
    _background, _background_at, _drift_model, _port_gains, estimate, prepare, target_of,
)
from lightloom.sequencer.analysis.reduction import reduce_to_factor
from lightloom.sequencer.analysis.estimate import merit
from lightloom.sequencer.cli import main
from lightloom.sequencer.optics.states import density, partial_trace
from lightloom.sequencer.storage.store import load_run

NIGHT = """\
protocol: night-4
description: Joint 36-setting tomography, four passes
analyzes: [polarization, spatial]
measure:
  targets:
    polarization: [H, V, D, A, R, L]
    spatial: [h, v, d, a, l+, l-]
dwell_s: 0.5
repeats: 2
background: {every_points: 36, at_start: true, at_end: true, dwell_s: 0.5}
reference: {every_points: 9, dwell_s: 0.2}
order: least-motion
sweep: {passes: 4, interval_s: 300}
target_state: {name: radial}
"""


@pytest.fixture(scope="module")
def night(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("night")
    protocol = d / "night.yaml"
    protocol.write_text(NIGHT, encoding="utf-8")
    out = d / "night.h5"
    assert main(["run", str(protocol), "--bench", "sim", "--out", str(out), "--quiet"]) == 0
    return out


def _per_reading_rows(run, absolute: float, relative: float):
    """Every port reading as its own row, corrected as the pipeline corrects it (no combination)."""
    from lightloom.sequencer.analysis.pipeline import _complete_ports

    r = run.readings
    gains = _port_gains(run)
    bg_model, ref_bg = _background(run)
    t_mid = 0.5 * (r.t_start + r.t_end)
    bg = _background_at(bg_model, t_mid)
    drift = _drift_model(run, ref_bg, _complete_ports(run), gains).factor(t_mid)
    meas = r.of_kind("measure")
    values = ((r.values - bg)[meas] / drift[meas][:, None] / gains[None, :]).reshape(-1)
    ops = (r.operators[meas] / gains[None, :, None, None]).reshape(-1, 4, 4)
    floor = 1e-6 * np.max(np.abs(values))
    sigma = np.sqrt(absolute**2 + (relative * values) ** 2 + floor**2)
    return ops, values, sigma


def test_the_fit_sees_one_row_per_setting_and_port(night: Path) -> None:
    run = load_run(night)
    prep = prepare(run)
    n_measure = int(run.readings.of_kind("measure").sum())
    assert prep.readings == n_measure * len(run.header.port_names)
    assert len(prep.values) == 36  # 9 analyzer settings x 4 ports on sim, whatever the number of passes


def test_estimates_agree_with_the_per_reading_fit(night: Path) -> None:
    run = load_run(night)
    prep = prepare(run)
    est = estimate(prep, target=target_of(run), rng=np.random.default_rng(3), n_bootstrap=100)
    nm = prep.corrections["noise_model"]
    ops, values, sigma = _per_reading_rows(run, nm["absolute_w"], nm["relative"])
    assert len(values) == 8 * len(prep.values) * 1  # 4 passes x 2 repeats per row
    reference = mle_gaussian(ops, values, sigma)
    # Each density-matrix entry and figure within 1 std (the bootstrap's) of the per-reading fit.
    diff = np.abs(reference.rho - est.rho)
    assert np.all(diff.real <= est.rho_std.real + 1e-5) and np.all(diff.imag <= est.rho_std.imag + 1e-5)
    for name, func in (("purity", merit.purity), ("concurrence", merit.concurrence)):
        value, std, _ = est.figures[name]
        assert abs(float(func(reference.rho)) - value) <= std
    assert abs(reference.intensity - est.power[0]) <= 2 * est.power[1]


def test_reduction_sums_complementary_ports_and_not_labels() -> None:
    # Two sorter outputs behind the H port see H (x) h and H (x) v: together H (x) I, exact.
    # A lone port behind one sorter output cannot be made exact: the conditional case.
    # Projectors built here by hand (common practice, no source).
    h, v = density(np.array([1, 0], complex)), density(np.array([0, 1], complex))
    pol = {k: density(np.asarray(x, complex) / np.linalg.norm(x)) for k, x in
           {"H": [1, 0], "V": [0, 1], "D": [1, 1], "A": [1, -1], "R": [1, 1j], "L": [1, -1j]}.items()}
    rho_pol = density(np.array([0.8, 0.6j]))
    rho = np.kron(rho_pol, 0.3 * h + 0.7 * v)
    ops = np.array([np.kron(pol[k], m) for k in pol for m in (h, v)])
    values = np.real(np.einsum("nij,ji->n", ops, rho))
    red_ops, red_vals, _, info, _ = reduce_to_factor(ops, values, None, "polarization")
    assert info.case == "exact" and len(red_ops) == 6
    expected = np.real(np.einsum("nij,ji->n", red_ops, partial_trace(rho, "polarization")))
    assert np.allclose(red_vals, expected)
    lone = np.array([np.kron(pol[k], h) for k in pol])
    lone_vals = np.real(np.einsum("nij,ji->n", lone, rho))
    red_ops, red_vals, _, info, _ = reduce_to_factor(lone, lone_vals, None, "polarization")
    assert info.case == "conditional"
    # proportional to the conditional state's predictions (here the reduced state: a product source)
    pred = np.real(np.einsum("nij,ji->n", red_ops, rho_pol))
    assert np.allclose(red_vals / red_vals.sum(), pred / pred.sum())
    # and equal to them with the unnormalised state of the light the h filter passes (its trace, 0.3,
    # the power that passes): the fitted intensity is that power, not twice it
    passed = partial_trace(np.kron(np.eye(2), h) @ rho @ np.kron(np.eye(2), h), "polarization")
    assert np.allclose(red_vals, np.real(np.einsum("nij,ji->n", red_ops, passed)))


def test_the_noise_models_degrees_of_freedom_widen_the_intervals_by_t_over_z(night: Path, capsys) -> None:
    # Repeats are grouped within a pass (drift between passes is not reading noise): 4 passes x 36
    # (setting, port) rows x (2 - 1) degrees of freedom, and the background readings (4 ports, one
    # fewer than their readings) add theirs. Student's t quantile against the normal one from
    # scipy.stats (a general-purpose reference library).
    from scipy.stats import norm, t

    run = load_run(night)
    prep = prepare(run)
    nm = prep.corrections["noise_model"]
    n_bg = int(run.readings.of_kind("background").sum())
    assert nm["dof"] == 4 * 36 * 1 + 4 * (n_bg - 1)
    est = estimate(prep, target=target_of(run), rng=np.random.default_rng(3), n_bootstrap=60)
    used = est.corrections["noise_model"]
    assert used["interval_widening"] == pytest.approx(t.ppf(0.975, nm["dof"]) / norm.ppf(0.975), rel=1e-9)
    assert used["interval_widening"] > 1.0
    # and the text report says what was applied
    assert main(["analyze", str(night)]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert f"intervals widened {used['interval_widening']:.3f}x for its {nm['dof']} degrees of freedom" in text
