"""``lightloom dry-run PROTOCOL --bench BENCH [--json]``: the plan, motion, limits and time, no hardware."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Iterator
from typing import Any

DESCRIPTION = (
    "Compile a protocol for a bench and show, without touching hardware, every step (setting, element"
    " positions, estimated seconds), the total time in h:mm:ss, the travel of each stage, any move"
    " outside the travel limits (exit status 2) and what the protocol determines on this bench"
    " (joint-state, polarization-state, spatial-state, partial with what is missing, or scan)."
)

SHORT_NAMES = {"quarter_wave_plate": "qwp", "half_wave_plate": "hwp", "mode_converter": "conv",
               "converter_angle": "conv deg", "image_rotator": "rot"}
SHOWN_STEPS = 60
_STEPS_SLOT = "\x00steps\x00"
_BLOCK = 8192


def add_parser(sub) -> None:
    p = sub.add_parser("dry-run", help="show the compiled steps, motion, limit checks and a time estimate",
                       description=DESCRIPTION)
    p.add_argument("protocol", help="protocol file or built-in name")
    p.add_argument("--bench", required=True, help="bench file or built-in name")
    p.add_argument("--json", action="store_true",
                   help="print JSON (points, estimated_seconds, determines, missing, steps, ...)")
    p.add_argument("--all", action="store_true", help=f"list every step, not only the first {SHOWN_STEPS}")
    p.set_defaults(handler=run)


def hms(seconds: float) -> str:
    """A duration as h:mm:ss (``0:00:22``, ``11:30:21``), rounded to the second."""
    total = int(round(max(seconds, 0.0)))
    h, rest = divmod(total, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}"


def determination_json(det: Any) -> dict[str, Any]:
    """``determines``, ``missing`` and which Stokes components each factor's readings determine."""
    return {
        "determines": det.kind,
        "missing": list(det.missing),
        "state_determined": getattr(det, "state", None),
        "stokes_determined": {
            factor: [f"S{i}" for i, ok in enumerate(flags) if ok] for factor, flags in det.stokes.items()
        },
    }


_STATE_WORDS = {"joint-state": "the joint 4x4 state", "polarization-state": "the 2x2 polarization state",
                "spatial-state": "the 2x2 spatial-mode state"}


def determination_lines(det: Any, protocol_determines: str | None, where: str = "") -> list[str]:
    """The determination in words, one short line each (for validate and dry-run); ``where`` follows the kind."""
    stated = f" (the protocol says determines: {protocol_determines})" if protocol_determines else ""
    if det.kind != "partial":
        words = {**_STATE_WORDS, "scan": "no state, a scan"}[det.kind]
        state = getattr(det, "state", None)
        if det.kind == "scan" and state:
            words = f"a scan; its readings also determine {_STATE_WORDS[state]}"
        return [f"determines {det.kind}{where}: {words}{stated}"]
    return [f"determines partial{where}{stated}, missing:"] + [
        f"  - {m}" for m in det.missing
    ]


def partial_warning(det: Any, protocol: Any, where: str) -> str | None:
    """The one-line warning for an incomplete set in a protocol without ``determines:``, or None."""
    if det.kind != "partial" or protocol.determines is not None:
        return None
    return (
        f"lightloom: warning: {protocol.source_path}: protocol '{protocol.name}' does not determine"
        f" the state {where}: {'; '.join(det.missing)}; add settings, or say `determines: scan`"
        " if no state is wanted"
    )


