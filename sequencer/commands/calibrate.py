"""``lightloom calibrate RUN.h5 [RUN2.h5 ...] --out OVERLAY.yaml [--bench BENCH]``: fit calibration scans, write a bench overlay."""

from __future__ import annotations

import argparse
import datetime as dt
import math
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

from rich.console import Console
from rich.table import Table

from lightloom.sequencer.errors import InputError, LightloomError, UsageError
from lightloom.sequencer.outputs import check_new_output

SCAN_PROTOCOLS = "waveplate-calibration-hwp, waveplate-calibration-qwp, calibration-rotator, calibration-converter"


def add_parser(sub) -> None:
    p = sub.add_parser(
        "calibrate",
        help="fit element offsets, retardances, port gains and sorter visibility from calibration runs",
        description=(
            "Fit the calibration runs together (what each determines follows from its scanned element), "
            "print old and new values with their standard deviations, and write OVERLAY, a bench that "
            "extends the bench of the runs and overrides only the fitted keys. The scans assume an "
            "H-polarized h-mode input (a polarizer before the analyzer)."
        ),
    )
    p.add_argument("runs", nargs="+", metavar="RUN.h5", help="run files of calibration scans (e.g. of waveplate-calibration-hwp)")
    p.add_argument("--out", required=True, metavar="OVERLAY.yaml", help="bench overlay to create (never overwritten)")
    p.add_argument("--bench", metavar="BENCH",
                   help="bench the overlay extends (a file or built-in name); default the bench the runs used")
    p.add_argument("--plots", metavar="DIR",
                   help="write one PNG per run into DIR: readings per port against the scanned angle, the fitted "
                        "model, residuals and the fitted parameters")
    p.set_defaults(handler=run)


@dataclass(frozen=True)
class _Run:
    path: Path
    data: Any  # sequencer.storage.RunData
    protocol: Any  # sequencer.protocol.Protocol


def run(args: argparse.Namespace) -> int:
    from lightloom.sequencer.analysis import calibration
    from lightloom.sequencer.lang.bench import parse_bench
    from lightloom.sequencer.plan.tablemodel import analyzer_model, port_models

    out = Path(args.out)
    check_new_output(out, "--out", f"{out} exists already; lightloom calibrate never overwrites a file (choose another --out)")
    runs = [_read_run(Path(p)) for p in args.runs]
    first = runs[0]
    for r in runs[1:]:
        if r.data.header.bench_sha256 != first.data.header.bench_sha256:
            raise InputError(
                f"{r.path}: taken on bench '{r.data.header.bench_name}', not the bench of {first.path} "
                f"('{first.data.header.bench_name}', or a changed version of it); calibrate the runs of one bench together"
            )
    bench = parse_bench(first.data.header.bench_text, f"<bench stored in {first.path}>")
    model, ports = analyzer_model(bench), port_models(bench)
    scans = [_scan(r, label) for r, label in zip(runs, _labels(runs))]
    try:
        fit = calibration.fit_calibration(scans, model, ports)
    except InputError as exc:
        if exc.file is None:
            raise InputError(exc.message, str(first.path), None) from None
        raise
    warnings = _misfits(scans, fit, model, ports, runs)
    spec, base = _base_bench(args.bench, first, out)
    rows = _overlay_values(fit, base)
    if not rows:
        raise InputError(f"{first.path}: the scans determine none of the calibration keys; nothing to write")
    text = _overlay_text(rows, fit, runs, spec, base, out)
    # The overlay must load as a bench before it is written, so a bad file never appears.
    parse_bench(text, str(out), directory=out.resolve().parent)
    try:
        with open(out, "x", encoding="utf-8") as handle:
            handle.write(text)
    except FileExistsError:
        raise UsageError(f"{out} exists already; lightloom calibrate never overwrites a file (choose another --out)") from None
    except OSError as exc:
        raise UsageError(f"cannot write {out}: {exc.strerror}") from None
    console = Console()
    _print(console, rows, fit, out, spec)
    for line in warnings:
        print(line, file=sys.stderr)
    if args.plots:
        for path in _plots(args.plots, scans, fit, model, ports, runs):
            console.print(f"figure: {path}", highlight=False)
    return 0


