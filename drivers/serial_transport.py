"""Line transport over serial lines with pyserial: COM ports, /dev/tty*, and URLs (socket://)."""

from __future__ import annotations

import socket
from typing import Any

import serial

from lightloom.drivers.errors import InstrumentTimeout
from lightloom.drivers.options import LineSettings
from lightloom.drivers.transport import LineTransport

_PARITY = {
    "none": serial.PARITY_NONE,
    "even": serial.PARITY_EVEN,
    "odd": serial.PARITY_ODD,
    "mark": serial.PARITY_MARK,
    "space": serial.PARITY_SPACE,
}
_STOP_BITS = {1: serial.STOPBITS_ONE, 1.5: serial.STOPBITS_ONE_POINT_FIVE, 2: serial.STOPBITS_TWO}


class SerialTransport(LineTransport):
    """One pyserial port. A read that times out returns a partial line rather than raising, so
    the termination is checked; after a timeout, whatever arrived late is discarded before the
    next command so that replies stay paired with their queries."""

    def __init__(self, device: str, address: str, settings: LineSettings) -> None:
        super().__init__(device, address)
        self.settings = settings
        self._port: Any = None
        self._timeout_s: float | None = None
        self._out_of_step = False

    @property
    def is_open(self) -> bool:
        return self._port is not None

    def open(self) -> None:
        if self._port is not None:
            return
        s = self.settings
        flow = s.flow_control or "none"
        try:
            port = serial.serial_for_url(
                self.address,
                baudrate=s.baud_rate or 9600,
                bytesize=s.data_bits or 8,
                parity=_PARITY[s.parity or "none"],
                stopbits=_STOP_BITS[s.stop_bits or 1],
                xonxoff=flow == "xonxoff",
                rtscts=flow == "rtscts",
                dsrdtr=flow == "dsrdtr",
                timeout=s.timeout_s,
                write_timeout=s.timeout_s,
            )
        except (serial.SerialException, OSError, ValueError) as error:
            raise self._lost(None, error) from error
        _disable_nagle(port)
        self._port = port
        self._timeout_s = s.timeout_s
        self._out_of_step = False

    def close(self) -> None:
        port, self._port = self._port, None
        if port is not None:
            close_port_quickly(port)

    def write_line(self, command: str) -> None:
        port = self._port
        if port is None:
            raise self._not_open(command)
        data = (command + self.settings.write_termination).encode(self.settings.encoding)
        try:
            if self._out_of_step:
                port.reset_input_buffer()
                self._out_of_step = False
            port.write(data)
        except serial.SerialTimeoutException as error:
            raise InstrumentTimeout(
                self.device,
                command,
                f"could not send within {self.settings.timeout_s:g} s: {error}",
                "is the instrument holding the line (flow control)? check options.flow_control",
            ) from error
        except (serial.SerialException, OSError) as error:
            raise self._lost(command, error) from error

    def query_line(self, command: str, timeout_s: float | None = None) -> str:
        self.write_line(command)
        port = self._port
        wait_s = self.settings.timeout_s if timeout_s is None else timeout_s
        termination = self.settings.read_termination.encode(self.settings.encoding)
        try:
            if wait_s != self._timeout_s:
                port.timeout = wait_s
                self._timeout_s = wait_s
            raw = port.read_until(termination)
        except (serial.SerialException, OSError) as error:
            raise self._lost(command, error) from error
        if not raw.endswith(termination):
            self._out_of_step = True
            raise self._timeout(command, wait_s, raw)
        try:
            text = raw[: -len(termination)].decode(self.settings.encoding)
        except UnicodeDecodeError:
            raise self._undecodable(command, raw, self.settings.encoding) from None
        return text.strip()


def _disable_nagle(port: Any) -> None:
    """Send each line at once on socket:// URLs: with Nagle's algorithm a query right after a
    write waits for the instrument's delayed ACK (about 40 ms on Linux), and pyserial leaves it
    on. Other ports have no socket and nothing to do."""
    sock = getattr(port, "_socket", None)
    if isinstance(sock, socket.socket):
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


def close_port_quickly(port: Any) -> None:
    """Close a pyserial ``port`` without its 0.3 s pause after closing a socket:// URL.

    That pause only gives a server time before a quick re-open; a reconnect here opens a new
    connection anyway, and the pause would add 0.3 s to every recovery.
    """
    sock = getattr(port, "_socket", None)
    try:
        if sock is not None:
            port._socket = None
            port.is_open = False
            sock.close()
        else:
            port.close()
    except Exception:  # a dropped port may fail to close in any way; it is gone either way
        pass
