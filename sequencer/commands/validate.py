"""``lightloom validate PROTOCOL [--bench BENCH] [--json]``: check files without touching hardware or writing anything."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from lightloom.sequencer.commands.dry_run import determination_json, determination_lines, partial_warning
from lightloom.sequencer.lang.bench import Bench, load_bench
from lightloom.sequencer.errors import BenchError
from lightloom.sequencer.lang.protocol import Protocol, load_protocol
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.plan.purpose import (
    any_bench_determination, plan_determination, protocol_determination, require_purpose,
)


def add_parser(subparsers: Any) -> None:
    parser = subparsers.add_parser(
        "validate",
        help="check a protocol, and optionally a bench, and print a summary",
        description=(
            "Read a protocol (a file or a built-in name such as joint-36) and, with --bench, a bench"
            " (a file or a built-in name such as sim); report the first problem as FILE:LINE: message"
            " (exit status 2) or print a summary (exit status 0), with what the protocol determines"
            " (joint-state, polarization-state, spatial-state, partial with what is missing, or scan)."
            " Nothing is written."
        ),
    )
    parser.add_argument("protocol", metavar="PROTOCOL", help="protocol YAML file or built-in protocol name")
    parser.add_argument("--bench", metavar="BENCH", help="bench YAML file or built-in bench name")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    parser.set_defaults(handler=run)


def protocol_summary(protocol: Protocol) -> dict[str, Any]:
    """The facts about a protocol that a person checks before a run, as plain data."""
    return {
        "name": protocol.name,
        "file": protocol.source_path,
        "sha256": protocol.sha256,
        "analyzes": list(protocol.analyzes),
        "dimension": protocol.dimension,
        "measure": protocol.measure,
        "points": len(protocol.points),
        "labels": [p.label for p in protocol.points],
        "dwell_s": protocol.dwell_s,
        "repeats": protocol.repeats,
        "order": protocol.order,
        "background": {
            "every_points": protocol.background.every_points,
            "at_start": protocol.background.at_start,
            "at_end": protocol.background.at_end,
            "dwell_s": protocol.background.dwell_s,
        },
        "reference": {"every_points": protocol.reference.every_points, "dwell_s": protocol.reference.dwell_s},
        "sweep": {"passes": protocol.sweep.passes, "interval_s": protocol.sweep.interval_s},
        "target_state": protocol.target_label,
        "stated_determines": protocol.determines,
    }


def bench_summary(bench: Bench) -> dict[str, Any]:
    """The facts about a bench that a person checks before a run, as plain data."""
    return {
        "name": bench.name,
        "file": bench.source_path,
        "extends": list(bench.extends),
        "sha256": bench.sha256,
        "simulated": bench.is_simulated,
        "devices": {name: spec.driver for name, spec in bench.devices.items()},
        "roles": dict(bench.roles.assigned()),
        "detectors": [
            {"device": p.device, "sorter_port": p.sorter_port, "splitter_port": p.splitter_port}
            for p in bench.roles.detectors
        ],
    }


def driver_options_check(bench: Bench) -> None:
    """Check the options of visa./serial. devices against their drivers' schema, at the line written.

    The bench language passes ``options`` through untouched; the driver families own their keys.
    """
    from lightloom.drivers.options import DriverConfigError, check_options

    for spec in bench.devices.values():
        if spec.family not in ("visa", "serial"):
            continue
        try:
            check_options(spec.driver, spec.options, *([spec.states] if spec.kind == "actuator" and spec.states else []))
        except DriverConfigError as exc:
            path = f"devices.{spec.name}" + (f".{exc.key}" if exc.key else "")
            file, line = bench.locate(path)
            raise BenchError(f"{path}: {exc.message}", file, line) from None


def compile_check(protocol: Protocol, bench: Bench, plan: StepList) -> dict[str, Any]:
    """The compiled plan's size; moves outside the travel limits are a BenchError (exit status 2)."""
    violations = list(plan.violations)
    if violations:
        more = f" (and {len(violations) - 1} more)" if len(violations) > 1 else ""
        raise BenchError(
            f"protocol '{protocol.name}' needs moves outside the travel limits of bench '{bench.name}':"
            f" {violations[0]}{more}; widen devices.*.limits or change the protocol"
        )
    return {"checked": True, "steps": len(plan.steps)}


