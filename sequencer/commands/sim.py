"""``lightloom sim serve --bench BENCH``: the simulated instruments of a bench, served on 127.0.0.1.

Each simulated instrument listens on its own TCP port of the loopback interface and speaks a
SCPI-style text protocol; a bench file pointing the real VISA (or serial) drivers at them is
written, so a protocol can be run through the real driver code against the simulated table.
"""

from __future__ import annotations

import argparse
import signal
import threading
import time
from pathlib import Path

import yaml
from rich.console import Console


DEFAULT_BASE_PORT = 47100
SERVED_HEADER = "# Written by `lightloom sim serve`"


def add_parser(sub) -> None:
    p = sub.add_parser(
        "sim", help="simulated instruments (sim serve)",
        description=(
            "Simulated instruments. `sim serve --bench BENCH` serves the devices of a simulated bench on"
            " 127.0.0.1 through a SCPI-style text protocol and writes a bench file that reaches them with"
            " the real VISA or serial drivers."
        ),
    )
    verbs = p.add_subparsers(dest="sim_verb", metavar="VERB")
    verbs.required = True
    s = verbs.add_parser("serve", help="serve a simulated bench's instruments on 127.0.0.1")
    s.add_argument("--bench", required=True, help="simulated bench file or built-in name (e.g. sim)")
    s.add_argument("--base-port", type=int, default=DEFAULT_BASE_PORT,
                   help=f"first TCP port, device i on base+i (default {DEFAULT_BASE_PORT}, so a restarted "
                        "server comes back on the same addresses); 0 = any free ports")
    s.add_argument("--transport", choices=("visa", "serial"), default="visa",
                   help="driver family the written bench uses (default visa)")
    s.add_argument("--bench-out", metavar="FILE", help="where to write the bench that points at the served instruments (default served-<bench>.yaml)")
    s.add_argument("--log", metavar="FILE", help="write a JSON-lines log of every command received")
    s.add_argument("--time-scale", type=float, default=None,
                   help="wall seconds per simulated second (default: the bench's simulation.time_scale, or 1 "
                        "when that is 0: served instruments need a running clock)")
    s.add_argument("--dialect", action="append", default=[], metavar="DEVICE=DIALECT",
                   help="serve DEVICE (a device name, or a kind such as power_meter for all of that kind) "
                        "speaking DIALECT (a built-in dialect name or a dialect YAML file; see docs/instruments.md); "
                        "the written bench gets the matching driver options. Repeatable")
    s.add_argument("--for-seconds", type=float, default=None, help=argparse.SUPPRESS)
    s.set_defaults(handler=run)


def served_bench_text(bench, addresses, transport: str, dialects=None) -> str:
    """The bench as YAML with every device driven by the real drivers at its served address
    (``dialects``: device name -> Dialect for devices that speak one)."""
    from lightloom.simulators.dialects import driver_options

    dialects = dialects or {}
    data = yaml.safe_load(bench.resolved_text)
    data.pop("simulation", None)
    data.pop("extends", None)
    data["bench"] = f"{bench.name}-served"
    data["description"] = (
        f"The simulated instruments of bench '{bench.name}' served on 127.0.0.1 by `lightloom sim serve`; "
        f"the real {transport} drivers talk to them"
    )
    for name, dev in list(data["devices"].items()):
        kind = dev.pop("driver").split(".", 1)[1]
        a = addresses[name]
        dev.pop("address", None)
        dev.pop("options", None)
        # Driver, address and options first, as a person reads a device entry.
        data["devices"][name] = {
            "driver": f"{transport}.{kind}",
            "address": a.visa_address if transport == "visa" else a.serial_url,
            "options": (driver_options(dialects[name], name) if name in dialects
                        else {"read_termination": "\n", "write_termination": "\n", "timeout_s": 2.0}),
            **dev,
        }
    header = (
        f"{SERVED_HEADER}: the instruments below are simulated and listen on 127.0.0.1\n"
        "# only while the server runs. Running a protocol on this bench goes through the real drivers.\n"
    )
    return header + yaml.dump(data, Dumper=TemplateDumper, sort_keys=False, width=120)


class TemplateDumper(yaml.SafeDumper):
    """A safe YAML writer that spells strings holding control characters ("\\n", "\\r\\n") as
    double-quoted escapes on one line, as a person writes them in a bench."""


