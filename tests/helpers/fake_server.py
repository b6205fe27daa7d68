"""A small loopback line server speaking the simulated instruments' SCPI-style set, with faults."""

from __future__ import annotations

import socket
import threading
import time
from dataclasses import dataclass, field


@dataclass
class FaultPlan:
    """What the server does wrong. Counters count down once per received command."""

    mute: bool = False
    garble_next: int = 0
    garble_with: bytes | None = None
    drop_next: bool = False


class FakeInstrument:
    """Simple state for one instrument of one kind; ``handle`` returns the reply or None."""

    def __init__(
        self,
        kind: str,
        name: str = "fake",
        busy_s: float = 0.05,
        limits_deg: tuple[float, float] = (-170.0, 170.0),
        power_base_w: float = 1.0e-4,
        power_ramp_w: float = 1.0e-6,
        power_reply_scale: float = 1.0,
        counts_base: int = 1000,
        counts_ramp: int = 10,
        position_format: str = "{:.4f}",
        idn: str | None = None,
    ) -> None:
        self.kind = kind
        self.idn = idn or f"lightloom,SIM-{kind.upper()},{name},0.1"
        self.busy_s = busy_s
        self.limits_deg = limits_deg
        self.position_format = position_format
        self.errors: list[str] = []
        self.position_deg = 0.0
        self.target_deg = 0.0
        self.busy_until = 0.0
        self.state = "out"
        self.shutter_open = False
        self.integration_s = 0.1
        self.wavelength_nm = 800.0
        self.range_w: float | None = None
        self.zeroed = False
        self.power_base_w = power_base_w
        self.power_ramp_w = power_ramp_w
        self.power_reply_scale = power_reply_scale
        self.counts_base = counts_base
        self.counts_ramp = counts_ramp
        self.gate_s = 0.1
        self.readings = 0

    def _busy(self) -> bool:
        if time.monotonic() >= self.busy_until:
            self.position_deg = self.target_deg
            return False
        return True

    def _start_motion(self) -> None:
        self.busy_until = time.monotonic() + self.busy_s

    def _number(self, text: str) -> float | None:
        try:
            return float(text)
        except ValueError:
            self.errors.append('-224,"Illegal parameter value"')
            return None

    def handle(self, line: str) -> str | None:
        header, _, arg = line.strip().partition(" ")
        header = header.upper()
        arg = arg.strip()
        if header == "*IDN?":
            return self.idn
        if header in ("*RST", "*CLS"):
            if header == "*CLS":
                self.errors.clear()
            return None
        if header == "*OPC?":
            while self._busy():
                time.sleep(0.002)
            return "1"
        if header == "SYST:ERR?":
            return self.errors.pop(0) if self.errors else '0,"No error"'
        reply = getattr(self, f"_{self.kind}")(header, arg)
        if reply is _UNKNOWN:
            self.errors.append('-113,"Undefined header"')
            return None
        return reply

    def _stage(self, header: str, arg: str) -> str | None | object:
        if header == "ANGL":
            value = self._number(arg)
            if value is None:
                return None
            low, high = self.limits_deg
            if not low <= value <= high:
                self.errors.append('-222,"Data out of range"')
                return None
            self._busy()
            self.target_deg = value
            self._start_motion()
            return None
        if header == "ANGL?":
            self._busy()
            return self.position_format.format(self.position_deg)
        if header == "BUSY?":
            return "1" if self._busy() else "0"
        if header == "HOME":
            self.target_deg = 0.0
            self._start_motion()
            return None
        if header == "LIM?":
            return f"{self.limits_deg[0]:g},{self.limits_deg[1]:g}"
        if header == "SPD?":
            return "20"
        return _UNKNOWN

    def _actuator(self, header: str, arg: str) -> str | None | object:
        if header == "STATE":
            if arg not in ("in", "out"):
                self.errors.append('-224,"Illegal parameter value"')
                return None
            self.state = arg
            self._start_motion()
            return None
        if header == "STATE?":
            return self.state
        if header == "BUSY?":
            return "1" if self._busy() else "0"
        if header == "STATES?":
            return "in,out"
        return _UNKNOWN

    def _shutter(self, header: str, arg: str) -> str | None | object:
        if header == "SHUT":
            if arg.upper() not in ("OPEN", "CLOSE"):
                self.errors.append('-224,"Illegal parameter value"')
                return None
            self.shutter_open = arg.upper() == "OPEN"
            return None
        if header == "SHUT?":
            return "OPEN" if self.shutter_open else "CLOSED"
        return _UNKNOWN

    def _powermeter(self, header: str, arg: str) -> str | None | object:
        if header == "INT":
            value = self._number(arg)
            if value is not None:
                self.integration_s = value
            return None
        if header == "INT?":
            return f"{self.integration_s:g}"
        if header == "WAV":
            value = self._number(arg)
            if value is not None:
                self.wavelength_nm = value
            return None
        if header == "WAV?":
            return f"{self.wavelength_nm:g}"
        if header == "RANGE":
            if arg.upper() == "AUTO":
                self.range_w = None
            else:
                self.range_w = self._number(arg)
            return None
        if header == "ZERO":
            self.zeroed = True
            return None
        if header == "MEAS?":
            time.sleep(self.integration_s)
            value = self.power_base_w + self.power_ramp_w * self.readings
            self.readings += 1
            return f"{value * self.power_reply_scale:.6e}"
        return _UNKNOWN

    def _counter(self, header: str, arg: str) -> str | None | object:
        if header == "GATE":
            value = self._number(arg)
            if value is not None:
                self.gate_s = value
            return None
        if header == "GATE?":
            return f"{self.gate_s:g}"
        if header == "COUNT?":
            time.sleep(self.gate_s)
            value = self.counts_base + self.counts_ramp * self.readings
            self.readings += 1
            return str(value)
        return _UNKNOWN


