"""The ``lightloom`` command line: parses the verb and hands over to its module in sequencer.commands."""

from __future__ import annotations

import argparse
import importlib
import sys
from types import ModuleType
from typing import NamedTuple, Sequence

from lightloom.sequencer import __version__
from lightloom.sequencer.errors import EXIT_INTERRUPTED, LightloomError

class Verb(NamedTuple):
    """A verb of the command line: its module in sequencer.commands and its one-line help."""

    module: str
    help: str


# The verbs, for `lightloom --help`, without importing any verb module: only the verb given on the
# command line is imported (its module's add_parser builds its options), so that one verb's imports
# never slow another or the help. The help here is the one the module gives its sub-parser.
VERBS: dict[str, Verb] = {
    "validate": Verb("validate", "check a protocol, and optionally a bench, and print a summary"),
    "dry-run": Verb("dry_run", "show the compiled steps, motion, limit checks and a time estimate"),
    "run": Verb("run", "run a protocol on a bench, recording every reading to FILE.h5"),
    "resume": Verb("resume", "continue an interrupted run; every step is recorded exactly once"),
    "analyze": Verb(
        "analyze",
        "reconstruct the state of a run (complete, interrupted or still running); several runs: one summary table",
    ),
    "advise": Verb(
        "advise",
        "settings of a quarter-half-quarter stack, mode converter and image rotator that steer the "
        "measured beam to a target",
    ),
    "calibrate": Verb(
        "calibrate", "fit element offsets, retardances, port gains and sorter visibility from calibration runs"
    ),
    "sim": Verb("sim", "simulated instruments (sim serve)"),
    "probe": Verb("probe", "list instruments (--list) or check every device of a bench before a night"),
    "demo": Verb("demo", "simulate a joint spin-orbit tomography of a vector beam and analyse it (under a minute)"),
}


def chosen_verb(argv: Sequence[str]) -> str | None:
    """The verb ``argv`` names (its first word not starting with "-"), or None."""
    for word in argv:
        if not word.startswith("-"):
            return word if word in VERBS else None
    return None


def verb_module(verb: str) -> ModuleType:
    """The module of ``verb`` in sequencer.commands (imported now)."""
    return importlib.import_module(f"lightloom.sequencer.commands.{VERBS[verb].module}")


def build_parser(argv: Sequence[str] = ()) -> argparse.ArgumentParser:
    """The parser: the chosen verb (see :func:`chosen_verb`) with its options, the others by name and help."""
    parser = argparse.ArgumentParser(
        prog="lightloom",
        description="Measurement sequencer and reconstruction for polarization and spatial-mode tomography.",
    )
    parser.add_argument("--version", action="version", version=f"lightloom {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    sub.required = True
    chosen = chosen_verb(argv)
    for verb, entry in VERBS.items():
        if verb == chosen:
            verb_module(verb).add_parser(sub)
        else:
            sub.add_parser(verb, help=entry.help, add_help=False)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    words = sys.argv[1:] if argv is None else list(argv)
    args = build_parser(words).parse_args(words)
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
