"""Bounded retry with back-off: pure behaviour, and recovery through a real loopback session."""

from __future__ import annotations

import pytest

from lightloom.drivers.errors import BadReply, ConnectionLost, InstrumentTimeout, LimitViolation
from lightloom.drivers.interfaces import Device
from lightloom.drivers.retry import backoff_delays_s, call_with_retry
from helpers.fake_server import FAMILIES, Rig


class CountingDevice(Device):
    """A device that only counts reconnects."""

    name = "counting"

    def __init__(self) -> None:
        self.reconnects = 0

    def reconnect(self) -> None:
        self.reconnects += 1


def _failing(errors):
    """A callable raising each of ``errors`` in turn, then returning 'ok'."""
    pending = list(errors)

    def call():
        if pending:
            raise pending.pop(0)
        return "ok"

    return call


def test_delays_double_up_to_the_cap():
    assert backoff_delays_s(5, 0.1, 0.3) == [0.1, 0.2, 0.3, 0.3]
    assert backoff_delays_s(1, 0.1, 0.3) == []


def test_one_transient_fault_is_survived_with_one_sleep():
    slept = []
    flaky = _failing([BadReply("pm", "MEAS?", "x")])
    result = call_with_retry(flaky, 3, 0.1, 1.0, None, slept.append)
    assert result == "ok" and slept == [0.1]


def test_gives_up_after_the_attempts_with_the_last_error():
    errors = [InstrumentTimeout("pm", "MEAS?", f"try {i}") for i in range(3)]
    retried = []
    with pytest.raises(InstrumentTimeout) as caught:
        call_with_retry(
            _failing(errors), 3, 0.1, 1.0, lambda n, e, d: retried.append((n, d)), lambda s: None
        )
    assert caught.value is errors[2]
    assert retried == [(1, 0.1), (2, 0.2)]


def test_non_transient_errors_are_not_retried():
    slept = []
    with pytest.raises(LimitViolation):
        refused = _failing([LimitViolation("hwp", None, "far")])
        call_with_retry(refused, 5, 0.1, 1.0, None, slept.append)
    assert slept == []


def test_reconnects_after_a_timeout_or_a_lost_connection_but_not_after_a_bad_reply():
    device = CountingDevice()
    errors = [
        BadReply("d", None, "x"),
        ConnectionLost("d", None, "y"),
        InstrumentTimeout("d", None, "z"),
    ]
    assert call_with_retry(_failing(errors), 4, 0, 0, None, lambda s: None, device=device) == "ok"
    assert device.reconnects == 2


def test_a_failing_reconnect_counts_as_a_failed_attempt():
    class Unreachable(CountingDevice):
        def reconnect(self) -> None:
            super().reconnect()
            raise ConnectionLost(self.name, None, "refused")

    device = Unreachable()
    with pytest.raises(ConnectionLost, match="refused"):
        dropped = _failing([ConnectionLost("d", None, "drop")])
        call_with_retry(dropped, 3, 0, 0, None, lambda s: None, device=device)
    assert device.reconnects == 2


def test_attempts_below_one_is_a_programming_error():
    with pytest.raises(ValueError):
        call_with_retry(lambda: 1, 0)


@pytest.fixture
def rig():
    made = Rig()
    yield made
    made.close()


@pytest.mark.parametrize("family", FAMILIES)
def test_a_reading_survives_a_dropped_connection_through_the_real_transport(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server)
    meter.read_power_w(0.01)
    server.faults.drop_next = True
    value = call_with_retry(
        lambda: meter.read_power_w(0.01), 3, 0.01, 0.1, None, lambda s: None, device=meter
    )
    assert value == pytest.approx(1.01e-4, rel=1e-6)


@pytest.mark.parametrize("family", FAMILIES)
def test_a_silent_instrument_exhausts_the_attempts_through_the_real_transport(rig, family):
    server = rig.server("powermeter")
    meter = rig.device(family, "power_meter", server, {"timeout_s": 0.1})
    server.faults.mute = True
    retried = []
    with pytest.raises(InstrumentTimeout):
        call_with_retry(
            lambda: meter.read_power_w(0.01),
            3,
            0.01,
            0.1,
            lambda n, e, d: retried.append(n),
            lambda s: None,
            device=meter,
        )
    assert retried == [1, 2]
