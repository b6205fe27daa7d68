"""``lightloom demo``: a complete simulated measurement of our vector-beam scenario, then its analysis."""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
from rich.console import Console


def add_parser(sub) -> None:
    p = sub.add_parser("demo", help="simulate a joint spin-orbit tomography of a vector beam and analyse it (under a minute)")
    p.add_argument("--out", metavar="DIR", help="folder for the run file, log and figures (default: a new temporary folder)")
    p.add_argument("--protocol", default="joint-36", help="built-in protocol to run (default joint-36)")
    p.add_argument("--bench", default="sim", help="simulated bench (default sim)")
    p.set_defaults(handler=run)


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
    folder = Path(args.out) if args.out else Path(tempfile.mkdtemp(prefix="lightloom-demo-"))
    folder.mkdir(parents=True, exist_ok=True)
    out = folder / "demo-run.h5"
    if out.exists():
        raise UsageError(f"{out} exists already; choose another --out folder")
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
        from lightloom.sequencer.commands.analyze import _plots

        for p in _plots(data, est, str(folder / "figures")):
            console.print(f"  figure: {p}", highlight=False)
    except UsageError as exc:
        console.print(f"  (no figures: {exc})", highlight=False, markup=False)
    console.print(f"done in {time.monotonic() - t0:.1f} s; files in {folder}", highlight=False)
    return 0
