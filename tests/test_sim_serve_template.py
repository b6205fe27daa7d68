"""The bench that `sim serve` writes is a clean template: line endings as one-line escapes, the
driver, address and options first, and driver options derived from the dialects served."""

from __future__ import annotations

import pytest
import yaml

from lightloom.sequencer.commands.sim import chosen_dialects, served_bench_text
from lightloom.sequencer.errors import UsageError
from lightloom.sequencer.lang.bench import load_bench, parse_bench
from lightloom.simulators.scpi_server import ServedAddress


def _addresses(bench):
    return {
        name: ServedAddress(47100 + i, f"TCPIP::127.0.0.1::{47100 + i}::SOCKET", f"socket://127.0.0.1:{47100 + i}")
        for i, name in enumerate(bench.devices)
    }


def test_line_endings_are_written_as_one_line_escapes_and_the_device_entry_starts_with_driver_and_address():
    bench = load_bench("sim")
    text = served_bench_text(bench, _addresses(bench), "visa")
    assert 'read_termination: "\\n"' in text and 'write_termination: "\\n"' in text
    # No quoted scalar broken over two lines (the old template wrote '\n' as a quote, a blank line, a quote).
    assert not any(line.strip() in ("'", '"') for line in text.splitlines())
    device = yaml.safe_load(text)["devices"]["qwp_stage"]
    assert list(device)[:3] == ["driver", "address", "options"]
    parse_bench(text, "served.yaml")


def test_dialects_chosen_by_kind_or_device_give_the_bench_their_driver_options():
    bench = load_bench("sim")
    dialects = chosen_dialects(bench, ["rotation_stage=ascii-rotation-stage", "pm_ref=scpi-power-meter"])
    assert set(dialects) == {"qwp_stage", "hwp_stage", "rotator_stage", "pm_ref"}
    text = served_bench_text(bench, _addresses(bench), "serial", dialects)
    assert 'read_termination: "\\r"' in text
    served = parse_bench(text, "served.yaml")
    stage = served.devices["qwp_stage"].options
    assert stage["commands"]["move"] == "GO {angle_deg:.3f}" and stage["idn_query"] == "ID?"
    assert stage["reply_pattern"]["position"] == "POS (\\S+)"
    assert served.devices["pm_ref"].options["commands"]["read"] == "MEAS:POW?"
    assert "commands" not in served.devices["pm_hH"].options  # the default command set


@pytest.mark.parametrize("choice, words", [
    ("shutter=scpi-power-meter", "is a shutter"),
    ("nothing=relay-shutter", "no device or kind"),
    ("shutter", "expected DEVICE=DIALECT"),
    ("shutter=no-such-dialect", "not a built-in dialect"),
])
def test_a_bad_dialect_choice_is_one_clear_line(choice, words):
    with pytest.raises(UsageError, match=words):
        chosen_dialects(load_bench("sim"), [choice])
