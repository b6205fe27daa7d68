"""The line transport abstraction that message-based drivers talk through, and its error wording."""

from __future__ import annotations

from abc import ABC, abstractmethod

from lightloom.drivers.errors import BadReply, ConnectionLost, InstrumentTimeout

CONNECTION_HINT = "check the cable/address; is the instrument on?"
TIMEOUT_HINT = (
    "is the instrument on and busy with nothing else? check the command template in "
    "options.commands, the terminations and options.timeout_s"
)
DECODE_HINT = "check options.encoding and the line settings (baud rate, parity)"


class LineTransport(ABC):
    """A text session with one instrument: one command per line, one reply line per query.

    Every failure leaves as a typed error naming the device and the command:
    InstrumentTimeout (no complete reply in time), BadReply (bytes that do not decode) or
    ConnectionLost (cannot open, refused, dropped). A session that failed stays failed until
    ``reconnect()``, which opens a fresh one.
    """

    def __init__(self, device: str, address: str) -> None:
        self.device = device
        self.address = address

    @property
    @abstractmethod
    def is_open(self) -> bool:
        """Whether a session is open (it may still have been dropped by the other end)."""

    @abstractmethod
    def open(self) -> None:
        """Open a session if none is open. Raises ConnectionLost."""

    @abstractmethod
    def close(self) -> None:
        """Close the session. Idempotent; never raises."""

    def reconnect(self) -> None:
        """Close and open a fresh session, with every setting applied anew."""
        self.close()
        self.open()

    @abstractmethod
    def write_line(self, command: str) -> None:
        """Send ``command`` followed by the write termination."""

    @abstractmethod
    def query_line(self, command: str, timeout_s: float | None = None) -> str:
        """Send ``command`` and return the reply line, termination and blanks stripped.

        ``timeout_s`` overrides the configured timeout for this reply (long integrations).
        """

    def _lost(self, command: str | None, error: BaseException) -> ConnectionLost:
        return ConnectionLost(
            self.device,
            command,
            f"connection to {self.address} failed: {error or type(error).__name__}",
            CONNECTION_HINT,
        )

    def _not_open(self, command: str | None) -> ConnectionLost:
        return ConnectionLost(
            self.device,
            command,
            f"no open session to {self.address}",
            "connect() or reconnect() the device first",
        )

    def _timeout(self, command: str, timeout_s: float, partial: bytes = b"") -> InstrumentTimeout:
        got = f"; got only {partial!r} without the read termination" if partial else ""
        return InstrumentTimeout(
            self.device, command, f"no reply within {timeout_s:g} s{got}", TIMEOUT_HINT
        )

    def _undecodable(self, command: str, raw: bytes, encoding: str) -> BadReply:
        return BadReply(
            self.device, command, f"reply {raw!r} is not valid {encoding} text", DECODE_HINT
        )
