"""A non-editable install puts one name at the top of site-packages, and every source file under it."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
FOLDERS = {"sequencer": "lightloom/sequencer", "drivers": "lightloom/drivers",
           "simulators": "lightloom/simulators", "protocols": "lightloom/protocols"}


def _isolation_flags() -> list[str]:
    """Build without isolation (fast, offline) only when this environment can build a wheel itself.

    A fresh virtual environment ships an old setuptools without ``bdist_wheel``; pip then builds in
    an isolated environment with the setuptools that pyproject.toml asks for, as any user's pip does.
    """
    try:
        import setuptools
    except ImportError:
        return []
    major, minor = (int(part) for part in setuptools.__version__.split(".")[:2])
    return ["--no-build-isolation"] if (major, minor) >= (70, 1) else []

def test_install_adds_only_lightloom_and_its_dist_info_with_every_module(tmp_path: Path) -> None:
    # Built from a copy, so the build leaves nothing in the working tree; no network (no deps,
    # no build isolation: setuptools is already installed with the test requirements).
    source = tmp_path / "src"
    source.mkdir()
    for name in ("pyproject.toml", "README.md", "LICENSE", *FOLDERS):
        (shutil.copytree if (REPO / name).is_dir() else shutil.copy2)(
            REPO / name, source / name,
            **({"ignore": shutil.ignore_patterns("__pycache__")} if (REPO / name).is_dir() else {}))
    target = tmp_path / "site"
    subprocess.run(
        [sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", *_isolation_flags(),
         "--no-compile", "--target", str(target), str(source)],
        check=True, capture_output=True, text=True,
    )
    top = {p.name for p in target.iterdir()} - {"bin"}  # --target puts console scripts in bin/
    assert top == {"lightloom", "lightloom-0.1.0.dist-info"}
    assert not (target / "lightloom" / "__init__.py").exists()  # a namespace: nothing of its own
    for folder, installed in FOLDERS.items():
        wanted = {p.relative_to(REPO / folder) for p in (REPO / folder).rglob("*")
                  if p.suffix in (".py", ".yaml") and "__pycache__" not in p.parts}
        got = {p.relative_to(target / installed) for p in (target / installed).rglob("*")}
        missing = sorted(str(p) for p in wanted - got)
        assert not missing, f"not installed (add the subpackage to pyproject.toml packages): {missing}"
