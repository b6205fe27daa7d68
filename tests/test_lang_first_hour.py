"""What a new user meets in the first hour: built-ins documented, --help that explains, readable labels, one demo folder."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import pytest

from lightloom.sequencer import cli
from lightloom.sequencer.lang import builtins
from lightloom.sequencer.lang.protocol import PURPOSES, load_protocol, parse_protocol
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.plan.tablemodel import compile_protocol

REPO = Path(__file__).resolve().parent.parent
README = (REPO / "README.md").read_text()
DOCS = {name: (REPO / "docs" / name).read_text() for name in ("protocol-language.md", "bench-language.md")}


@pytest.mark.parametrize("name", builtins.builtin_protocols())
def test_every_built_in_protocol_is_listed_in_the_readme_and_the_protocol_docs(name: str) -> None:
    assert f"`{name}`" in README
    assert f"`{name}`" in DOCS["protocol-language.md"]


@pytest.mark.parametrize("name", builtins.builtin_benches())
def test_every_built_in_bench_is_listed_in_the_readme_and_the_bench_docs(name: str) -> None:
    assert f"`{name}`" in README
    assert f"`{name}`" in DOCS["bench-language.md"]


@pytest.mark.parametrize("name", builtins.builtin_protocols())
def test_every_built_in_protocol_says_what_it_determines(name: str) -> None:
    assert load_protocol(name).determines in PURPOSES


def test_every_verb_has_a_description_in_its_help() -> None:
    # The parser builds a verb's options (and description) only for the verb chosen.
    for verb in cli.VERBS:
        parser = cli.build_parser([verb])
        verbs = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
        sub = verbs.choices[verb]
        assert sub.description and len(sub.description.split()) >= 12, verb


def test_a_stokes_target_is_labelled_like_the_named_ones_and_its_partner_is_the_opposite_vector() -> None:
    text = (
        "protocol: s\nanalyzes: [polarization]\nmeasure:\n  targets:\n"
        "    polarization: [H, {stokes: [0.6, 0, 0.8]}, {ket: ['1', '0.3j']}]\ndwell_s: 0.1\n"
    )
    protocol = parse_protocol(text, "s.yaml")
    assert [p.label for p in protocol.points] == ["H", "s(0.6 0 0.8)", "ket(1 0.3j)"]
    steps = compile_protocol(protocol, load_bench("sim")).steps
    labels = {s.label for s in steps if s.kind == "measure"}
    # On a two-port splitter each setting reads a state and its orthogonal partner (-S), like H/V.
    assert "s(0.6 0 0.8)/s(-0.6 0 -0.8)" in labels and "H/V" in labels
    assert not any("," in label for label in labels)  # "," separates factors in joint labels


def test_demo_leaves_one_folder_reused_by_every_call_and_says_where(tmp_path, monkeypatch, capsys) -> None:
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("COLUMNS", "400")  # paths on one line
    assert cli.main(["demo", "--protocol", "polarization-4"]) == 0
    first = capsys.readouterr().out
    folder = tmp_path / "lightloom-demo"
    assert f"{folder}/" in first and "demo-run.h5" in first
    run_file = folder / "demo-run.h5"
    stamp = run_file.stat().st_mtime_ns
    (folder / "notes.txt").write_text("mine")
    assert cli.main(["demo", "--protocol", "polarization-4"]) == 0
    capsys.readouterr()
    assert [p.name for p in tmp_path.iterdir()] == ["lightloom-demo"]
    assert run_file.stat().st_mtime_ns != stamp  # replaced, not refused
    assert (folder / "notes.txt").read_text() == "mine"  # nothing else touched
    assert cli.main(["analyze", str(run_file), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["run"]["status"] == "complete"


def test_demo_refuses_a_file_given_as_its_folder(tmp_path, capsys) -> None:
    target = tmp_path / "a-file"
    target.write_text("keep")
    assert cli.main(["demo", "--out", str(target)]) == 2
    assert "is a file, not a folder" in capsys.readouterr().err
    assert target.read_text() == "keep"