def run(args: argparse.Namespace) -> int:
    import numpy as np
    from rich import box
    from rich.console import Console
    from rich.table import Table

    from lightloom.sequencer.lang.bench import load_bench
    from lightloom.sequencer.model.steps import STEP_KINDS
    from lightloom.sequencer.lang.protocol import load_protocol
    from lightloom.sequencer.plan.purpose import plan_determination
    from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model
    from lightloom.sequencer.plan.timing import estimate_steps

    protocol = load_protocol(args.protocol)
    bench = load_bench(args.bench)
    plan = compile_protocol(protocol, bench)
    table = table_model(bench)
    est = estimate_steps(plan, table)
    det = plan_determination(protocol, plan, table)
    warning = partial_warning(det, protocol, f"on bench '{bench.name}'")
    if warning:
        print(warning, file=sys.stderr)
    n_measure = int(np.count_nonzero(plan.columns.kind == STEP_KINDS.index("measure")))
    exposures = _exposure_checks(bench, plan)
    if args.json:
        out = {
            "protocol": protocol.name,
            "bench": bench.name,
            "points": len(plan.steps),
            "settings": plan.n_settings,
            "measure_steps": n_measure,
            "estimated_seconds": round(est.total_seconds, 3),
            "motion_seconds": round(est.motion_seconds, 3),
            "dwell_seconds": round(est.dwell_seconds, 3),
            "wait_seconds": round(est.wait_seconds, 3),
            **determination_json(det),
            "travel_deg": {k: round(v, 3) for k, v in est.travel_deg.items()},
            "converter_switches": est.converter_switches,
            "limit_violations": list(plan.violations),
            **({"camera_exposures": [
                {"setting": c.label, "exposure_s": c.exposure_s, "peak_adu": round(c.peak_adu, 1),
                 "saturation_adu": c.saturation_adu, "saturates": c.saturates,
                 "max_exposure_s": c.max_exposure_s} for c in exposures]} if exposures else {}),
            "steps": _STEPS_SLOT,
        }
        head, tail = json.dumps(out, indent=1).split(json.dumps(_STEPS_SLOT))
        sys.stdout.write(head)
        for block in step_json_blocks(plan, est.step_seconds):
            sys.stdout.write(block)
        sys.stdout.write(tail + "\n")
        sys.stdout.flush()
        return 2 if plan.violations else 0
    console = Console(highlight=False)
    # Only the elements this bench has get a column, so that the table fits 80 columns.
    present = [int(i) for i in np.flatnonzero(~np.all(np.isnan(plan.columns.settings), axis=0))]
    t = Table(title=f"{protocol.name} on {bench.name} ({plan.order} order)", box=box.SIMPLE_HEAD,
              pad_edge=False, title_justify="left")
    t.add_column("step", justify="right", no_wrap=True)
    t.add_column("setting", justify="left", overflow="fold")  # long labels wrap, never cut
    for i in present:
        name = plan.element_names[i]
        t.add_column(SHORT_NAMES.get(name, name), justify="right", no_wrap=True)
    t.add_column("s", justify="right", no_wrap=True)
    shown = plan.steps if args.all else plan.steps[:SHOWN_STEPS]
    for s, dt in zip(shown, est.step_seconds):
        angles = s.settings.stage_angles()
        vals = [
            (s.settings.mode_converter or "-") if plan.element_names[i] == "mode_converter"
            else (f"{angles[plan.element_names[i]]:.2f}" if plan.element_names[i] in angles else "-")
            for i in present
        ]
        t.add_row(str(s.index), s.label, *vals, f"{dt:.2f}")
    console.print(t)
    if len(shown) < len(plan.steps):
        console.print(f"... {len(plan.steps) - len(shown)} more steps (--all lists them)")
    console.print(
        f"{len(plan.steps)} steps: {plan.n_settings} settings, {n_measure} measurements,"
        f" {plan.passes} pass{'es' if plan.passes != 1 else ''}"
    )
    console.print(f"estimated {hms(est.total_seconds)} (h:mm:ss)")
    console.print(f"  motion {hms(est.motion_seconds)}, dwell {hms(est.dwell_seconds)}"
                  + (f", waiting for passes {hms(est.wait_seconds)}" if est.wait_seconds else ""))
    for name, deg in est.travel_deg.items():
        console.print(f"  {SHORT_NAMES.get(name, name)}: {deg:.1f} deg travelled,"
                      f" {hms(est.stage_seconds[name])} moving")
    if est.converter_switches:
        console.print(f"  conv: {est.converter_switches} switches in and out")
    for line in determination_lines(det, protocol.determines):
        console.print(line, markup=False)
    for c in exposures:
        fill = c.peak_adu / c.saturation_adu
        if c.saturates:
            console.print(f"would saturate: {c.label}: brightest pixel about {c.peak_adu:.0f} ADU at "
                          f"{c.exposure_s * 1e3:g} ms, saturation {c.saturation_adu:.0f} ADU; use dwell_s <= "
                          f"{c.max_exposure_s * 1e3:.3g} ms")
        else:
            console.print(f"camera: {c.label}: brightest pixel about {c.peak_adu:.0f} ADU ({fill:.0%} of saturation)")
    if plan.violations:
        for v in plan.violations:
            console.print(f"limit violation: {v}", markup=False)
        return 2
    console.print("limits: all moves inside the travel limits")
    return 0


