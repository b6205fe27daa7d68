"""``lightloom resume FILE.h5``: continue a stopped run from the first step not recorded."""

from __future__ import annotations

import argparse
import sys

from rich.console import Console


def add_parser(sub) -> None:
    p = sub.add_parser(
        "resume", help="continue an interrupted run; every step is recorded exactly once",
        description=(
            "Continue a run stopped by Ctrl-C, a fault, a kill or a power cut from its first step not yet"
            " recorded, with the protocol and bench stored in the file, so that every step is recorded"
            " exactly once."
        ),
    )
    p.add_argument("file", help="the run file (FILE.h5) of the stopped run")
    p.add_argument("--quiet", action="store_true", help="no live display even on a terminal")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    from lightloom.sequencer.run.session import resume_run

    live = sys.stdout.isatty() and not args.quiet
    return resume_run(args.file, console=Console(), live=live)
