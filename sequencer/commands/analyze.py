"""``lightloom analyze FILE.h5 [FILE.h5 ...] [--json | --csv] [--plots DIR] [--per-pass | --window DURATION]``."""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
from typing import Any

import numpy as np


def add_parser(sub) -> None:
    p = sub.add_parser(
        "analyze",
        help="reconstruct the state of a run (complete, interrupted or still running); several runs: one summary table",
        description=(
            "Reconstruct the state measured in a run file (finished, stopped or still running) with error"
            " bars: density matrix, purity, concurrence, Stokes parameters and fidelity to the protocol's"
            " target, as tables, as JSON (--json) or as figures (--plots DIR); what the readings do not"
            " determine yet is listed as missing. Each pass or time window on its own with --per-pass or"
            " --window; several files give one summary table (--json, --csv)."
        ),
    )
    p.add_argument("files", nargs="+", metavar="FILE", help="run file (FILE.h5) or its journal; several for a summary table")
    out = p.add_mutually_exclusive_group()
    out.add_argument("--json", action="store_true", help="print the result as JSON")
    out.add_argument("--csv", action="store_true", help="print one summary row per run as CSV")
    p.add_argument("--plots", metavar="DIR", help="write PNG figures into DIR")
    split = p.add_mutually_exclusive_group()
    split.add_argument("--per-pass", action="store_true", help="also fit each pass of the protocol's sweep on its own")
    split.add_argument("--window", metavar="DURATION",
                       help="also fit each time window on its own, e.g. 900s, 30min, 2h (for runs without passes)")
    p.add_argument("--bench", help="recompute the operators from the read-back positions with this bench's calibration (e.g. a calibrate overlay)")
    p.add_argument("--normalize", action="store_true", help="normalise each setting over its complementary ports (cancels drift without a reference meter)")
    p.add_argument("--bootstrap", type=int, default=200, metavar="N", help="bootstrap resamples for the error bars (default 200)")
    p.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")
    p.add_argument("--series", action="store_true", help="imaging runs: per-pass integrated Stokes, non-separability and pattern drift, out of core with dask")
    p.add_argument("--series-maps", metavar="FILE.h5", help="imaging runs: Stokes maps per window of passes to this new HDF5 file (out of core)")
    p.add_argument("--series-window", type=int, default=1, metavar="N", help="passes per window of --series-maps (default 1: a map per pass)")
    p.add_argument("--dask", metavar="ADDRESS", help="run the --series analysis on the dask.distributed scheduler at ADDRESS (default: local threads)")
    p.add_argument("--maps", metavar="FILE.h5", help="imaging runs: write the Stokes, DOP, orientation and ellipticity maps to this new HDF5 file")
    p.add_argument("--field-maps", action="store_true",
                   help="add the transverse polarization maps of a joint state to the JSON (key field_maps)")
    p.add_argument("--stability", action="store_true",
                   help="also report the stability of the reference and every port: mean, drift per hour, "
                        "Allan deviation (automatic for runs of the stability protocol)")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    from lightloom.sequencer.analysis.summary import parse_duration_s
    from lightloom.sequencer.errors import UsageError

    if args.bootstrap < 2:
        raise UsageError("--bootstrap needs at least 2 resamples")
    window_s = None
    if args.window is not None:
        try:
            window_s = parse_duration_s(args.window)
        except ValueError as exc:
            raise UsageError(f"--window: {exc}") from None
    if len(args.files) > 1:
        if args.per_pass or window_s is not None or args.plots or args.bench or args.field_maps or args.stability:
            raise UsageError("--per-pass, --window, --plots, --bench, --field-maps and --stability take one run file; "
                             "give one file, or drop them for the summary table")
        return _many(args)
    return _one(args, args.files[0], window_s)


