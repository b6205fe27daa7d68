"""``lightloom analyze FILE.h5 [--json] [--plots DIR]``: states, figures of merit and error bars."""

from __future__ import annotations

import argparse
import json

import numpy as np
from rich.console import Console


def add_parser(sub) -> None:
    p = sub.add_parser(
        "analyze", help="reconstruct the state of a run (complete, interrupted or still running)",
        description=(
            "Reconstruct the state measured in a run file (finished, stopped or still running) with error"
            " bars: density matrix, purity, concurrence, Stokes parameters and fidelity to the protocol's"
            " target, as tables, as JSON (--json) or as figures (--plots DIR)."
        ),
    )
    p.add_argument("file", help="run file (FILE.h5) or its journal")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--plots", metavar="DIR", help="write PNG figures into DIR")
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
    from lightloom.sequencer.analysis.pipeline import AnalysisError, estimate, prepare, result_json, target_of
    from lightloom.sequencer.analysis.estimate import EstimationError
    from lightloom.sequencer.errors import UsageError
    from lightloom.sequencer.storage.store import load_run

    if args.bootstrap < 2:
        raise UsageError("--bootstrap needs at least 2 resamples")
    data = load_run(args.file)
    # --- scans and stability (sequencer.analysis.scans / .stability) ---
    from lightloom.sequencer.analysis.scans import scanned_element

    element = scanned_element(data)
    if element is not None:
        return _scan(args, data, element)
    stability = _stability(args, data)
    # --- state estimate ---
    operators = None
    if args.bench:
        operators = _recomputed_operators(data, args.bench)
    try:
        prep = prepare(data, normalize=args.normalize, operators=operators)
        est = estimate(prep, target=target_of(data), rng=np.random.default_rng(args.seed), n_bootstrap=args.bootstrap)
    except (AnalysisError, EstimationError) as exc:
        if stability is None:
            if isinstance(exc, AnalysisError):
                raise UsageError(f"{args.file}: {exc}") from None
            raise
        est = None
        doc = {"run": _run_section(data), "state": f"not determined: {exc}"}
    if est is not None:
        doc = result_json(data, est)
        if args.bench:
            doc["corrections"]["operators"] = f"recomputed from read-back positions with the calibration of {args.bench}"
        if args.field_maps:
            if est.rho.shape != (4, 4):
                raise UsageError(f"{args.file}: --field-maps needs a joint (polarization and spatial) run")
            from lightloom.sequencer.analysis.portrait import portrait, portrait_json

            doc["field_maps"] = portrait_json(portrait(est.rho))
    from lightloom.sequencer import imaging_report

    imaging = imaging_report.imaging_result(args.file, data, rng=np.random.default_rng(args.seed),
                                            replicates=args.bootstrap)
    if imaging is not None:
        imaging_report.add_to_document(doc, imaging)
        if args.maps:
            doc["imaging"]["maps"] = str(imaging_report.write_maps(imaging, args.maps))
    if (args.series or args.series_maps) and imaging is not None:
        if args.series_window < 1:
            raise UsageError("--series-window needs at least 1 pass")
        doc["imaging_series"] = imaging_report.imaging_series(
            args.file, address=args.dask, maps_out=args.series_maps, passes_per_window=args.series_window)
    if (args.maps or args.series or args.series_maps) and imaging is None:
        raise UsageError(f"{args.file}: --maps and --series need an imaging run (a camera behind the analyzer); this run has no frames")
    if stability is not None:
        from lightloom.sequencer.analysis.stability import stability_json

        doc["stability"] = stability_json(stability)
    if args.plots:
        doc["plots"] = [str(p) for p in _plots(data, est, args.plots)] if est is not None else []
        if stability is not None:
            doc["plots"].append(str(_stability_plot(data, stability, args.plots)))
        if imaging is not None:
            from pathlib import Path

            from lightloom.sequencer.present.imaging_figures import plot_ellipses

            doc["plots"].append(str(plot_ellipses(imaging.maps.stokes, Path(args.plots) / "stokes_ellipses.png",
                                                  title=f"{data.header.protocol_name}: polarization map")))
    if args.json:
        print(json.dumps(doc, indent=1))
    else:
        from lightloom.sequencer.present.report import print_report

        console = Console()
        if est is not None:
            print_report(console, doc)
        else:
            console.print(f"{data.header.protocol_name}: {doc['state']}", highlight=False, markup=False)
        if stability is not None:
            from lightloom.sequencer.present.report import print_stability

            print_stability(console, doc["stability"])
        for p in doc.get("plots", []):
            console.print(f"  figure: {p}", highlight=False)
    return 0


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


