"""The shutter close on the way out of a run: retried with back-off and reconnects for the bench's
``retry.shutter_close_s``, through the real drivers against a served bench taken down mid-run."""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path

import yaml

from lightloom.sequencer.cli import main
from lightloom.sequencer.commands.sim import served_bench_text
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.run.session import log_path_for
from lightloom.sequencer.storage.store import load_run
from lightloom.simulators.scpi_server import LoopbackServer
from lightloom.simulators.table import SimulatedTable


def _shutter_commands(log: Path) -> list[str]:
    if not log.exists():
        return []
    records = [json.loads(line) for line in log.read_text().splitlines() if line.strip()]
    return [r["command"] for r in records if r["device"] == "shutter" and r["command"].upper().startswith("SHUT ")]


def _meter_reads(log: Path) -> int:
    if not log.exists():
        return 0
    return sum(1 for line in log.read_text().splitlines() if '"MEAS?"' in line)


def _served_bench(tmp_path: Path, close_s: float) -> tuple[LoopbackServer, Path, Path]:
    bench = load_bench("sim")
    table = SimulatedTable(bench, time_scale=0.01)
    for device in table.devices.values():
        device.connect()
    log = tmp_path / "commands.jsonl"
    server = LoopbackServer(table.devices, log_path=log).start()
    data = yaml.safe_load(served_bench_text(bench, server.addresses(), "visa"))
    # Short times for the test: two attempts per operation, then the close is retried for close_s.
    data["retry"] = {"attempts": 2, "backoff_s": 0.05, "max_backoff_s": 0.4, "shutter_close_s": close_s}
    for dev in data["devices"].values():
        dev["options"]["timeout_s"] = 0.5
    path = tmp_path / "served.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return server, path, log


def _take_down_while_open(server: LoopbackServer, log: Path, down_s: float) -> threading.Thread:
    """Stop the server once the shutter is open and some readings were taken; start it again
    ``down_s`` later (a rack power cut, a controller restart)."""

    def outage() -> None:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            shutter = _shutter_commands(log)
            if shutter and shutter[-1] == "SHUT OPEN" and _meter_reads(log) >= 15:
                break
            time.sleep(0.005)
        server.stop()
        time.sleep(down_s)
        server.start()

    thread = threading.Thread(target=outage, daemon=True)
    thread.start()
    return thread


def test_a_bench_back_within_the_close_time_receives_close_as_its_last_shutter_command(tmp_path):
    server, bench, log = _served_bench(tmp_path, close_s=10.0)
    try:
        outage = _take_down_while_open(server, log, down_s=1.5)
        out = tmp_path / "run.h5"
        status = main(["run", "polarization-6", "--bench", str(bench), "--out", str(out), "--quiet"])
        outage.join(10)
    finally:
        server.stop()
    assert status == 3  # the readings could not be taken: a fault, after a safe stop
    commands = _shutter_commands(log)
    assert "SHUT OPEN" in commands and commands[-1] == "SHUT CLOSE"  # what the hardware was told last
    data = load_run(out)
    assert data.status == "fault" and "block the beam by hand" not in data.message
    run_log = log_path_for(out).read_text()
    assert "shutter closed at attempt" in run_log


def test_a_bench_down_for_longer_warns_to_block_the_beam_after_the_bounded_time_with_back_off(tmp_path):
    server, bench, log = _served_bench(tmp_path, close_s=1.0)
    try:
        outage = _take_down_while_open(server, log, down_s=2.5)
        out = tmp_path / "run.h5"
        status = main(["run", "polarization-6", "--bench", str(bench), "--out", str(out), "--quiet"])
        outage.join(10)
    finally:
        server.stop()
    assert status == 3
    data = load_run(out)
    assert "block the beam by hand" in data.message
    run_log = log_path_for(out).read_text().splitlines()
    failures = [line for line in run_log if "closing the shutter failed at attempt" in line]
    # Back-off 0.05 s doubling to 0.4 s over 1 s: about 5 attempts, spread over the whole second
    # (before the fix, 8 attempts came within a few milliseconds).
    stamps = [time.mktime(time.strptime(line[:19], "%Y-%m-%dT%H:%M:%S")) + float("0" + line[19:23])
              for line in failures]
    assert 3 <= len(failures) <= 10
    assert stamps[-1] - stamps[0] >= 0.7
    assert _shutter_commands(log)[-1] == "SHUT OPEN"  # the warning is true: the beam may be on
