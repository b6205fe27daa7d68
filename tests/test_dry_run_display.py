"""`dry-run` reads well on an 80-column terminal, with durations as h:mm:ss."""

from __future__ import annotations

import re

import pytest

from lightloom.sequencer import cli
from lightloom.sequencer.commands.dry_run import hms


@pytest.mark.parametrize("seconds, shown", [(0, "0:00:00"), (22.4, "0:00:22"), (59.6, "0:01:00"),
                                            (41421.9, "11:30:22"), (90061, "25:01:01")])
def test_durations_read_as_hours_minutes_seconds(seconds: float, shown: str) -> None:
    assert hms(seconds) == shown


@pytest.mark.parametrize("protocol, bench", [("overnight-joint-36", "sim"), ("joint-16", "sim-single"),
                                             ("waveplate-calibration-hwp", "sim")])
def test_dry_run_fits_80_columns_without_cut_values(monkeypatch, capsys, protocol, bench) -> None:
    monkeypatch.setenv("COLUMNS", "80")
    assert cli.main(["dry-run", protocol, "--bench", bench]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert max(len(line.rstrip()) for line in lines) <= 80
    assert "\u2026" not in out  # rich's ellipsis: a value cut to fit
    assert re.search(r"^estimated \d+:\d\d:\d\d \(h:mm:ss\)$", out, re.M)
    assert re.search(r"^ +2 +\S", out, re.M)  # step rows are there


def test_an_overnight_series_shows_its_hours(monkeypatch, capsys) -> None:
    monkeypatch.setenv("COLUMNS", "80")
    assert cli.main(["dry-run", "overnight-joint-36", "--bench", "sim"]) == 0
    out = capsys.readouterr().out
    hours = int(re.search(r"^estimated (\d+):", out, re.M).group(1))
    assert 11 <= hours <= 12  # 24 passes 30 minutes apart: the last starts after 11.5 h
    assert "waiting for passes" in out and "determines joint-state" in out
