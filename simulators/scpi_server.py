"""Loopback SCPI-style server: each simulated device on its own 127.0.0.1 TCP port, with served faults and a command log.

The default command set is IEEE 488.2 common commands plus device commands of our own (the
drivers' default templates, drivers/options.py DEFAULT_COMMANDS); a device given a dialect
(simulators/dialects.py) speaks that instead, with its own line ending. Default lines end with
"\\n" (a trailing "\\r" is stripped); one command per line; headers are case-insensitive. Unknown
headers push -113, bad or out-of-range arguments -222, a device fault -240; a command with an error
sends no reply. The error queue holds 16 entries; when it is full
the newest is replaced by -350 (IEEE 488.2 / SCPI-99 queue rules, from memory).

Served link faults: ``timeout`` swallows a query (it is not executed, no reply), ``garbled``
executes a query and sends a corrupted reply, ``drop`` closes the connection without executing
the command (the server keeps listening and the next connection works). A write has no reply to
lose or garble, so only ``drop`` hits writes on the wire.
"""

from __future__ import annotations

import json
import math
import selectors
import socket
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable, Mapping, NamedTuple

from lightloom.drivers.errors import DeviceFault, InstrumentError, LimitViolation
from lightloom.simulators.devices import ACTUATOR, COUNTER, POWERMETER, SHUTTER, STAGE, SimDevice
from lightloom.simulators.dialects import Dialect, DialectInstrument
from lightloom.simulators.faults import FaultInjector, garble_reply

LOOPBACK_HOST = "127.0.0.1"

ERROR_TEXT: dict[int, str] = {
    0: "No error",
    -113: "Undefined header",
    -222: "Data out of range",
    -240: "Hardware error",
    -350: "Queue overflow",
}

ERROR_QUEUE_LENGTH = 16
_MAX_LINE_BYTES = 65536
_OPC_POLL_WALL_S = 0.05


class NonLoopbackHost(ValueError):
    """A bind address other than 127.0.0.1 was requested for the simulated instruments."""


class PortUnavailable(OSError):
    """A listening port for a simulated instrument could not be bound."""


class ServedAddress(NamedTuple):
    """Where one simulated instrument listens: TCP port, VISA resource name, pyserial URL."""

    tcp_port: int
    visa_address: str
    serial_url: str


@dataclass(frozen=True)
class CommandResult:
    """The outcome of one command: the reply line (None for none) and the error code it pushed."""

    reply: str | None
    error: int | None = None


class _ScpiError(Exception):
    def __init__(self, code: int, detail: str = "") -> None:
        super().__init__(detail)
        self.code = code
        self.detail = detail


def _no_argument(arg: str) -> None:
    if arg:
        raise _ScpiError(-222, "no parameter expected")


def _real(arg: str) -> float:
    try:
        value = float(arg)
    except ValueError:
        raise _ScpiError(-222, f"not a number: {arg!r}") from None
    if not math.isfinite(value):
        raise _ScpiError(-222, f"not a finite number: {arg!r}")
    return value


def _fmt(value: float) -> str:
    return f"{value:.10g}"


Handler = Callable[[str], "str | None"]


def _query(read: Callable[[], str]) -> Handler:
    def handler(arg: str) -> str:
        _no_argument(arg)
        return read()

    return handler


def _action(act: Callable[[], object]) -> Handler:
    def handler(arg: str) -> None:
        _no_argument(arg)
        act()

    return handler


def _number_setter(apply: Callable[[float], object]) -> Handler:
    def handler(arg: str) -> None:
        apply(_real(arg))

    return handler


def _word_setter(apply: Callable[[str], object]) -> Handler:
    def handler(arg: str) -> None:
        if not arg or len(arg.split()) != 1:
            raise _ScpiError(-222, f"expected one word, got {arg!r}")
        apply(arg)

    return handler