def _analyse(args: argparse.Namespace, path: str, window_s: float | None, data=None, *, stream: bool = False):
    """(RunData, document, whole-run Estimate or None, [(segment document, Estimate or None)]).

    With ``stream`` the documents of the passes or windows are not made here: ``doc["passes"]``
    is an iterator that makes them one at a time as the JSON is written (``_write_json``).
    """
    from lightloom.sequencer.analysis.pipeline import AnalysisError, analyse_run, by_pass, by_window, segment_documents
    from lightloom.sequencer.errors import UsageError
    from lightloom.sequencer.storage.store import load_run

    if data is None:
        data = load_run(path)
    from lightloom.sequencer.analysis.scans import scanned_element

    element = scanned_element(data)
    if element is not None:
        doc, _, est = _scan_document(args, path, data, element)
        return data, doc, est, []
    operators = _recomputed_operators(data, args.bench) if getattr(args, "bench", None) else None
    segments = None
    if getattr(args, "per_pass", False):
        segments = by_pass(np.asarray(data.readings.pass_index))
    elif window_s is not None:
        segments = by_window(0.5 * (np.asarray(data.readings.t_start) + np.asarray(data.readings.t_end)), window_s)
    rng = np.random.default_rng(args.seed)
    try:
        doc, est, parts = analyse_run(
            data, rng=rng, n_bootstrap=args.bootstrap, normalize=args.normalize, operators=operators,
            segments=None if stream else segments, segment_estimates=False,
        )
    except AnalysisError as exc:
        raise UsageError(f"{path}: {exc}") from None
    if args.bench:
        doc.setdefault("corrections", {})["operators"] = f"recomputed from read-back positions with the calibration of {args.bench}"
    if getattr(args, "field_maps", False):
        if est is None or est.rho is None or est.rho.shape != (4, 4):
            raise UsageError(f"{path}: --field-maps needs a joint (polarization and spatial) state, determined by the readings")
        from lightloom.sequencer.analysis.portrait import portrait, portrait_json

        doc["field_maps"] = portrait_json(portrait(est.rho))
    if doc.get("determines") == "partial":
        doc["state"] = "not determined: " + "; ".join(doc.get("missing", []))
    if segments is not None and stream:
        doc["passes"] = (d for d, _ in segment_documents(data, segments, rng=rng, n_bootstrap=args.bootstrap,
                                                          normalize=args.normalize, operators=operators))
    elif segments is not None:
        doc["passes"] = [d for d, _ in parts]
    return data, doc, est, parts


def _one(args: argparse.Namespace, path: str, window_s: float | None) -> int:
    from lightloom.sequencer.analysis.scans import scanned_element
    from lightloom.sequencer.storage.store import load_run

    data = load_run(path)
    element = scanned_element(data)
    if element is not None:
        return _scan(args, path, data, element)
    # --json alone writes each pass's document as it is made: a night of thousands of passes
    # then never holds them all
    data, doc, est, parts = _analyse(args, path, window_s, data, stream=bool(args.json and not args.plots))
    stability = _stability(args, data)
    from lightloom.sequencer import imaging_report
    from lightloom.sequencer.errors import UsageError

    imaging = imaging_report.imaging_result(path, data, rng=np.random.default_rng(args.seed),
                                            replicates=args.bootstrap)
    if imaging is not None:
        imaging_report.add_to_document(doc, imaging)
        if args.maps:
            doc["imaging"]["maps"] = str(imaging_report.write_maps(imaging, args.maps))
    if (args.series or args.series_maps) and imaging is not None:
        if args.series_window < 1:
            raise UsageError("--series-window needs at least 1 pass")
        doc["imaging_series"] = imaging_report.imaging_series(
            path, address=args.dask, maps_out=args.series_maps, passes_per_window=args.series_window)
    if (args.maps or args.series or args.series_maps) and imaging is None:
        raise UsageError(f"{path}: --maps and --series need an imaging run (a camera behind the analyzer); this run has no frames")
    if stability is not None:
        from lightloom.sequencer.analysis.stability import stability_json

        doc["stability"] = stability_json(stability)
    if args.plots:
        doc["plots"] = [str(p) for p in write_figures(data, doc, est, args.plots)]
        if stability is not None:
            doc["plots"].append(str(_stability_plot(data, stability, args.plots)))
        if imaging is not None:
            from pathlib import Path

            from lightloom.sequencer.present.imaging_figures import plot_ellipses

            doc["plots"].append(str(plot_ellipses(imaging.maps.stokes, Path(args.plots) / "stokes_ellipses.png",
                                                  title=f"{data.header.protocol_name}: polarization map")))
    if args.json:
        _write_json(doc)
    elif args.csv:
        _print_csv([(path, doc)])
    else:
        from rich.console import Console

        from lightloom.sequencer.present.report import print_passes, print_report

        console = Console()
        print_report(console, doc)
        if "passes" in doc:
            print_passes(console, doc["passes"])
        if stability is not None:
            from lightloom.sequencer.present.report import print_stability

            print_stability(console, doc["stability"])
        for p in doc.get("plots", []):
            console.print(f"  figure: {p}", highlight=False)
    return 0


