"""Backgrounds where the protocol asks for them: background.every_points counts protocol points
through the whole run (across passes), and one due at the end of a pass is taken there."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from lightloom.sequencer import cli
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.lang.builtins import find
from lightloom.sequencer.lang.protocol import load_protocol
from lightloom.sequencer.plan.tablemodel import compile_protocol
from lightloom.sequencer.storage import load_run


def _kinds(protocol: str, bench: str) -> tuple[list[str], list[int]]:
    steps = compile_protocol(load_protocol(protocol), load_bench(bench)).steps
    return [s.kind for s in steps], [s.pass_index for s in steps]


@pytest.mark.parametrize("bench, settings_per_pass", [("sim", 9), ("sim-single", 36)])
def test_overnight_protocol_gets_a_background_every_36_points_whatever_the_bench(bench, settings_per_pass):
    kinds, passes = _kinds("overnight-joint-36", bench)
    backgrounds = [p for k, p in zip(kinds, passes) if k == "background"]
    # 24 passes of 36 points, every_points 36: one a pass, plus the one at the start.
    assert len(backgrounds) == 24 + 1
    assert sorted(set(backgrounds)) == list(range(24))
    assert kinds.count("measure") == 24 * settings_per_pass * 2


def test_every_9_points_on_one_detector_gives_four_backgrounds_a_pass(tmp_path):
    text = find("protocol", "overnight-joint-36").data.decode()
    path = tmp_path / "every9.yaml"
    path.write_text(text.replace("every_points: 36", "every_points: 9").replace("passes: 24", "passes: 2"))
    kinds, passes = _kinds(str(path), "sim-single")
    # 36 points a pass: after points 9, 18, 27 and 36 of each pass; the run's last one is at_end.
    assert kinds.count("background") == 1 + 2 * 4
    assert kinds[0] == kinds[-1] == "background"


def test_a_finished_overnight_file_holds_one_background_a_pass(tmp_path):
    text = find("protocol", "overnight-joint-36").data.decode()
    protocol = tmp_path / "overnight-3.yaml"
    protocol.write_text(text.replace("passes: 24", "passes: 3"))
    out = tmp_path / "night.h5"
    assert cli.main(["run", str(protocol), "--bench", "sim", "--out", str(out), "--quiet"]) == 0
    r = load_run(out).readings
    background = r.of_kind("background")
    per_pass = np.bincount(r.pass_index[background], minlength=3)
    assert per_pass.tolist() == [2, 1, 1]  # the start, then one at the end of every pass
    assert np.all(r.values[background] < 0.01 * np.median(r.values[r.of_kind("measure")]))
