"""``lightloom demo``: a complete simulated measurement of our vector-beam scenario, then its analysis."""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np
from rich.console import Console

DEFAULT_FOLDER = "lightloom-demo"
RUN_NAME = "demo-run.h5"
FIGURES = "figures"
# Everything a demo writes in its folder (and the PNG files in figures/); a new demo replaces these only.
DEMO_FILES = (RUN_NAME, RUN_NAME + ".journal", "demo-run.log")


def add_parser(sub) -> None:
    p = sub.add_parser(
        "demo",
        help="simulate a joint spin-orbit tomography of a vector beam and analyse it (under a minute)",
        description=(
            "Run a complete measurement on a simulated table (a radially polarized vector beam with small"
            f" errors, protocol joint-36 on bench sim) and analyse it. The run file, its journal and log and"
            f" the figures go to one folder, ./{DEFAULT_FOLDER}/ unless --out says otherwise; a new demo"
            " replaces the previous demo's files there and touches nothing else."
        ),
    )
    p.add_argument("--out", metavar="DIR", default=DEFAULT_FOLDER,
                   help=f"folder for the run file, log and figures (default ./{DEFAULT_FOLDER}/, reused by every demo)")
    p.add_argument("--protocol", default="joint-36", help="built-in protocol to run (default joint-36)")
    p.add_argument("--bench", default="sim", help="simulated bench (default sim)")
    p.set_defaults(handler=run)


def prepare_folder(folder: Path) -> None:
    """Create ``folder``, or clear the previous demo's files from it (only those: other files stay).

    Raises
    ------
    UsageError
        When ``folder`` is an existing file, or a previous demo file cannot be removed.
    """
    from lightloom.sequencer.errors import UsageError

    if folder.exists() and not folder.is_dir():
        raise UsageError(f"{folder} is a file, not a folder; give the demo a folder with --out DIR")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        for name in DEMO_FILES:
            (folder / name).unlink(missing_ok=True)
        figures = folder / FIGURES
        if figures.is_dir():
            for png in figures.glob("*.png"):  # the figures folder is the demo's own
                png.unlink()
    except OSError as exc:
        raise UsageError(f"cannot prepare the demo folder {folder}: {exc.strerror or exc}; choose another --out") from None


def run(args: argparse.Namespace) -> int:
    from lightloom.sequencer.analysis.pipeline import estimate, prepare, result_json, target_of
    from lightloom.sequencer.lang.bench import load_bench
    from lightloom.sequencer.errors import UsageError
    from lightloom.sequencer.analysis.estimate import merit
    from lightloom.sequencer.present.report import print_report
    from lightloom.sequencer.run.session import start_run
    from lightloom.sequencer.storage.store import load_run

    console = Console()
    bench = load_bench(args.bench)
    if not bench.is_simulated:
        raise UsageError(f"the demo runs on a simulated bench; '{args.bench}' has no simulation section")
    folder = Path(args.out)
    prepare_folder(folder)
    out = folder / RUN_NAME
    console.print(f"files go to {folder.resolve()}/ (a new demo replaces them)", highlight=False, markup=False)
    console.print(
        "[bold]lightloom demo[/bold]: a radially polarized vector beam from a segmented wave plate with small "
        f"errors, analysed on the simulated table '{bench.name}' with protocol {args.protocol}."
    )
    t0 = time.monotonic()
    status = start_run(args.protocol, args.bench, str(out), console=console, live=False)
    if status != 0:
        return status
    data = load_run(out)
    est = estimate(prepare(data), target=target_of(data), rng=np.random.default_rng(0), n_bootstrap=200)
    doc = result_json(data, est)
    print_report(console, doc)
    rho_true = bench.simulation.source.density()
    if len(est.analyzes) == 2:
        f = float(merit.fidelity(est.rho, rho_true))
        console.print(
            f"  check against the simulated source: fidelity {f:.5f}; true purity {float(merit.purity(rho_true)):.4f}, "
            f"true concurrence {float(merit.concurrence(rho_true)):.4f}",
            highlight=False,
        )
    try:
        from lightloom.sequencer.commands.analyze import write_figures

        figures = list(write_figures(data, doc, est, str(folder / FIGURES)))
    except UsageError as exc:
        figures = []
        console.print(f"  (no figures: {exc})", highlight=False, markup=False)
    console.print(f"done in {time.monotonic() - t0:.1f} s; wrote in {folder.resolve()}/:", highlight=False,
                  markup=False)
    written = [folder / name for name in DEMO_FILES if (folder / name).exists()] + [Path(p) for p in figures]
    for path in written:
        console.print(f"  {path}", highlight=False, markup=False)
    console.print(f"next: lightloom analyze {out} --json", highlight=False, markup=False)
    return 0
