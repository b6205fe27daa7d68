"""Line transport over VISA (pyvisa; the pure-Python pyvisa-py backend ``@py`` by default)."""

from __future__ import annotations

import select
import socket
from typing import Any

import pyvisa
from pyvisa import constants
from pyvisa.errors import Error as VisaError
from pyvisa.errors import VisaIOError

from lightloom.drivers.errors import InstrumentError
from lightloom.drivers.options import LineSettings
from lightloom.drivers.serial_transport import close_port_quickly
from lightloom.drivers.transport import LineTransport

_PARITY = {
    "none": constants.Parity.none,
    "even": constants.Parity.even,
    "odd": constants.Parity.odd,
    "mark": constants.Parity.mark,
    "space": constants.Parity.space,
}
_STOP_BITS = {
    1: constants.StopBits.one,
    1.5: constants.StopBits.one_and_a_half,
    2: constants.StopBits.two,
}
_FLOW = {
    "none": constants.ControlFlow.none,
    "xonxoff": constants.ControlFlow.xon_xoff,
    "rtscts": constants.ControlFlow.rts_cts,
    "dsrdtr": constants.ControlFlow.dtr_dsr,
}


def check_resource_name(address: str) -> None:
    """Raise ValueError with pyvisa's explanation when ``address`` is not a VISA resource name."""
    try:
        pyvisa.rname.parse_resource_name(address)
    except pyvisa.rname.InvalidResourceName as error:
        raise ValueError(str(error).strip()) from None


class VisaTransport(LineTransport):
    """One VISA session; ``reconnect`` opens a fresh resource because re-opening an old one
    does not re-apply its settings (terminations, timeout)."""

    def __init__(self, device: str, address: str, settings: LineSettings) -> None:
        super().__init__(device, address)
        self.settings = settings
        self._resource: Any = None
        self._timeout_ms: float | None = None

    @property
    def is_open(self) -> bool:
        return self._resource is not None

    def open(self) -> None:
        if self._resource is not None:
            return
        library = self.settings.visa_library
        try:
            manager = pyvisa.ResourceManager(library)
        except (OSError, ValueError, VisaError) as error:
            raise InstrumentError(
                self.device,
                None,
                f"cannot load the VISA library {library!r}: {error}",
                "install it, or set options.visa_library ('@py' is the pure-Python backend)",
            ) from error
        timeout_ms = self.settings.timeout_s * 1000.0
        try:
            resource = manager.open_resource(
                self.address,
                read_termination=self.settings.read_termination,
                write_termination=self.settings.write_termination,
                timeout=timeout_ms,
                open_timeout=int(timeout_ms),
                encoding=self.settings.encoding,
            )
            self._apply_line_settings(resource)
            _disable_nagle(resource)
        # pyvisa-py reports some failures to connect as a bare Exception from its sessions.
        except Exception as error:
            raise self._lost(None, error) from error
        self._resource = resource
        self._timeout_ms = timeout_ms

    def _apply_line_settings(self, resource: Any) -> None:
        if resource.interface_type != constants.InterfaceType.asrl:
            return
        s = self.settings
        if s.baud_rate is not None:
            resource.baud_rate = s.baud_rate
        if s.data_bits is not None:
            resource.data_bits = s.data_bits
        if s.parity is not None:
            resource.parity = _PARITY[s.parity]
        if s.stop_bits is not None:
            resource.stop_bits = _STOP_BITS[s.stop_bits]
        if s.flow_control is not None:
            resource.flow_control = _FLOW[s.flow_control]

    def close(self) -> None:
        resource, self._resource = self._resource, None
        if resource is not None:
            try:
                interface = _session_interface(resource)
                if isinstance(getattr(interface, "_socket", None), socket.socket):
                    close_port_quickly(interface)
                resource.close()
            except Exception:  # a dead session may fail to close in any way; it is gone either way
                pass

    def write_line(self, command: str) -> None:
        resource = self._checked(command)
        data = (command + self.settings.write_termination).encode(self.settings.encoding)
        try:
            resource.write_raw(data)
        except (VisaError, OSError) as error:
            raise self._lost(command, error) from error

    def query_line(self, command: str, timeout_s: float | None = None) -> str:
        self.write_line(command)
        resource = self._resource
        wait_s = self.settings.timeout_s if timeout_s is None else timeout_s
        try:
            if wait_s * 1000.0 != self._timeout_ms:
                resource.timeout = wait_s * 1000.0
                self._timeout_ms = wait_s * 1000.0
            raw = resource.read_raw()
        except VisaIOError as error:
            if error.error_code == constants.StatusCode.error_timeout:
                if _peer_closed(resource):
                    raise self._lost(command, ConnectionResetError("closed by the instrument"))
                raise self._timeout(command, wait_s) from error
            raise self._lost(command, error) from error
        except (VisaError, OSError) as error:
            raise self._lost(command, error) from error
        try:
            text = raw.decode(self.settings.encoding)
        except UnicodeDecodeError:
            raise self._undecodable(command, raw, self.settings.encoding) from None
        termination = self.settings.read_termination
        if text.endswith(termination):
            text = text[: -len(termination)]
        return text.strip()

    def _checked(self, command: str) -> Any:
        resource = self._resource
        if resource is None:
            raise self._not_open(command)
        # pyvisa-py keeps reading a socket closed by the other end until the timeout, so a
        # dropped link would cost a full timeout and then look like a silent instrument.
        if _peer_closed(resource):
            raise self._lost(command, ConnectionResetError("closed by the instrument"))
        return resource


def _session_interface(resource: Any) -> Any:
    """What a pyvisa-py session talks through (a socket, a pyserial port); None elsewhere."""
    sessions = getattr(getattr(resource, "visalib", None), "sessions", None)
    if not isinstance(sessions, dict):
        return None
    try:
        return getattr(sessions.get(resource.session), "interface", None)
    except VisaError:
        return None


def _session_socket(resource: Any) -> socket.socket | None:
    """The TCP socket under a pyvisa-py session: a SOCKET resource's own, or the one inside a
    pyserial ``socket://`` port of an ``ASRLsocket://`` resource; None for anything else."""
    interface = _session_interface(resource)
    if not isinstance(interface, socket.socket):
        interface = getattr(interface, "_socket", None)
    return interface if isinstance(interface, socket.socket) else None


def _disable_nagle(resource: Any) -> None:
    """Send each line at once. With Nagle's algorithm a query right after a write waits for the
    instrument's delayed ACK (about 40 ms on Linux); pyvisa-py 0.8 leaves it on and refuses
    VI_ATTR_TCPIP_NODELAY, so the option is set on its socket."""
    sock = _session_socket(resource)
    if sock is not None:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        return
    if resource.interface_type != constants.InterfaceType.tcpip:
        return
    try:
        resource.set_visa_attribute(constants.ResourceAttribute.tcpip_nodelay, constants.VI_TRUE)
    except Exception:  # libraries without the attribute already send at once or cannot be told
        pass


def _peer_closed(resource: Any) -> bool:
    """Whether the TCP socket under a pyvisa-py SOCKET session was closed by the other end.

    Other libraries and interfaces hide their sockets; for them this says False.
    """
    try:
        resource.session
    except VisaError:
        return True
    sock = _session_socket(resource)
    if sock is None:
        return False
    try:
        readable, _, _ = select.select([sock], [], [], 0)
        if not readable:
            return False
        return sock.recv(1, socket.MSG_PEEK) == b""
    except (OSError, ValueError):
        return True
