"""Loopback server life cycle: loopback-only binding, stop/start on the same ports, the JSON-lines command log."""

from __future__ import annotations

import json
import socket
import threading
from pathlib import Path

import numpy as np
import pytest

from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import SimPowerMeter, SimRotationStage, SimShutter
from lightloom.simulators.faults import FaultInjector
from lightloom.simulators.scpi_server import LoopbackServer, NonLoopbackHost, PortUnavailable


def devices():
    clock = SimClock(0.0)
    return [
        SimRotationStage("hwp", clock, settle_s=0.05),
        SimShutter("shutter", clock),
        SimPowerMeter("pm_hH", clock, lambda: 2e-4, np.random.default_rng(0)),
    ]


def query(port: int, *lines: str, timeout_s: float = 2.0) -> str:
    """Send lines on a fresh connection and return the first reply line."""
    with socket.create_connection(("127.0.0.1", port), timeout=timeout_s) as sock:
        sock.sendall("".join(line + "\n" for line in lines).encode())
        data = b""
        while b"\n" not in data:
            chunk = sock.recv(4096)
            if not chunk:
                raise EOFError("closed")
            data += chunk
        return data.split(b"\n", 1)[0].decode()


def free_base_port(count: int) -> int:
    """A port p such that p .. p+count-1 are free right now."""
    for _ in range(50):
        with socket.socket() as probe:
            probe.bind(("127.0.0.1", 0))
            base = probe.getsockname()[1]
        if base + count > 65535:
            continue
        socks = []
        try:
            for p in range(base, base + count):
                s = socket.socket()
                socks.append(s)
                s.bind(("127.0.0.1", p))
            return base
        except OSError:
            continue
        finally:
            for s in socks:
                s.close()
    raise RuntimeError("no free port range")


def test_every_listening_socket_is_bound_to_loopback() -> None:
    with LoopbackServer(devices()) as srv:
        names = srv.listening_sockets()
        assert set(names) == {"hwp", "shutter", "pm_hH"}
        assert all(host == "127.0.0.1" for host, _ in names.values())
        assert len({port for _, port in names.values()}) == 3


@pytest.mark.parametrize("host", ["0.0.0.0", "", "192.168.1.20", "::"])
def test_a_non_loopback_bind_address_is_refused(host: str) -> None:
    with pytest.raises(NonLoopbackHost, match="127.0.0.1 only"):
        LoopbackServer(devices(), host=host)


def test_addresses_give_port_visa_and_serial_forms() -> None:
    with LoopbackServer(devices()) as srv:
        port, visa, url = srv.addresses()["hwp"]
        assert visa == f"TCPIP::127.0.0.1::{port}::SOCKET"
        assert url == f"socket://127.0.0.1:{port}"


def test_base_port_assigns_consecutive_ports_in_device_order() -> None:
    base = free_base_port(3)
    with LoopbackServer(devices(), base_port=base) as srv:
        assert [a.tcp_port for a in srv.addresses().values()] == [base, base + 1, base + 2]
        assert query(base + 2, "*IDN?") == "lightloom,SIM-POWERMETER,pm_hH,0.1"


def test_stop_then_start_comes_back_on_the_same_ports_with_device_state_kept() -> None:
    srv = LoopbackServer(devices())
    srv.start()
    ports = {name: a.tcp_port for name, a in srv.addresses().items()}
    # leave a connection open across the stop: its server side goes through TIME_WAIT
    held = socket.create_connection(("127.0.0.1", ports["hwp"]), timeout=2)
    assert query(ports["hwp"], "ANGL 15", "*OPC?") == "1"
    srv.stop()
    assert not srv.running
    with pytest.raises(OSError):
        query(ports["hwp"], "*IDN?", timeout_s=0.5)
    srv.start()
    try:
        assert {name: a.tcp_port for name, a in srv.addresses().items()} == ports
        assert query(ports["hwp"], "ANGL?") == "15.000000"
    finally:
        held.close()
        srv.stop()


def test_restart_with_explicit_base_port_reuses_it() -> None:
    base = free_base_port(3)
    srv = LoopbackServer(devices(), base_port=base)
    with srv:
        assert query(base, "*IDN?").startswith("lightloom,SIM-STAGE")
        srv.restart()
        assert srv.addresses()["hwp"].tcp_port == base
        assert query(base, "*IDN?").startswith("lightloom,SIM-STAGE")


def test_a_port_in_use_is_reported_with_the_device_name() -> None:
    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen(1)
        port = busy.getsockname()[1]
        srv = LoopbackServer(devices(), ports={"shutter": port})
        with pytest.raises(PortUnavailable, match=f"127.0.0.1:{port} for device 'shutter'"):
            srv.start()
        assert not srv.running


def test_stop_is_idempotent_and_joins_its_threads() -> None:
    before = {t.name for t in threading.enumerate()}
    srv = LoopbackServer(devices()).start()
    query(srv.addresses()["hwp"].tcp_port, "*IDN?")
    srv.stop()
    srv.stop()
    leftover = {t.name for t in threading.enumerate() if t.name.startswith("sim-scpi")} - before
    assert leftover == set()


def read_log(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines()]


def test_command_log_records_every_received_command_with_its_reply(tmp_path: Path) -> None:
    log = tmp_path / "commands.jsonl"
    with LoopbackServer(devices(), log_path=log) as srv:
        port = srv.addresses()["hwp"].tcp_port
        query(port, "ANGL 20", "FOO", "*OPC?")
        records = read_log(log)  # readable while the server still runs: flushed per line
    assert [r["command"] for r in records] == ["ANGL 20", "FOO", "*OPC?"]
    assert [r["reply"] for r in records] == [None, None, "1"]
    assert records[1]["error"] == -113
    assert all(r["device"] == "hwp" for r in records)
    assert all(set(r) >= {"t_wall", "t_virtual", "device", "command", "reply"} for r in records)
    assert records[2]["t_virtual"] >= records[0]["t_virtual"]


def test_command_log_shows_the_shutter_was_closed_last(tmp_path: Path) -> None:
    log = tmp_path / "commands.jsonl"
    srv = LoopbackServer(devices(), log_path=log).start()
    port = srv.addresses()["shutter"].tcp_port
    query(port, "SHUT OPEN", "SHUT CLOSE", "SHUT?")
    shutter_commands = [r["command"] for r in read_log(log) if r["command"].startswith("SHUT ")]
    srv.stop()
    assert shutter_commands[-1] == "SHUT CLOSE"


def test_command_log_appends_across_a_restart_and_marks_served_faults(tmp_path: Path) -> None:
    log = tmp_path / "commands.jsonl"
    injector = FaultInjector([{"device": "hwp", "kind": "garbled", "at_s": 0.0}])
    srv = LoopbackServer(devices(), log_path=log, faults=injector).start()
    port = srv.addresses()["hwp"].tcp_port
    garbled = query(port, "ANGL?")
    srv.restart()
    query(port, "ANGL?")
    srv.stop()
    records = read_log(log)
    assert [r.get("fault") for r in records] == ["garbled", None]
    assert records[0]["reply"] == garbled != "0.000000"
    assert records[1]["reply"] == "0.000000"
