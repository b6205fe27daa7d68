"""The command line's verb table: `--help` lists every verb without importing any verb module."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from lightloom.sequencer import cli

COMMANDS = Path(cli.__file__).resolve().parent / "commands"


def test_help_imports_no_verb_module() -> None:
    code = (
        "import sys\nfrom lightloom.sequencer.cli import main\n"
        "try:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
        "print([m for m in sys.modules if m.startswith('lightloom.sequencer.commands.')])\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert "validate" in out and out.strip().splitlines()[-1] == "[]"


def test_every_verb_module_is_in_the_table() -> None:
    modules = {p.stem for p in COMMANDS.glob("*.py") if p.stem != "__init__"}
    assert modules == {v.module for v in cli.VERBS.values()}


@pytest.mark.parametrize("verb", sorted(cli.VERBS))
def test_the_table_help_is_the_verb_modules_own(verb: str) -> None:
    # The top-level help lists the chosen verb with its module's help, the others with the table's.
    assert cli.build_parser([verb]).format_help() == cli.build_parser([]).format_help()


@pytest.mark.parametrize("verb", sorted(cli.VERBS))
def test_verb_help_shows_that_verbs_options(verb: str, capsys) -> None:
    with pytest.raises(SystemExit) as stop:
        cli.main([verb, "--help"])
    assert stop.value.code == 0
    assert capsys.readouterr().out.startswith(f"usage: lightloom {verb} ")
