"""Typed instrument errors: each names the device, the command and what to check."""

from __future__ import annotations


class InstrumentError(Exception):
    """Base of all instrument errors. ``transient`` errors may succeed when retried."""

    transient: bool = False

    def __init__(self, device: str, command: str | None, message: str, hint: str = "") -> None:
        self.device = device
        self.command = command
        self.message = message
        self.hint = hint
        where = f"device '{device}'" + (f", command {command!r}" if command else "")
        text = f"{where}: {message}"
        if hint:
            text += f" ({hint})"
        super().__init__(text)


class InstrumentTimeout(InstrumentError):
    """The instrument did not answer in time."""

    transient = True


class BadReply(InstrumentError):
    """The instrument answered something that cannot be parsed."""

    transient = True


class ConnectionLost(InstrumentError):
    """The connection to the instrument failed or dropped."""

    transient = True


class LimitViolation(InstrumentError):
    """A requested move or setting outside the configured travel or range limits."""


class DeviceFault(InstrumentError):
    """The instrument reports a fault it cannot recover from (stuck axis, error queue entry)."""


class IdentityMismatch(InstrumentError):
    """The ``*IDN?`` answer does not match what the bench expects."""


class NotSupported(InstrumentError):
    """The device cannot do what was asked: its bench configuration gives no command for it."""
