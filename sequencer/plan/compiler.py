"""The compiler, a pure function (protocol, bench) -> StepList.

Target states become element settings through the optics model and the bench's calibration.
Every port of a setting measures a projector, so targets that share a basis share a setting when
the table detects both outputs of that factor: with a polarizing beam splitter the 6 polarization
projectors need 3 settings, with four ports the 36 joint projectors need 9; with one detector every
projector needs its own setting. A factor the protocol does not analyse is parked; when the table
resolves that factor but detects only some of its outputs, each setting is measured once per
output of a basis of that factor, and the analysis sums them (``point_index`` and the port label
tie the parts together).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from lightloom.sequencer.errors import BenchError, OpticsError, ProtocolError
from lightloom.sequencer.plan.kinematics import StageKinematics, nearest_equivalent_deg
from lightloom.sequencer.optics.analyzer import (
    CONVERTER, CONVERTER_ANGLE, CONVERTER_IN, CONVERTER_OUT, ELEMENT_NAMES, HWP, QWP, ROTATOR,
    AnalyzerModel, PortModel, complete_port_set,
)
from lightloom.sequencer.optics.settings import polarization_setting_variants, spatial_setting
from lightloom.sequencer.optics.states import POLARIZATION_KETS, SPATIAL_KETS, ORTHOGONAL_NAME
from lightloom.sequencer.optics.stokes import stokes_from_density
from lightloom.sequencer.optics.states import density
from lightloom.sequencer.plan.ordering import PERIOD_DEG, order_settings
from lightloom.sequencer.model.elements import COLUMN, ElementSettings
from lightloom.sequencer.model.steps import STEP_KINDS, StepColumns, StepList

# A run file holds its whole plan; beyond this a series belongs in several runs.
MAX_STEPS = 200_000


@dataclass(frozen=True)
class TableModel:
    """What the compiler needs to know about a bench, as plain data."""

    name: str
    analyzer: AnalyzerModel
    ports: tuple[PortModel, ...]
    present: frozenset[str]  # the elements (ELEMENT_NAMES) a device plays on this bench
    kinematics: Mapping[str, StageKinematics]  # per stage element present
    converter_switch_s: float = 0.0
    shutter_s: float = 0.0
    read_overhead_s: float = 0.0


@dataclass(frozen=True)
class Request:
    """One projector the protocol asks for: a ket and label per factor (None = not analysed),
    or explicit element settings."""

    polarization: tuple[np.ndarray, str] | None = None
    spatial: tuple[np.ndarray, str] | None = None
    elements: Mapping[str, float | str] | None = None
    line: int | None = None


@dataclass
class _Basis:
    stokes: np.ndarray
    ket: np.ndarray
    labels: list[str]


@dataclass
class _FactorRegistry:
    """Bases of one factor, merged by orthogonality when both outputs are detected."""

    merge: bool
    bases: list[_Basis] = field(default_factory=list)

    def find(self, ket: np.ndarray, label: str, partner_name: str | None) -> tuple[int, int]:
        s = stokes_from_density(density(ket))[1:]
        for i, b in enumerate(self.bases):
            if np.allclose(s, b.stokes, atol=1e-9):
                return i, 0
            if self.merge and np.allclose(s, -b.stokes, atol=1e-9):
                if b.labels[1].startswith("~"):
                    b.labels[1] = label
                return i, 1
        other = partner_name if partner_name is not None else f"~{label}"
        self.bases.append(_Basis(s, ket, [label, other]))
        return len(self.bases) - 1, 0


# A factor's part of a setting: (basis index in its registry, member 0 or 1 of that basis).
_FactorPart = tuple[int, int]


@dataclass(frozen=True)
class _ExplicitEntry:
    """A setting the protocol gives as element values."""

    settings: np.ndarray  # one value per ELEMENT_NAMES, NaN where absent
    label: str


@dataclass(frozen=True)
class _TargetEntry:
    """A setting that measures target projectors; None for a factor that is parked."""

    polarization: _FactorPart | None
    spatial: _FactorPart | None
    request_index: int  # which request first asked for it (0-based)
    line: int | None  # its protocol line


@dataclass(frozen=True)
class _TargetKey:
    """What makes two target settings the same setting (a merged basis: the basis alone)."""

    polarization: _FactorPart | int | None
    spatial: _FactorPart | int | None


@dataclass(frozen=True)
class _Schedule:
    """How the settings are measured: dwell times (s), repeats, backgrounds, references, passes."""

    dwell_s: float
    repeats: int
    background_every: int
    background_at_start: bool
    background_at_end: bool
    background_dwell_s: float
    reference_every: int
    reference_dwell_s: float
    passes: int
    pass_interval_s: float
    order: str


@dataclass(frozen=True)
class _Reference:
    """The setting drift references are taken at: its element values, port labels and point index."""

    settings: np.ndarray
    port_labels: tuple[str, ...]
    point: int


def _partner(label: str) -> str | None:
    """The orthogonal state's label: a named one (H -> V), or a Stokes target's negated vector."""
    if label.startswith("s(") and label.endswith(")"):
        parts = label[2:-1].split()
        flipped = [p[1:] if p.startswith("-") else p if p.strip("0.+") == "" else "-" + p.lstrip("+") for p in parts]
        return "s(" + " ".join(flipped) + ")"
    return ORTHOGONAL_NAME.get(label)


def _outputs(ports: Sequence[PortModel]) -> tuple[list[str | None], list[str | None], bool]:
    pol = sorted({p.splitter_port for p in ports}, key=str)
    sp = sorted({p.sorter_port for p in ports}, key=str)
    return pol, sp, complete_port_set([(p.sorter_port, p.splitter_port) for p in ports])


def compile_requests(
    table: TableModel,
    requests: Sequence[Request],
    *,
    protocol_name: str,
    analyzes: tuple[str, ...],
    dwell_s: float,
    repeats: int,
    order: str = "as-written",
    seed: int = 0,
    background_every: int = 0,
    background_at_start: bool = True,
    background_at_end: bool = True,
    background_dwell_s: float | None = None,
    reference_every: int = 0,
    reference_dwell_s: float | None = None,
    passes: int = 1,
    pass_interval_s: float = 0.0,
) -> StepList:
    """Compile projector requests into an ordered StepList for ``table``.

    Raises
    ------
    BenchError
        If the table cannot measure what is asked (missing analyzer element, unreachable target).
    """
    model = table.analyzer
    pol_out, sp_out, complete = _outputs(table.ports)
    if "polarization" in analyzes and not model.analyzes_polarization:
        raise BenchError(f"the protocol analyses polarization but bench '{table.name}' has no polarizing splitter (optics.polarizing_splitter)")
    if "spatial" in analyzes and not model.analyzes_spatial:
        raise BenchError(f"the protocol analyses the spatial mode but bench '{table.name}' has no parity sorter (optics.parity_sorter)")
    merge_pol = complete and len(pol_out) == 2
    merge_sp = complete and len(sp_out) == 2
    pol_port = "H" if merge_pol else (table.ports[0].splitter_port or "H")
    sp_port = "h" if merge_sp else (table.ports[0].sorter_port or "h")
    pol_reg, sp_reg = _FactorRegistry(merge_pol), _FactorRegistry(merge_sp)
    # Expansion of a factor that is resolved at the ports but not analysed and not fully detected.
    expand_pol = "polarization" not in analyzes and model.analyzes_polarization and not merge_pol
    expand_sp = "spatial" not in analyzes and model.analyzes_spatial and not merge_sp

    entries, logical, points = _collect_entries(
        table, requests, pol_reg, sp_reg, merge_pol, merge_sp, expand_pol, expand_sp,
    )
    if not entries:
        raise ProtocolError(f"protocol '{protocol_name}' asks for no measurement")
    variants, variant_labels = _setting_variants(
        table, entries, pol_reg, sp_reg, analyzes, merge_pol, merge_sp, pol_port, sp_port,
    )
    order_idx, choice = order_settings(variants, table, order, seed, reference_every)
    settings = np.array([variants[k][choice[k]] for k in range(len(variants))])
    key_labels = [variant_labels[k][choice[k]] for k in range(len(variants))]
    # Drift references are taken at the first setting measured (for as-written: the first point).
    ref_index = order_idx[0]
    schedule = _Schedule(
        dwell_s=dwell_s,
        repeats=repeats,
        background_every=background_every,
        background_at_start=background_at_start,
        background_at_end=background_at_end,
        background_dwell_s=background_dwell_s if background_dwell_s is not None else dwell_s,
        reference_every=reference_every,
        reference_dwell_s=reference_dwell_s if reference_dwell_s is not None else dwell_s,
        passes=passes,
        pass_interval_s=pass_interval_s,
        order=order,
    )
    reference = _Reference(settings[ref_index], key_labels[ref_index], logical[ref_index])
    return _expand_steps(
        table, protocol_name, settings, key_labels, logical, order_idx, points,
        schedule=schedule, reference=reference,
    )


def _collect_entries(
    table: TableModel,
    requests: Sequence[Request],
    pol_reg: _FactorRegistry,
    sp_reg: _FactorRegistry,
    merge_pol: bool,
    merge_sp: bool,
    expand_pol: bool,
    expand_sp: bool,
) -> tuple[list[_ExplicitEntry | _TargetEntry], list[int], list[int]]:
    """The distinct settings the requests need, in the order first asked for.

    Returns the entries, each entry's logical point index, and per entry the number of protocol
    points it is the first setting of (for background.every_points).
    """
    keys: list[tuple | _TargetKey] = []
    entries: list[_ExplicitEntry | _TargetEntry] = []
    logical: list[int] = []
    points: list[int] = []

    def factor_parts(req_part, reg: _FactorRegistry, expand: bool, kets: Mapping[str, np.ndarray],
                     names: tuple[str, str]) -> list[_FactorPart | None]:
        if req_part is not None:
            ket, label = req_part
            return [reg.find(np.asarray(ket), label, _partner(label))]
        if expand:
            return [reg.find(kets[n], n, _partner(n)) for n in names]
        return [None]

    for r_index, req in enumerate(requests):
        if req.elements is not None:
            s = _explicit_settings(table, req)
            key = tuple(np.round(np.nan_to_num(s, nan=-999.0), 9))
            if key not in keys:
                keys.append(key)
                entries.append(_ExplicitEntry(s, _explicit_label(req.elements)))
                logical.append((max(logical) + 1) if logical else 0)
                points.append(0)
            points[keys.index(key)] += 1
            continue
        pol_parts = factor_parts(req.polarization, pol_reg, expand_pol, POLARIZATION_KETS, ("H", "V"))
        sp_parts = factor_parts(req.spatial, sp_reg, expand_sp, SPATIAL_KETS, ("h", "v"))
        logical_index = None
        credited = False
        for pp in pol_parts:
            for spp in sp_parts:
                target_key = _TargetKey(
                    pp[0] if (pp is not None and merge_pol) else pp,
                    spp[0] if (spp is not None and merge_sp) else spp,
                )
                if target_key in keys:
                    if not credited:
                        points[keys.index(target_key)] += 1
                        credited = True
                    continue
                if logical_index is None:
                    logical_index = (max(logical) + 1) if logical else 0
                keys.append(target_key)
                entries.append(_TargetEntry(pp, spp, r_index, req.line))
                logical.append(logical_index)
                points.append(0 if credited else 1)
                credited = True
    return entries, logical, points


def _setting_variants(
    table: TableModel,
    entries: Sequence[_ExplicitEntry | _TargetEntry],
    pol_reg: _FactorRegistry,
    sp_reg: _FactorRegistry,
    analyzes: tuple[str, ...],
    merge_pol: bool,
    merge_sp: bool,
    pol_port: str,
    sp_port: str,
) -> tuple[list[np.ndarray], list[list[tuple[str, ...]]]]:
    """Every setting with the alternatives that measure the same projectors, and their port labels.

    A merged basis may be sent either way round through the splitter or the sorter: least-motion
    ordering picks among the alternatives.
    """
    variants: list[np.ndarray] = []
    variant_labels: list[list[tuple[str, ...]]] = []
    solved: dict = {}
    for entry in entries:
        if isinstance(entry, _ExplicitEntry):
            variants.append(entry.settings[None, :])
            variant_labels.append([tuple(entry.label for _ in table.ports)])
            continue
        pp, spp = entry.polarization, entry.spatial
        pol_choices = ["H", "V"] if (merge_pol and pp is not None) else [pol_port]
        sp_choices = ["h", "v"] if (merge_sp and spp is not None) else [sp_port]
        rows, labels = [], []
        for pport in pol_choices:
            for sport in sp_choices:
                try:
                    found = _target_settings(table, pp, spp, pol_reg, sp_reg, pport, sport, solved)
                except OpticsError as exc:
                    raise BenchError(f"point {entry.request_index + 1}: {exc}", None, entry.line) from None
                label = _port_labels(table.ports, pp, spp, pol_reg, sp_reg, analyzes, pport, sport)
                rows.extend(found)
                labels.extend([label] * len(found))
        variants.append(np.array(rows))
        variant_labels.append(labels)
    return variants, variant_labels


def _explicit_settings(table: TableModel, req: Request) -> np.ndarray:
    s = _park(table)
    assert req.elements is not None
    for key, value in req.elements.items():
        name = key[:-4] if key.endswith("_deg") else key
        if name not in ELEMENT_NAMES:
            raise ProtocolError(f"unknown element '{key}'; expected one of {', '.join(ELEMENT_NAMES)}", None, req.line)
        i = ELEMENT_NAMES.index(name)
        if name not in table.present:
            raise BenchError(f"the protocol sets {key} but bench '{table.name}' has no {name} role", None, req.line)
        if i == CONVERTER:
            s[i] = CONVERTER_IN if str(value) == "in" else CONVERTER_OUT
        else:
            s[i] = float(value)
    return s


def _explicit_label(elements: Mapping[str, float | str]) -> str:
    short = {"quarter_wave_plate": "qwp", "half_wave_plate": "hwp", "mode_converter": "conv",
             "converter_angle": "conv_angle", "image_rotator": "rot"}
    parts = []
    for key, value in elements.items():
        name = key[:-4] if key.endswith("_deg") else key
        parts.append(f"{short.get(name, name)}={value:g}" if isinstance(value, (int, float)) else f"{short.get(name, name)}={value}")
    return " ".join(parts)


def _park(table: TableModel) -> np.ndarray:
    s = np.full(len(ELEMENT_NAMES), math.nan)
    for name in table.present:
        s[COLUMN[name]] = CONVERTER_OUT if name == "mode_converter" else 0.0
    return s


def _target_settings(table, pp, spp, pol_reg, sp_reg, pol_port, sp_port, solved: dict) -> list[np.ndarray]:
    """Every setting found that sends the pol part to ``pol_port`` and the spatial part to ``sp_port``.

    ``solved`` keeps each factor's solution by (factor, basis, port): joint protocols ask for the
    same polarization and spatial projectors many times over.
    """
    base = _park(table)
    model = table.analyzer
    if spp is not None:
        b = sp_reg.bases[spp[0]]
        key = ("spatial", spp[0], sp_port)
        if key not in solved:
            solved[key] = spatial_setting(b.ket, sp_port, model)
        ss = solved[key]
        if model.mode_converter is not None and "mode_converter" in table.present:
            base[CONVERTER] = CONVERTER_IN if ss.converter_in else CONVERTER_OUT
        elif ss.converter_in:
            raise OpticsError("this target needs the mode converter in the beam, but the bench has no mode_converter role")
        if ss.converter_angle_deg is not None:
            base[CONVERTER_ANGLE] = ss.converter_angle_deg
        if ss.image_rotator_deg is not None:
            base[ROTATOR] = ss.image_rotator_deg
    if pp is None:
        return [base]
    out = []
    key = ("polarization", pp[0], pol_port)
    if key not in solved:
        solved[key] = polarization_setting_variants(pol_reg.bases[pp[0]].ket, pol_port, model)
    for ps in solved[key]:
        s = base.copy()
        if ps.quarter_wave_plate_deg is not None:
            s[QWP] = ps.quarter_wave_plate_deg
        if ps.half_wave_plate_deg is not None:
            s[HWP] = ps.half_wave_plate_deg
        out.append(s)
    return out


def _port_labels(ports, pp, spp, pol_reg, sp_reg, analyzes, pol_port, sp_port) -> tuple[str, ...]:
    labels = []
    for port in ports:
        parts = []
        if "polarization" in analyzes and pp is not None:
            b = pol_reg.bases[pp[0]]
            member = pp[1] if not pol_reg.merge else (0 if port.splitter_port == pol_port else 1)
            parts.append(b.labels[member])
        if "spatial" in analyzes and spp is not None:
            b = sp_reg.bases[spp[0]]
            member = spp[1] if not sp_reg.merge else (0 if port.sorter_port == sp_port else 1)
            parts.append(b.labels[member])
        labels.append(",".join(parts))
    return tuple(labels)


def _setting_label(port_labels: tuple[str, ...]) -> str:
    """A short name for a setting from its port labels: ("H,h", "V,h", ...) -> "H/V x h/v"."""
    if len(set(port_labels)) == 1:
        return port_labels[0]
    columns: list[list[str]] = []
    for label in port_labels:
        for j, part in enumerate(label.split(",")):
            if j == len(columns):
                columns.append([])
            if part not in columns[j]:
                columns[j].append(part)
    return " x ".join("/".join(c) for c in columns)


def _expand_steps(
    table: TableModel,
    protocol_name: str,
    settings: np.ndarray,
    key_labels: Sequence[tuple[str, ...]],
    logical: Sequence[int],
    order_idx: Sequence[int],
    points: Sequence[int],
    *,
    schedule: _Schedule,
    reference: _Reference,
) -> StepList:
    """The step list: ``settings`` (one row per setting) in ``order_idx``, measured per ``schedule``."""
    dwell_s, repeats, passes = schedule.dwell_s, schedule.repeats, schedule.passes
    bg_every, bg_start, bg_end = schedule.background_every, schedule.background_at_start, schedule.background_at_end
    bg_dwell, ref_every, ref_dwell = schedule.background_dwell_s, schedule.reference_every, schedule.reference_dwell_s
    ref_settings, ref_labels, ref_point = reference.settings, reference.port_labels, reference.point
    per_pass = len(order_idx) * repeats
    if ref_every > 0:
        per_pass += 2 + (len(order_idx) - 1) // ref_every
    total = passes * per_pass + 2
    if bg_every > 0:
        total += passes * sum(points) // bg_every
    if total > MAX_STEPS:
        raise ProtocolError(
            f"the plan would have about {total} steps, more than {MAX_STEPS}; lower repeats "
            "or sweep.passes, or split the series into several runs"
        )
    n_ports = len(table.ports)
    labels: dict[str, int] = {}
    port_sets: dict[tuple[str, ...], int] = {}
    setting_label = [labels.setdefault(_setting_label(key_labels[k]), len(labels)) for k in range(len(settings))]
    setting_ports = [port_sets.setdefault(tuple(key_labels[k]), len(port_sets)) for k in range(len(settings))]
    ref_label, ref_ports = labels.setdefault("reference", len(labels)), port_sets.setdefault(tuple(ref_labels), len(port_sets))
    bg_label, bg_ports = labels.setdefault("background", len(labels)), port_sets.setdefault(("",) * n_ports, len(port_sets))
    measure, background, reference = (STEP_KINDS.index(k) for k in ("measure", "background", "reference"))
    violations: list[str] = []

    def resolve(target: np.ndarray, position: np.ndarray) -> np.ndarray:
        out = target.copy()
        for name, k in table.kinematics.items():
            i = COLUMN[name]
            if math.isnan(target[i]):
                continue
            out[i] = nearest_equivalent_deg(target[i], position[i], PERIOD_DEG[name], k)
            if not (k.min_deg - 1e-9 <= out[i] <= k.max_deg + 1e-9):
                violations.append(
                    f"{name} at {out[i]:.3f} deg is outside its travel {k.min_deg:g}..{k.max_deg:g} deg"
                )
        return out

    def pass_core(parity: int, start: np.ndarray) -> tuple[dict[str, np.ndarray], np.ndarray, np.ndarray]:
        """One pass without its backgrounds: columns, end position, last row of each setting."""
        rows: list[tuple[int, int, int, np.ndarray, float, int, int]] = []
        ends: list[int] = []
        position = start
        sequence = list(order_idx) if parity == 0 else list(reversed(order_idx))
        if ref_every > 0:
            position = resolve(ref_settings, position)
            rows.append((reference, ref_point, 0, position, ref_dwell, ref_label, ref_ports))
        for count, k in enumerate(sequence, start=1):
            position = resolve(settings[k], position)
            for r in range(repeats):
                rows.append((measure, logical[k], r, position, dwell_s, setting_label[k], setting_ports[k]))
            if ref_every > 0 and count % ref_every == 0 and count < len(sequence):
                position = resolve(ref_settings, position)
                rows.append((reference, ref_point, 0, position, ref_dwell, ref_label, ref_ports))
            ends.append(len(rows) - 1)
        if ref_every > 0:
            position = resolve(ref_settings, position)
            rows.append((reference, ref_point, 0, position, ref_dwell, ref_label, ref_ports))
        columns = {
            "kind": np.array([r[0] for r in rows], np.uint8),
            "point_index": np.array([r[1] for r in rows], np.int32),
            "repeat_index": np.array([r[2] for r in rows], np.int32),
            "settings": np.array([r[3] for r in rows], np.float64).reshape(len(rows), len(ELEMENT_NAMES)),
            "dwell_s": np.array([r[4] for r in rows], np.float64),
            "label": np.array([r[5] for r in rows], np.int32),
            "port_labels": np.array([r[6] for r in rows], np.int32),
        }
        return columns, position, np.array(ends, np.int64)

    # Passes alternate direction and start where the last one ended, so after a pass or two
    # they repeat: compute each distinct (direction, start position) once, whatever the night.
    cores: dict[tuple[int, bytes], tuple[dict[str, np.ndarray], np.ndarray, np.ndarray]] = {}
    pass_cores = []
    position = _park(table)
    park = position.copy()
    for p in range(passes):
        key = (p % 2, position.tobytes())
        if key not in cores:
            cores[key] = pass_core(p % 2, position)
        core = cores[key]
        pass_cores.append(core)
        position = core[1]
    lengths = np.array([len(core[0]["kind"]) for core in pass_cores], np.int64)
    offsets = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    columns = {name: np.concatenate([core[0][name] for core in pass_cores]) for name in pass_cores[0][0]}
    columns["pass_index"] = np.repeat(np.arange(passes, dtype=np.int32), lengths)
    # background.every_points counts protocol points through the whole run: a setting that
    # measures several points advances the count by all of them, and a background due at the
    # end of a pass is taken there (unless the run's last one, at_end, follows anyway).
    after = np.zeros(0, np.int64)
    after_pass = np.zeros(0, np.int32)
    if bg_every > 0:
        forward = np.asarray(points, np.int64)[np.asarray(order_idx)]
        per_pass_points = np.stack([forward, forward[::-1]])[np.arange(passes) % 2]
        seen = np.cumsum(per_pass_points.ravel())
        due = (seen // bg_every) > ((seen - per_pass_points.ravel()) // bg_every)
        if bg_end:
            due[-1] = False
        ends = np.concatenate([core[2] + offsets[p] for p, core in enumerate(pass_cores)])
        after = ends[due]
        after_pass = np.repeat(np.arange(passes, dtype=np.int32), len(order_idx))[due]
    n_bg = len(after)
    inserted = {
        "kind": np.full(n_bg, background, np.uint8), "point_index": np.full(n_bg, -1, np.int32),
        "repeat_index": np.zeros(n_bg, np.int32), "settings": columns["settings"][after],
        "dwell_s": np.full(n_bg, bg_dwell, np.float64), "label": np.full(n_bg, bg_label, np.int32),
        "port_labels": np.full(n_bg, bg_ports, np.int32), "pass_index": after_pass,
    }
    columns = {name: np.insert(col, after + 1, inserted[name], axis=0) for name, col in columns.items()}

    def one_background(pass_index: int, at: np.ndarray) -> dict[str, np.ndarray]:
        return {"kind": np.array([background], np.uint8), "point_index": np.array([-1], np.int32),
                "repeat_index": np.zeros(1, np.int32), "settings": at[None, :],
                "dwell_s": np.array([bg_dwell]), "label": np.array([bg_label], np.int32),
                "port_labels": np.array([bg_ports], np.int32), "pass_index": np.array([pass_index], np.int32)}

    parts = [columns]
    if bg_start:
        parts.insert(0, one_background(0, park))
    if bg_end:
        parts.append(one_background(passes - 1, position))
    columns = {name: np.concatenate([part[name] for part in parts]) for name in columns}
    step_columns = StepColumns(**columns, labels=tuple(labels), port_label_sets=tuple(port_sets))
    return StepList(
        protocol_name=protocol_name,
        bench_name=table.name,
        element_names=ELEMENT_NAMES,
        port_names=tuple(p.name for p in table.ports),
        columns=step_columns,
        n_settings=len(settings),
        passes=passes,
        pass_interval_s=float(schedule.pass_interval_s),
        order=schedule.order,
        violations=tuple(dict.fromkeys(violations)),
    )
