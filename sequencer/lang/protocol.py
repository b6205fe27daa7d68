"""The protocol language: what to measure (never which instrument), read from YAML into frozen objects.

The keys are documented in docs/protocol-language.md.
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Mapping

import numpy as np
from numpy.typing import NDArray

from lightloom.sequencer.lang import builtins
from lightloom.sequencer.errors import OpticsError, ProtocolError
from lightloom.sequencer.lang.fields import (
    Section,
    aside,
    choice,
    density_matrix,
    described,
    expect_seq,
    fail,
    fmt,
    frozen_matrix,
    normalized_ket,
    number,
    retyped,
)
from lightloom.sequencer.lang.fields import text as read_text
from lightloom.sequencer.optics.states import (
    JOINT_KETS,
    POLARIZATION_KETS,
    SPATIAL_KETS,
    ket_from_stokes,
)
from lightloom.sequencer.optics.stokes import density_from_stokes
from lightloom.sequencer.lang.yamlsafe import YMap, YNode, YScalar, parse_bytes, parse_text
from lightloom.sequencer.model.vocabulary import ANALYZERS, CONVERTER_STATES, ELEMENT_FACTOR, ELEMENT_NAMES, ORDERS, STAGE_ELEMENTS


NAMED_TARGETS: Mapping[str, Mapping[str, NDArray[np.complex128]]] = MappingProxyType(
    {"polarization": POLARIZATION_KETS, "spatial": SPATIAL_KETS}
)


# File key -> element name: angles carry their unit in the key, the converter state has none.
ELEMENT_KEYS: Mapping[str, str] = MappingProxyType(
    {
        "quarter_wave_plate_deg": "quarter_wave_plate",
        "half_wave_plate_deg": "half_wave_plate",
        "mode_converter": "mode_converter",
        "converter_angle_deg": "converter_angle",
        "image_rotator_deg": "image_rotator",
    }
)

SHORT_NAMES: Mapping[str, str] = MappingProxyType(
    {
        "quarter_wave_plate": "qwp",
        "half_wave_plate": "hwp",
        "mode_converter": "conv",
        "converter_angle": "conv_deg",
        "image_rotator": "rot",
    }
)

COMBINE: tuple[str, ...] = ("product", "zip")

MAX_ANGLE_DEG = 720.0
MAX_DWELL_S = 3600.0
MAX_POINTS = 10_000
MAX_REPEATS = 100_000
MAX_PASSES = 100_000
MAX_INTERVAL_S = 7 * 24 * 3600.0
STOKES_UNIT_TOLERANCE = 1e-3

_TOP_KEYS = (
    "protocol",
    "description",
    "analyzes",
    "measure",
    "dwell_s",
    "repeats",
    "background",
    "reference",
    "order",
    "seed",
    "sweep",
    "target_state",
    "frames_averaged",
    "determines",
)
MAX_FRAMES_AVERAGED = 10_000

PURPOSES: tuple[str, ...] = ("joint-state", "polarization-state", "spatial-state", "scan")
"""What a protocol may say it is for (``determines:``); checked against the bench before a run."""


@dataclass(frozen=True)
class FactorTarget:
    """A projective target for one factor: its label and its normalised 2-component ket."""

    factor: str
    label: str
    ket: tuple[complex, complex]

    def ket_array(self) -> NDArray[np.complex128]:
        """The ket as a (2,) complex array."""
        return np.array(self.ket, dtype=np.complex128)


@dataclass(frozen=True)
class MeasurementPoint:
    """One setting of the analyzers: target states per analysed factor, or explicit element settings.

    Exactly one of ``targets`` (factor -> FactorTarget) and ``elements`` (element name -> angle in
    degrees, or ``"in"``/``"out"`` for ``mode_converter``) is non-empty. ``line`` is where it was written.
    """

    label: str
    targets: Mapping[str, FactorTarget]
    elements: Mapping[str, float | str]
    line: int = field(compare=False)

    @property
    def is_explicit(self) -> bool:
        """True for explicit element settings, False for target states."""
        return bool(self.elements)


@dataclass(frozen=True)
class Background:
    """Shutter-closed readings: every ``every_points`` points (0 = never in between), at start and end."""

    every_points: int
    at_start: bool
    at_end: bool
    dwell_s: float


@dataclass(frozen=True)
class Reference:
    """Drift readings at the first point, every ``every_points`` points (0 = none)."""

    every_points: int
    dwell_s: float


@dataclass(frozen=True)
class Sweep:
    """The whole set of points measured ``passes`` times, pass starts at least ``interval_s`` apart."""

    passes: int
    interval_s: float


@dataclass(frozen=True)
class Scan:
    """A calibration scan: ``element`` stepped from ``from_deg`` to ``to_deg`` by ``step_deg``."""

    element: str
    from_deg: float
    to_deg: float
    step_deg: float


@dataclass(frozen=True)
class Protocol:
    """A parsed, checked protocol. ``points`` are in the order written (the compiler reorders).

    ``target_state`` is the normalised target density matrix (2x2 or 4x4, as a tuple of rows) or
    None; ``measure`` is ``"targets"``, ``"settings"`` or ``"scan"``; ``scan`` is set for scans.
    """

    name: str
    description: str
    analyzes: tuple[str, ...]
    points: tuple[MeasurementPoint, ...]
    dwell_s: float
    repeats: int
    background: Background
    reference: Reference
    order: str
    seed: int
    sweep: Sweep
    target_state: tuple[tuple[complex, ...], ...] | None
    target_label: str | None
    measure: str
    scan: Scan | None
    source_path: str = field(compare=False)
    source_text: str = field(compare=False, repr=False)
    sha256: str = field(compare=False)
    frames_averaged: int | None = None
    """Camera frames averaged into one reading (None: the camera's own setting)."""
    determines: str | None = None
    determines_line: int = field(default=0, compare=False)

    @property
    def dimension(self) -> int:
        """2 for one analysed factor, 4 for the joint space."""
        return 2 ** len(self.analyzes)

    @property
    def is_joint(self) -> bool:
        return len(self.analyzes) == 2

    def target_density(self) -> NDArray[np.complex128] | None:
        """The target density matrix as a read-only array, or None."""
        if self.target_state is None:
            return None
        rho = np.array(self.target_state, dtype=np.complex128)
        rho.setflags(write=False)
        return rho


def _frozen(mapping: dict) -> Mapping:
    return MappingProxyType(dict(mapping))


def _analyzes(sec: Section) -> tuple[str, ...]:
    node = sec.require("analyzes", "a list of one or both of: polarization, spatial")
    items = [node] if isinstance(node, YScalar) else list(expect_seq(node, "analyzes", "polarization, spatial"))
    if not items:
        fail("analyzes: expected one or both of: polarization, spatial; got an empty list", node)
    seen: list[str] = []
    for item in items:
        factor = choice(item, "analyzes", ANALYZERS)
        if factor in seen:
            fail(f"analyzes lists '{factor}' twice; list each factor once", item)
        seen.append(factor)
    return tuple(f for f in ANALYZERS if f in seen)


def _named_target(node: YScalar, factor: str, what: str) -> FactorTarget:
    name = node.value
    names = NAMED_TARGETS[factor]
    if isinstance(name, str) and name in names:
        ket = names[name]
        return FactorTarget(factor, name, (complex(ket[0]), complex(ket[1])))
    expected = ", ".join(names)
    other = "spatial" if factor == "polarization" else "polarization"
    if isinstance(name, str) and name in NAMED_TARGETS[other]:
        fail(
            f"{what}: '{name}' is a {other} target, not a {factor} one; {factor} targets are {expected}"
            " (polarization names are upper case, spatial modes lower case)",
            node,
        )
    hint = aside(name, names) if isinstance(name, str) else ""
    fail(
        f"{what}: unknown {factor} target {described(node)}{hint}; expected one of {expected},"
        " {stokes: [s1, s2, s3]} or {ket: [a, b]}",
        node,
    )


def _written(node: YNode) -> str:
    return node.text if isinstance(node, YScalar) and node.text else "?"


def _stokes_vector(node: YNode, what: str) -> tuple[float, float, float]:
    seq = expect_seq(node, what, "[s1, s2, s3]")
    if len(seq) != 3:
        fail(f"{what}: expected three numbers [s1, s2, s3], got {len(seq)}", seq)
    return tuple(number(item, f"{what}[{i}]") for i, item in enumerate(seq.items))  # type: ignore[return-value]


def factor_target(node: YNode, factor: str, what: str) -> FactorTarget:
    """Parse one factor's target: a name, ``{stokes: [s1, s2, s3]}`` or ``{ket: [a, b]}``."""
    if isinstance(node, YScalar):
        return _named_target(node, factor, what)
    sec = Section.of(node, what, "protocol", "a target name, {stokes: [...]} or {ket: [...]}")
    sec.check_keys(("stokes", "ket", "label"))
    given = [k for k in ("stokes", "ket") if sec.has(k)]
    if len(given) != 1:
        fail(f"{what}: give exactly one of stokes: [s1, s2, s3] or ket: [a, b]", sec.node)
    if given[0] == "stokes":
        s_node = sec.require("stokes", "[s1, s2, s3]")
        s = np.array(_stokes_vector(s_node, sec.name("stokes")))
        length = float(np.linalg.norm(s))
        if abs(length - 1.0) > STOKES_UNIT_TOLERANCE:
            fail(
                f"{sec.name('stokes')}: a projector needs a unit Stokes vector (length 1 within"
                f" {STOKES_UNIT_TOLERANCE:g}), got length {length:.4g}",
                s_node,
            )
        ket = ket_from_stokes(s / length)
        # Labels join factors with "," and bases with "/", so the components are separated by spaces.
        label = "s(" + " ".join(_written(item) for item in expect_seq(s_node, "stokes").items) + ")"
    else:
        k_node = sec.require("ket", "[a, b]")
        ket = np.array(normalized_ket(k_node, sec.name("ket"), 2))
        label = "ket(" + " ".join(_written(item) for item in expect_seq(k_node, "ket").items) + ")"
    if sec.has("label"):
        label = sec.text("label")
    return FactorTarget(factor, label, (complex(ket[0]), complex(ket[1])))


def element_settings(node: YNode, what: str, *, allow_empty: bool = False) -> dict[str, float | str]:
    """Parse ``{quarter_wave_plate_deg: 0, mode_converter: out, ...}`` into element name -> value."""
    sec = Section.of(node, what, "protocol", "element settings such as half_wave_plate_deg: 22.5")
    sec.check_keys(tuple(ELEMENT_KEYS))
    values: dict[str, float | str] = {}
    for entry in sec.node.entries:
        element = ELEMENT_KEYS[entry.key]
        if sec.get(entry.key) is None:
            fail(f"{sec.name(entry.key)}: expected a value, got nothing (null)", entry.value)
        if element == "mode_converter":
            values[element] = choice(entry.value, sec.name(entry.key), CONVERTER_STATES)
        else:
            values[element] = number(entry.value, sec.name(entry.key), "deg", ge=-MAX_ANGLE_DEG, le=MAX_ANGLE_DEG)
    if not values and not allow_empty:
        fail(f"{what}: give at least one element setting, e.g. half_wave_plate_deg: 22.5", sec.node)
    return {e: values[e] for e in ELEMENT_NAMES if e in values}


def elements_label(values: Mapping[str, float | str]) -> str:
    """``"qwp=0,hwp=22.5,conv=out"`` for element settings."""
    return ",".join(
        f"{SHORT_NAMES[e]}={v if isinstance(v, str) else fmt(v)}" for e, v in values.items()
    )


def _targets_point(targets: dict[str, FactorTarget], line: int, label: str | None = None) -> MeasurementPoint:
    ordered = {f: targets[f] for f in ANALYZERS if f in targets}
    return MeasurementPoint(
        label or ",".join(t.label for t in ordered.values()),
        _frozen(ordered),
        _frozen({}),
        line,
    )


def _elements_point(values: dict[str, float | str], line: int, label: str | None = None) -> MeasurementPoint:
    return MeasurementPoint(label or elements_label(values), _frozen({}), _frozen(values), line)


def _measure_targets(sec: Section, analyzes: tuple[str, ...]) -> list[MeasurementPoint]:
    sec.check_keys(ANALYZERS + ("combine",))
    combine = sec.choice("combine", COMBINE, "product")
    lists: list[list[FactorTarget]] = []
    lines: list[list[int]] = []
    for factor in ANALYZERS:
        if factor not in analyzes:
            if sec.has(factor):
                fail(
                    f"{sec.name(factor)}: targets for {factor}, but the protocol analyzes only"
                    f" {', '.join(analyzes)}; add {factor} to analyzes or remove these targets",
                    sec.node.entry(factor).value,  # type: ignore[union-attr]
                )
            continue
        node = sec.require(factor, f"a list of {factor} targets")
        seq = expect_seq(node, sec.name(factor), f"{factor} targets")
        if not seq.items:
            fail(f"{sec.name(factor)}: expected at least one target, got an empty list", seq)
        lists.append([factor_target(item, factor, f"{sec.name(factor)}[{i}]") for i, item in enumerate(seq.items)])
        lines.append([item.line for item in seq.items])
    points: list[MeasurementPoint] = []
    if len(lists) == 1:
        for target, line in zip(lists[0], lines[0]):
            points.append(_targets_point({target.factor: target}, line))
    elif combine == "zip":
        if len(lists[0]) != len(lists[1]):
            fail(
                f"{sec.name('combine')}: zip needs equally long lists, got {len(lists[0])} polarization"
                f" and {len(lists[1])} spatial targets; use combine: product or make them equal",
                sec.node.get("combine") or sec.node,
            )
        for p, s, line in zip(lists[0], lists[1], lines[0]):
            points.append(_targets_point({p.factor: p, s.factor: s}, line))
    else:
        for p, line in zip(lists[0], lines[0]):
            for s in lists[1]:
                points.append(_targets_point({p.factor: p, s.factor: s}, line))
    return points


def _measure_settings(node: YNode, analyzes: tuple[str, ...]) -> list[MeasurementPoint]:
    seq = expect_seq(node, "measure.settings", "a list of settings")
    if not seq.items:
        fail("measure.settings: expected at least one setting, got an empty list", seq)
    points = []
    for i, item in enumerate(seq.items):
        what = f"measure.settings[{i}]"
        sec = Section.of(item, what, "protocol", "targets per factor, or elements: {...}")
        sec.check_keys(ANALYZERS + ("elements", "label"))
        label = sec.text("label") if sec.has("label") else None
        if sec.has("elements"):
            extra = [f for f in ANALYZERS if sec.has(f)]
            if extra:
                fail(f"{what}: give either elements or targets ({', '.join(extra)}), not both", sec.node)
            points.append(_elements_point(element_settings(sec.require("elements", ""), sec.name("elements")),
                                          item.line, label))
            continue
        targets = {}
        for factor in ANALYZERS:
            if factor in analyzes:
                t_node = sec.require(factor, f"a {factor} target (or give elements: {{...}})")
                targets[factor] = factor_target(t_node, factor, sec.name(factor))
            elif sec.has(factor):
                fail(
                    f"{sec.name(factor)}: a {factor} target, but the protocol analyzes only"
                    f" {', '.join(analyzes)}; add {factor} to analyzes or remove it",
                    sec.node.entry(factor).value,  # type: ignore[union-attr]
                )
        points.append(_targets_point(targets, item.line, label))
    return points


def _measure_scan(sec: Section, analyzes: tuple[str, ...]) -> tuple[list[MeasurementPoint], Scan]:
    sec.check_keys(("element", "from_deg", "to_deg", "step_deg", "fixed"))
    element = sec.choice("element", STAGE_ELEMENTS)
    if ELEMENT_FACTOR[element] not in analyzes:
        fail(
            f"{sec.name('element')}: {element} belongs to the {ELEMENT_FACTOR[element]} analyzer, but the"
            f" protocol analyzes only {', '.join(analyzes)}; add {ELEMENT_FACTOR[element]} to analyzes",
            sec.node.entry("element").value,  # type: ignore[union-attr]
        )
    start = sec.number("from_deg", "deg", ge=-MAX_ANGLE_DEG, le=MAX_ANGLE_DEG)
    stop = sec.number("to_deg", "deg", ge=-MAX_ANGLE_DEG, le=MAX_ANGLE_DEG)
    step = sec.number("step_deg", "deg", gt=0.0, le=2 * MAX_ANGLE_DEG)
    span_steps = abs(stop - start) / step  # inf for a step below the smallest float ratio
    count = int(math.floor(span_steps + 1e-9)) + 1 if span_steps < MAX_POINTS else MAX_POINTS + 1
    if count > MAX_POINTS:
        fail(f"{sec.name('step_deg')}: the scan has more than {MAX_POINTS} points; use a larger step",
             sec.node.entry("step_deg").value)  # type: ignore[union-attr]
    fixed: dict[str, float | str] = {}
    if sec.has("fixed"):
        fixed_node = sec.require("fixed", "")
        fixed = element_settings(fixed_node, sec.name("fixed"), allow_empty=True)
        if element in fixed:
            fail(f"{sec.name('fixed')}: {element} is the scanned element; it cannot also be fixed", fixed_node)
    direction = 1.0 if stop >= start else -1.0
    points = []
    for i in range(count):
        angle = round(start + direction * i * step, 9) + 0.0
        values = dict(fixed)
        values[element] = angle
        ordered = {e: values[e] for e in ELEMENT_NAMES if e in values}
        points.append(_elements_point(ordered, sec.line, f"{SHORT_NAMES[element]}={fmt(angle)}"))
    return points, Scan(element, start, stop, step)


def _target_state(sec: Section, analyzes: tuple[str, ...]) -> tuple[tuple[tuple[complex, ...], ...], str]:
    dim = 2 ** len(analyzes)
    sec.check_keys(("name", "ket", "stokes", "density_matrix"))
    given = [k for k in ("name", "ket", "stokes", "density_matrix") if sec.has(k)]
    if len(given) != 1:
        fail("target_state: give exactly one of name, ket, stokes or density_matrix", sec.node)
    key = given[0]
    node = sec.require(key, "")
    what = sec.name(key)
    if key == "name":
        if dim == 4:
            names = dict(JOINT_KETS)
            for p, pk in POLARIZATION_KETS.items():
                for s, sk in SPATIAL_KETS.items():
                    names[f"{p},{s}"] = np.kron(pk, sk)
            listed = ", ".join(JOINT_KETS) + ", or a product such as H,h"
        else:
            names = dict(NAMED_TARGETS[analyzes[0]])
            listed = ", ".join(names)
        value = node.value if isinstance(node, YScalar) else None
        if not isinstance(value, str) or value not in names:
            hint = aside(value, names) if isinstance(value, str) else ""
            fail(
                f"{what}: unknown target state {described(node)} for a {dim}-dimensional"
                f" ({' x '.join(analyzes)}) protocol{hint}; expected {listed}",
                node,
            )
        ket = names[value]
        return frozen_matrix(np.outer(ket, ket.conj())), value
    if key == "ket":
        n = len(node) if hasattr(node, "__len__") and not isinstance(node, YMap) else dim
        if n != dim:
            fail(
                f"{what}: the protocol analyzes {' and '.join(analyzes)}, so the target ket needs"
                f" {dim} amplitudes (basis {'|H,h>, |H,v>, |V,h>, |V,v>' if dim == 4 else 'of that factor'}),"
                f" got {n}",
                node,
            )
        ket = np.array(normalized_ket(node, what, dim))
        return frozen_matrix(np.outer(ket, ket.conj())), "ket"
    if key == "stokes":
        if dim != 2:
            fail(f"{what}: a Stokes target is for one factor only; for a joint protocol give name, ket"
                 " or density_matrix", node)
        s = np.array(_stokes_vector(node, what))
        if float(np.linalg.norm(s)) > 1.0 + STOKES_UNIT_TOLERANCE:
            fail(f"{what}: a Stokes vector longer than 1 is not a physical state (length"
                 f" {float(np.linalg.norm(s)):.4g})", node)
        return frozen_matrix(density_from_stokes(s)), "stokes"
    rows = expect_seq(node, what, f"{dim} rows of {dim} complex numbers")
    if len(rows) != dim:
        fail(f"{what}: the protocol is {dim}-dimensional, so the matrix needs {dim} rows, got {len(rows)}", node)
    return density_matrix(node, what, dim), "density_matrix"


def _protocol_from_tree(root: YNode, source_path: str, source_text: str) -> Protocol:
    sec = Section.of(root, "", "protocol", "protocol: NAME, analyzes: [...], measure: {...}, dwell_s: ...")
    if "bench" in sec.node and "protocol" not in sec.node:
        fail("this is a bench file, not a protocol; give it with --bench BENCH", sec.node.get("bench"))  # type: ignore[arg-type]
    sec.check_keys(_TOP_KEYS)
    name = read_text(sec.require("protocol", "the protocol's name"), "protocol")
    description = sec.text("description", "")
    analyzes = _analyzes(sec)

    measure = sec.section("measure", "exactly one of targets, settings or scan", required=True)
    assert measure is not None
    measure.check_keys(("targets", "settings", "scan"))
    kinds = [k for k in ("targets", "settings", "scan") if measure.has(k)]
    if len(kinds) != 1:
        found = f"got {', '.join(kinds)}" if kinds else "got none"
        fail(f"measure: give exactly one of targets, settings or scan; {found}", measure.node)
    kind = kinds[0]
    scan: Scan | None = None
    if kind == "targets":
        points = _measure_targets(measure.section("targets", "a list of targets per factor"), analyzes)  # type: ignore[arg-type]
    elif kind == "settings":
        points = _measure_settings(measure.require("settings", ""), analyzes)
    else:
        points, scan = _measure_scan(measure.section("scan", "element, from_deg, to_deg, step_deg"), analyzes)  # type: ignore[arg-type]
    if len(points) > MAX_POINTS:
        fail(f"measure: {len(points)} points, more than {MAX_POINTS}; split the protocol", measure.node)

    dwell_s = sec.number("dwell_s", "s", gt=0.0, le=MAX_DWELL_S)
    repeats = sec.integer("repeats", 1, ge=1, le=MAX_REPEATS)
    frames_averaged = (
        sec.integer("frames_averaged", ge=1, le=MAX_FRAMES_AVERAGED) if sec.has("frames_averaged") else None
    )

    bg = sec.section("background", "every_points, at_start, at_end, dwell_s")
    if bg is not None:
        bg.check_keys(("every_points", "at_start", "at_end", "dwell_s"))
        background = Background(
            bg.integer("every_points", 0, ge=0, le=MAX_POINTS),
            bg.boolean("at_start", True),
            bg.boolean("at_end", True),
            bg.number("dwell_s", "s", dwell_s, gt=0.0, le=MAX_DWELL_S),
        )
    else:
        background = Background(0, True, True, dwell_s)

    ref = sec.section("reference", "every_points, dwell_s")
    if ref is not None:
        ref.check_keys(("every_points", "dwell_s"))
        reference = Reference(
            ref.integer("every_points", 0, ge=0, le=MAX_POINTS),
            ref.number("dwell_s", "s", dwell_s, gt=0.0, le=MAX_DWELL_S),
        )
    else:
        reference = Reference(0, dwell_s)

    order = sec.choice("order", ORDERS, "as-written")
    seed = sec.integer("seed", 0, ge=0, le=2**63 - 1)

    sw = sec.section("sweep", "passes, interval_s")
    if sw is not None:
        sw.check_keys(("passes", "interval_s"))
        sweep = Sweep(sw.integer("passes", 1, ge=1, le=MAX_PASSES), sw.number("interval_s", "s", 0.0, ge=0.0,
                                                                              le=MAX_INTERVAL_S))
    else:
        sweep = Sweep(1, 0.0)

    target_state = None
    target_label = None
    ts = sec.section("target_state", "name, ket, stokes or density_matrix")
    if ts is not None:
        target_state, target_label = _target_state(ts, analyzes)

    determines = sec.choice("determines", PURPOSES, None)
    if determines is not None:
        _check_purpose(determines, analyzes, sec)

    return Protocol(
        name=name,
        description=description,
        analyzes=analyzes,
        points=tuple(points),
        dwell_s=dwell_s,
        repeats=repeats,
        background=background,
        reference=reference,
        order=order,
        seed=seed,
        sweep=sweep,
        target_state=target_state,
        target_label=target_label,
        measure=kind,
        scan=scan,
        source_path=source_path,
        source_text=source_text,
        sha256=hashlib.sha256(source_text.encode("utf-8")).hexdigest(),
        frames_averaged=frames_averaged,
        determines=determines,
        determines_line=sec.key_line("determines") if determines is not None else 0,
    )


def _check_purpose(determines: str, analyzes: tuple[str, ...], sec: Section) -> None:
    """A stated purpose must fit the analysed factors (the bench check comes at compile time)."""
    needs = {"joint-state": ("polarization", "spatial"), "polarization-state": ("polarization",),
             "spatial-state": ("spatial",)}.get(determines, ())
    lacking = [f for f in needs if f not in analyzes]
    if lacking:
        fail(
            f"determines: {determines} needs analyzes to include {' and '.join(lacking)},"
            f" but the protocol analyzes only {', '.join(analyzes)}",
            sec.node.get("determines"),  # type: ignore[arg-type]
        )


def parse_protocol(text: str, path: str) -> Protocol:
    """Parse protocol YAML ``text``; ``path`` names the file in messages and in the result.

    Raises
    ------
    ProtocolError
        ``path:line: what is wrong and what is expected``.
    """
    with retyped(ProtocolError):
        try:
            return _protocol_from_tree(parse_text(text, path), path, text)
        except OpticsError as exc:
            raise ProtocolError(str(exc), path, 1) from None


def load_protocol(path_or_builtin_name: str | Path) -> Protocol:
    """Read a protocol from a file path, or from the built-in library by name (``joint-36``)."""
    with retyped(ProtocolError):
        source = builtins.find("protocol", str(path_or_builtin_name))
        root = parse_bytes(source.data, source.file)
        source_text = source.data.decode("utf-8").lstrip("\ufeff")
        try:
            return _protocol_from_tree(root, source.file, source_text)
        except OpticsError as exc:
            raise ProtocolError(str(exc), source.file, 1) from None
