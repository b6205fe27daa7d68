"""The real drivers with their default options against the simulated bench served on loopback."""

from __future__ import annotations

import pytest

from lightloom.drivers.registry import create_device
from lightloom.sequencer.lang.bench import load_bench
from lightloom.simulators.scpi_server import LoopbackServer
from lightloom.simulators.table import SimulatedTable


@pytest.fixture(scope="module")
def served():
    bench = load_bench("sim")
    table = SimulatedTable(bench, time_scale=0.01)
    for device in table.devices.values():
        device.connect()
    server = LoopbackServer(table.devices).start()
    yield bench, server.addresses()
    server.stop()


@pytest.fixture(params=["visa", "serial"])
def devices(request, served):
    bench, addresses = served
    made = {}
    for name, address in addresses.items():
        where = address.visa_address if request.param == "visa" else address.serial_url
        driver = f"{request.param}.{bench.devices[name].kind}"
        made[name] = create_device(name, driver, where, {"timeout_s": 2.0, "check_errors": True}, None)
    yield bench, made
    for device in made.values():
        device.close()


def _of_kind(bench, devices, kind):
    return [devices[name] for name in devices if bench.devices[name].kind == kind]


def test_every_served_instrument_passes_the_default_identity_check(devices):
    _, made = devices
    for device in made.values():
        device.connect()


def test_stages_move_and_read_back_through_the_default_templates(devices):
    bench, made = devices
    for stage in _of_kind(bench, made, "rotation_stage"):
        stage.move_to_deg(22.5)
        assert stage.wait_settled(10.0) == pytest.approx(22.5, abs=1e-3)


def test_the_beam_reaches_the_meters_only_with_the_shutter_open(devices):
    bench, made = devices
    shutter = _of_kind(bench, made, "shutter")[0]
    meters = _of_kind(bench, made, "power_meter")
    shutter.open()
    lit = sum(meter.read_power_w(0.02) for meter in meters)
    shutter.close_beam()
    dark = sum(meter.read_power_w(0.02) for meter in meters)
    # The built-in sim bench's source is 1 mW; a closed shutter leaves only the meters' offsets.
    assert lit > 1e-4 and abs(dark) < 1e-5