_UNKNOWN = object()


@dataclass
class FakeLineServer:
    """A TCP line server on 127.0.0.1 for one instrument; one thread per connection.

    ``stop()`` closes the listener and every connection (the instrument went away);
    ``start()`` listens again on the same port (it came back).
    """

    instrument: FakeInstrument
    port: int = 0
    faults: FaultPlan = field(default_factory=FaultPlan)
    received: list[str] = field(default_factory=list)

    def __post_init__(self) -> None:
        self._lock = threading.Lock()
        self._listener: socket.socket | None = None
        self._placeholder: socket.socket | None = None
        self._connections: list[socket.socket] = []
        self._threads: list[threading.Thread] = []

    def start(self) -> "FakeLineServer":
        listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(8)
        self.port = listener.getsockname()[1]
        self._listener = listener
        if self._placeholder is not None:
            self._placeholder.close()
            self._placeholder = None
        thread = threading.Thread(target=self._accept_loop, args=(listener,), daemon=True)
        thread.start()
        self._threads.append(thread)
        return self

    def stop(self) -> None:
        """Stop serving. The port stays bound, not listening (connections are refused), so that
        no other test's server takes it before ``start()`` listens on it again."""
        listener, self._listener = self._listener, None
        if listener is not None:
            if self._placeholder is None:
                placeholder = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
                placeholder.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
                self._placeholder = placeholder
            _close_socket(listener)
            self._placeholder.bind(("127.0.0.1", self.port))
        with self._lock:
            connections, self._connections = self._connections, []
        for connection in connections:
            _close_socket(connection)

    def shutdown(self) -> None:
        """Stop serving and release the port."""
        self.stop()
        if self._placeholder is not None:
            self._placeholder.close()
            self._placeholder = None

    def drop_connections(self) -> None:
        """Close every open connection but keep listening."""
        with self._lock:
            connections, self._connections = self._connections, []
        for connection in connections:
            _close_socket(connection)

    def commands(self, header: str) -> list[str]:
        """The received command lines whose header is ``header``."""
        with self._lock:
            return [c for c in self.received if c.split(" ")[0] == header]

    def _accept_loop(self, listener: socket.socket) -> None:
        while True:
            try:
                connection, _ = listener.accept()
            except OSError:
                return
            connection.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            with self._lock:
                self._connections.append(connection)
            thread = threading.Thread(target=self._serve, args=(connection,), daemon=True)
            thread.start()

    def _serve(self, connection: socket.socket) -> None:
        buffer = b""
        while True:
            try:
                chunk = connection.recv(4096)
            except OSError:
                return
            if not chunk:
                _close_socket(connection)
                return
            buffer += chunk
            while b"\n" in buffer:
                raw, buffer = buffer.split(b"\n", 1)
                line = raw.rstrip(b"\r").decode("ascii", "replace")
                if not self._answer(connection, line):
                    return

    def _answer(self, connection: socket.socket, line: str) -> bool:
        with self._lock:
            self.received.append(line)
            if self.faults.drop_next:
                self.faults.drop_next = False
                drop = True
            else:
                drop = False
        if drop:
            with self._lock:
                if connection in self._connections:
                    self._connections.remove(connection)
            _close_socket(connection)
            return False
        reply = self.instrument.handle(line)
        if reply is None or self.faults.mute:
            return True
        data = reply.encode("ascii")
        with self._lock:
            if self.faults.garble_next > 0:
                self.faults.garble_next -= 1
                garbled = self.faults.garble_with
                data = b"\x15#?" + data[::-1] + b"~" if garbled is None else garbled
        try:
            connection.sendall(data + b"\n")
        except OSError:
            return False
        return True


def _close_socket(sock: socket.socket) -> None:
    try:
        sock.shutdown(socket.SHUT_RDWR)
    except OSError:
        pass
    sock.close()


FAMILIES = ("visa", "serial")


def address_for(family: str, port: int) -> str:
    """How each driver family reaches a loopback server: pyvisa-py's SOCKET resource, pyserial's
    socket:// URL, or pyvisa-py's serial path to the same socket."""
    if family == "visa":
        return f"TCPIP::127.0.0.1::{port}::SOCKET"
    if family == "serial":
        return f"socket://127.0.0.1:{port}"
    if family == "visa-asrl":
        return f"ASRLsocket://127.0.0.1:{port}::INSTR"
    raise ValueError(family)


def driver_for(family: str, kind: str) -> str:
    return f"{'visa' if family.startswith('visa') else 'serial'}.{kind}"


class Rig:
    """Servers and devices made by one test, all closed at its end."""

    def __init__(self) -> None:
        self.servers: list[FakeLineServer] = []
        self.devices: list = []

    def server(self, kind: str, **instrument_options) -> FakeLineServer:
        server = FakeLineServer(FakeInstrument(kind, **instrument_options)).start()
        self.servers.append(server)
        return server

    def device(
        self,
        family: str,
        kind: str,
        server: FakeLineServer,
        options: dict | None = None,
        limits: dict | None = None,
        name: str = "dev",
    ):
        from lightloom.drivers.registry import create_device

        merged = {"timeout_s": 0.3, **(options or {})}
        device = create_device(
            name, driver_for(family, kind), address_for(family, server.port), merged, limits
        )
        self.devices.append(device)
        return device

    def close(self) -> None:
        for device in self.devices:
            device.close()
        for server in self.servers:
            server.shutdown()