def _write_json(doc: dict[str, Any]) -> None:
    """The document on stdout as ``json.dumps(doc, indent=1)`` writes it, written as it is encoded;
    ``passes`` given as an iterator comes last, each pass written as it is made."""
    passes = doc.get("passes")
    out = sys.stdout
    if passes is None or isinstance(passes, list):
        json.dump(doc, out, indent=1)
        out.write("\n")
        return
    head = json.dumps({k: v for k, v in doc.items() if k != "passes"}, indent=1)
    out.write((head[:-2] + ",\n" if len(head) > 2 else "{\n") + ' "passes": [')
    first = True
    for part in passes:
        # json escapes newlines inside strings: every newline here is the layout's
        out.write(("\n" if first else ",\n") + "\n".join("  " + line for line in json.dumps(part, indent=1).split("\n")))
        first = False
    out.write("]\n}\n" if first else "\n ]\n}\n")


def _many(args: argparse.Namespace) -> int:
    from lightloom.sequencer.errors import LightloomError

    results: list[tuple[str, dict[str, Any]]] = []
    unreadable = 0
    for path in args.files:
        try:
            _, doc, _, _ = _analyse(args, path, None)
        except LightloomError as exc:
            unreadable += 1
            doc = {"error": str(exc)}
        results.append((path, doc))
    if args.json:
        print(json.dumps({"runs": [{"file": f, **d} for f, d in results]}, indent=1))
    elif args.csv:
        _print_csv(results)
    else:
        from rich.console import Console

        from lightloom.sequencer.present.report import print_summary

        print_summary(Console(), results)
    return 2 if unreadable else 0


def _print_csv(results: list[tuple[str, dict[str, Any]]]) -> None:
    import csv

    from lightloom.sequencer.analysis.summary import SUMMARY_COLUMNS, summary_row

    writer = csv.DictWriter(sys.stdout, fieldnames=list(SUMMARY_COLUMNS), lineterminator="\n")
    writer.writeheader()
    for path, doc in results:
        writer.writerow({k: ("" if v is None else v) for k, v in summary_row(path, doc).items()})


def _recomputed_operators(data, bench_spec: str) -> np.ndarray:
    from lightloom.sequencer.lang.bench import load_bench
    from lightloom.sequencer.errors import UsageError
    from lightloom.sequencer.optics.analyzer import port_operators
    from lightloom.sequencer.plan.tablemodel import table_model

    bench = load_bench(bench_spec)
    table = table_model(bench)
    if tuple(p.name for p in table.ports) != tuple(data.header.port_names):
        raise UsageError(
            f"bench {bench_spec} has detector ports {[p.name for p in table.ports]}, the run has "
            f"{list(data.header.port_names)}; use the bench of the run or an overlay of it"
        )
    return port_operators(table.analyzer, table.ports, data.readings.readback)