def _represent_text(dumper: yaml.SafeDumper, text: str) -> yaml.ScalarNode:
    if any(ch in text for ch in "\r\n\t"):
        return dumper.represent_scalar("tag:yaml.org,2002:str", text, style='"')
    return dumper.represent_str(text)


TemplateDumper.add_representer(str, _represent_text)


def chosen_dialects(bench, choices: list[str]) -> dict:
    """Device name -> Dialect from ``--dialect DEVICE_OR_KIND=DIALECT`` choices (later ones win)."""
    from lightloom.sequencer.errors import UsageError
    from lightloom.simulators.dialects import DialectError, load_dialect

    out = {}
    for choice in choices:
        who, sep, what = choice.partition("=")
        if not sep or not who or not what:
            raise UsageError(f"--dialect {choice!r}: expected DEVICE=DIALECT, e.g. pm_ref=scpi-power-meter")
        names = [n for n, d in bench.devices.items() if n == who or d.kind == who]
        if not names:
            raise UsageError(f"--dialect {choice!r}: bench '{bench.name}' has no device or kind {who!r} "
                             f"(devices: {', '.join(bench.devices)})")
        try:
            dialect = load_dialect(what)
        except DialectError as exc:
            raise UsageError(str(exc)) from None
        for name in names:
            if bench.devices[name].kind != dialect.kind:
                raise UsageError(f"--dialect {choice!r}: {name} is a {bench.devices[name].kind}, "
                                 f"dialect {dialect.name!r} is for a {dialect.kind}")
            out[name] = dialect
    return out


def run(args: argparse.Namespace) -> int:
    from lightloom.sequencer.lang.bench import load_bench
    from lightloom.sequencer.errors import UsageError
    from lightloom.simulators.scpi_server import LoopbackServer
    from lightloom.simulators.table import SimulatedTable

    bench = load_bench(args.bench)
    if not bench.is_simulated:
        raise UsageError(f"bench '{bench.name}' has no simulation section; only simulated benches can be served")
    out = Path(args.bench_out or f"served-{bench.name}.yaml")
    if out.exists() and not out.read_text(encoding="utf-8", errors="replace").startswith(SERVED_HEADER):
        raise UsageError(f"{out} exists and was not written by `lightloom sim serve`; choose another --bench-out")
    scale = args.time_scale
    if scale is None:
        scale = bench.simulation.time_scale if bench.simulation.time_scale > 0 else 1.0
    if not scale > 0:
        raise UsageError(f"--time-scale must be > 0 for served instruments, got {scale}")
    dialects = chosen_dialects(bench, args.dialect)
    table = SimulatedTable(bench, time_scale=scale)
    for device in table.devices.values():
        device.connect()
    try:
        server = LoopbackServer(table.devices, base_port=args.base_port, log_path=args.log, dialects=dialects)
        server.start()
    except OSError as exc:
        raise UsageError(f"cannot listen on 127.0.0.1 (base port {args.base_port}): {exc}; try another --base-port") from None
    console = Console()
    try:
        addresses = server.addresses()
        out.write_text(served_bench_text(bench, addresses, args.transport, dialects), encoding="utf-8")
        console.print(f"simulated instruments of '{bench.name}' on 127.0.0.1 (time scale {scale:g}):", highlight=False)
        width = max(len(n) for n in addresses)
        for name, a in addresses.items():
            print(f"  {name:<{width}}  {bench.devices[name].kind:<14}  {a.visa_address:<34}  {a.serial_url}", flush=True)
        console.print(f"bench for the real drivers: {out}", highlight=False)
        console.print(f"e.g. lightloom run joint-36 --bench {out} --out served-run.h5", highlight=False)
        if args.log:
            console.print(f"command log: {args.log}", highlight=False)
        console.print("serving; Ctrl-C stops", highlight=False)
        stop = threading.Event()

        def on_term(signum, frame):  # noqa: ARG001
            stop.set()

        previous = signal.signal(signal.SIGTERM, on_term)
        try:
            deadline = None if args.for_seconds is None else time.monotonic() + args.for_seconds
            while not stop.is_set() and (deadline is None or time.monotonic() < deadline):
                stop.wait(0.2)
        except KeyboardInterrupt:
            pass
        finally:
            signal.signal(signal.SIGTERM, previous)
    finally:
        server.stop()
        console.print("stopped", highlight=False)
    return 0
