"""The one check before a command writes a new file: it must not exist, and its folder must."""

from __future__ import annotations

from pathlib import Path

from lightloom.sequencer.errors import UsageError


def check_new_output(path: Path, option: str, exists_message: str) -> None:
    """Refuse to write ``path`` if it exists (``exists_message``) or its folder is missing.

    ``option`` names the command-line option that chose the path (e.g. ``--out``); both refusals
    are UsageError (exit status 2) and nothing is written.
    """
    if path.exists():
        raise UsageError(exists_message)
    if not path.parent.is_dir():
        raise UsageError(f"the folder {path.parent} does not exist; create it or choose another {option}")
