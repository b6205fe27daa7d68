"""Transport faults through real pyvisa-py and pyserial sessions to a loopback line server."""

from __future__ import annotations

import time

import pytest

from lightloom.drivers.errors import (
    BadReply,
    ConnectionLost,
    IdentityMismatch,
    InstrumentError,
    InstrumentTimeout,
)
from lightloom.drivers.registry import create_device
from helpers.fake_server import Rig

ALL_PATHS = ["visa", "serial", "visa-asrl"]


@pytest.fixture
def rig():
    made = Rig()
    yield made
    made.close()


@pytest.fixture(params=ALL_PATHS)
def family(request):
    return request.param


def test_identity_check_passes_for_the_default_simulated_identity(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server)
    stage.connect()
    assert server.commands("*IDN?") == ["*IDN?"]


def test_identity_mismatch_names_the_reply_and_closes_the_session(rig, family):
    server = rig.server("stage", idn="acme,LASER-9000,42,1.0")
    stage = rig.device(family, "rotation_stage", server, name="hwp")
    with pytest.raises(IdentityMismatch) as caught:
        stage.connect()
    assert "hwp" in str(caught.value) and "LASER-9000" in str(caught.value)
    assert not stage.transport.is_open


def test_identity_given_in_options_is_a_substring_of_the_reply(rig, family):
    server = rig.server("stage", idn="acme,ROT-2,sn77,1.0")
    stage = rig.device(family, "rotation_stage", server, {"identity": "ROT-2"})
    stage.connect()
    assert stage.position_deg() == 0.0


def test_identity_null_sends_no_identity_query(rig, family):
    server = rig.server("stage", idn="garbage")
    stage = rig.device(family, "rotation_stage", server, {"identity": None})
    stage.connect()
    assert stage.position_deg() == 0.0
    assert server.commands("*IDN?") == []


def test_silent_instrument_raises_timeout_within_the_configured_time(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server, {"timeout_s": 0.3}, name="hwp")
    stage.connect()
    server.faults.mute = True
    start = time.monotonic()
    with pytest.raises(InstrumentTimeout) as caught:
        stage.position_deg()
    elapsed = time.monotonic() - start
    assert 0.25 <= elapsed < 1.0
    assert "hwp" in str(caught.value) and "ANGL?" in str(caught.value)


def test_garbled_reply_raises_bad_reply_with_the_raw_text(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server)
    stage.connect()
    server.faults.garble_next = 1
    with pytest.raises(BadReply) as caught:
        stage.position_deg()
    assert "\\x15#?" in str(caught.value)
    assert stage.position_deg() == 0.0


def test_reply_that_is_not_valid_text_raises_bad_reply_with_the_bytes(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server)
    stage.connect()
    server.faults.garble_next, server.faults.garble_with = 1, b"\xff\xfe12"
    with pytest.raises(BadReply) as caught:
        stage.position_deg()
    assert "xff" in str(caught.value) and "ascii" in str(caught.value)
    assert stage.position_deg() == 0.0


def test_connection_dropped_before_a_command_raises_connection_lost_at_once(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server, {"timeout_s": 2.0}, name="hwp")
    stage.connect()
    server.drop_connections()
    time.sleep(0.05)
    start = time.monotonic()
    with pytest.raises(ConnectionLost) as caught:
        stage.position_deg()
        stage.position_deg()
    assert time.monotonic() - start < 1.0
    assert "hwp" in str(caught.value) and "is the instrument on" in str(caught.value)


def test_connection_dropped_while_waiting_for_a_reply_raises_connection_lost(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server, {"timeout_s": 0.3})
    stage.connect()
    server.faults.drop_next = True
    start = time.monotonic()
    with pytest.raises(ConnectionLost):
        stage.position_deg()
    assert time.monotonic() - start < 1.0


def test_reconnect_works_once_the_instrument_is_back(rig, family):
    server = rig.server("stage")
    stage = rig.device(family, "rotation_stage", server)
    stage.connect()
    server.stop()
    with pytest.raises(ConnectionLost):
        stage.position_deg()
    with pytest.raises(ConnectionLost):
        stage.reconnect()
    server.start()
    stage.reconnect()
    assert stage.position_deg() == 0.0


def test_nothing_listening_raises_connection_lost_naming_the_address(rig, family):
    server = rig.server("stage")
    server.stop()
    stage = rig.device(family, "rotation_stage", server, name="qwp")
    with pytest.raises(ConnectionLost) as caught:
        stage.connect()
    assert "qwp" in str(caught.value) and str(server.port) in str(caught.value)


def test_replies_stay_paired_with_queries_after_a_reconnect_following_a_timeout(rig, family):
    server = rig.server("stage", busy_s=0.0)
    stage = rig.device(family, "rotation_stage", server, {"timeout_s": 0.2})
    stage.move_to_deg(10.0)
    server.faults.mute = True
    with pytest.raises(InstrumentTimeout):
        stage.position_deg()
    server.faults.mute = False
    stage.reconnect()
    stage.move_to_deg(20.0)
    assert stage.wait_settled(1.0) == 20.0


def test_missing_visa_library_is_a_permanent_error_saying_what_to_install():
    meter = create_device(
        "pm", "visa.power_meter", "TCPIP::127.0.0.1::1::SOCKET", {"visa_library": "@nosuch"}, None
    )
    with pytest.raises(InstrumentError) as caught:
        meter.connect()
    assert not caught.value.transient
    assert "@nosuch" in str(caught.value) and "options.visa_library" in str(caught.value)
