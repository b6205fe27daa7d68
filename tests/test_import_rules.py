"""Import rules between the layers, read from the source (every import statement, at any depth).

The pure layers (optics, model, lang, plan, analysis) hold no I/O, no clock and no terminal: they
may not import the run shell, storage, drivers, simulators, commands or present layers, nor h5py,
rich, matplotlib or time. Drivers know nothing of protocols: from lightloom.sequencer they may
import only the shared model (the vocabulary).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
PACKAGES = {"sequencer": "lightloom.sequencer", "drivers": "lightloom.drivers",
            "simulators": "lightloom.simulators"}
PURE_LAYERS = ("optics", "model", "lang", "plan", "analysis")
FORBIDDEN_IN_PURE = (
    "lightloom.sequencer.run", "lightloom.sequencer.storage", "lightloom.sequencer.commands",
    "lightloom.sequencer.present", "lightloom.drivers", "lightloom.simulators",
    "h5py", "rich", "matplotlib", "time",
)
DRIVERS_MAY_USE = ("lightloom.sequencer.model",)


def module_name(path: Path) -> str:
    top, *rest = path.relative_to(REPO).with_suffix("").parts
    parts = [PACKAGES[top], *rest]
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def imported(path: Path) -> set[str]:
    """Every module an import statement in ``path`` names (relative imports resolved)."""
    package = module_name(path) if path.name == "__init__.py" else module_name(path).rpartition(".")[0]
    return imported_by(path.read_text(encoding="utf-8"), package)


def imported_by(source: str, package: str) -> set[str]:
    """Every module an import statement in ``source`` names, relative ones from ``package``."""
    names: set[str] = set()
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                names.add(f"{base}.{node.module}" if node.module else base)
            else:
                names.add(str(node.module))
    return names


def within(name: str, prefixes: tuple[str, ...]) -> bool:
    return any(name == p or name.startswith(p + ".") for p in prefixes)


def sources(*folders: str) -> list[Path]:
    return sorted(p for folder in folders for p in (REPO / folder).rglob("*.py"))


PURE_FILES = sources(*(f"sequencer/{layer}" for layer in PURE_LAYERS))
DRIVER_FILES = sources("drivers")


def test_the_rules_see_every_pure_layer_and_driver_module() -> None:
    assert {p.relative_to(REPO).parts[1] for p in PURE_FILES} == set(PURE_LAYERS)
    assert any(p.name == "registry.py" for p in DRIVER_FILES)


@pytest.mark.parametrize("path", PURE_FILES, ids=lambda p: str(p.relative_to(REPO)))
def test_a_pure_layer_imports_no_input_output_clock_or_terminal(path: Path) -> None:
    bad = sorted(n for n in imported(path) if within(n, FORBIDDEN_IN_PURE))
    assert not bad, f"{path.relative_to(REPO)} imports {', '.join(bad)}"


@pytest.mark.parametrize("path", DRIVER_FILES, ids=lambda p: str(p.relative_to(REPO)))
def test_drivers_use_only_the_shared_model_of_the_sequencer(path: Path) -> None:
    bad = sorted(n for n in imported(path)
                 if within(n, ("lightloom.sequencer",)) and not within(n, DRIVERS_MAY_USE))
    assert not bad, f"{path.relative_to(REPO)} imports {', '.join(bad)}"


def test_the_rule_reader_catches_a_hidden_import() -> None:
    # An import inside a function counts as much as one at the top; relative ones are resolved.
    source = "def f():\n    import time\n    from ..storage import runfile\n"
    assert imported_by(source, "lightloom.sequencer.plan") >= {"time", "lightloom.sequencer.storage"}
