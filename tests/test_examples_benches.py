"""The example benches of docs/examples/benches run, as written (addresses aside), against
simulated instruments speaking the same dialects, through pyvisa-py and pyserial."""

from __future__ import annotations

import json

import pytest
import yaml

from lightloom.sequencer.cli import main
from lightloom.sequencer.storage.store import load_run
from lightloom.simulators.dialects import DialectError, DialectInstrument, load_dialect, parse_dialect
from lightloom.simulators.devices import SimShutter
from lightloom.simulators.clock import SimClock
from served_twins import EXAMPLES, REPO, serve_twin

CASES = [
    ("polarimeter-power-meters.yaml", "polarization-6", 1e-3, "REL1 OFF"),
    ("spin-orbit-photon-counters.yaml", "joint-16", 2e-8, "REL1 OFF"),
]


def _records(log):
    return [json.loads(line) for line in log.read_text().splitlines() if line.strip()]


@pytest.mark.parametrize("example, protocol, power_w, closed", CASES)
def test_an_example_bench_passes_the_pre_night_check_and_runs_a_protocol_against_its_dialects(
    tmp_path, example, protocol, power_w, closed
):
    twin = serve_twin(EXAMPLES / example, tmp_path, power_w=power_w)
    try:
        # The pre-night check first, as a user would, then the protocol.
        assert main(["probe", str(twin.bench_path), "--yes", "--json"]) == 0
        out = tmp_path / "run.h5"
        assert main(["run", protocol, "--bench", str(twin.bench_path), "--out", str(out), "--quiet"]) == 0
    finally:
        twin.stop()
    data = load_run(out)
    assert data.status == "complete" and data.steps_done == data.header.steps_total
    records = _records(twin.log)
    # Every command the bench's templates produced was understood (no error pushed by any device).
    assert [r for r in records if "error" in r] == []
    drivers = {dev["driver"].split(".")[0] for dev in twin.data["devices"].values()}
    assert drivers == {"visa", "serial"}  # both transports exercised
    shutter = [r["command"] for r in records if r["device"] == "shutter" and r["command"].startswith("REL1 O")]
    assert shutter[-1] == closed


def test_the_example_benches_validate_with_their_protocols():
    for example, protocol, _, _ in CASES:
        assert main(["validate", protocol, "--bench", str(EXAMPLES / example)]) == 0


def test_a_dialect_reply_format_and_state_words_are_what_the_instrument_sends():
    shutter = SimShutter("shutter", SimClock(0.0))
    shutter.connect()
    speaker = DialectInstrument(shutter, load_dialect("relay-shutter"))
    assert speaker.execute("VER?").reply == "RELAY-8 v2.4"
    assert speaker.execute("rel1   on").reply is None and shutter.is_open()  # case and blanks free
    assert speaker.execute("REL1?").reply == "REL1=ON"
    assert speaker.execute("SHUT OPEN").error == -113  # another dialect's command is not understood


def test_a_dialect_with_a_template_missing_its_value_is_refused_with_the_key():
    text = (REPO / "simulators" / "dialect_files" / "ascii-rotation-stage.yaml").read_text()
    data = yaml.safe_load(text)
    data["commands"]["move"] = "GO"
    with pytest.raises(DialectError, match=r"commands\.move.*angle_deg"):
        parse_dialect(yaml.safe_dump(data), "mine.yaml")