def _join(items: list[str]) -> str:
    return ", ".join(items) if items else "none"


def _row(label: str, value: str) -> str:
    return f"  {label:<11} {value}"


def render_text(summary: dict[str, Any]) -> str:
    """The summary as a few aligned lines for a terminal."""
    p = summary["protocol"]
    bg = p["background"]
    bg_parts = [f"every {bg['every_points']} points"] if bg["every_points"] else []
    bg_parts += [w for w, on in (("at start", bg["at_start"]), ("at end", bg["at_end"])) if on]
    ref = p["reference"]
    sweep = p["sweep"]
    labels = p["labels"][:6] + (["..."] if len(p["labels"]) > 6 else [])
    passes = f"{sweep['passes']} pass{'es' if sweep['passes'] != 1 else ''}"
    if sweep["interval_s"]:
        passes += f", starts {sweep['interval_s']:g} s apart"
    lines = [
        f"protocol {p['name']}  ({p['file']})",
        _row("analyzes", f"{' x '.join(p['analyzes'])} ({p['dimension']}x{p['dimension']} state)"),
        _row("points", f"{p['points']} from {p['measure']}: {' '.join(labels)}"),
        _row("dwell", f"{p['dwell_s']:g} s x {p['repeats']} repeats, order {p['order']}"),
        _row("background", f"{_join(bg_parts)} ({bg['dwell_s']:g} s)" if bg_parts else "none"),
        _row("reference", f"every {ref['every_points']} points ({ref['dwell_s']:g} s)" if ref["every_points"]
             else "none"),
        _row("sweep", passes),
        _row("target", p["target_state"] or "none"),
    ]
    b = summary["bench"]
    if b is not None:
        extends = f", extends {', '.join(b['extends'])}" if b["extends"] else ""
        detectors = [
            f"{d['device']} ({','.join(x for x in (d['sorter_port'], d['splitter_port']) if x) or '-'})"
            for d in b["detectors"]
        ]
        lines += [
            f"bench {b['name']}  ({b['file']}{extends})",
            _row("kind", "simulated" if b["simulated"] else "hardware"),
            _row("devices", _join([f"{n} ({d})" for n, d in b["devices"].items()])),
            _row("roles", _join([f"{r}={d}" for r, d in b["roles"].items()])),
            _row("detectors", _join(detectors)),
        ]
        lines.append(_row("compile", f"ok, {summary['compile']['steps']} steps"))
    where = f" on bench {b['name']}" if b is not None else " on one detector per projector (no --bench)"
    first, *rest = determination_lines(_Shown(summary), p["stated_determines"], where)
    lines.append(_row("determines", first.removeprefix("determines ")))
    lines += [" " * 12 + line for line in rest]
    lines.append("ok")
    return "\n".join(lines)


class _Shown:
    """The determination as ``determination_lines`` reads it, rebuilt from the summary's JSON keys."""

    def __init__(self, summary: dict[str, Any]) -> None:
        self.kind = summary["determines"]
        self.missing = tuple(summary["missing"])
        self.state = summary.get("state_determined")


def run(args: argparse.Namespace) -> int:
    protocol = load_protocol(args.protocol)
    bench = load_bench(args.bench) if args.bench else None
    if bench is not None:
        driver_options_check(bench)
    compiled = None
    if bench is not None:
        from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model

        plan = compile_protocol(protocol, bench)
        compiled = compile_check(protocol, bench, plan)
        det = plan_determination(protocol, plan, table_model(bench))
        where = f"on bench '{bench.name}'"
    else:
        # A stated purpose that no table can deliver (its targets lack a basis even with both outputs
        # of every splitter and sorter read) is bad input without a bench too.
        fullest = any_bench_determination(protocol)
        if fullest is not None:
            require_purpose(protocol, fullest, on="on any bench (even one that reads both outputs of its splitter and sorter)")
        det = protocol_determination(protocol)
        where = "on one detector per projector (give --bench to check your table)"
    warning = partial_warning(det, protocol, where)
    if warning:
        print(warning, file=sys.stderr)
    summary: dict[str, Any] = {
        "protocol": protocol_summary(protocol),
        "bench": bench_summary(bench) if bench is not None else None,
        "compile": compiled,
        **determination_json(det),
        "ok": True,
    }
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        print(render_text(summary))
    return 0