def write_figures(data, doc: dict[str, Any], est, directory: str) -> list:
    """The PNG figures of an analysed run into ``directory``; returns their paths."""
    from pathlib import Path

    from lightloom.sequencer.errors import UsageError

    try:
        from lightloom.sequencer.present import plots, timeline
    except ImportError as exc:  # plots extra missing
        raise UsageError(f"plots need matplotlib: pip install 'lightloom[plots]' ({exc})") from None
    out = Path(directory)
    written = []
    try:
        if est is not None and est.rho is not None:
            written.append(plots.plot_density_matrix(est.rho, list(est.basis), out / "density_matrix.png",
                                                     title=f"{data.header.protocol_name}: reconstructed state"))
            points = {f: np.array([v for v, *_ in s]) for f, s in est.stokes.items()}
            unc = {f: float(np.sqrt(sum(sd**2 for _, sd, *_ in s[1:]))) for f, s in est.stokes.items()}
            written.append(plots.plot_poincare(points, out / "poincare.png", title="reduced states", uncertainties=unc))
            if est.rho.shape == (4, 4):
                from lightloom.sequencer.analysis.portrait import portrait
                from lightloom.sequencer.present.portrait import plot_portrait

                written.append(plot_portrait(portrait(est.rho), out / "portrait.png",
                                             title=f"{data.header.protocol_name}: polarization portrait"))
        series = timeline.reference_series(data)
        if series.lines:
            written.append(timeline.plot_reference_series(series, out / "reference.png",
                                                          title="source power over the run"))
        if doc.get("passes"):
            written.append(timeline.plot_results_over_time(doc["passes"], out / "over_time.png",
                                                           title=f"{data.header.protocol_name}: results over time"))
    except getattr(plots, "PlotsUnavailable", ImportError) as exc:
        raise UsageError(str(exc)) from None
    return written


# ---------------------------------------------------------------- scans and stability


def _stability(args: argparse.Namespace, data):
    """Stability series when asked (--stability) or for a run of the stability protocol, else None."""
    if not (getattr(args, "stability", False) or data.header.protocol_name == "stability"):
        return None
    from lightloom.sequencer.analysis.stability import stability_of_run

    return stability_of_run(data)


def _stability_plot(data, stability, directory: str):
    from pathlib import Path

    from lightloom.sequencer.errors import UsageError
    from lightloom.sequencer.present.plots import PlotsUnavailable
    from lightloom.sequencer.present.stability_figures import plot_stability

    try:
        return plot_stability(stability, Path(directory) / "stability.png",
                              title=f"{data.header.protocol_name} on {data.header.bench_name}: stability")
    except PlotsUnavailable as exc:
        raise UsageError(str(exc)) from None


def _scan_document(args: argparse.Namespace, path: str, data, element: str):
    """The document of a scan run (readings per port against the scanned angle, the calibration
    model fitted), the scan report (None while there is nothing to fit) and the estimate of the
    state its readings determine (None when they determine none)."""
    from pathlib import Path

    from lightloom.sequencer.analysis.pipeline import run_section
    from lightloom.sequencer.analysis.scans import run_scan_report, scan_json
    from lightloom.sequencer.errors import InputError

    bench = None
    if getattr(args, "bench", None):
        from lightloom.sequencer.lang.bench import load_bench

        bench = load_bench(args.bench)
    doc = {"run": run_section(data), "determines": "scan"}
    # A scan whose operators determine a state (a rotating quarter-wave plate in front of a
    # polarizer is a polarimeter) also gets the state, its figures and Stokes parameters.
    from lightloom.sequencer.analysis.pipeline import analyse_run

    state, est, _ = analyse_run(data, rng=np.random.default_rng(getattr(args, "seed", 0)),
                                n_bootstrap=getattr(args, "bootstrap", 200), normalize=getattr(args, "normalize", False))
    if est is not None and est.rho is not None:
        doc = {**state, **doc, "state_determined": state["determines"]}
    else:
        est = None
    try:
        report = run_scan_report(data, element, Path(path).stem, bench)
        doc["scan"] = scan_json(report)
    except InputError as exc:  # nothing to fit yet (a run just started): say so, exit 0
        report = None
        doc["scan"] = None
        doc["missing"] = [exc.message]  # a list, as in every other document
    if report is not None and est is not None:
        curve = _state_curve(data, element, report, est)
        if curve is not None:
            from lightloom.sequencer.analysis.scans import state_curve_json

            doc["scan"]["state_model"] = state_curve_json(curve)
            report = dataclasses.replace(report, state=curve)
    return doc, report, est