class ScpiInstrument:
    """The SCPI command interpreter of one simulated device, with its error queue.

    Parameters
    ----------
    device : SimDevice
        The device the commands act on (its ``kind`` selects the command set).
    opc_timeout_s : float
        Virtual seconds ``*OPC?`` waits for a pending operation before giving up with no reply
        (and -240 in the queue), as an instrument whose axis never arrives would.
    """

    def __init__(self, device: SimDevice, *, opc_timeout_s: float = 60.0) -> None:
        self.device = device
        self.opc_timeout_s = float(opc_timeout_s)
        self.lock = threading.Lock()
        self._errors: list[tuple[int, str]] = []
        self._commands = self._command_table()

    # error queue
    def push_error(self, code: int, detail: str = "") -> None:
        """Append an error; a full queue keeps its oldest entries and ends in -350."""
        text = ERROR_TEXT.get(code, "Error") + (f";{detail}" if detail else "")
        if len(self._errors) >= ERROR_QUEUE_LENGTH:
            self._errors[-1] = (-350, ERROR_TEXT[-350])
            return
        self._errors.append((code, text))

    def pop_error(self) -> str:
        """The oldest error as ``code,"text"`` (``0,"No error"`` when empty)."""
        code, text = self._errors.pop(0) if self._errors else (0, ERROR_TEXT[0])
        return f'{code},"{text}"'

    @property
    def error_codes(self) -> tuple[int, ...]:
        """Codes waiting in the error queue, oldest first."""
        return tuple(code for code, _ in self._errors)

    def is_query(self, line: str) -> bool:
        """Whether ``line`` asks for a reply (its header ends in "?")."""
        parts = line.split(None, 1)
        return bool(parts) and parts[0].endswith("?")

    # execution
    def execute(self, line: str, stop: threading.Event | None = None) -> CommandResult:
        """Run one command line; errors go to the queue and give no reply."""
        parts = line.strip().split(None, 1)
        if not parts:
            return CommandResult(None)
        header = parts[0].upper()
        arg = parts[1].strip() if len(parts) > 1 else ""
        handler = self._commands.get(header)
        try:
            if handler is None:
                raise _ScpiError(-113, parts[0][:40])
            if header == "*OPC?":
                _no_argument(arg)
                return CommandResult(self._wait_complete(stop))
            return CommandResult(handler(arg))
        except _ScpiError as exc:
            self.push_error(exc.code, exc.detail)
            return CommandResult(None, exc.code)
        except (LimitViolation, ValueError) as exc:
            self.push_error(-222, _short(exc))
            return CommandResult(None, -222)
        except (DeviceFault, InstrumentError) as exc:
            self.push_error(-240, _short(exc))
            return CommandResult(None, -240)

    def _wait_complete(self, stop: threading.Event | None) -> str | None:
        clock = self.device.clock
        start = clock.now()
        while True:
            remaining = self.device.pending_s()
            if remaining <= 0.0:
                return "1"
            waited = clock.now() - start
            if waited >= self.opc_timeout_s or (stop is not None and stop.is_set()):
                self.push_error(-240, f"operation not complete after {waited:g} s")
                return None
            step = min(remaining, self.opc_timeout_s - waited)
            if clock.time_scale > 0:
                step = min(step, _OPC_POLL_WALL_S / clock.time_scale)
            clock.sleep(step)

    # command tables
    def _command_table(self) -> dict[str, Handler]:
        dev: Any = self.device
        table: dict[str, Handler] = {
            "*IDN?": _query(dev.identity),
            "*RST": _action(dev.reset),
            "*CLS": _action(self._errors.clear),
            "*OPC?": _query(lambda: "1"),  # execute() answers it through _wait_complete
            "SYST:ERR?": _query(self.pop_error),
        }
        kind = dev.kind
        if kind == STAGE:
            table.update({
                "ANGL": _number_setter(dev.move_to_deg),
                "ANGL?": _query(lambda: f"{dev.position_deg():.6f}"),
                "BUSY?": _query(lambda: "1" if dev.is_busy() else "0"),
                "HOME": _action(dev.start_home),
                "LIM?": _query(lambda: ",".join(_fmt(x) for x in dev.limits_deg)),
                "SPD?": _query(lambda: _fmt(dev.speed_deg_per_s)),
            })
        elif kind == ACTUATOR:
            table.update({
                "STATE": _word_setter(dev.set_state),
                "STATE?": _query(dev.state),
                "BUSY?": _query(lambda: "1" if dev.is_busy() else "0"),
                "STATES?": _query(lambda: ",".join(dev.states)),
            })
        elif kind == SHUTTER:
            table.update({
                "SHUT": _word_setter(self._shutter),
                "SHUT?": _query(lambda: "OPEN" if dev.is_open() else "CLOSED"),
            })
        elif kind == POWERMETER:
            table.update({
                "INT": _number_setter(dev.set_integration_s),
                "INT?": _query(lambda: _fmt(dev.integration_s)),
                "WAV": _number_setter(dev.set_wavelength_nm),
                "WAV?": _query(lambda: _fmt(dev.wavelength_nm)),
                "RANGE": _word_setter(lambda word: dev.set_range_w(None if word.upper() == "AUTO" else _real(word))),
                "ZERO": _action(dev.zero),
                "MEAS?": _query(lambda: f"{dev.measure_w():.6e}"),
            })
        elif kind == COUNTER:
            table.update({
                "GATE": _number_setter(dev.set_gate_s),
                "GATE?": _query(lambda: _fmt(dev.gate_s)),
                "COUNT?": _query(lambda: str(dev.count())),
            })
        else:
            raise ValueError(f"device {dev.name!r} has kind {kind!r}, which the SCPI server does not serve")
        return table

    def _shutter(self, word: str) -> None:
        dev: Any = self.device
        if word.upper() == "OPEN":
            dev.open()
        elif word.upper() == "CLOSE":
            dev.close_beam()
        else:
            raise _ScpiError(-222, f"SHUT takes OPEN or CLOSE, got {word!r}")


