"""Template-driven power meter and photon counter over pyvisa-py and pyserial, on loopback."""

from __future__ import annotations

import pytest

from lightloom.drivers.errors import BadReply, LimitViolation, NotSupported
from helpers.fake_server import FAMILIES, Rig


@pytest.fixture
def rig():
    made = Rig()
    yield made
    made.close()


@pytest.fixture(params=FAMILIES)
def family(request):
    return request.param


def test_power_readings_follow_the_instrument_in_watts(rig, family):
    server = rig.server("powermeter", power_base_w=2.0e-4, power_ramp_w=1.0e-6)
    meter = rig.device(family, "power_meter", server)
    first = meter.read_power_w(0.01)
    second = meter.read_power_w(0.01)
    assert first == pytest.approx(2.0e-4, rel=1e-6)
    assert second == pytest.approx(2.01e-4, rel=1e-6)


def test_integration_time_is_sent_only_when_it_changes(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server)
    meter.read_power_w(0.01)
    meter.read_power_w(0.01)
    meter.read_power_w(0.02)
    assert server.commands("INT") == ["INT 0.01", "INT 0.02"]
    assert len(server.commands("MEAS?")) == 3


def test_integration_time_is_sent_again_after_a_reconnect(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server)
    meter.read_power_w(0.01)
    meter.reconnect()
    meter.read_power_w(0.01)
    assert server.commands("INT") == ["INT 0.01", "INT 0.01"]


def test_a_reading_longer_than_timeout_s_waits_for_the_integration(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server, {"timeout_s": 0.15})
    assert meter.read_power_w(0.4) == pytest.approx(1.0e-4, rel=1e-6)


def test_reply_scale_converts_milliwatts_to_watts(rig, family):
    server = rig.server("powermeter", power_base_w=3.0e-4, power_reply_scale=1e3)
    meter = rig.device(family, "power_meter", server, {"reply_scale": 1e-3})
    assert meter.read_power_w(0.01) == pytest.approx(3.0e-4, rel=1e-6)


def test_garbled_power_reading_is_a_bad_reply_with_the_raw_text(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server, name="pm_h")
    meter.read_power_w(0.01)
    server.faults.garble_next = 1
    with pytest.raises(BadReply) as caught:
        meter.read_power_w(0.01)
    assert "pm_h" in str(caught.value) and "MEAS?" in str(caught.value) and "~" in str(caught.value)


def test_non_positive_integration_is_refused(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server)
    with pytest.raises(LimitViolation):
        meter.read_power_w(0.0)
    assert server.commands("MEAS?") == []


def test_wavelength_from_options_is_set_at_connect_and_after_reconnect(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server, {"wavelength_nm": 810})
    meter.read_power_w(0.01)  # a query: the server has handled every earlier command
    assert server.instrument.wavelength_nm == 810.0
    meter.set_wavelength_nm(633.0)
    meter.read_power_w(0.01)
    server.instrument.wavelength_nm = 800.0
    meter.reconnect()
    meter.read_power_w(0.01)
    assert server.instrument.wavelength_nm == 633.0


def test_range_and_auto_range_and_zero_reach_the_instrument(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server)
    meter.set_range_w(1e-3)
    meter.read_power_w(0.01)  # a query: the server has handled every earlier command
    assert server.instrument.range_w == 1e-3
    meter.set_range_w(None)
    meter.zero()
    meter.read_power_w(0.01)
    assert server.instrument.range_w is None
    assert server.instrument.zeroed


def test_operation_with_a_null_command_is_not_supported(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server, {"commands": {"zero": None}})
    with pytest.raises(NotSupported, match="options.commands.zero"):
        meter.zero()


def test_counts_follow_the_instrument(rig, family):
    server = rig.server("counter", counts_base=1500, counts_ramp=7)
    counter = rig.device(family, "photon_counter", server)
    assert [counter.read_counts(0.01) for _ in range(3)] == [1500, 1507, 1514]
    assert server.commands("GATE") == ["GATE 0.01"]


def test_counter_reply_scale_reads_kilocounts(rig, family):
    server = rig.server("counter", counts_base=2000)
    counter = rig.device(
        family, "photon_counter", server, {"reply_scale": 1e3, "reply_pattern": r"(\d+)"}
    )
    assert counter.read_counts(0.01) == 2_000_000


def test_fractional_counts_are_a_bad_reply(rig, family):
    server = rig.server("counter", counts_base=2001)
    counter = rig.device(family, "photon_counter", server, {"reply_scale": 0.5})
    with pytest.raises(BadReply, match="whole number"):
        counter.read_counts(0.01)


def test_gate_longer_than_timeout_s_waits_for_the_counts(rig, family):
    server = rig.server("counter")
    counter = rig.device(family, "photon_counter", server, {"timeout_s": 0.15})
    assert counter.read_counts(0.4) == 1000
