"""``lightloom dry-run PROTOCOL --bench BENCH [--json]``: the plan, motion, limits and time, no hardware."""

from __future__ import annotations

import argparse
import json
import math

from rich.console import Console
from rich.table import Table


def add_parser(sub) -> None:
    p = sub.add_parser("dry-run", help="show the compiled steps, motion, limit checks and a time estimate")
    p.add_argument("protocol", help="protocol file or built-in name")
    p.add_argument("--bench", required=True, help="bench file or built-in name")
    p.add_argument("--json", action="store_true", help="print JSON (points, estimated_seconds, ...)")
    p.add_argument("--all", action="store_true", help="list every step, not only the first 60")
    p.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    from lightloom.sequencer.lang.bench import load_bench
    from lightloom.sequencer.optics.analyzer import CONVERTER
    from lightloom.sequencer.lang.protocol import load_protocol
    from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model
    from lightloom.sequencer.plan.timing import estimate_steps

    protocol = load_protocol(args.protocol)
    bench = load_bench(args.bench)
    plan = compile_protocol(protocol, bench)
    table = table_model(bench)
    est = estimate_steps(plan, table)
    measure = [s for s in plan.steps if s.kind == "measure"]
    exposures = _exposure_checks(bench, plan)
    if args.json:
        out = {
            "protocol": protocol.name,
            "bench": bench.name,
            "points": len(plan.steps),
            "settings": plan.n_settings,
            "measure_steps": len(measure),
            "estimated_seconds": round(est.total_seconds, 3),
            "motion_seconds": round(est.motion_seconds, 3),
            "dwell_seconds": round(est.dwell_seconds, 3),
            "wait_seconds": round(est.wait_seconds, 3),
            "travel_deg": {k: round(v, 3) for k, v in est.travel_deg.items()},
            "converter_switches": est.converter_switches,
            "limit_violations": list(plan.violations),
            **({"camera_exposures": [
                {"setting": c.label, "exposure_s": c.exposure_s, "peak_adu": round(c.peak_adu, 1),
                 "saturation_adu": c.saturation_adu, "saturates": c.saturates,
                 "max_exposure_s": c.max_exposure_s} for c in exposures]} if exposures else {}),
            "steps": [
                {
                    "index": s.index, "kind": s.kind, "pass": s.pass_index, "point": s.point_index,
                    "repeat": s.repeat_index, "label": s.label, "port_labels": list(s.port_labels),
                    "settings": {n: (None if math.isnan(v) else v) for n, v in zip(plan.element_names, s.settings)},
                    "dwell_s": s.dwell_s, "seconds": round(t, 4),
                }
                for s, t in zip(plan.steps, est.step_seconds)
            ],
        }
        print(json.dumps(out, indent=1))
        return 2 if plan.violations else 0
    console = Console()
    t = Table(title=f"{protocol.name} on {bench.name} ({plan.order} order)")
    short = {"quarter_wave_plate": "qwp", "half_wave_plate": "hwp", "mode_converter": "conv",
             "converter_angle": "conv deg", "image_rotator": "rot"}
    for col in ("step", "kind", "setting", *[short.get(n, n) for n in plan.element_names], "s"):
        t.add_column(col, justify="right" if col not in ("kind", "setting") else "left", no_wrap=True)
    shown = plan.steps if args.all else plan.steps[:60]
    for s, dt in zip(shown, est.step_seconds):
        vals = []
        for i, v in enumerate(s.settings):
            if math.isnan(v):
                vals.append("-")
            elif i == CONVERTER:
                vals.append("in" if v == 1.0 else "out")
            else:
                vals.append(f"{v:.2f}")
        t.add_row(str(s.index), s.kind, s.label, *vals, f"{dt:.2f}")
    console.print(t)
    if len(shown) < len(plan.steps):
        console.print(f"... {len(plan.steps) - len(shown)} more steps (--all lists them)")
    console.print(
        f"{len(plan.steps)} steps ({plan.n_settings} settings, {len(measure)} measurements), "
        f"estimated {est.total_seconds:.1f} s: motion {est.motion_seconds:.1f} s, dwell {est.dwell_seconds:.1f} s"
        + (f", waiting for passes {est.wait_seconds:.1f} s" if est.wait_seconds else "")
    )
    for name, deg in est.travel_deg.items():
        console.print(f"  {name}: {deg:.1f} deg travelled, {est.stage_seconds[name]:.1f} s moving")
    if est.converter_switches:
        console.print(f"  mode converter: {est.converter_switches} switches")
    for c in exposures:
        fill = c.peak_adu / c.saturation_adu
        if c.saturates:
            console.print(f"[red]would saturate:[/red] {c.label}: brightest pixel about {c.peak_adu:.0f} ADU at "
                          f"{c.exposure_s * 1e3:g} ms, saturation {c.saturation_adu:.0f} ADU; use dwell_s <= "
                          f"{c.max_exposure_s * 1e3:.3g} ms")
        else:
            console.print(f"camera: {c.label}: brightest pixel about {c.peak_adu:.0f} ADU ({fill:.0%} of saturation)")
    if plan.violations:
        for v in plan.violations:
            console.print(f"[red]limit violation:[/red] {v}")
        return 2
    console.print("limits: all moves inside the travel limits")
    return 0


def _exposure_checks(bench, plan) -> list:
    """On a simulated bench with a camera: the expected brightest pixel of every setting."""
    if bench.simulation is None or not any(d.kind == "camera" for d in bench.devices.values()):
        return []
    from lightloom.simulators.camera import check_exposures

    return check_exposures(bench, plan.steps)
