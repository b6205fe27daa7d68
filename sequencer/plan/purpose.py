"""What a protocol determines, on a bench or on its own, and the check of its ``determines:`` key (pure)."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from lightloom.sequencer.errors import ProtocolError
from lightloom.sequencer.lang.protocol import Protocol
from lightloom.sequencer.model.steps import STEP_KINDS, StepList
from lightloom.sequencer.model.vocabulary import ANALYZERS
from lightloom.sequencer.optics.analyzer import (
    CONVERTER, CONVERTER_IN, CONVERTER_OUT, ELEMENT_NAMES, AnalyzerModel, ConverterModel, PlateModel,
    PortModel, RotatorModel, port_operators,
)
from lightloom.sequencer.optics.determination import Determination, determination
from lightloom.sequencer.optics.states import density

if TYPE_CHECKING:  # the compiler pulls in scipy; validate without a bench does not need it
    from lightloom.sequencer.plan.compiler import TableModel

FACTORS = ANALYZERS


def plan_operators(plan: StepList, table: TableModel) -> NDArray[np.complex128]:
    """The per-port measurement operators (n, 4, 4) of the distinct settings of the plan's measure steps."""
    c = plan.columns
    rows = c.settings[c.kind == STEP_KINDS.index("measure")]
    if not len(rows):
        return np.zeros((0, 4, 4), dtype=np.complex128)
    settings = np.unique(np.nan_to_num(rows, nan=0.0), axis=0)
    return port_operators(table.analyzer, table.ports, settings).reshape(-1, 4, 4)


def plan_determination(protocol: Protocol, plan: StepList, table: TableModel) -> Determination:
    """What ``plan`` (``protocol`` compiled for ``table``) determines, from its per-port operators."""
    return determination(plan_operators(plan, table), FACTORS, protocol.analyzes, scan=_is_scan(protocol))


_IDEAL = AnalyzerModel(
    quarter_wave_plate=PlateModel(90.0),
    half_wave_plate=PlateModel(180.0),
    mode_converter=ConverterModel(90.0, 45.0, 0.0, rotatable=False),
    image_rotator=RotatorModel(),
    splitter_extinction=0.0,
    sorter_visibility=1.0,
)


def requested_operators(protocol: Protocol) -> NDArray[np.complex128]:
    """The projectors the protocol asks for as written, each read by one ideal detector (n, 4, 4).

    Without a bench this is the cautious view: a table that detects both outputs of a splitter or
    sorter reads each projector's orthogonal partner as well, and may determine more.
    """
    out = []
    eye = np.eye(2, dtype=np.complex128)
    for point in protocol.points:
        if point.is_explicit:
            s = np.zeros(len(ELEMENT_NAMES))
            s[CONVERTER] = CONVERTER_OUT
            for name, value in point.elements.items():
                i = ELEMENT_NAMES.index(name)
                s[i] = (CONVERTER_IN if value == "in" else CONVERTER_OUT) if i == CONVERTER else float(value)
            rotatable = "converter_angle" in point.elements
            model = _IDEAL if not rotatable else AnalyzerModel(
                _IDEAL.quarter_wave_plate, _IDEAL.half_wave_plate, ConverterModel(90.0, 0.0, 0.0, rotatable=True),
                _IDEAL.image_rotator, 0.0, 1.0,
            )
            port = PortModel(
                "ideal",
                sorter_port="h" if "spatial" in protocol.analyzes else None,
                splitter_port="H" if "polarization" in protocol.analyzes else None,
            )
            out.append(port_operators(model, (port,), s[None, :])[0, 0])
            continue
        parts = []
        for factor in FACTORS:
            target = point.targets.get(factor)
            parts.append(density(target.ket_array()) if target is not None else eye)
        out.append(np.kron(parts[0], parts[1]))
    return np.array(out, dtype=np.complex128).reshape(-1, 4, 4)


def any_bench_determination(protocol: Protocol) -> Determination | None:
    """What the protocol's targets determine on the fullest table: every projector read together
    with its orthogonal partner on each analysed factor (both outputs of the splitter and of the
    sorter), which no bench exceeds. None for a protocol with explicit element settings or a scan:
    what those give depends on the bench's calibration."""
    if protocol.measure == "scan" or any(p.is_explicit for p in protocol.points):
        return None
    eye = np.eye(2, dtype=np.complex128)
    out = []
    for point in protocol.points:
        pairs = []
        for factor in FACTORS:
            target = point.targets.get(factor)
            if target is None:
                pairs.append((eye,))
                continue
            projector = density(target.ket_array())
            pairs.append((projector, eye - projector))
        out += [np.kron(a, b) for a in pairs[0] for b in pairs[1]]
    return determination(np.array(out, dtype=np.complex128).reshape(-1, 4, 4), FACTORS, protocol.analyzes,
                         scan=_is_scan(protocol))


def protocol_determination(protocol: Protocol) -> Determination:
    """What the protocol's requested projectors determine on one ideal detector (no bench given)."""
    return determination(requested_operators(protocol), FACTORS, protocol.analyzes, scan=_is_scan(protocol))


def _is_scan(protocol: Protocol) -> bool:
    return protocol.measure == "scan" or protocol.determines == "scan"


def require_purpose(protocol: Protocol, found: Determination, bench_name: str | None = None,
                    on: str | None = None) -> None:
    """Refuse a protocol whose ``determines:`` key asks for more than ``found``.

    Raises
    ------
    ProtocolError
        At the line of the ``determines:`` key, naming what is missing.
    """
    wanted = protocol.determines
    if wanted is None or wanted == "scan" or wanted == found.kind:
        return  # any set of readings can be a scan; only states need completeness
    factor = wanted.removesuffix("-state")
    if factor in found.stokes and all(found.stokes[factor]):
        return  # a factor's state is determined as part of a joint one
    on = f" {on}" if on else (f" on bench '{bench_name}'" if bench_name else "")
    if found.kind == "scan":
        what = "it is a scan (measure: scan), which determines no state"
    else:
        what = "missing " + "; ".join(found.missing) if found.missing else f"it determines {found.kind}"
    raise ProtocolError(
        f"determines: {wanted}, but the protocol cannot determine it{on}: {what};"
        " add the missing settings or change determines",
        protocol.source_path,
        protocol.determines_line or 1,
    )