def _state_curve(data, element: str, report, est):
    """The scan's readings, summed over the other factor's outputs, against the model of the state
    the scan determines (single-factor states only; None otherwise)."""
    from lightloom.sequencer.analysis.scans import state_curve
    from lightloom.sequencer.lang.bench import parse_bench
    from lightloom.sequencer.optics.analyzer import ELEMENT_NAMES, port_operators
    from lightloom.sequencer.plan.tablemodel import analyzer_model, port_models

    if est.rho is None or est.rho.shape != (2, 2) or est.power is None:
        return None
    r = data.readings
    light = np.asarray(r.kind).astype(str) == "measure"
    names = tuple(r.element_names)
    column = names.index(element)
    rb, cmd = np.asarray(r.readback, dtype=float), np.asarray(r.commanded, dtype=float)
    settings = np.where(np.isfinite(rb), rb, cmd)[light]
    ops = np.asarray(r.operators)[light]
    if data.header.port_units == "counts":  # counts per reading: the rate times the dwell
        ops = ops * np.asarray(r.dwell_s, dtype=float)[light][:, None, None, None]
    bench = parse_bench(data.header.bench_text, "<bench stored in the run file>")
    full = np.stack([settings[:, names.index(n)] if n in names else np.zeros(len(settings)) for n in ELEMENT_NAMES], 1)
    grid = np.repeat(np.nan_to_num(full[:1]), len(report.grid_deg), axis=0)
    grid[:, ELEMENT_NAMES.index(element)] = report.grid_deg
    grid_ops = port_operators(analyzer_model(bench), port_models(bench), grid)
    if data.header.port_units == "counts":
        grid_ops = grid_ops * float(np.median(np.asarray(r.dwell_s, dtype=float)[light]))
    return state_curve(est.analyzes[0], r.port_names, settings[:, column], ops, np.asarray(r.values)[light],
                       report.background, est.rho, float(est.power[0]), report.grid_deg, grid_ops)


def _scan(args: argparse.Namespace, path: str, data, element: str) -> int:
    """A scan run: readings per port against the scanned angle, the calibration model fitted."""
    from pathlib import Path

    from lightloom.sequencer.errors import UsageError

    doc, report, est = _scan_document(args, path, data, element)
    if args.plots and report is not None:
        from lightloom.sequencer.present.plots import PlotsUnavailable
        from lightloom.sequencer.present.scan_figures import plot_scan

        try:
            doc["plots"] = [str(plot_scan(report, Path(args.plots) / "scan.png",
                                          title=f"{data.header.protocol_name} on {data.header.bench_name}"))]
            if report.state is not None:
                from lightloom.sequencer.present.scan_figures import plot_state

                doc["plots"].append(str(plot_state(report, Path(args.plots) / "scan_state.png",
                                                   title=f"{data.header.protocol_name} on {data.header.bench_name}:"
                                                         f" readings and the {report.state.factor} state")))
        except PlotsUnavailable as exc:
            raise UsageError(str(exc)) from None
    if args.plots and est is not None:
        # the state the scan determines gets the figures of any state (density matrix, Poincare sphere)
        doc["plots"] = doc.get("plots", []) + [str(p) for p in write_figures(data, doc, est, args.plots)]
    if args.json:
        print(json.dumps(doc, indent=1))
    elif args.csv:
        _print_csv([(path, doc)])
    else:
        from rich.console import Console

        from lightloom.sequencer.present.report import print_scan

        console = Console()
        if "density_matrix" in doc:
            from lightloom.sequencer.present.report import print_report

            print_report(console, doc)
        print_scan(console, doc)
        for p in doc.get("plots", []):
            console.print(f"  figure: {p}", highlight=False)
    return 0