def step_json_blocks(plan: Any, step_seconds: Any) -> Iterator[str]:
    """The ``steps`` JSON list, as text blocks of at most _BLOCK steps, one step a line.

    A night has up to 200,000 steps but usually a few hundred distinct (kind, setting, dwell,
    seconds) rows, so each distinct row's JSON is built once and each step's line joins it to
    its own indices: time linear in the steps, memory a few integers a step plus one block of text.
    """
    import numpy as np

    from lightloom.sequencer.model.elements import ElementSettings
    from lightloom.sequencer.model.steps import STEP_KINDS

    c = plan.columns
    n = len(c)
    if n == 0:
        yield "[]"
        return
    seconds = np.asarray(step_seconds, dtype=float)
    # One row per step of everything but its indices, as bytes; a dict finds the distinct ones.
    rows = np.column_stack([c.kind, c.label, c.port_labels, c.dwell_s, seconds,
                            np.nan_to_num(c.settings, nan=-1e300)]).astype(float)
    rows = np.ascontiguousarray(rows)
    keys = rows.view(np.dtype((np.void, rows.shape[1] * rows.itemsize))).ravel().tolist()
    distinct: dict[bytes, int] = {}
    codes = [distinct.setdefault(key, len(distinct)) for key in keys]  # a hash, not a sort: linear
    first = np.zeros(len(distinct), dtype=np.int64)
    first[np.asarray(codes)[::-1]] = np.arange(n - 1, -1, -1)  # the first step of each distinct row
    fragments = []
    for i in first.tolist():
        settings = ElementSettings.from_vector(c.settings[i]).as_list()
        fragments.append(
            f"{json.dumps(STEP_KINDS[c.kind[i]])}, \"label\": {json.dumps(c.labels[c.label[i]])},"
            f" \"port_labels\": {json.dumps(list(c.port_label_sets[c.port_labels[i]]))},"
            f" \"settings\": {json.dumps(dict(zip(plan.element_names, settings)))},"
            f" \"dwell_s\": {json.dumps(float(c.dwell_s[i]))}, \"seconds\": {json.dumps(round(float(seconds[i]), 4))}}}"
        )
    passes, points, repeats = c.pass_index.tolist(), c.point_index.tolist(), c.repeat_index.tolist()
    for start in range(0, n, _BLOCK):
        lines = [
            f"{{\"index\": {k}, \"pass\": {passes[k]}, \"point\": {points[k]},"
            f" \"repeat\": {repeats[k]}, \"kind\": {fragments[codes[k]]}"
            for k in range(start, min(start + _BLOCK, n))
        ]
        yield ("[\n  " if start == 0 else ",\n  ") + ",\n  ".join(lines) + ("\n ]" if start + _BLOCK >= n else "")


def _exposure_checks(bench, plan) -> list:
    """On a simulated bench with a camera: the expected brightest pixel of every setting."""
    if bench.simulation is None or not any(d.kind == "camera" for d in bench.devices.values()):
        return []
    from lightloom.simulators.camera import check_exposures

    return check_exposures(bench, plan.steps)
