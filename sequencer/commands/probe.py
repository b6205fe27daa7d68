"""``lightloom probe --list`` (what answers where) and ``lightloom probe BENCH`` (the pre-night check).

Discovery lists the VISA resources (pyvisa-py) and serial ports (pyserial) with what answers an
identity query, and can write a bench skeleton. The pre-night check connects every device of a
bench, checks identities, moves each stage a small step and back, reads the dark levels with the
shutter closed and, after the laser-safety caution and a confirmation, checks that the beam is seen.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path


def add_parser(sub) -> None:
    p = sub.add_parser(
        "probe",
        help="list instruments (--list) or check every device of a bench before a night",
        description="With --list: the VISA resources and serial ports of this machine and what answers "
                    "*IDN? at each. With BENCH: the pre-night check of every device of the bench "
                    "(identities, a small move of each stage and back, dark levels, and the beam after "
                    "a confirmation). Exit 3 when a check fails.",
    )
    p.add_argument("bench", nargs="?", metavar="BENCH", help="bench file or built-in name to check")
    p.add_argument("--list", action="store_true", help="list VISA resources and serial ports with their *IDN? replies")
    p.add_argument("--address", action="append", default=[], metavar="ADDR",
                   help="with --list: also query this VISA resource or serial URL (repeatable; pyvisa-py does not "
                        "list TCP/IP instruments, e.g. TCPIP::192.168.1.31::5025::SOCKET or socket://127.0.0.1:47100)")
    p.add_argument("--no-scan", action="store_true",
                   help="with --list: query only the --address ones, not the ports of this machine")
    p.add_argument("--query", default="*IDN?", help="with --list: the identity query to send (default *IDN?)")
    p.add_argument("--timeout", type=float, default=0.5, metavar="S",
                   help="with --list: seconds to wait for each reply (default 0.5)")
    p.add_argument("--baud", type=int, default=9600, help="with --list: serial baud rate (default 9600)")
    p.add_argument("--skeleton", metavar="FILE", help="with --list: write a bench skeleton of what answered to FILE")
    p.add_argument("--yes", action="store_true",
                   help="open the shutter for the beam checks without asking (scripts); the laser caution is still shown")
    p.add_argument("--step-deg", type=float, default=1.0, help="stage test step, deg (default 1)")
    p.add_argument("--settle-timeout", type=float, default=10.0, metavar="S",
                   help="seconds a stage or the converter may take to arrive before its motion check fails (default 10)")
    p.add_argument("--dwell", type=float, default=0.1, metavar="S", help="detector dwell for dark and beam, s (default 0.1)")
    p.add_argument("--json", action="store_true", help="print the results as JSON")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    from lightloom.sequencer.errors import UsageError

    if args.list:
        if args.bench:
            raise UsageError("probe takes either --list or a BENCH, not both")
        return _list(args)
    if not args.bench:
        raise UsageError("probe needs a BENCH to check, or --list to find instruments")
    for name in ("step_deg", "dwell", "timeout", "settle_timeout"):
        value = getattr(args, name)
        if not (value > 0 and value < 1e6):
            raise UsageError(f"--{name.replace('_', '-')} must be a number > 0, got {value}")
    return _check(args)


# ---------------------------------------------------------------------- discovery
def _list(args: argparse.Namespace) -> int:
    from rich.console import Console
    from rich.table import Table

    from lightloom.drivers.discovery import (
        Found, identify_all, is_visa_address, list_serial_ports, list_visa_resources, serial_port_of,
    )
    from lightloom.sequencer.errors import UsageError
    from lightloom.sequencer.outputs import check_new_output

    if not (0 < args.timeout <= 30):
        raise UsageError(f"--timeout must be in (0, 30] s, got {args.timeout}")
    notes: list[str] = []
    candidates: list[Found] = []
    if not args.no_scan:
        serial_ports = list_serial_ports()
        visa, note = list_visa_resources(wait_s=max(2.0, 10 * args.timeout))
        if note:
            notes.append(note)
        ports = {f.address for f in serial_ports}
        # A serial port is listed by both; query it once, through pyserial.
        candidates += [f for f in visa if serial_port_of(f.address) not in ports] + serial_ports
    for address in args.address:
        candidates.append(Found(address, "visa" if is_visa_address(address) else "serial", "given with --address"))
    found = identify_all(candidates, args.query, args.timeout, args.baud)
    if args.json:
        print(json.dumps({"query": args.query, "found": [
            {"address": f.address, "family": f.family, "description": f.description, "identity": f.identity,
             "error": f.error, "kind_guess": f.kind_guess} for f in found], "notes": notes}, indent=2))
    else:
        console = Console()
        table = Table(title=f"instruments ({args.query}, {args.timeout:g} s timeout)")
        for column in ("address", "via", "answers", "kind (guess)"):
            table.add_column(column)
        for f in found:
            table.add_row(f.address, f.family + (f" ({f.description})" if f.description else ""),
                          f.identity if f.identity else f"[dim]{f.error}[/dim]", f.kind_guess or "")
        console.print(table)
        for note in notes:
            console.print(f"note: {note}", highlight=False)
        if not any(is_visa_address(f.address) and f.address.upper().startswith("TCPIP") for f in found):
            console.print("note: TCP/IP instruments are not listed by pyvisa-py; add them with --address", highlight=False)
    if args.skeleton:
        out = Path(args.skeleton)
        check_new_output(out, "--skeleton", f"{out} exists; choose another --skeleton (it is never overwritten)")
        out.write_text(skeleton_text(found), encoding="utf-8")
        if not args.json:
            print(f"bench skeleton: {out}")
    return 0


def skeleton_text(found) -> str:
    """A bench skeleton: one device per address that answered, to be completed by hand."""
    import yaml

    from lightloom.sequencer.commands.sim import TemplateDumper

    devices = {}
    for i, f in enumerate(x for x in found if x.identity):
        kind = f.kind_guess or "power_meter"
        entry = {
            "driver": f"{f.family}.{kind}",
            "address": f.address,
            "options": {"identity": _identity_core(f.identity), "timeout_s": 2.0},
        }
        if kind == "rotation_stage":
            entry["limits"] = {"min_deg": -360, "max_deg": 360, "speed_deg_per_s": 10, "acceleration_deg_per_s2": 20}
        if kind == "actuator":
            entry["states"] = ["in", "out"]
        devices[f"{kind}_{i + 1}"] = entry
    header = (
        "# Bench skeleton written by `lightloom probe --list`: one device per address that answered.\n"
        "# The kinds are guesses from the identity replies. Complete it with docs/instruments.md: each\n"
        "# device's command templates (options.commands), reply patterns and terminations, the roles,\n"
        "# limits and calibration; then `lightloom validate` and `lightloom probe` it.\n"
    )
    body = {"bench": "my-table", "description": "TODO: what is on this table", "wavelength_nm": 780,
            "devices": devices or {"TODO": {"driver": "visa.power_meter", "address": "TCPIP::192.168.1.20::5025::SOCKET"}},
            "roles": {"shutter": "TODO", "detectors": ["TODO"]}}
    return header + yaml.dump(body, Dumper=TemplateDumper, sort_keys=False, width=110)


def _identity_core(reply: str) -> str:
    """Maker and model of an identity reply (its first two comma-separated fields), else the reply."""
    parts = [p.strip() for p in reply.split(",")]
    return ",".join(parts[:2]) if len(parts) >= 2 else reply.strip()


# ---------------------------------------------------------------------- pre-night check
def _check(args: argparse.Namespace) -> int:
    from rich.console import Console

    from lightloom.sequencer.errors import EXIT_FAULT, EXIT_OK
    from lightloom.sequencer.lang.bench import load_bench
    from lightloom.sequencer.run.precheck import PreNightCheck, ProbeSettings
    from lightloom.sequencer.run.safety import LASER_SAFETY_CAUTION
    from lightloom.sequencer.run.session import assemble

    bench = load_bench(args.bench)
    assembled = assemble(bench)
    settings = ProbeSettings(
        step_deg=args.step_deg, dwell_s=args.dwell, settle_timeout_s=args.settle_timeout, shutter_close_s=bench.retry.shutter_close_s,
        backoff_s=bench.retry.backoff_s, max_backoff_s=bench.retry.max_backoff_s,
    )
    console = Console(stderr=args.json)
    lines: list[str] = []
    check = PreNightCheck(assembled.rig, settings, now=assembled.now, sleep=assembled.sleep, log=lines.append)
    beam = "skipped"
    try:
        check.connect_all()
        check.move_stages()
        check.read_dark()
        if not bench.is_simulated:
            sys.stderr.write(LASER_SAFETY_CAUTION)
            sys.stderr.flush()
        if bench.is_simulated or args.yes or _confirmed(console):
            check.check_beam()
            beam = "checked"
        else:
            from lightloom.sequencer.run.precheck import Check

            check.checks.append(Check(bench.roles.shutter, "beam", None, "skipped: not confirmed (type yes, or --yes)"))
    except BaseException:
        check.close_shutter()
        raise
    finally:
        check.close_devices()
    if args.json:
        print(json.dumps({"bench": bench.name, "ok": not check.failed, "beam": beam,
                          "checks": [c.to_json() for c in check.checks]}, indent=2))
    else:
        _table(console, bench.name, check.checks)
    return EXIT_FAULT if check.failed else EXIT_OK


def _confirmed(console) -> bool:
    if not sys.stdin.isatty():
        return False
    try:
        answer = console.input("Open the shutter now for the beam check? Type yes to open: ")
    except EOFError:
        return False
    return answer.strip().lower() == "yes"


def _table(console, bench_name: str, checks) -> None:
    from rich.table import Table

    table = Table(title=f"pre-night check of {bench_name}")
    for column in ("device", "check", "result", "detail"):
        table.add_column(column)
    for c in checks:
        result = "[green]PASS[/green]" if c.ok else "[red]FAIL[/red]" if c.ok is False else "[yellow]skipped[/yellow]"
        table.add_row(c.device, c.check, result, c.detail)
    console.print(table)
    failed = sum(1 for c in checks if c.ok is False)
    console.print(f"{failed} check(s) failed" if failed else "every check passed", highlight=False)
