"""Hostile values in every number field of a bench and a protocol: one FILE:LINE line at the value, never a traceback."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from lightloom.sequencer import cli
from lightloom.sequencer.errors import InputError
from lightloom.sequencer.lang.bench import parse_bench
from lightloom.sequencer.lang.protocol import parse_protocol

REPO = Path(__file__).resolve().parent.parent
SOURCES = {
    "bench": REPO / "simulators" / "benches" / "sim.yaml",
    "protocol": REPO / "protocols" / "overnight-joint-36.yaml",
    "scan": REPO / "protocols" / "waveplate-calibration-hwp.yaml",
}
# The bench templates for real instruments (driver options included), when this checkout has them.
for _example in sorted((REPO / "docs" / "examples" / "benches").glob("*.yaml")):
    SOURCES[f"bench-{_example.stem}"] = _example
# A number written after "key: " (block or flow style).
NUMBER_SITE = re.compile(r"(?<=: )-?\d+(?:\.\d+)?(?:e-?\d+)?(?=\s*(?:#.*)?[,}\n])")

HUGE = "1" + "0" * 400
HOSTILE = {
    "400 digits": HUGE,
    "minus 400 digits": "-" + HUGE,
    "5000 digits": "9" * 5000,
    "underscored 400 digits": "1_" + "0" * 400,
    "hex 400 digits": "0x" + "f" * 400,
    "1e400": "1e400",
    "-1.0e999": "-1.0e999",
    ".nan": ".nan",
    "-.inf": "-.inf",
}


def sites(text: str) -> list[tuple[int, int, int]]:
    """(start, end, line) of every number written in ``text``."""
    return [(m.start(), m.end(), text.count("\n", 0, m.start()) + 1) for m in NUMBER_SITE.finditer(text)]


def parse(kind: str, text: str, path: str) -> None:
    if kind.startswith("bench"):
        parse_bench(text, path, directory=SOURCES[kind].parent)
    else:
        parse_protocol(text, path)


def test_the_sweep_covers_many_number_fields() -> None:
    counts = {kind: len(sites(path.read_text())) for kind, path in SOURCES.items()}
    assert counts["bench"] >= 50 and counts["protocol"] >= 8 and counts["scan"] >= 5, counts


# Every field gets the 400-digit integers (the values that once crashed); the others every third field,
# so that the sweep stays quick.
EVERY = {name: 1 if "400 digits" in name and not name.startswith(("hex", "under")) else 3 for name in HOSTILE}


@pytest.mark.parametrize("name", HOSTILE)
def test_every_number_field_refuses_a_hostile_value_at_its_line(name: str) -> None:
    value = HOSTILE[name]
    checked = 0
    for kind, path in SOURCES.items():
        text = path.read_text()
        for start, end, line in sites(text)[:: EVERY[name]]:
            hostile = text[:start] + value + text[end:]
            with pytest.raises(InputError) as caught:
                parse(kind, hostile, f"{kind}.yaml")
            message = caught.value.one_line()
            assert message.startswith(f"{kind}.yaml:{line}: "), message
            assert len(message) < 400, message  # the value is clipped, not echoed in full
            checked += 1
    assert checked >= 60 // EVERY[name]


def test_a_400_digit_dwell_is_refused_by_the_command_line(tmp_path, capsys) -> None:
    text = SOURCES["protocol"].read_text().replace("dwell_s: 0.5\n", f"dwell_s: {HUGE}\n", 1)
    path = tmp_path / "p.yaml"
    path.write_text(text)
    line = text[: text.index(HUGE)].count("\n") + 1
    assert cli.main(["validate", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert err.startswith(f"lightloom: {path}:{line}: ")
    assert "(401 digits) is beyond the range of numbers" in err


def test_a_scan_step_too_small_to_count_is_refused_not_a_crash(tmp_path, capsys) -> None:
    text = SOURCES["scan"].read_text().replace("step_deg: 5", "step_deg: 1e-320")
    path = tmp_path / "scan.yaml"
    path.write_text(text)
    assert cli.main(["validate", str(path)]) == 2
    err = capsys.readouterr().err
    assert "step_deg: the scan has more than 10000 points" in err and err.count("\n") == 1


@pytest.mark.parametrize("items", [10_001, 100_000])
def test_a_very_long_list_is_refused_in_plain_words(tmp_path, capsys, items: int) -> None:
    path = tmp_path / "long.yaml"
    path.write_text(
        "protocol: long\nanalyzes: [polarization]\nmeasure:\n  targets:\n"
        f"    polarization: [{', '.join(['H'] * items)}]\ndwell_s: 0.5\n"
    )
    assert cli.main(["validate", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert err.startswith(f"lightloom: {path}:5: too many values: this file holds more than 10000")
    assert "alias" not in err


@pytest.mark.parametrize("amplitude", ["1e200", "1e308j", "-1e300-1e300j", "1e400", "1" + "0" * 400, "nan", "1e-400"])
def test_complex_amplitudes_written_as_text_are_read_or_refused_never_a_crash(amplitude: str) -> None:
    protocol = (
        "protocol: t\nanalyzes: [polarization]\nmeasure:\n  targets:\n"
        f"    polarization: [H, {{ket: ['{amplitude}', '1e-3j']}}]\ndwell_s: 1\n"
    )
    bench = f"extends: sim\nsimulation:\n  source: {{state: {{density_matrix: null, ket: ['{amplitude}', '0', '0', '1']}}}}\n"
    for kind, text in (("protocol", protocol), ("bench", bench)):
        try:
            parse(kind, text, f"{kind}.yaml")
        except InputError as exc:
            assert exc.one_line().startswith(f"{kind}.yaml:"), exc.one_line()
