"""Readable terminal tables (rich) of an analysis result."""

from __future__ import annotations

from typing import Any

import numpy as np
from rich.console import Console
from rich.table import Table


def _pm(x: dict[str, Any], digits: int = 4) -> str:
    text = f"{x['value']:.{digits}f} ± {x['std']:.{digits}f}"
    if x.get("interval") is not None:
        lo, hi = x["interval"]
        text += f" [{lo:.{digits}f}, {hi:.{digits}f}]"
    return text


def print_report(console: Console, doc: dict[str, Any]) -> None:
    """Print the analysis document produced by analysis.result_json."""
    run = doc["run"]
    from rich.text import Text

    head = Text(run["protocol"], style="bold")
    head.append(
        f" on {run['bench']}: {run['status']}, {run['steps_done']}/{run['steps_total']} steps"
        + (f" — {run['message']}" if run.get("message") else "")
    )
    console.print(head)
    basis = doc["basis"]
    rho = np.array(doc["density_matrix"]["real"]) + 1j * np.array(doc["density_matrix"]["imag"])
    t = Table(title="density matrix (maximum likelihood)")
    t.add_column("")
    for b in basis:
        t.add_column(b, justify="right")
    for i, b in enumerate(basis):
        t.add_row(b, *[f"{rho[i, j].real:+.3f}{rho[i, j].imag:+.3f}j" for j in range(len(basis))])
    console.print(t)
    f = Table(title="figures of merit (value ± std [95% interval], parametric bootstrap)")
    f.add_column("quantity")
    f.add_column("value", justify="right")
    f.add_row("purity tr(rho^2)", _pm(doc["purity"]))
    f.add_row("linear entropy", _pm(doc["linear_entropy"]))
    if "concurrence" in doc:
        f.add_row("concurrence", _pm(doc["concurrence"]))
        f.add_row("fully entangled fraction", _pm(doc["fully_entangled_fraction"]))
    if "fidelity" in doc:
        f.add_row(f"fidelity to target ({doc.get('target') or 'protocol target'})", _pm(doc["fidelity"]))
    if "closest_vector_mode" in doc:
        c = doc["closest_vector_mode"]
        f.add_row(f"closest vector mode: {c['name']}", _pm(c["fidelity"]))
        for name, v in doc.get("vector_mode_fidelities", {}).items():
            if name != c["name"]:
                f.add_row(f"  fidelity to {name}", _pm(v))
    console.print(f)
    s = Table(title="Stokes parameters (normalised, S0 = 1)")
    s.add_column("factor")
    for k in ("S1", "S2", "S3", "degree"):
        s.add_column(k, justify="right")
    for factor, vals in doc["stokes"].items():
        s.add_row(factor, *[_pm(v, 3) for v in vals[1:]], _pm(doc["degree_of_polarization"][factor], 3))
    console.print(s)
    corr = doc["corrections"]
    lines = []
    bg = corr.get("background", {})
    lines.append(f"background: {'subtracted, ' + str(bg.get('readings')) + ' readings' if bg.get('applied') else 'none recorded'}")
    d = corr.get("drift", {})
    lines.append(
        f"drift: {d['source']}, {d.get('model', '')} (factor {d['min']:.4f}..{d['max']:.4f}, std up to "
        f"{d.get('factor_std_max', 0.0):.2%}, drawn into the bootstrap)" if d.get("applied")
        else f"drift: not corrected ({d.get('reason') or 'no reference'})"
    )
    lines.append(f"port gains: {corr.get('port_gain', {}).get('how', '-')}")
    if corr.get("normalisation", {}).get("applied"):
        lines.append("normalisation: per setting over complementary ports")
    nm = corr.get("noise_model", {})
    if nm.get("model") == "gaussian":
        lines.append(f"noise: Gaussian, {nm['absolute_w']:.3g} W + {nm['relative']:.2%} relative ({nm['how']}), residual scale {nm.get('residual_scale', 1):.2f}")
    else:
        lines.append("noise: Poisson counts")
    e = doc["estimator"]
    lines.append(
        f"estimator: {e['method']}, {e['readings']} readings, log-likelihood {e['log_likelihood']:.6g}, "
        f"certified gap {e['certified_gap']:.2g}, {e['bootstrap_resamples']} bootstrap resamples"
    )
    for line in lines:
        console.print(f"  {line}", highlight=False, markup=False)


def print_scan(console: Console, doc: dict[str, Any]) -> None:
    """Print the document of a scan run: run line, fitted parameters, residuals per port."""
    run = doc["run"]
    console.print(f"[bold]{run['protocol']}[/bold] on {run['bench']}: {run['status']}, "
                  f"{run['steps_done']}/{run['steps_total']} steps: a scan (no state)", highlight=False)
    scan = doc.get("scan")
    if scan is None:
        console.print(f"  not fitted yet: {doc.get('missing', '')}", highlight=False, markup=False)
        return
    fit = scan["fit"]
    t = Table(title=f"scan of the {scan['scanned_element'].replace('_', ' ')}: fitted parameters (± std [95% interval])")
    t.add_column("parameter")
    t.add_column("value", justify="right")
    from rich.markup import escape

    for name, p in fit["parameters"].items():
        name = escape(name.removeprefix("calibration."))
        if p["std"] is None:
            t.add_row(name, f"{p['value']:.6g} (not determined)")
        else:
            lo, hi = p["interval"]
            t.add_row(name, f"{p['value']:.6g} ± {p['std']:.2g} [{lo:.6g}, {hi:.6g}]")
    console.print(t)
    ports = ", ".join(f"{k} ({len(v['readings'])} readings)" for k, v in scan["ports"].items())
    console.print(f"  ports: {ports}; residual rms {fit['residual_rms']:.3g} {scan['unit']}, reduced chi2 "
                  f"{fit['reduced_chi2']:.2f}", highlight=False, markup=False)
    for note in fit["notes"]:
        console.print(f"  note: {note}", highlight=False, markup=False)


def print_stability(console: Console, stab: dict[str, Any]) -> None:
    """Print the ``stability`` section: per series mean, drift per hour, Allan deviation at a few taus."""
    t = Table(title="stability (drift: straight line; Allan deviation: overlapping, relative)")
    for col in ("series", "readings", "mean", "drift per hour", "Allan dev. (tau)"):
        t.add_column(col, justify="left" if col == "series" else "right")
    series = ([("reference", stab["reference"])] if stab.get("reference") else []) + list(stab["ports"].items())
    for name, s in series:
        d = s["drift_per_hour"]
        allan = s["allan"]
        picks = [i for i in sorted({0, len(allan["tau_s"]) // 2, len(allan["tau_s"]) - 1}) if i >= 0]
        adev = ", ".join(f"{allan['deviation'][i]:.2g} ({allan['tau_s'][i]:.3g} s)" for i in picks) if allan["tau_s"] else "-"
        t.add_row(name, str(s["readings"]), f"{s['mean']['value']:.4g} {s['unit']}",
                  f"{100 * d['value']:+.3f} ± {100 * d['std']:.3f} %", adev)
    console.print(t)
