"""Served faults on the wire: a swallowed query, a garbled reply, a dropped connection, a stalled *OPC?."""

from __future__ import annotations

import socket
from typing import Iterator

import numpy as np
import pytest

from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import SimPowerMeter, SimRotationStage
from lightloom.simulators.faults import FaultInjector
from lightloom.simulators.scpi_server import LoopbackServer


class LineClient:
    def __init__(self, port: int, timeout_s: float = 2.0) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=timeout_s)
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.buffer = b""

    def send(self, line: str) -> None:
        self.sock.sendall(line.encode("ascii") + b"\n")

    def readline(self) -> str:
        while b"\n" not in self.buffer:
            data = self.sock.recv(4096)
            if not data:
                raise EOFError("the server closed the connection")
            self.buffer += data
        line, self.buffer = self.buffer.split(b"\n", 1)
        return line.decode("ascii")

    def query(self, line: str) -> str:
        self.send(line)
        return self.readline()

    def close(self) -> None:
        self.sock.close()


def serve(faults: list[dict], opc_timeout_s: float = 60.0):
    clock = SimClock(0.0)
    injector = FaultInjector(faults, np.random.default_rng(3))
    devices = [
        SimRotationStage("hwp", clock, settle_s=0.05, faults=injector),
        SimPowerMeter("pm_hH", clock, lambda: 1e-4, np.random.default_rng(0), faults=injector),
    ]
    return LoopbackServer(devices, opc_timeout_s=opc_timeout_s), devices


@pytest.fixture()
def timeout_server() -> Iterator[LoopbackServer]:
    srv, _ = serve([{"device": "pm_hH", "kind": "timeout", "at_s": 0.0}])
    with srv:
        yield srv


def test_served_timeout_sends_no_reply_and_the_next_query_works(timeout_server: LoopbackServer) -> None:
    client = LineClient(timeout_server.addresses()["pm_hH"].tcp_port, timeout_s=0.3)
    client.send("MEAS?")
    with pytest.raises(socket.timeout):
        client.readline()
    assert float(client.query("MEAS?")) == pytest.approx(1e-4)
    client.close()


def test_served_timeout_does_not_hit_writes() -> None:
    srv, (stage, _) = serve([{"device": "hwp", "kind": "timeout", "at_s": 0.0}])
    with srv:
        client = LineClient(srv.addresses()["hwp"].tcp_port, timeout_s=0.3)
        client.send("ANGL 5")
        with pytest.raises(socket.timeout):
            client.query("*OPC?")  # the first query is the one swallowed
        assert client.query("*OPC?") == "1"
        assert client.query("ANGL?") == "5.000000"
        client.close()


def test_served_garbled_reply_is_unparseable_and_then_replies_are_clean() -> None:
    srv, _ = serve([{"device": "pm_hH", "kind": "garbled", "at_s": 0.0}])
    with srv:
        client = LineClient(srv.addresses()["pm_hH"].tcp_port)
        garbled = client.query("MEAS?")
        with pytest.raises(ValueError):
            float(garbled)
        assert float(client.query("MEAS?")) == pytest.approx(1e-4)
        assert client.query("*IDN?") == "lightloom,SIM-POWERMETER,pm_hH,0.1"
        client.close()


def test_served_drop_closes_the_connection_and_a_new_one_works() -> None:
    srv, _ = serve([{"device": "hwp", "kind": "drop", "at_s": 0.0}])
    with srv:
        port = srv.addresses()["hwp"].tcp_port
        client = LineClient(port)
        client.send("*IDN?")
        with pytest.raises((EOFError, ConnectionResetError)):
            client.readline()
        client.close()
        again = LineClient(port)
        assert again.query("*IDN?") == "lightloom,SIM-STAGE,hwp,0.1"
        again.close()


def test_served_drop_with_probability_is_reproducible() -> None:
    def pattern() -> list[str]:
        srv, _ = serve([{"device": "hwp", "kind": "drop", "probability": 0.3}])
        out = []
        with srv:
            port = srv.addresses()["hwp"].tcp_port
            client = LineClient(port)
            for _ in range(30):
                try:
                    client.query("*IDN?")
                    out.append("ok")
                except (EOFError, ConnectionResetError):
                    out.append("drop")
                    client.close()
                    client = LineClient(port)
            client.close()
        return out

    first = pattern()
    assert first == pattern()
    assert 0 < first.count("drop") < 30


def test_opc_on_a_stalled_stage_gives_no_reply_and_queues_240() -> None:
    srv, (stage, _) = serve([{"device": "hwp", "kind": "stuck", "at_s": 0.0}], opc_timeout_s=5.0)
    with srv:
        client = LineClient(srv.addresses()["hwp"].tcp_port, timeout_s=0.5)
        client.send("ANGL 30")
        with pytest.raises(socket.timeout):
            client.query("*OPC?")
        assert client.query("BUSY?") == "1"
        assert client.query("ANGL?") == "0.000000"
        assert client.query("SYST:ERR?").startswith('-240,"Hardware error')
        assert stage.optical_angle_deg() == 0.0
        client.close()


def test_served_devices_do_not_also_raise_link_faults_in_process() -> None:
    srv, (_, meter) = serve([{"device": "pm_hH", "kind": "timeout", "at_s": 0.0, "count": 1}])
    with srv:
        client = LineClient(srv.addresses()["pm_hH"].tcp_port, timeout_s=0.3)
        with pytest.raises(socket.timeout):
            client.query("MEAS?")
        assert len(meter.faults.events) == 1  # type: ignore[union-attr]
        assert float(client.query("MEAS?")) == pytest.approx(1e-4)
        client.close()
