"""The ``lightloom`` command line: parses the verb and hands over to its module in sequencer.commands."""

from __future__ import annotations

import argparse
import importlib
import sys
from typing import Sequence

from lightloom.sequencer import __version__
from lightloom.sequencer.errors import EXIT_INTERRUPTED, LightloomError

# verb -> module in sequencer.commands (imported lazily so that one verb's imports never slow another)
VERBS: dict[str, str] = {
    "validate": "validate",
    "dry-run": "dry_run",
    "run": "run",
    "resume": "resume",
    "analyze": "analyze",
    "advise": "advise",
    "calibrate": "calibrate",
    "sim": "sim",
    "probe": "probe",
    "demo": "demo",
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="lightloom",
        description="Measurement sequencer and reconstruction for polarization and spatial-mode tomography.",
    )
    parser.add_argument("--version", action="version", version=f"lightloom {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    sub.required = True
    for verb, module_name in VERBS.items():
        try:
            module = importlib.import_module(f"lightloom.sequencer.commands.{module_name}")
        except ModuleNotFoundError as exc:
            if exc.name != f"lightloom.sequencer.commands.{module_name}":
                raise
            continue  # verb not built yet
        module.add_parser(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        status = int(args.handler(args))
    except LightloomError as exc:
        print(f"lightloom: {exc.one_line()}", file=sys.stderr)
        return exc.exit_status
    except KeyboardInterrupt:
        print("lightloom: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # the reader of our output went away (e.g. `| head`): not an error of ours
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0
    return status


if __name__ == "__main__":
    sys.exit(main())
