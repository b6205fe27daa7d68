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


def run(args: argparse.Namespace) -> int:
    from lightloom.sequencer.run.session import start_run

    console = Console(stderr=False)
    live = sys.stdout.isatty() and not args.quiet
    return start_run(args.protocol, args.bench, args.out, console=console, live=live)