def _misfits(scans, fit, model, ports, runs: Sequence[_Run]) -> list[str]:
    """Refuse a scan the fitted model cannot describe (residuals beyond REFUSE_RATIO times the scatter
    of its repeated readings: nothing is written); warning lines for those beyond LACK_OF_FIT_RATIO."""
    from lightloom.sequencer.analysis.scans import LACK_OF_FIT_RATIO, REFUSE_RATIO, scan_report

    warnings = []
    for scan, r in zip(scans, runs):
        unit = "counts" if r.data.header.port_units == "counts" else "W"
        report = scan_report(scan, model, ports, unit=unit, fit=fit)
        if not math.isfinite(report.misfit) or report.misfit <= LACK_OF_FIT_RATIO:
            continue
        what = (f"the calibration model does not describe this scan: its residuals are {report.misfit:.0f} times the "
                f"scatter of repeated readings ({report.repeat_scatter:.3g} {unit})")
        if report.misfit > REFUSE_RATIO:
            raise InputError(f"{what}; the scans assume the input |H,h> (a polarizer at H and the h mode before the "
                             "analyzer): check the input and scan again; nothing written", str(r.path), None)
        warnings.append(f"lightloom: warning: {r.path}: {what}; check the input |H,h> and the beam's stability")
    return warnings


def _plots(directory: str, scans, fit, model, ports, runs: Sequence[_Run]) -> list[Path]:
    """One figure per scan: its readings, the joint fit's model curve, residuals, parameters."""
    from lightloom.sequencer.analysis.scans import scan_report
    from lightloom.sequencer.present.plots import PlotsUnavailable
    from lightloom.sequencer.present.scan_figures import plot_scan

    written = []
    try:
        for scan, r in zip(scans, runs):
            unit = "counts" if r.data.header.port_units == "counts" else "W"
            report = scan_report(scan, model, ports, unit=unit, fit=fit)
            written.append(plot_scan(report, Path(directory) / f"calibration-{scan.label}.png",
                                     title=f"{r.data.header.protocol_name} ({scan.label}): joint calibration fit"))
    except PlotsUnavailable as exc:
        raise UsageError(str(exc)) from None
    return written


def _read_run(path: Path) -> _Run:
    from lightloom.sequencer.lang.protocol import parse_protocol
    from lightloom.sequencer.storage import load_run

    if not path.exists():
        raise UsageError(f"{path}: no such run file")
    try:
        data = load_run(path)
    except LightloomError as exc:
        raise InputError(f"{exc.one_line()}; calibrate reads run files written by `lightloom run`") from None
    except Exception as exc:  # h5py and numpy raise many kinds on a file that is not ours
        raise InputError(f"not a lightloom run file ({type(exc).__name__}: {exc})", str(path), None) from None
    header = data.header
    where = header.sources.protocol_path or f"<protocol stored in {path}>"
    protocol = parse_protocol(header.protocol_text, where)
    if protocol.scan is None:
        raise InputError(
            f"the run measured protocol '{protocol.name}' ({protocol.measure}), not a calibration scan; "
            f"calibrate takes runs of scan protocols such as {SCAN_PROTOCOLS}",
            str(path), None,
        )
    return _Run(path, data, protocol)


def _labels(runs: Sequence[_Run]) -> list[str]:
    labels: list[str] = []
    for r in runs:
        label, n = r.path.stem, 2
        while label in labels:
            label, n = f"{r.path.stem}-{n}", n + 1
        labels.append(label)
    return labels


def _scan(run: _Run, label: str):
    """The run's readings as a calibration scan, columns in ELEMENT_NAMES order."""
    from lightloom.sequencer.analysis.scans import scan_readings

    rd = run.data.readings
    if not (rd.kind == "measure").any():
        raise InputError("the run holds no measure readings yet; run or resume it first", str(run.path), None)
    return scan_readings(label, run.protocol.scan.element, rd)


def _base_bench(option: str | None, first: _Run, out: Path):
    """(text for ``extends:``, the loaded bench) of the bench the overlay extends."""
    from lightloom.sequencer.lang import builtins
    from lightloom.sequencer.lang.bench import load_bench, parse_bench

    header = first.data.header
    spec = option
    if spec is None:
        spec = header.sources.bench_spec or header.sources.bench_path
        if not spec:
            raise UsageError(f"{first.path} does not say which bench it ran on; give --bench")
    try:
        source = builtins.find("bench", spec)
    except InputError as exc:
        if option is not None:
            raise UsageError(f"--bench {spec}: {exc.message}") from None
        # The run stored the bench as typed, relative to the folder it ran in: try the run's folder.
        try:
            source = builtins.find("bench", spec, first.path.resolve().parent)
        except InputError:
            raise UsageError(
                f"{first.path} ran on bench '{spec}', which is not found from here (nor beside the run "
                "file); give --bench with that bench's file or built-in name"
            ) from None
    base = load_bench(source.builtin or source.file)
    if option is None and base.sha256 != header.bench_sha256:
        raise UsageError(
            f"the bench '{spec}' changed since {first.path} was taken (its resolved text differs from the "
            "copy in the run file); give --bench to choose the bench the overlay extends"
        )
    stored = parse_bench(header.bench_text, f"<bench stored in {first.path}>")
    run_ports = [(d.device, d.sorter_port, d.splitter_port) for d in stored.roles.detectors]
    base_ports = [(d.device, d.sorter_port, d.splitter_port) for d in base.roles.detectors]
    if run_ports != base_ports:
        raise UsageError(
            f"bench '{spec}' has detector ports {base_ports}, the runs {run_ports}; "
            "the overlay must extend a bench with the detectors of the runs"
        )
    if source.builtin is not None:
        return source.builtin, base
    target = Path(source.file).resolve()
    try:
        text = os.path.relpath(target, out.resolve().parent)
    except ValueError:  # another drive
        text = str(target)
    return Path(text).as_posix(), base


