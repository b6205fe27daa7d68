"""`lightloom probe`: discovery of what answers where, and the pre-night check of a bench, against
served simulated instruments reached through pyvisa-py and pyserial, with faults injected."""

from __future__ import annotations

import json
import socket
import threading
import time

import pytest
import yaml

from lightloom.sequencer.cli import main
from lightloom.sequencer.commands.sim import served_bench_text
from lightloom.sequencer.lang.bench import load_bench
from lightloom.simulators.dialects import load_dialect
from lightloom.simulators.scpi_server import LoopbackServer
from lightloom.simulators.table import SimulatedTable
from helpers.runs import write_bench


class Served:
    def __init__(self, tmp_path, faults=None, transport="visa", dialects=None):
        bench = load_bench(str(write_bench(tmp_path, "sim-probe", simulation={"faults": faults or []})))
        self.table = SimulatedTable(bench, time_scale=0.01)
        for device in self.table.devices.values():
            device.connect()
        self.log = tmp_path / "commands.jsonl"
        chosen = {name: load_dialect(d) for name, d in (dialects or {}).items()}
        self.server = LoopbackServer(self.table.devices, log_path=self.log, dialects=chosen).start()
        self.addresses = self.server.addresses()
        data = yaml.safe_load(served_bench_text(bench, self.addresses, transport, chosen))
        data["retry"] = {"attempts": 2, "backoff_s": 0.05, "max_backoff_s": 0.2, "shutter_close_s": 2.0}
        for dev in data["devices"].values():
            dev["options"]["timeout_s"] = 0.5
        self.data = data
        self.bench = tmp_path / "served.yaml"
        self.write()

    def write(self):
        self.bench.write_text(yaml.safe_dump(self.data, sort_keys=False))

    def shutter_commands(self):
        records = [json.loads(line) for line in self.log.read_text().splitlines() if line.strip()]
        return [r["command"] for r in records if r["device"] == "shutter" and r["command"].startswith("SHUT ")]

    def stop(self):
        self.server.stop()


@pytest.fixture
def served(tmp_path):
    made = []

    def make(**kwargs):
        s = Served(tmp_path, **kwargs)
        made.append(s)
        return s

    yield make
    for s in made:
        s.stop()


def _probe(capsys, *args):
    capsys.readouterr()
    status = main(["probe", *map(str, args), "--json"])
    out = capsys.readouterr().out
    return status, json.loads(out)


def _by(doc, device, check):
    return [c for c in doc["checks"] if c["device"] == device and c["check"] == check]


def test_the_served_bench_passes_every_check_and_ends_with_the_shutter_closed(served, capsys):
    s = served(transport="serial")
    status, doc = _probe(capsys, s.bench, "--yes")
    assert status == 0 and doc["ok"] and doc["beam"] == "checked"
    for stage in ("qwp_stage", "hwp_stage", "rotator_stage"):
        (motion,) = _by(doc, stage, "motion")
        assert motion["ok"] and motion["values"]["move_s"] > 0 and motion["values"]["readback_error_deg"] <= 0.05
    assert _by(doc, "converter_flip", "motion")[0]["ok"]
    for meter in ("pm_hH", "pm_hV", "pm_vH", "pm_vV", "pm_ref"):
        assert _by(doc, meter, "dark")[0]["ok"]
    (beam,) = _by(doc, "pm_ref", "beam")
    assert beam["ok"] and beam["values"]["open"] > 10 * abs(beam["values"]["dark"])
    assert "SHUT OPEN" in s.shutter_commands() and s.shutter_commands()[-1] == "SHUT CLOSE"


def test_swapped_addresses_fail_the_identity_check_and_name_the_other_device(served, capsys):
    s = served()
    devices = s.data["devices"]
    devices["shutter"]["address"], devices["pm_ref"]["address"] = devices["pm_ref"]["address"], devices["shutter"]["address"]
    s.write()
    status, doc = _probe(capsys, s.bench, "--yes")
    assert status == 3 and not doc["ok"]
    assert not _by(doc, "shutter", "identity")[0]["ok"] and not _by(doc, "pm_ref", "identity")[0]["ok"]
    hints = _by(doc, "shutter", "address") + _by(doc, "pm_ref", "address")
    assert {h["detail"].split(" answers like ")[1].split(":")[0] for h in hints} == {"pm_ref", "shutter"}
    assert "SHUT OPEN" not in s.shutter_commands()  # never opened: the shutter was not reachable


