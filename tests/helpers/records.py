"""Run records for storage tests: a joint run's header and readings whose values show a mixed-up row."""

from __future__ import annotations

import hashlib

import numpy as np

from lightloom.sequencer.model.records import PortLayout, RunSources
from lightloom.sequencer.model.steps import StepColumns, StepList
from lightloom.sequencer.storage import FLAG_DRIFT, FLAG_RETRIED, Reading, RunHeader

ELEMENTS = ("quarter_wave_plate", "half_wave_plate", "mode_converter", "converter_angle",
            "image_rotator")
PORTS = ("det_hh", "det_hv", "det_vh", "det_vv")
BASIS = ("H,h", "H,v", "V,h", "V,v")


def make_steps(n: int, ports=PORTS) -> StepList:
    """A step list of n measure steps at the parked settings (what a run file's /steps holds)."""
    columns = StepColumns(
        kind=np.zeros(n, np.uint8), pass_index=np.arange(n) // 10, point_index=np.arange(n) % 10,
        repeat_index=np.zeros(n), settings=np.zeros((n, len(ELEMENTS))), dwell_s=np.full(n, 0.1),
        label=np.zeros(n), port_labels=np.zeros(n), labels=("H x h",),
        port_label_sets=(tuple(BASIS[i % 4] for i in range(len(ports))),),
    )
    return StepList("joint16", "sim", ELEMENTS, tuple(ports), columns, n_settings=10,
                    passes=max(1, -(-n // 10)), pass_interval_s=0.0, order="as-written")


def make_header(steps_total: int = 100, *, target: bool = True, ports=PORTS, name="joint16"):
    """A header like a joint run's: five elements, four ports, a target state."""
    protocol = f"name: {name}\nsettings: [H, V]\n"
    bench = "extends: sim\nsimulation: {seed: 3}\n"
    target_state = None
    if target:
        ket = np.array([1, 0, 0, 1j]) / np.sqrt(2)
        target_state = np.outer(ket, ket.conj())
    return RunHeader(
        format_version=1, tool_version="0.1.0", created_utc="2026-03-04T05:06:07+00:00",
        protocol_name=name, protocol_text=protocol,
        protocol_sha256=hashlib.sha256(protocol.encode()).hexdigest(),
        bench_name="sim", bench_text=bench, bench_sha256=hashlib.sha256(bench.encode()).hexdigest(),
        simulated=True, analyzes=("polarization", "spatial"), element_names=ELEMENTS,
        port_names=tuple(ports), port_units="W", dimension=4, basis_labels=BASIS,
        steps_total=steps_total, steps_json=make_steps(steps_total, ports).to_json(),
        ports=tuple(PortLayout(BASIS[i % 4], "hv"[i % 4 // 2], "HV"[i % 2], 1.0 + 0.01 * i)
                    for i in range(len(ports))),
        sources=RunSources("joint16", "/data/ünïcode/joint16.yaml", "sim", "sim"),
        target_state=target_state, target_label="Φ+ ünïcode", reference_device="ref", wavelength_nm=808.0,
    )


def make_reading(i: int, n_ports: int = len(PORTS), kind: str = "measure") -> Reading:
    """Reading i, with every value derived from i so that a mixed-up row is visible."""
    commanded = np.array([i, i + 0.25, 1.0, np.nan, -i], dtype=float)
    ops = (np.arange(n_ports * 16).reshape(n_ports, 4, 4) + i) * (1 - 0.5j)
    return Reading(
        step_index=i, kind=kind, pass_index=i // 10, point_index=i % 10, repeat_index=i % 2,
        commanded=commanded, readback=commanded + 0.001, values=np.arange(n_ports) + 1e-3 * i,
        reference_w=np.nan if i % 3 else 1e-3 + i, operators=ops, dwell_s=0.1 + i,
        t_start=1.7e9 + i, t_end=1.7e9 + i + 0.5, flags=(FLAG_DRIFT if i % 2 else FLAG_RETRIED),
    )
