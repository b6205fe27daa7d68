"""``lightloom run PROTOCOL --bench BENCH --out FILE.h5``: execute a protocol, recording every reading."""

from __future__ import annotations

import argparse
import sys

from rich.console import Console


def add_parser(sub) -> None:
    p = sub.add_parser(
        "run", help="run a protocol on a bench, recording every reading to FILE.h5",
        description=(
            "Compile PROTOCOL for BENCH and execute it: move the analyzer, read every detector, record each"
            " reading to a journal before it is reported and to FILE.h5 (never overwritten). Every way out"
            " closes the shutter first; exit status 0 done, 2 bad input, 3 fault and 130 interrupted (3 and"
            " 130 leave a file for `lightloom resume`)."
        ),
    )
    p.add_argument("protocol", help="protocol file or built-in name (e.g. joint-36)")
    p.add_argument("--bench", required=True, help="bench file or built-in name (e.g. sim)")
    p.add_argument("--out", required=True, help="run file to create (never overwritten), e.g. night1.h5")
    p.add_argument("--quiet", action="store_true", help="no live display even on a terminal")
    p.set_defaults(handler=run)


def warn_if_partial(protocol_spec: str, bench_spec: str) -> None:
    """Say on stderr, before the night, when the protocol cannot determine its state on this bench.

    Only for protocols without ``determines:`` (with it, the compiler refuses a shortfall). One pass
    in written order has the same settings as the whole run, and compiles in a moment.
    """
    import dataclasses

    from lightloom.sequencer.commands.dry_run import partial_warning
    from lightloom.sequencer.lang.bench import load_bench
    from lightloom.sequencer.lang.protocol import Sweep, load_protocol
    from lightloom.sequencer.plan.purpose import plan_determination
    from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model

    protocol = load_protocol(protocol_spec)
    if protocol.determines is not None:
        return
    bench = load_bench(bench_spec)
    one_pass = dataclasses.replace(protocol, repeats=1, sweep=Sweep(1, 0.0), order="as-written")
    det = plan_determination(one_pass, compile_protocol(one_pass, bench), table_model(bench))
    warning = partial_warning(det, protocol, f"on bench '{bench.name}'")
    if warning:
        print(warning, file=sys.stderr)


def run(args: argparse.Namespace) -> int:
    from lightloom.sequencer.run.session import start_run

    warn_if_partial(args.protocol, args.bench)
    console = Console(stderr=False)
    live = sys.stdout.isatty() and not args.quiet
    return start_run(args.protocol, args.bench, args.out, console=console, live=live)
