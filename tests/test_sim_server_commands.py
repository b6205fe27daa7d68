"""The loopback SCPI server over plain sockets: identities, moves and *OPC?, readings, the error queue."""

from __future__ import annotations

import re
import socket
from typing import Iterator

import numpy as np
import pytest

from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import (
    SimActuator,
    SimDevice,
    SimPhotonCounter,
    SimPowerMeter,
    SimRotationStage,
    SimShutter,
    move_time_s,
)
from lightloom.simulators.scpi_server import LoopbackServer


class LineClient:
    """A bare TCP client speaking newline-terminated lines."""

    def __init__(self, port: int, timeout_s: float = 2.0) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=timeout_s)
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.buffer = b""

    def send(self, line: str, end: str = "\n") -> None:
        self.sock.sendall((line + end).encode("ascii"))

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


@pytest.fixture()
def bench() -> dict[str, SimDevice]:
    clock = SimClock(0.0)
    shutter = SimShutter("shutter", clock)
    light = lambda: 1.5e-4 if shutter.transmits() else 0.0  # noqa: E731
    return {
        "hwp": SimRotationStage("hwp", clock, speed_deg_per_s=20.0, acceleration_deg_per_s2=40.0, settle_s=0.1),
        "converter": SimActuator("converter", clock, switch_s=0.5),
        "shutter": shutter,
        "pm_hH": SimPowerMeter("pm_hH", clock, light, np.random.default_rng(1), offset_w=1e-6),
        "apd": SimPhotonCounter("apd", clock, light, np.random.default_rng(2), counts_per_w=1e6),
    }


@pytest.fixture()
def server(bench: dict[str, SimDevice]) -> Iterator[LoopbackServer]:
    with LoopbackServer(bench.values()) as srv:
        yield srv


@pytest.fixture()
def connect(server: LoopbackServer) -> Iterator:
    clients: list[LineClient] = []

    def open_client(name: str) -> LineClient:
        client = LineClient(server.addresses()[name].tcp_port)
        clients.append(client)
        return client

    yield open_client
    for client in clients:
        client.close()


def test_each_instrument_answers_idn_with_its_kind_and_name(connect) -> None:
    kinds = {"hwp": "STAGE", "converter": "ACTUATOR", "shutter": "SHUTTER", "pm_hH": "POWERMETER", "apd": "COUNTER"}
    for name, kind in kinds.items():
        assert connect(name).query("*IDN?") == f"lightloom,SIM-{kind},{name},0.1"


def test_move_then_opc_waits_for_the_move_and_position_reads_target(connect, bench) -> None:
    stage = connect("hwp")
    clock = bench["hwp"].clock
    stage.send("ANGL 37.5")
    assert stage.query("BUSY?") == "1"
    t0 = clock.now()
    assert stage.query("*OPC?") == "1"
    assert clock.now() - t0 >= move_time_s(37.5, 20.0, 40.0) + 0.1 - 0.01
    assert stage.query("BUSY?") == "0"
    assert stage.query("ANGL?") == "37.500000"


def test_polling_busy_sees_the_move_finish_on_an_instant_clock(connect) -> None:
    stage = connect("hwp")
    stage.send("ANGL 2")
    polls = 0
    while stage.query("BUSY?") == "1":
        polls += 1
        assert polls < 5000
    assert stage.query("ANGL?") == "2.000000"


def test_stage_reports_limits_and_speed(connect) -> None:
    stage = connect("hwp")
    assert stage.query("LIM?") == "-360,360"
    assert stage.query("SPD?") == "20"


def test_home_command_returns_the_stage_to_zero(connect) -> None:
    stage = connect("hwp")
    stage.send("ANGL 50")
    stage.send("HOME")
    assert stage.query("*OPC?") == "1"
    assert stage.query("ANGL?") == "0.000000"


def test_meas_returns_the_mean_power_in_scientific_notation(connect) -> None:
    pm, shutter = connect("pm_hH"), connect("shutter")
    shutter.send("SHUT OPEN")
    assert shutter.query("SHUT?") == "OPEN"
    pm.send("INT 0.2")
    assert pm.query("INT?") == "0.2"
    reply = pm.query("MEAS?")
    assert re.fullmatch(r"-?\d\.\d{6}e[+-]\d\d", reply)
    assert float(reply) == pytest.approx(1.5e-4 + 1e-6)


def test_zero_removes_the_offset_over_the_wire(connect) -> None:
    pm, shutter = connect("pm_hH"), connect("shutter")
    shutter.send("SHUT CLOSE")
    assert shutter.query("SHUT?") == "CLOSED"  # each connection is served in its own thread: sync
    pm.send("ZERO")
    assert pm.query("*OPC?") == "1"
    shutter.send("SHUT OPEN")
    assert shutter.query("SHUT?") == "OPEN"
    assert float(pm.query("MEAS?")) == pytest.approx(1.5e-4, abs=1e-12)


