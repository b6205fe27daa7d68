"""The loopback SCPI server through the real client stacks: pyvisa-py TCPIP SOCKET and pyserial socket://."""

from __future__ import annotations

from typing import Iterator

import numpy as np
import pytest
import pyvisa
import serial

from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import SimPowerMeter, SimRotationStage, SimShutter
from lightloom.simulators.scpi_server import LoopbackServer


@pytest.fixture()
def server() -> Iterator[LoopbackServer]:
    clock = SimClock(0.0)
    devices = [
        SimRotationStage("qwp", clock, settle_s=0.05),
        SimShutter("shutter", clock),
        SimPowerMeter("pm_hH", clock, lambda: 3.25e-5, np.random.default_rng(0)),
    ]
    with LoopbackServer(devices) as srv:
        yield srv


@pytest.fixture()
def visa() -> Iterator[pyvisa.ResourceManager]:
    rm = pyvisa.ResourceManager("@py")
    yield rm
    rm.close()


def open_visa(rm: pyvisa.ResourceManager, address: str):
    return rm.open_resource(address, read_termination="\n", write_termination="\n", timeout=2000)


def test_pyvisa_reads_the_identity_of_each_instrument(server: LoopbackServer, visa) -> None:
    for name, address in server.addresses().items():
        inst = open_visa(visa, address.visa_address)
        assert inst.query("*IDN?").split(",")[2] == name
        inst.close()


def test_pyvisa_moves_a_stage_and_waits_with_opc(server: LoopbackServer, visa) -> None:
    inst = open_visa(visa, server.addresses()["qwp"].visa_address)
    inst.write("ANGL -22.5")
    assert inst.query("*OPC?") == "1"
    assert float(inst.query("ANGL?")) == -22.5
    inst.close()


def test_pyvisa_measures_power(server: LoopbackServer, visa) -> None:
    inst = open_visa(visa, server.addresses()["pm_hH"].visa_address)
    assert float(inst.query("MEAS?")) == pytest.approx(3.25e-5)
    inst.close()


def test_pyserial_socket_url_drives_the_shutter(server: LoopbackServer) -> None:
    port = serial.serial_for_url(server.addresses()["shutter"].serial_url, timeout=2)
    port.write(b"*IDN?\n")
    assert port.readline() == b"lightloom,SIM-SHUTTER,shutter,0.1\n"
    port.write(b"SHUT OPEN\r\nSHUT?\r\n")
    assert port.readline() == b"OPEN\n"
    port.write(b"SHUT CLOSE\nSHUT?\n")
    assert port.readline() == b"CLOSED\n"
    port.close()


def test_pyserial_reads_the_error_queue_after_a_bad_command(server: LoopbackServer) -> None:
    port = serial.serial_for_url(server.addresses()["qwp"].serial_url, timeout=2)
    port.write(b"SPIN 3\nSYST:ERR?\n")
    assert port.readline().startswith(b'-113,"Undefined header')
    port.close()
