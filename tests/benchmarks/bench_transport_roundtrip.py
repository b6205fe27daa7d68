"""Benchmark: median query round trip through pyvisa-py and pyserial to a loopback line server.

Run on demand: ``PYTHONPATH=. python tests/benchmarks/bench_transport_roundtrip.py [N]``.
Against tests/helpers/fake_server.py on 127.0.0.1, in this one run, prints the median of N
round trips for: the bare libraries (``resource.query``, pyserial ``write`` + ``read_until``),
the drivers' transports (``query_line``), a stage's ``position_deg()``, and a write followed by
a query (where Nagle's algorithm costs a delayed ACK unless TCP_NODELAY is set). Ratios are
against the bare library on the same path.
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path
from typing import Callable

TESTS = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(TESTS))

import pyvisa  # noqa: E402
import serial  # noqa: E402

from lightloom.drivers.options import parse_config  # noqa: E402
from lightloom.drivers.registry import create_device  # noqa: E402
from lightloom.drivers.serial_transport import SerialTransport  # noqa: E402
from lightloom.drivers.visa_transport import VisaTransport  # noqa: E402
from helpers.fake_server import FakeInstrument, FakeLineServer, address_for  # noqa: E402


def median_ms(call: Callable[[], object], n: int) -> float:
    for _ in range(min(50, n)):
        call()
    samples = []
    for _ in range(n):
        start = time.perf_counter()
        call()
        samples.append(time.perf_counter() - start)
    return statistics.median(samples) * 1e3


def main(n: int) -> None:
    server = FakeLineServer(FakeInstrument("stage", busy_s=0.0)).start()
    port = server.port
    line = parse_config("visa.rotation_stage", {"timeout_s": 1.0}, None).line
    rows: list[tuple[str, float, float | None]] = []

    manager = pyvisa.ResourceManager("@py")
    bare_visa = manager.open_resource(
        address_for("visa", port), read_termination="\n", write_termination="\n", timeout=1000
    )
    visa_bare_ms = median_ms(lambda: bare_visa.query("ANGL?"), n)
    rows.append(("pyvisa-py SOCKET, resource.query", visa_bare_ms, None))

    visa = VisaTransport("bench", address_for("visa", port), line)
    visa.open()
    visa_ms = median_ms(lambda: visa.query_line("ANGL?"), n)
    rows.append(("pyvisa-py SOCKET, VisaTransport.query_line", visa_ms, visa_bare_ms))

    bare_serial = serial.serial_for_url(address_for("serial", port), timeout=1.0)

    def serial_query() -> bytes:
        bare_serial.write(b"ANGL?\n")
        return bare_serial.read_until(b"\n")

    serial_bare_ms = median_ms(serial_query, n)
    rows.append(("pyserial socket://, write + read_until", serial_bare_ms, None))
    ser = SerialTransport("bench", address_for("serial", port), line)
    ser.open()
    serial_ms = median_ms(lambda: ser.query_line("ANGL?"), n)
    rows.append(("pyserial socket://, SerialTransport.query_line", serial_ms, serial_bare_ms))

    asrl = VisaTransport("bench", address_for("visa-asrl", port), line)
    asrl.open()
    asrl_ms = median_ms(lambda: asrl.query_line("ANGL?"), n)
    rows.append(("pyvisa-py ASRLsocket://, VisaTransport.query_line", asrl_ms, serial_bare_ms))

    for family in ("visa", "serial"):
        stage = create_device(
            "hwp", f"{family}.rotation_stage", address_for(family, port), {"timeout_s": 1.0}, None
        )
        stage.connect()
        bare_ms = visa_bare_ms if family == "visa" else serial_bare_ms
        stage_ms = median_ms(stage.position_deg, n)
        rows.append((f"{family}.rotation_stage position_deg()", stage_ms, bare_ms))
        stage.close()

    few = max(10, n // 50)

    def bare_write_query() -> str:
        bare_visa.write("ANGL 1")
        return bare_visa.query("BUSY?")

    nagle_ms = median_ms(bare_write_query, few)
    rows.append(("write then query, pyvisa-py as opened (Nagle on)", nagle_ms, None))

    def ours_write_query() -> str:
        visa.write_line("ANGL 1")
        return visa.query_line("BUSY?")

    ours_ms = median_ms(ours_write_query, n)
    rows.append(("write then query, VisaTransport (TCP_NODELAY)", ours_ms, nagle_ms))

    def serial_write_query() -> bytes:
        bare_serial.write(b"ANGL 1\n")
        return serial_query()

    serial_nagle_ms = median_ms(serial_write_query, few)
    rows.append(("write then query, pyserial as opened (Nagle on)", serial_nagle_ms, None))

    def ours_serial_write_query() -> str:
        ser.write_line("ANGL 1")
        return ser.query_line("BUSY?")

    ours_serial_ms = median_ms(ours_serial_write_query, n)
    label = "write then query, SerialTransport (TCP_NODELAY)"
    rows.append((label, ours_serial_ms, serial_nagle_ms))

    for closer in (bare_visa.close, visa.close, bare_serial.close, ser.close, asrl.close):
        closer()
    server.shutdown()

    print(f"median of {n} round trips (write-then-query rows with Nagle on: {few}), loopback")
    for label, ms, reference in rows:
        ratio = ""
        if reference:
            ratio = f"  x{ms / reference:.2f} of the bare library"
            if ms / reference < 0.1:
                ratio = f"  1/{reference / ms:.0f} of the bare library"
        print(f"  {label:<52} {ms:8.3f} ms{ratio}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 2000)
