"""Finding instruments: the VISA resources and serial ports of this machine, and what answers an
identity query at each, with short timeouts so a silent or busy port never hangs the listing."""

from __future__ import annotations

import re
import threading
import time
import warnings
from dataclasses import dataclass
from typing import Callable, Iterable

# Words in an identity reply that suggest the kind of device (a guess for a bench skeleton).
_KIND_HINTS: tuple[tuple[str, str], ...] = (
    ("power_meter", r"POWER|METER|OPM|\bPM\d|SIM-POWERMETER"),
    ("photon_counter", r"COUNT|SPCM|\bSPC|TIMETAG|SIM-COUNTER"),
    ("shutter", r"SHUTTER|RELAY|SIM-SHUTTER"),
    ("actuator", r"FLIP|FILTER|SIM-ACTUATOR"),
    ("rotation_stage", r"ROT|STAGE|MOUNT|MOTOR|SIM-STAGE"),
)


@dataclass(frozen=True)
class Found:
    """One address and what answered there.

    ``address`` is a VISA resource name or a pyserial port/URL; ``family`` ``visa`` or ``serial``;
    ``description`` what the system says of the port; ``identity`` the reply (None if nothing
    answered); ``error`` why not, in a few words.
    """

    address: str
    family: str
    description: str = ""
    identity: str | None = None
    error: str | None = None

    @property
    def kind_guess(self) -> str | None:
        """The device kind the identity suggests, or None."""
        if not self.identity:
            return None
        text = self.identity.upper()
        for kind, pattern in _KIND_HINTS:
            if re.search(pattern, text):
                return kind
        return None


def is_visa_address(address: str) -> bool:
    """A VISA resource name (``TCPIP::...``, ``ASRL...::INSTR``, ``USB0::...``) rather than a
    pyserial port or URL."""
    return "::" in address


def list_serial_ports() -> list[Found]:
    """The serial ports pyserial lists (USB adapters, built-in UARTs), not yet queried."""
    from serial.tools import list_ports

    return [
        Found(p.device, "serial", " ".join(x for x in (p.description, p.hwid) if x and x != "n/a"))
        for p in sorted(list_ports.comports(), key=lambda p: p.device)
    ]


def list_visa_resources(wait_s: float, library: str = "@py") -> tuple[list[Found], str | None]:
    """The VISA resources the backend lists within ``wait_s`` seconds; (found, note) where note
    says why the list may be incomplete. pyvisa-py does not list raw TCP/IP sockets."""
    box: dict[str, object] = {}

    def work() -> None:
        try:
            import pyvisa

            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                manager = pyvisa.ResourceManager(library)
                box["names"] = manager.list_resources("?*::INSTR")
        except Exception as exc:  # any backend failure: report it, list the rest
            box["error"] = f"{type(exc).__name__}: {exc}"

    thread = threading.Thread(target=work, name="visa-list", daemon=True)
    thread.start()
    thread.join(wait_s)
    if thread.is_alive():
        return [], f"the VISA backend did not finish listing within {wait_s:g} s"
    if "error" in box:
        return [], f"VISA listing failed ({box['error']})"
    return [Found(str(n), "visa") for n in box.get("names", ())], None  # type: ignore[union-attr]


def query_identity(
    address: str, query: str = "*IDN?", timeout_s: float = 0.5, baud_rate: int = 9600
) -> tuple[str | None, str | None]:
    """Send ``query`` to ``address`` and read one line; (reply, None) or (None, why not).

    The query ends with "\\r\\n", which instruments ending lines with "\\n" or "\\r" both take;
    the first line of the reply, ending in either, is returned.
    """
    try:
        if is_visa_address(address):
            return _visa_query(address, query, timeout_s), None
        return _serial_query(address, query, timeout_s, baud_rate), None
    except Exception as exc:  # a port in use, refused, absent, silent: say so and go on
        text = " ".join(str(exc).split()) or type(exc).__name__
        return None, text[:100]


def _serial_query(address: str, query: str, timeout_s: float, baud_rate: int) -> str:
    import serial

    port = serial.serial_for_url(address, baudrate=baud_rate, timeout=timeout_s, write_timeout=timeout_s)
    try:
        port.reset_input_buffer()
        port.write((query + "\r\n").encode("ascii"))
        return _first_line(port.read, timeout_s)
    finally:
        port.close()


def _visa_query(address: str, query: str, timeout_s: float) -> str:
    import pyvisa

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        manager = pyvisa.ResourceManager("@py")
        resource = manager.open_resource(address, open_timeout=int(timeout_s * 1000), timeout=timeout_s * 1000)
    try:
        resource.write_termination = "\r\n"
        resource.write(query)
        deadline = time.monotonic() + timeout_s

        def read(n: int) -> bytes:
            left = deadline - time.monotonic()
            if left <= 0:
                return b""
            resource.timeout = max(left * 1000, 1)
            try:
                return bytes(resource.read_bytes(1))
            except pyvisa.VisaIOError:
                return b""

        return _first_line(read, timeout_s)
    finally:
        resource.close()


def _first_line(read: Callable[[int], bytes], timeout_s: float) -> str:
    deadline = time.monotonic() + timeout_s
    data = b""
    while time.monotonic() < deadline:
        byte = read(1)
        if not byte:
            break
        if byte in (b"\n", b"\r"):
            if data.strip():
                break
            continue
        data += byte
        if len(data) > 512:
            break
    text = data.decode("ascii", errors="replace").strip()
    if not text:
        raise TimeoutError(f"no reply within {timeout_s:g} s")
    return text


def identify_all(
    found: Iterable[Found], query: str, timeout_s: float, baud_rate: int = 9600
) -> list[Found]:
    """Query every address at once (one thread each) and wait at most about twice ``timeout_s``
    plus connection time; an address still busy then is reported as not answering."""
    items = list(found)
    results: dict[int, tuple[str | None, str | None]] = {}

    def work(i: int, address: str) -> None:
        results[i] = query_identity(address, query, timeout_s, baud_rate)

    threads = [
        threading.Thread(target=work, args=(i, f.address), name=f"idn-{i}", daemon=True)
        for i, f in enumerate(items)
    ]
    for thread in threads:
        thread.start()
    deadline = time.monotonic() + 2.0 * timeout_s + 2.0
    for thread in threads:
        thread.join(max(0.0, deadline - time.monotonic()))
    out = []
    for i, f in enumerate(items):
        reply, error = results.get(i, (None, "no answer in time (busy or hanging port)"))
        out.append(Found(f.address, f.family, f.description, reply, error))
    return out


def serial_port_of(visa_address: str) -> str | None:
    """The serial port behind an ``ASRL<port>::INSTR`` resource, or None."""
    m = re.fullmatch(r"ASRL(.+)::INSTR", visa_address, re.IGNORECASE)
    return m.group(1) if m else None