def _short(exc: Exception) -> str:
    text = exc.message if isinstance(exc, InstrumentError) else str(exc)
    return " ".join(text.split()).replace('"', "'")[:120]


class _CommandLog:
    """JSON-lines log of received commands, flushed per line so it survives a crash of the server."""

    def __init__(self, path: Path) -> None:
        self._file = open(path, "a", encoding="utf-8")
        self._lock = threading.Lock()

    def write(self, record: dict[str, object]) -> None:
        line = json.dumps(record, separators=(",", ":")) + "\n"
        with self._lock:
            if not self._file.closed:
                self._file.write(line)
                self._file.flush()

    def close(self) -> None:
        with self._lock:
            self._file.close()


class LoopbackServer:
    """Serves simulated devices on 127.0.0.1, one listening TCP port per device, one thread per connection.

    Parameters
    ----------
    devices : iterable of SimDevice, or mapping name -> SimDevice
        The devices to serve (names unique); how they were built does not matter.
    host : str
        Must be ``"127.0.0.1"``: the simulated instruments have no authentication, so anything
        else raises NonLoopbackHost.
    base_port : int
        0 picks free ephemeral ports; otherwise device ``i`` (in the given order) listens on
        ``base_port + i``.
    ports : mapping name -> int, optional
        Explicit ports for some devices (override ``base_port``).
    log_path : path, optional
        Append a JSON-lines record per received command: ``t_wall`` (Unix s), ``t_virtual``
        (clock s at receipt), ``device``, ``command``, ``reply`` (null if none), and ``fault`` /
        ``error`` when a served fault fired or the command pushed an error.
    faults : FaultInjector, optional
        Link faults to enact on the wire; by default each device's own ``faults``.
    opc_timeout_s : float
        Virtual seconds ``*OPC?`` waits (see ScpiInstrument).
    command_latency_s : float
        Virtual seconds each executed command spends, as a real instrument does; it also lets a
        client that polls ``BUSY?`` on an instant clock see the move progress.

    Once started, the server keeps its ports: ``stop()`` then ``start()`` (or ``restart()``)
    listens on the same ones (SO_REUSEADDR), and the devices keep their state.
    """

    def __init__(
        self,
        devices: Iterable[SimDevice] | Mapping[str, SimDevice],
        host: str = LOOPBACK_HOST,
        base_port: int = 0,
        *,
        ports: Mapping[str, int] | None = None,
        log_path: str | Path | None = None,
        faults: FaultInjector | None = None,
        opc_timeout_s: float = 60.0,
        command_latency_s: float = 0.001,
        dialects: Mapping[str, Dialect] | None = None,
    ) -> None:
        if host != LOOPBACK_HOST:
            raise NonLoopbackHost(
                f"refusing to serve the simulated instruments on {host!r}: they have no authentication and "
                f"listen on {LOOPBACK_HOST} only; use host={LOOPBACK_HOST!r}"
            )
        items = list(devices.values()) if isinstance(devices, Mapping) else list(devices)
        self._devices: dict[str, SimDevice] = {}
        for device in items:
            if device.name in self._devices:
                raise ValueError(f"two devices are named {device.name!r}; each served device needs its own name")
            self._devices[device.name] = device
        if not self._devices:
            raise ValueError("no devices to serve")
        if not (isinstance(base_port, int) and 0 <= base_port and (base_port == 0 or base_port + len(items) - 1 <= 65535)):
            raise ValueError(f"base_port must be 0 (free ports) or a port with room for {len(items)} devices, got {base_port!r}")
        unknown = sorted(set(ports or {}) - set(self._devices))
        if unknown:
            raise ValueError(f"ports given for unknown device(s) {', '.join(unknown)}; devices: {', '.join(self._devices)}")
        self._ports: dict[str, int] = {
            name: (ports or {}).get(name, 0 if base_port == 0 else base_port + i) for i, name in enumerate(self._devices)
        }
        self._host = host
        self._log_path = None if log_path is None else Path(log_path)
        self._faults = faults
        self._latency_s = float(command_latency_s)
        unknown = sorted(set(dialects or {}) - set(self._devices))
        if unknown:
            raise ValueError(f"dialects given for unknown device(s) {', '.join(unknown)}; devices: {', '.join(self._devices)}")
        dialects = dialects or {}
        self._instruments: dict[str, ScpiInstrument | DialectInstrument] = {
            name: DialectInstrument(dev, dialects[name], opc_timeout_s=opc_timeout_s) if name in dialects
            else ScpiInstrument(dev, opc_timeout_s=opc_timeout_s)
            for name, dev in self._devices.items()
        }
        self._endings = {name: dialects[name].termination if name in dialects else "\n" for name in self._devices}
        self._stop = threading.Event()
        self._running = False
        self._listeners: dict[str, socket.socket] = {}
        self._accept_thread: threading.Thread | None = None
        self._wake_r: socket.socket | None = None
        self._wake_w: socket.socket | None = None
        self._connections: set[socket.socket] = set()
        self._threads: set[threading.Thread] = set()
        self._conn_lock = threading.Lock()
        self._log: _CommandLog | None = None
        self._bound_once = False

    # public API
    @property
    def running(self) -> bool:
        """Whether the server is listening."""
        return self._running

    @property
    def instruments(self) -> Mapping[str, "ScpiInstrument | DialectInstrument"]:
        """The command interpreter (with its error queue) of each device, by name."""
        return dict(self._instruments)

    def start(self) -> "LoopbackServer":
        """Bind every port on 127.0.0.1 and start serving; returns self."""
        if self._running:
            raise RuntimeError("the server is already running; stop() it first")
        listeners: dict[str, socket.socket] = {}
        try:
            for name, port in self._ports.items():
                listeners[name] = self._listen(name, port)
        except BaseException:
            for sock in listeners.values():
                sock.close()
            raise
        self._listeners = listeners
        for name, sock in listeners.items():
            self._ports[name] = sock.getsockname()[1]
        self._bound_once = True
        self._log = None if self._log_path is None else _CommandLog(self._log_path)
        self._stop.clear()
        self._wake_r, self._wake_w = socket.socketpair()
        self._accept_thread = threading.Thread(target=self._accept_loop, name="sim-scpi-accept", daemon=True)
        self._running = True
        self._accept_thread.start()
        return self

    def stop(self, join_timeout_s: float = 5.0) -> None:
        """Stop serving: close listeners and connections, join the threads. Idempotent."""
        if not self._running:
            return
        self._stop.set()
        if self._wake_w is not None:
            try:
                self._wake_w.send(b"x")
            except OSError:
                pass
        if self._accept_thread is not None:
            self._accept_thread.join(join_timeout_s)
        for sock in self._listeners.values():
            sock.close()
        self._listeners = {}
        with self._conn_lock:
            connections = list(self._connections)
            threads = list(self._threads)
        for conn in connections:
            try:
                conn.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
        deadline = time.monotonic() + join_timeout_s
        for thread in threads:
            thread.join(max(0.0, deadline - time.monotonic()))
        for sock in (self._wake_r, self._wake_w):
            if sock is not None:
                sock.close()
        self._wake_r = self._wake_w = None
        if self._log is not None:
            self._log.close()
            self._log = None
        self._running = False

    def restart(self) -> "LoopbackServer":
        """stop() then start() on the same ports."""
        self.stop()
        return self.start()

    def addresses(self) -> dict[str, ServedAddress]:
        """Per device: TCP port, VISA address ``TCPIP::127.0.0.1::PORT::SOCKET``, URL ``socket://127.0.0.1:PORT``."""
        if not self._bound_once:
            raise RuntimeError("the ports are chosen when the server starts: call start() first")
        return {
            name: ServedAddress(port, f"TCPIP::{self._host}::{port}::SOCKET", f"socket://{self._host}:{port}")
            for name, port in self._ports.items()
        }

    def listening_sockets(self) -> dict[str, tuple[str, int]]:
        """``getsockname()`` of each listening socket, by device name (empty when stopped)."""
        return {name: sock.getsockname() for name, sock in self._listeners.items()}

    def __enter__(self) -> "LoopbackServer":
        if not self._running:
            self.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.stop()

    # serving
    def _listen(self, name: str, port: int) -> socket.socket:
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            sock.bind((self._host, port))
            sock.listen(8)
        except OSError as exc:
            sock.close()
            raise PortUnavailable(
                exc.errno,
                f"cannot listen on {self._host}:{port} for device {name!r} ({exc.strerror}); "
                "free the port, or choose another base port (0 picks free ones)",
            ) from exc
        sock.setblocking(False)
        return sock

    def _accept_loop(self) -> None:
        selector = selectors.DefaultSelector()
        assert self._wake_r is not None
        selector.register(self._wake_r, selectors.EVENT_READ, None)
        for name, sock in self._listeners.items():
            selector.register(sock, selectors.EVENT_READ, name)
        try:
            while not self._stop.is_set():
                for key, _ in selector.select(timeout=1.0):
                    if key.data is None or self._stop.is_set():
                        continue
                    try:
                        conn, _addr = key.fileobj.accept()  # type: ignore[union-attr]
                    except (BlockingIOError, InterruptedError):
                        continue
                    except OSError:
                        if self._stop.is_set():
                            return
                        continue
                    self._spawn(key.data, conn)
        finally:
            selector.close()

    def _spawn(self, name: str, conn: socket.socket) -> None:
        conn.setblocking(True)
        conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        thread = threading.Thread(target=self._serve, args=(name, conn), name=f"sim-scpi-{name}", daemon=True)
        with self._conn_lock:
            self._connections.add(conn)
            self._threads.add(thread)
        thread.start()

    def _serve(self, name: str, conn: socket.socket) -> None:
        self._devices[name].connect()
        buffer = b""
        try:
            while not self._stop.is_set():
                try:
                    data = conn.recv(4096)
                except OSError:
                    return
                if not data:
                    return
                _quick_ack(conn)
                buffer += data
                # A line ends at "\n" ("\r\n" too, the "\r" stripped), or at "\r" for a device
                # whose dialect ends its lines with "\r" alone.
                end = b"\r" if self._endings[name] == "\r" else b"\n"
                while end in buffer:
                    raw, buffer = buffer.split(end, 1)
                    line = raw.decode("ascii", errors="replace").strip()
                    if line and not self._handle(name, conn, line):
                        return
                if len(buffer) > _MAX_LINE_BYTES:
                    return
        finally:
            _shutdown(conn)
            with self._conn_lock:
                self._connections.discard(conn)
                self._threads.discard(threading.current_thread())

    def _handle(self, name: str, conn: socket.socket, line: str) -> bool:
        """Serve one command line; False when the connection is to be closed."""
        device = self._devices[name]
        instrument = self._instruments[name]
        t_wall = time.time()
        t_virtual = device.clock.now()
        query = instrument.is_query(line)
        injector = self._faults if self._faults is not None else device.faults
        fault = None if injector is None else injector.link_fault(name, t_virtual, query=query)
        record: dict[str, object] = {"t_wall": t_wall, "t_virtual": t_virtual, "device": name, "command": line, "reply": None}
        if fault is not None:
            record["fault"] = fault
        if fault in ("drop", "timeout"):
            self._write_log(record)
            return fault != "drop"
        with instrument.lock, device.link_faults_suspended():
            if self._latency_s > 0:
                device.clock.sleep(self._latency_s)
            result = instrument.execute(line, self._stop)
        reply = result.reply
        if fault == "garbled" and reply is not None:
            reply = garble_reply(reply)
        record["reply"] = reply
        if result.error is not None:
            record["error"] = result.error
        self._write_log(record)
        if reply is not None:
            try:
                conn.sendall((reply + self._endings[name]).encode("ascii", errors="replace"))
            except OSError:
                return False
        return True

    def _write_log(self, record: dict[str, object]) -> None:
        log = self._log
        if log is not None:
            log.write(record)


def _shutdown(conn: socket.socket) -> None:
    try:
        conn.shutdown(socket.SHUT_RDWR)
    except OSError:
        pass
    conn.close()


def _quick_ack(conn: socket.socket) -> None:
    # A client that writes two short commands back to back waits for our ACK of the first
    # (Nagle); acknowledging at once avoids a 40 ms delayed-ACK stall per command on Linux.
    quickack = getattr(socket, "TCP_QUICKACK", None)
    if quickack is not None:
        try:
            conn.setsockopt(socket.IPPROTO_TCP, quickack, 1)
        except OSError:
            pass