def test_a_dead_meter_fails_and_the_rest_is_still_checked(served, capsys):
    s = served(faults=[{"device": "pm_hV", "kind": "timeout", "at_s": 0.0, "duration_s": 1e6}])
    status, doc = _probe(capsys, s.bench, "--yes")
    assert status == 3
    assert [c["ok"] for c in doc["checks"] if c["device"] == "pm_hV"] == [False]
    assert _by(doc, "pm_ref", "beam")[0]["ok"] and _by(doc, "qwp_stage", "motion")[0]["ok"]
    assert s.shutter_commands()[-1] == "SHUT CLOSE"


def test_a_stuck_stage_fails_its_motion_check_within_the_settle_timeout(served, capsys):
    s = served(faults=[{"device": "hwp_stage", "kind": "stuck", "at_s": 0.0}])
    t0 = time.monotonic()
    status, doc = _probe(capsys, s.bench, "--yes", "--settle-timeout", "1")
    assert status == 3 and time.monotonic() - t0 < 30
    (motion,) = _by(doc, "hwp_stage", "motion")
    assert motion["ok"] is False
    assert _by(doc, "qwp_stage", "motion")[0]["ok"]
    assert s.shutter_commands()[-1] == "SHUT CLOSE"


def test_without_confirmation_the_shutter_is_never_opened(served, capsys):
    s = served()
    status, doc = _probe(capsys, s.bench)  # stdin is not a terminal under pytest: no confirmation
    assert status == 0 and doc["beam"] == "skipped"
    assert "SHUT OPEN" not in s.shutter_commands()


def test_a_simulated_bench_is_checked_in_process(capsys):
    status, doc = _probe(capsys, "sim")
    assert status == 0 and doc["ok"] and _by(doc, "pm_ref", "beam")[0]["ok"]


def _silent_listener():
    """A TCP port that accepts and never answers (a hung instrument)."""
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen(4)
    held = []

    def accept():
        while True:
            try:
                held.append(sock.accept()[0])
            except OSError:
                return

    threading.Thread(target=accept, daemon=True).start()
    return sock


def test_list_reports_what_answers_at_given_addresses_without_hanging(served, capsys, tmp_path):
    s = served(dialects={"shutter": "relay-shutter"})
    silent = _silent_listener()
    try:
        stage, meter, shutter = s.addresses["qwp_stage"], s.addresses["pm_ref"], s.addresses["shutter"]
        quiet = f"socket://127.0.0.1:{silent.getsockname()[1]}"
        skeleton = tmp_path / "skeleton.yaml"
        t0 = time.monotonic()
        status, doc = _probe(capsys, "--list", "--no-scan", "--timeout", "0.3", "--skeleton", skeleton,
                             "--address", stage.visa_address, "--address", meter.serial_url,
                             "--address", shutter.serial_url, "--address", quiet)
        elapsed = time.monotonic() - t0
    finally:
        silent.close()
    assert status == 0 and elapsed < 8.0  # 0.3 s timeouts: bounded even with a silent port
    found = {f["address"]: f for f in doc["found"]}
    assert found[stage.visa_address]["identity"].startswith("lightloom,SIM-STAGE")
    assert found[stage.visa_address]["kind_guess"] == "rotation_stage"
    assert found[meter.serial_url]["kind_guess"] == "power_meter"
    assert found[shutter.serial_url]["identity"] is None  # the relay board answers VER?, not *IDN?
    assert found[quiet]["identity"] is None and "no reply" in found[quiet]["error"]
    bench = yaml.safe_load(skeleton.read_text())
    assert {d["address"] for d in bench["devices"].values()} == {stage.visa_address, meter.serial_url}


def test_list_with_another_identity_query_finds_the_relay_board(served, capsys):
    s = served(dialects={"shutter": "relay-shutter"})
    shutter = s.addresses["shutter"]
    status, doc = _probe(capsys, "--list", "--no-scan", "--query", "VER?", "--address", shutter.serial_url)
    assert status == 0 and doc["found"][0]["identity"] == "RELAY-8 v2.4" and doc["found"][0]["kind_guess"] == "shutter"
