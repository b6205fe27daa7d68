"""From a bench and a protocol to the compiler's plain inputs, and ``compile_protocol``.

Two optics models come from one bench: what the user believes (``calibration``), used to compile
settings and to compute the measurement operators stored with every reading; and, for simulated
benches, the truth of the simulated table (``simulation.table``), used only by the simulators.
"""

from __future__ import annotations


from lightloom.sequencer.lang.bench import Bench
from lightloom.sequencer.plan.compiler import Request, TableModel, compile_requests
from lightloom.sequencer.errors import InputError
from lightloom.sequencer.plan.kinematics import StageKinematics
from lightloom.sequencer.optics.analyzer import (
    ELEMENT_NAMES, AnalyzerModel, ConverterModel, PlateModel, PortModel, RotatorModel,
)
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.model.vocabulary import STAGE_ELEMENTS
from lightloom.sequencer.lang.protocol import Protocol
from lightloom.sequencer.plan.purpose import plan_determination, require_purpose


def analyzer_model(bench: Bench, truth: bool = False) -> AnalyzerModel:
    """The analyzer chain of ``bench``: its calibration, or (``truth``) the simulated table."""
    src = bench.simulation.table if (truth and bench.simulation is not None) else bench.calibration
    roles = bench.roles
    if truth and bench.simulation is not None:
        splitter = bench.simulation.table.polarizing_splitter
        sorter = bench.simulation.table.parity_sorter
    else:
        splitter, sorter = bench.optics.polarizing_splitter, bench.optics.parity_sorter
    q, h, c, r = src.quarter_wave_plate, src.half_wave_plate, src.mode_converter, src.image_rotator
    return AnalyzerModel(
        quarter_wave_plate=PlateModel(q.retardance_deg, q.fast_axis_offset_deg) if roles.quarter_wave_plate else None,
        half_wave_plate=PlateModel(h.retardance_deg, h.fast_axis_offset_deg) if roles.half_wave_plate else None,
        mode_converter=(
            ConverterModel(c.retardance_deg, c.axis_deg, c.axis_offset_deg, roles.converter_angle is not None)
            if roles.mode_converter else None
        ),
        image_rotator=RotatorModel(r.axis_offset_deg) if roles.image_rotator else None,
        splitter_extinction=splitter.extinction if splitter is not None else None,
        sorter_visibility=sorter.visibility if sorter is not None else None,
    )


def port_models(bench: Bench, truth: bool = False) -> tuple[PortModel, ...]:
    """Detector ports of ``bench`` with their gains (calibrated, or the simulated truth)."""
    gains = bench.simulation.table.port_gain if (truth and bench.simulation is not None) else bench.calibration.port_gain
    return tuple(
        PortModel(d.device, d.sorter_port, d.splitter_port, float(gains.get(d.device, 1.0)))
        for d in bench.roles.detectors
    )


def table_model(bench: Bench, truth: bool = False) -> TableModel:
    """Everything the compiler, the estimator of times and the runner need to know of ``bench``."""
    roles = bench.roles
    role_of = {name: getattr(roles, name) for name in ELEMENT_NAMES}
    present = frozenset(name for name in ELEMENT_NAMES if role_of[name] is not None)
    kinematics: dict[str, StageKinematics] = {}
    for role in STAGE_ELEMENTS:
        device_name = role_of[role]
        if device_name is None:
            continue
        spec = bench.devices[device_name]
        lim = spec.limits
        assert lim is not None, "the bench loader guarantees limits for rotation stages"
        kinematics[role] = StageKinematics(
            speed_deg_per_s=lim.speed_deg_per_s,
            acceleration_deg_per_s2=lim.acceleration_deg_per_s2,
            backlash_deg=spec.backlash_deg,
            settle_s=spec.settle_s,
            min_deg=lim.min_deg,
            max_deg=lim.max_deg,
            overhead_s=2 * spec.overhead_s,  # a move command and a busy/position query
        )
    conv = bench.devices[roles.mode_converter] if roles.mode_converter else None
    shutter = bench.devices[roles.shutter]
    readers = [bench.devices[d.device] for d in roles.detectors]
    if roles.reference:
        readers.append(bench.devices[roles.reference])
    return TableModel(
        name=bench.name,
        analyzer=analyzer_model(bench, truth),
        ports=port_models(bench, truth),
        present=present,
        kinematics=kinematics,
        converter_switch_s=(conv.switch_s + conv.settle_s + 2 * conv.overhead_s) if conv else 0.0,
        shutter_s=shutter.switch_s + shutter.settle_s + shutter.overhead_s,
        read_overhead_s=max(r.overhead_s for r in readers) if readers else 0.0,
    )


def protocol_requests(protocol: Protocol) -> list[Request]:
    """The protocol's points as compiler requests."""
    out = []
    for point in protocol.points:
        if point.is_explicit:
            out.append(Request(elements=dict(point.elements), line=point.line))
            continue
        pol = point.targets.get("polarization")
        sp = point.targets.get("spatial")
        out.append(
            Request(
                polarization=(pol.ket_array(), pol.label) if pol is not None else None,
                spatial=(sp.ket_array(), sp.label) if sp is not None else None,
                line=point.line,
            )
        )
    return out


def compile_protocol(protocol: Protocol, bench: Bench) -> StepList:
    """Compile ``protocol`` for ``bench`` (pure). Errors point at the protocol line that asked.

    Raises
    ------
    BenchError
        ``PROTOCOL:LINE: ...`` when the bench cannot measure what a point asks for.
    ProtocolError
        At the ``determines:`` line when the bench cannot deliver what the protocol says it is for.
    """
    table = table_model(bench)
    try:
        plan = compile_requests(
            table,
            protocol_requests(protocol),
            protocol_name=protocol.name,
            analyzes=protocol.analyzes,
            dwell_s=protocol.dwell_s,
            repeats=protocol.repeats,
            order=protocol.order,
            seed=protocol.seed,
            background_every=protocol.background.every_points,
            background_at_start=protocol.background.at_start,
            background_at_end=protocol.background.at_end,
            background_dwell_s=protocol.background.dwell_s,
            reference_every=protocol.reference.every_points,
            reference_dwell_s=protocol.reference.dwell_s,
            passes=protocol.sweep.passes,
            pass_interval_s=protocol.sweep.interval_s,
        )
    except InputError as exc:
        if exc.file is None:
            raise type(exc)(
                f"{exc.message} (bench '{bench.name}', {bench.source_path})",
                protocol.source_path,
                exc.line if exc.line is not None else 1,
            ) from None
        raise
    if protocol.determines not in (None, "scan"):
        require_purpose(protocol, plan_determination(protocol, plan, table), bench.name)
    return plan