def test_power_meter_wavelength_and_range_settings(connect) -> None:
    pm = connect("pm_hH")
    pm.send("WAV 633")
    assert pm.query("WAV?") == "633"
    pm.send("RANGE 1e-4")
    assert connect("shutter").query("SHUT OPEN\nSHUT?") == "OPEN"
    assert float(pm.query("MEAS?")) == pytest.approx(1e-4)
    pm.send("RANGE AUTO")
    assert float(pm.query("MEAS?")) > 1e-4
    assert pm.query("SYST:ERR?") == '0,"No error"'


def test_count_returns_integer_counts_over_the_gate(connect) -> None:
    apd = connect("apd")
    assert connect("shutter").query("SHUT OPEN\nSHUT?") == "OPEN"
    apd.send("GATE 0.5")
    assert apd.query("GATE?") == "0.5"
    reply = apd.query("COUNT?")
    assert re.fullmatch(r"\d+", reply)
    assert abs(int(reply) - 75) < 5 * 75**0.5


def test_actuator_lists_states_and_switches(connect) -> None:
    conv = connect("converter")
    assert conv.query("STATES?") == "in,out"
    conv.send("STATE out")
    assert conv.query("BUSY?") == "1"
    assert conv.query("*OPC?") == "1"
    assert conv.query("STATE?") == "out"


def test_unknown_command_gives_no_reply_and_queues_113(connect) -> None:
    stage = connect("hwp")
    stage.send("ROTATE 5")
    assert stage.query("*IDN?").startswith("lightloom,SIM-STAGE")  # no stray reply came first
    assert stage.query("SYST:ERR?").startswith('-113,"Undefined header')
    assert stage.query("SYST:ERR?") == '0,"No error"'


def test_errors_come_out_of_the_queue_oldest_first(connect) -> None:
    stage = connect("hwp")
    stage.send("FOO")
    stage.send("ANGL 1000")
    assert stage.query("SYST:ERR?").startswith("-113,")
    assert stage.query("SYST:ERR?").startswith("-222,")
    assert stage.query("SYST:ERR?") == '0,"No error"'


def test_out_of_limit_move_queues_222_and_does_not_move(connect) -> None:
    stage = connect("hwp")
    stage.send("ANGL 400")
    assert stage.query("BUSY?") == "0"
    assert stage.query("ANGL?") == "0.000000"
    assert stage.query("SYST:ERR?").startswith('-222,"Data out of range')


@pytest.mark.parametrize("bad", ["ANGL abc", "ANGL", "ANGL nan", "ANGL? 5"])
def test_bad_arguments_queue_222_and_send_no_reply(connect, bad: str) -> None:
    stage = connect("hwp")
    stage.send(bad)
    assert stage.query("*IDN?").startswith("lightloom,")
    assert stage.query("SYST:ERR?").startswith("-222,")


def test_bad_shutter_word_and_bad_actuator_state_queue_222(connect) -> None:
    shutter, conv = connect("shutter"), connect("converter")
    shutter.send("SHUT AJAR")
    conv.send("STATE sideways")
    assert shutter.query("SYST:ERR?").startswith("-222,")
    assert conv.query("SYST:ERR?").startswith("-222,")
    assert shutter.query("SHUT?") == "CLOSED"


def test_cls_clears_the_error_queue(connect) -> None:
    stage = connect("hwp")
    stage.send("FOO")
    stage.send("BAR")
    stage.send("*CLS")
    assert stage.query("SYST:ERR?") == '0,"No error"'


def test_error_queue_overflow_ends_in_350(connect) -> None:
    stage = connect("hwp")
    for _ in range(20):
        stage.send("FOO")
    replies = [stage.query("SYST:ERR?") for _ in range(17)]
    assert all(r.startswith("-113,") for r in replies[:15])
    assert replies[15] == '-350,"Queue overflow"'
    assert replies[16] == '0,"No error"'


def test_rst_closes_the_shutter(connect) -> None:
    shutter = connect("shutter")
    shutter.send("SHUT OPEN")
    assert shutter.query("SHUT?") == "OPEN"
    shutter.send("*RST")
    assert shutter.query("SHUT?") == "CLOSED"


def test_trailing_carriage_return_and_lower_case_headers_are_accepted(connect) -> None:
    stage = connect("hwp")
    stage.send("angl 10", end="\r\n")
    assert stage.query("*opc?") == "1"
    stage.send("ANGL?", end="\r\n")
    assert stage.readline() == "10.000000"


def test_several_clients_in_sequence_share_the_instrument_state(server: LoopbackServer) -> None:
    port = server.addresses()["hwp"].tcp_port
    first = LineClient(port)
    first.send("ANGL 12")
    assert first.query("*OPC?") == "1"
    first.close()
    second = LineClient(port)
    assert second.query("*IDN?") == "lightloom,SIM-STAGE,hwp,0.1"
    assert second.query("ANGL?") == "12.000000"
    second.close()
