"""Readable terminal tables (rich) of an analysis result."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from rich import box
from rich.console import Console
from rich.table import Table


def _pm(x: dict[str, Any] | None, digits: int = 4) -> str:
    if x is None:
        return "not yet"
    text = f"{x['value']:.{digits}f} ± {x['std']:.{digits}f}"
    if x.get("interval") is not None:
        lo, hi = x["interval"]
        text += f" [{lo:.{digits}f}, {hi:.{digits}f}]"
    return text


def _power(x: dict[str, Any]) -> str:
    return f"{x['value']:.5g} ± {x['std']:.2g} {x.get('units', '')}"


def _matrix_table(title: str, basis: list[str], m: dict[str, Any]) -> Table:
    rho = np.array(m["real"]) + 1j * np.array(m["imag"])
    t = Table(title=title)
    t.add_column("")
    for b in basis:
        t.add_column(b, justify="right")
    for i, b in enumerate(basis):
        t.add_row(b, *[f"{rho[i, j].real:+.3f}{rho[i, j].imag:+.3f}j" for j in range(len(basis))])
    return t


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
    if "density_matrix" not in doc:
        _print_partial(console, doc)
        return
    console.print(_matrix_table("density matrix (maximum likelihood)", basis, doc["density_matrix"]))
    if "linear_inversion" in doc:
        li = doc["linear_inversion"]
        console.print(_matrix_table(
            f"density matrix (linear inversion; lowest eigenvalue {li['min_eigenvalue']:+.4f})", basis, li))
    f = Table(title="figures of merit (value ± std [95% interval], parametric bootstrap)")
    f.add_column("quantity")
    f.add_column("value", justify="right")
    f.add_row("purity tr(rho^2)", _pm(doc["purity"]))
    f.add_row("linear entropy", _pm(doc["linear_entropy"]))
    if "power" in doc:
        f.add_row("power S0", _power(doc["power"]))
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
        s.add_row(factor, *[_pm(v, 3) for v in vals[1:]], _pm(doc["degree_of_polarization"].get(factor), 3))
    console.print(s)
    _print_corrections(console, doc)


def _print_partial(console: Console, doc: dict[str, Any]) -> None:
    """A run whose readings do not determine the state yet: what they do give, and what is missing."""
    if doc.get("stokes"):
        so_far = "" if doc.get("run", {}).get("status") == "complete" else " so far"
        s = Table(title=f"Stokes parameters determined{so_far} (normalised, S0 = 1)")
        s.add_column("factor")
        for k in ("S1", "S2", "S3", "degree"):
            s.add_column(k, justify="right")
        for factor, vals in doc["stokes"].items():
            cells = [_pm(v, 3) for v in vals[1:]] + [_pm(doc.get("degree_of_polarization", {}).get(factor), 3)]
            s.add_row(factor, *[c if so_far or c != "not yet" else "not determined" for c in cells])
        console.print(s)
    if "power" in doc:
        console.print(f"  power S0: {_power(doc['power'])}", highlight=False)
    done = doc.get("run", {}).get("status") == "complete"
    console.print("  the state is not determined; missing from the complete run:" if done
                  else "  the state is not determined yet; still missing:", highlight=False)
    for line in doc.get("missing", []):
        console.print(f"   - {line}", highlight=False, markup=False)
    if "corrections" in doc and "estimator" in doc:
        _print_corrections(console, doc)


def _print_corrections(console: Console, doc: dict[str, Any]) -> None:
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
        widen = (f"; intervals widened {nm['interval_widening']:.3f}x for its {nm['dof']} degrees of freedom"
                 if nm.get("interval_widening", 1.0) > 1.0 else "")
        lines.append(f"noise: Gaussian, {nm['absolute_w']:.3g} W + {nm['relative']:.2%} relative ({nm['how']}), "
                     f"residual scale {nm.get('residual_scale', 1):.2f}{widen}")
    else:
        lines.append("noise: Poisson counts")
    red = corr.get("reduction", {})
    if red.get("applied"):
        lines.append(f"reduction: {red['how']}")
    e = doc["estimator"]
    if "log_likelihood" in e:
        lines.append(
            f"estimator: {e['method']}, {e['readings']} readings in {e.get('distinct_operators', '?')} distinct "
            f"operators, log-likelihood {e['log_likelihood']:.6g}, certified gap {e['certified_gap']:.2g}, "
            f"{e['bootstrap_resamples']} bootstrap resamples"
        )
    else:
        lines.append(f"estimator: {e['method']}, {e['readings']} readings, {e.get('determined', '')}")
    for line in lines:
        console.print(f"  {line}", highlight=False, markup=False)


def print_passes(console: Console, passes: list[dict[str, Any]]) -> None:
    """One row per pass or time window of an analysis with --per-pass or --window."""
    if not passes:
        console.print("  no pass holds measure readings yet", highlight=False)
        return
    kind = "pass" if "pass" in passes[0] else "window"
    t0 = min(p["t_start"] for p in passes)
    stokes = "polarization" if any("polarization" in p.get("stokes", {}) for p in passes) else "spatial"
    t = Table(title=f"results per {kind}: value(std in its last digits), middle h:mm:ss",
              box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False, padding=(0, 1), collapse_padding=True)
    for col in (kind, "middle", "purity", "conc.", "fid.", f"{stokes[:3]}. S1", "S2", "S3"):
        t.add_column(col, justify="right", no_wrap=True)
    for p in passes:
        s = p.get("stokes", {}).get(stokes) or [None] * 4
        t.add_row(str(p.get(kind)), _clock(0.5 * (p["t_start"] + p["t_end"]) - t0),
                  _tight(p.get("purity")), _tight(p.get("concurrence")), _tight(p.get("fidelity")),
                  *[_tight(x, 3) for x in s[1:4]])
    console.print(t)
    for p in passes:
        if p.get("missing"):
            console.print(f"  {kind} {p.get(kind)}: not determined: " + "; ".join(p["missing"]), highlight=False, markup=False)


def _tight(x: dict[str, Any] | None, digits: int = 4) -> str:
    """Value with its std in the last digits, in parentheses: 0.9490(2) is 0.9490 ± 0.0002."""
    if x is None:
        return "-"
    return f"{x['value']:.{digits}f}({int(round(x['std'] * 10**digits))})"


def _clock(seconds: float) -> str:
    s = int(round(seconds))
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"


def print_summary(console: Console, results: list[tuple[str, dict[str, Any]]]) -> None:
    """One row per run file (its name; the JSON and CSV give the paths): protocol, status, purity,
    concurrence, fidelity, Stokes."""
    from lightloom.sequencer.analysis.summary import summary_row

    rows = [(path, summary_row(path, doc)) for path, doc in results]
    # Numbers are never cut: a column of figures no run has is left out, the file's name and its
    # status share a column, and on a narrow terminal only the text columns fold.
    figures = [(key, head) for key, head in (("purity", "purity"), ("concurrence", "conc."), ("fidelity", "fid."))
               if any(r[key] is not None for _, r in rows)]
    factors = [(f, head) for f, head in (("polarization", "pol.\nS1-S3"), ("spatial", "spat.\nS1-S3"))
               if any(r[f"{f}_S{k}"] is not None for _, r in rows for k in (1, 2, 3))]
    t = Table(title="runs: value(std in its last digits)", box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False,
              padding=(0, 1), collapse_padding=True)
    # the figures' columns are 10 characters wide, the Stokes ones 6, and each column takes 2 more
    # for the gap (the last one none): what is left goes to the two text columns
    left = console.width - 12 * len(figures) - 8 * len(factors) - 2
    protocol_width = max(8, min(16, left // 2 + 1))
    t.add_column("file\nstatus", overflow="fold", max_width=max(8, left - protocol_width))
    t.add_column("protocol", overflow="fold", max_width=protocol_width)
    for _, head in figures:
        t.add_column(head, no_wrap=True, min_width=10)
    for _, head in factors:
        t.add_column(head, no_wrap=True, min_width=6)

    def pm(row: dict[str, Any], key: str, digits: int = 4) -> str:
        if row[key] is None:
            return "-"
        return _tight({"value": row[key], "std": row[key + "_std"]}, digits)

    for path, row in rows:
        status = row["status"] or "-"
        if row["steps_total"]:
            status += f" {row['steps_done']}/{row['steps_total']}"
        stokes = ["\n".join("-" if row[f"{f}_S{k}"] is None else f"{row[f'{f}_S{k}']:+.3f}" for k in (1, 2, 3))
                  for f, _ in factors]
        t.add_row(f"{Path(path).name}\n{status}", row["protocol"] or "-", *[pm(row, key) for key, _ in figures],
                  *stokes)
    console.print(t)
    for path, doc in results:
        if "error" in doc:
            console.print(f"  {path}: {doc['error']}", highlight=False, markup=False)
        elif doc.get("determines") == "scan" and "purity" not in doc:
            console.print(f"  {path}: a scan, no state (`lightloom analyze {path}` shows its fit)",
                          highlight=False, markup=False)
        elif doc.get("missing"):
            done = doc.get("run", {}).get("status") == "complete"
            console.print(f"  {path}: {'not determined' if done else 'not yet determined'}: " + "; ".join(doc["missing"]),
                          highlight=False, markup=False)


def print_scan(console: Console, doc: dict[str, Any]) -> None:
    """Print the document of a scan run: run line, fitted parameters, residuals per port."""
    run = doc["run"]
    state = doc.get("state_determined")
    what = (f"a scan; its readings also determine the {state.removesuffix('-state')} state (above)" if state
            else "a scan (no state)")
    console.print(f"[bold]{run['protocol']}[/bold] on {run['bench']}: {run['status']}, "
                  f"{run['steps_done']}/{run['steps_total']} steps: {what}", highlight=False)
    scan = doc.get("scan")
    if scan is None:
        console.print("  not fitted yet: " + "; ".join(doc.get("missing", [])), highlight=False, markup=False)
        return
    fit = scan["fit"]
    if fit.get("describes_readings") is False:
        console.print("  the calibration model below does not describe these readings (see the note); "
                      + ("the state above is what they determine" if state else "its values mean nothing"),
                      highlight=False, markup=False)
    model = scan.get("state_model")
    if model:
        rms = ", ".join(f"{name} {np.sqrt(np.mean(np.square(o['residuals']))):.3g} {scan['unit']}"
                        for name, o in model["outputs"].items())
        console.print(f"  against the {model['factor']} state (outputs summed over the other factor): residual rms {rms}",
                      highlight=False, markup=False)
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
    ratio = fit.get("residuals_over_repeat_scatter")
    versus = f", {ratio:.2g} times the scatter of repeated readings" if ratio is not None else ""
    console.print(f"  ports: {ports}; residual rms {fit['residual_rms']:.3g} {scan['unit']}{versus}, reduced chi2 "
                  f"{fit['reduced_chi2']:.2f} (against the noise fitted to these residuals)", highlight=False, markup=False)
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