@dataclass(frozen=True)
class _Row:
    key: str  # dotted bench key
    old: float
    new: float
    std: float


def _old_value(key: str, base) -> float:
    from lightloom.sequencer.analysis import calibration as c

    cal = base.calibration
    if key.startswith(c.GAIN_PREFIX):
        return float(cal.port_gain.get(key[len(c.GAIN_PREFIX):], 1.0))
    if key == c.SORTER_VISIBILITY:
        return float(base.optics.parity_sorter.visibility)
    _, element, field = key.split(".")
    return float(getattr(getattr(cal, element), field))


def _overlay_values(fit, base) -> list[_Row]:
    from lightloom.sequencer.analysis import calibration as c

    first_gain = float(base.calibration.port_gain.get(base.roles.detectors[0].device, 1.0))
    rows = []
    for key, (value, std) in fit.fitted().items():
        if not math.isfinite(std):
            continue
        if key.startswith(c.GAIN_PREFIX):
            value, std = value * first_gain, std * first_gain
        rows.append(_Row(key, _old_value(key, base), value, std))
    return rows


def _rounded(value: float, std: float) -> float:
    """``value`` to two significant digits of its std (at least 4 decimals, at most 9)."""
    digits = 4 if std <= 0 else int(min(9, max(4, 1 - math.floor(math.log10(std)))))
    return round(value, digits)


def _overlay_text(rows: Sequence[_Row], fit, runs: Sequence[_Run], spec: str, base, out: Path) -> str:
    from lightloom.sequencer import __version__
    from lightloom.sequencer.lang.yamlsafe import dump_plain

    body: dict[str, Any] = {}
    for row in rows:
        node = body
        parts = row.key.split(".")
        for part in parts[:-1]:
            node = node.setdefault(part, {})
        node[parts[-1]] = _rounded(row.new, row.std)
    now = dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")
    lines = [
        f"# Calibration overlay written by `lightloom calibrate` (lightloom {__version__}) at {now}.",
        f"# It extends {spec} and overrides only the keys fitted from these runs:",
    ]
    for r in runs:
        h = r.data.header
        lines.append(f"#   {r.path.resolve()}: {h.protocol_name} (scan of {r.protocol.scan.element}), "
                     f"{len(r.data.readings)} readings, started {h.created_utc}, {r.data.status}")
    lines.append("# The scans assumed an H-polarized h-mode input (a polarizer at H before the analyzer).")
    lines.append("# Fitted values (1-sigma standard deviation from the fit covariance):")
    width = max(len(r.key) for r in rows)
    for row in rows:
        lines.append(f"#   {row.key:<{width}} {row.new:.6g} +- {row.std:.2g}   (was {row.old:g})")
    lines.append(f"# Residual rms {fit.residual_rms_w:.3g} W over {fit.n_readings} readings.")
    for note in fit.notes:
        lines.append(f"# Note: {note}")
    overlay = {
        "bench": f"{base.name}-calibrated",
        "description": f"{base.name} with the calibration fitted on {now[:10]}",
        "extends": spec,
        **body,
    }
    return "\n".join(lines) + "\n" + dump_plain(overlay)


def _print(console: Console, rows: Sequence[_Row], fit, out: Path, spec: str) -> None:
    table = Table(title=f"calibration fitted from {fit.n_readings} readings")
    for col in ("parameter", "old", "new", "std"):
        table.add_column(col, justify="left" if col == "parameter" else "right", no_wrap=True)
    for row in rows:
        name = row.key.removeprefix("calibration.")
        table.add_row(name, f"{row.old:g}", f"{row.new:.6g}", f"{row.std:.2g}")
    console.print(table)
    console.print(f"residual rms {fit.residual_rms_w:.3g} W", highlight=False)
    for note in fit.notes:
        console.print(f"note: {note}", highlight=False)
    console.print(f"wrote {out} (extends {spec}); run the next protocol with --bench {out}", highlight=False)