def _plots(data, est, directory: str) -> list:
    from pathlib import Path

    from lightloom.sequencer.errors import UsageError

    try:
        from lightloom.sequencer.present import plots
    except ImportError as exc:  # plots extra missing
        raise UsageError(f"plots need matplotlib: pip install 'lightloom[plots]' ({exc})") from None
    out = Path(directory)
    written = []
    try:
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
        r = data.readings
        lit = ~r.of_kind("background")
        ref = r.reference_w[lit]
        t = 0.5 * (r.t_start + r.t_end)[lit]
        if np.isfinite(ref).any():
            flagged = (r.flags[lit] & 1) != 0
            t0 = float(t.min()) if len(t) else 0.0
            events = [(e.t - t0, e.kind) for e in data.events if e.kind in ("beam_lost", "beam_back", "drift", "fault", "interrupted", "resume")]
            written.append(plots.plot_reference_trace(t - t0, ref, out / "reference.png",
                                                      title="reference (pick-off) power", flagged=flagged, events=events))
    except getattr(plots, "PlotsUnavailable", ImportError) as exc:
        raise UsageError(str(exc)) from None
    return written


# ---------------------------------------------------------------- scans and stability


def _run_section(data) -> dict:
    return {
        "status": data.status, "steps_done": int(data.steps_done), "steps_total": int(data.header.steps_total),
        "message": data.message, "protocol": data.header.protocol_name, "bench": data.header.bench_name,
    }


def _stability(args: argparse.Namespace, data):
    """Stability series when asked (--stability) or for a run of the stability protocol, else None."""
    if not (args.stability or data.header.protocol_name == "stability"):
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


def _scan(args: argparse.Namespace, data, element: str) -> int:
    """A scan run: readings per port against the scanned angle, the calibration model fitted."""
    from pathlib import Path

    from lightloom.sequencer.analysis.scans import run_scan_report, scan_json
    from lightloom.sequencer.errors import InputError, UsageError

    bench = None
    if args.bench:
        from lightloom.sequencer.lang.bench import load_bench

        bench = load_bench(args.bench)
    doc = {"run": _run_section(data), "determines": "scan"}
    try:
        report = run_scan_report(data, element, Path(args.file).stem, bench)
        doc["scan"] = scan_json(report)
    except InputError as exc:  # nothing to fit yet (a run just started): say so, exit 0
        report = None
        doc["scan"] = None
        doc["missing"] = exc.message
    if args.plots and report is not None:
        from lightloom.sequencer.present.plots import PlotsUnavailable
        from lightloom.sequencer.present.scan_figures import plot_scan

        try:
            doc["plots"] = [str(plot_scan(report, Path(args.plots) / "scan.png",
                                          title=f"{data.header.protocol_name} on {data.header.bench_name}"))]
        except PlotsUnavailable as exc:
            raise UsageError(str(exc)) from None
    if args.json:
        print(json.dumps(doc, indent=1))
    else:
        from lightloom.sequencer.present.report import print_scan

        console = Console()
        print_scan(console, doc)
        for p in doc.get("plots", []):
            console.print(f"  figure: {p}", highlight=False)
    return 0
