"""Every broken file in tests/bad_inputs/ gets exactly one `FILE:LINE: message` line, exit status 2, nothing written."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time
from pathlib import Path

import pytest

from lightloom.sequencer import cli

REPO = Path(__file__).resolve().parent.parent
CORPUS = Path(__file__).resolve().parent / "bad_inputs"
FILES = sorted(CORPUS.glob("*.yaml"))

# A subprocess start costs ~0.3 s, so the whole corpus runs in process and a sample by subprocess.
SUBPROCESS_SAMPLE = (
    "protocol-billion-laughs.yaml",
    "protocol-not-utf8.yaml",
    "protocol-python-tag.yaml",
    "bench-extends-cycle-a.yaml",
    "bench-source-not-hermitian.yaml",
)


def expectations(path: Path) -> dict[str, str]:
    """The ``# expect-KEY: value`` comments at the top of a corpus file."""
    found: dict[str, str] = {}
    for raw in path.read_bytes().splitlines():
        match = re.match(rb"^# expect-([a-z]+): (.*)$", raw)
        if match is None:
            break
        found[match.group(1).decode()] = match.group(2).decode()
    return found


def command(path: Path) -> list[str]:
    if path.name.startswith("bench-"):
        return ["validate", "polarization-4", "--bench", str(path)]
    return ["validate", str(path)]


def check_report(path: Path, status: int, stderr: str, stdout: str) -> None:
    expected = expectations(path)
    shown = CORPUS / expected.get("file", path.name)
    assert status == 2, stderr
    lines = stderr.splitlines()
    assert len(lines) == 1, stderr
    assert lines[0].startswith(f"lightloom: {shown}:{expected['line']}: "), lines[0]
    assert expected["text"] in lines[0]
    assert "Traceback" not in stderr
    assert stdout == ""


def test_corpus_has_at_least_25_files_each_with_expectations() -> None:
    assert len(FILES) >= 25
    for path in FILES:
        expected = expectations(path)
        assert {"line", "text"} <= set(expected), path.name
        assert path.name.startswith(("protocol-", "bench-")), path.name


@pytest.mark.parametrize("path", FILES, ids=[p.name for p in FILES])
def test_bad_input_gives_one_line_at_its_file_and_line(
    path: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.chdir(tmp_path)
    start = time.process_time()  # CPU time: the machine may be shared
    status = cli.main(command(path))
    elapsed = time.process_time() - start
    out, err = capsys.readouterr()
    check_report(path, status, err, out)
    assert list(tmp_path.iterdir()) == []
    assert elapsed < 2.0


@pytest.mark.parametrize("name", SUBPROCESS_SAMPLE)
def test_bad_input_by_subprocess_exits_2_without_traceback(name: str, tmp_path: Path) -> None:
    path = CORPUS / name
    env = dict(os.environ, PYTHONPATH=str(REPO), PYTHONDONTWRITEBYTECODE="1")
    start = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "lightloom.sequencer", *command(path)],
        cwd=tmp_path,
        env=env,
        capture_output=True,
        text=True,
        timeout=30,
    )
    assert time.perf_counter() - start < 10.0
    check_report(path, proc.returncode, proc.stderr, proc.stdout)
    assert list(tmp_path.iterdir()) == []


def test_file_over_one_mebibyte_is_refused_before_parsing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    big = tmp_path / "big.yaml"
    filler = "# " + "x" * 1000 + "\n"
    big.write_text("protocol: big\n" + filler * 1100)
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    start = time.process_time()
    status = cli.main(["validate", str(big)])
    elapsed = time.process_time() - start
    _, err = capsys.readouterr()
    assert status == 2
    assert err.startswith(f"lightloom: {big}:1: file is ")
    assert "1 MiB" in err
    assert elapsed < 1.0
    assert list(work.iterdir()) == []


def test_empty_file_is_refused_at_line_1(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    empty = tmp_path / "empty.yaml"
    empty.write_bytes(b"")
    monkeypatch.chdir(tmp_path)
    assert cli.main(["validate", str(empty)]) == 2
    assert capsys.readouterr().err == f"lightloom: {empty}:1: file is empty; expected a YAML mapping of keys\n"


def test_missing_protocol_names_the_built_ins(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["validate", "no-such-protocol"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert "no protocol file 'no-such-protocol'" in err
    assert "joint-36" in err
