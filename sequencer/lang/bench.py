"""The bench language: what is on the table (devices, roles, optics, calibration), read from YAML into frozen objects.

The keys are documented in docs/bench-language.md.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import re
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np
from numpy.typing import NDArray

from lightloom.sequencer.lang import builtins
from lightloom.sequencer.errors import BenchError, InputError
from lightloom.sequencer.lang.fields import (
    Section,
    aside,
    choice,
    density_matrix,
    fail,
    frozen_matrix,
    normalized_ket,
    retyped,
)
from lightloom.sequencer.lang.fields import text as read_text
from lightloom.sequencer.lang.yamlsafe import YMap, YNode, YScalar, YSeq, dump_plain, merge, parse_bytes, parse_text, to_plain
from lightloom.sequencer.model.faults import FAULT_KEYS, FaultRuleError, FaultSpec, check_fault
from lightloom.sequencer.model.vocabulary import (
    DETECTOR_KINDS, DEVICE_KINDS, DRIVER_FAMILIES, FAULT_KINDS, ROLE_NAMES, SORTER_PORTS, SPLITTER_PORTS,
)

PLUGIN_GROUP = "lightloom.drivers"

_DEVICE_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_\-]{0,63}$")
_COMMON_DEVICE_KEYS = ("driver", "address", "options", "overhead_s", "description")
_KIND_KEYS: Mapping[str, tuple[str, ...]] = MappingProxyType(
    {
        "rotation_stage": ("limits", "backlash_deg", "settle_s"),
        "actuator": ("states", "switch_s", "settle_s"),
        "shutter": ("switch_s", "settle_s"),
        "power_meter": (),
        "photon_counter": (),
        "camera": (),
    }
)
_TOP_KEYS = (
    "bench",
    "description",
    "extends",
    "wavelength_nm",
    "devices",
    "roles",
    "optics",
    "calibration",
    "thresholds",
    "retry",
    "simulation",
)
MAX_EXTENDS_DEPTH = 16


@dataclass(frozen=True)
class Limits:
    """Travel and kinematic limits of a rotation stage (degrees, seconds)."""

    min_deg: float
    max_deg: float
    speed_deg_per_s: float
    acceleration_deg_per_s2: float


@dataclass(frozen=True)
class DeviceSpec:
    """One device on the table. ``driver`` is ``family.kind``; ``options`` is read-only and driver-specific.

    ``limits`` is set for rotation stages only, ``states`` for actuators only.
    """

    name: str
    driver: str
    family: str
    kind: str
    address: str | None
    options: Mapping[str, Any]
    limits: Limits | None
    backlash_deg: float
    settle_s: float
    overhead_s: float
    states: tuple[str, ...]
    switch_s: float
    description: str
    line: int = field(compare=False)

    @property
    def is_simulated(self) -> bool:
        return self.family == "sim"

    @property
    def is_detector(self) -> bool:
        return self.kind in DETECTOR_KINDS


@dataclass(frozen=True)
class DetectorPort:
    """A detector device and the analyzer outputs it sits behind (None where that optic is absent)."""

    device: str
    sorter_port: str | None
    splitter_port: str | None

    @property
    def label(self) -> str:
        """``"h,H"``-style port label (``"-"`` for a port without sorter and splitter)."""
        return ",".join(p for p in (self.sorter_port, self.splitter_port) if p) or "-"


@dataclass(frozen=True)
class Roles:
    """Which device (by name) plays which part; None where the bench has none."""

    quarter_wave_plate: str | None
    half_wave_plate: str | None
    mode_converter: str | None
    converter_angle: str | None
    image_rotator: str | None
    shutter: str
    reference: str | None
    detectors: tuple[DetectorPort, ...]

    def assigned(self) -> Mapping[str, str]:
        """Role -> device for every single-device role that is filled (detectors excluded)."""
        return MappingProxyType(
            {r: getattr(self, r) for r in ROLE_NAMES if r != "detectors" and getattr(self, r) is not None}
        )


@dataclass(frozen=True)
class PolarizingSplitter:
    """A polarizing beam splitter after the polarization analyzer; ``extinction`` in [0, 0.5)."""

    extinction: float


@dataclass(frozen=True)
class ParitySorter:
    """An interferometric parity sorter after the spatial analyzer; ``visibility`` in (0, 1]."""

    visibility: float


@dataclass(frozen=True)
class Optics:
    """Fixed optics of the analyzer (None = not on the table)."""

    polarizing_splitter: PolarizingSplitter | None
    parity_sorter: ParitySorter | None


@dataclass(frozen=True)
class PlateCalibration:
    """A wave plate: fast-axis offset from the stage zero and retardance, in degrees."""

    fast_axis_offset_deg: float
    retardance_deg: float


@dataclass(frozen=True)
class ConverterCalibration:
    """The pi/2 mode converter: mount angle (without a converter_angle stage), offset, retardance (deg)."""

    axis_deg: float
    axis_offset_deg: float
    retardance_deg: float


@dataclass(frozen=True)
class RotatorCalibration:
    """The image rotator: offset of its axis from the stage zero (deg)."""

    axis_offset_deg: float


@dataclass(frozen=True)
class Calibration:
    """What the user believes about the table. ``port_gain`` has an entry for every detector device."""

    quarter_wave_plate: PlateCalibration
    half_wave_plate: PlateCalibration
    mode_converter: ConverterCalibration
    image_rotator: RotatorCalibration
    port_gain: Mapping[str, float]
    reference_fraction: float | None


@dataclass(frozen=True)
class Thresholds:
    """When the beam counts as lost (fraction of initial power), how long to wait, and drift to flag."""

    beam_loss_fraction: float
    beam_wait_s: float
    drift_fraction: float


@dataclass(frozen=True)
class Retry:
    """Bounded retries of transient instrument faults, with back-off doubling up to ``max_backoff_s``."""

    attempts: int
    backoff_s: float
    max_backoff_s: float
    shutter_close_s: float = 60.0


@dataclass(frozen=True)
class SimSource:
    """The simulated light: power in W and the normalised 4x4 density matrix (basis |H,h>, |H,v>, |V,h>, |V,v>)."""

    power_w: float
    state: tuple[tuple[complex, ...], ...]
    label: str

    def density(self) -> NDArray[np.complex128]:
        rho = np.array(self.state, dtype=np.complex128)
        rho.setflags(write=False)
        return rho


@dataclass(frozen=True)
class Table:
    """The true imperfections of the simulated table (defaults: the calibration and optics values)."""

    quarter_wave_plate: PlateCalibration
    half_wave_plate: PlateCalibration
    mode_converter: ConverterCalibration
    image_rotator: RotatorCalibration
    polarizing_splitter: PolarizingSplitter | None
    parity_sorter: ParitySorter | None
    port_gain: Mapping[str, float]
    reference_fraction: float | None


@dataclass(frozen=True)
class Noise:
    """Detector noise: power-meter offset and Gaussian noise (W), relative noise, photon-counter scale."""

    meter_offset_w: float
    meter_noise_w: float
    relative_noise: float
    counts_per_w: float
    dark_counts_per_s: float


@dataclass(frozen=True)
class Drift:
    """Relative laser power drift: 1 + amplitude * sin(2 pi t / period_s)."""

    amplitude: float
    period_s: float


@dataclass(frozen=True)
class Simulation:
    """The ``simulation:`` section: what the virtual bench does."""

    seed: int
    time_scale: float
    source: SimSource
    table: Table
    noise: Noise
    drift: Drift
    faults: tuple[FaultSpec, ...]


@dataclass(frozen=True)
class Bench:
    """A parsed, checked bench with every ``extends:`` resolved.

    ``resolved_text`` is the merged bench as YAML (stored in run files); ``sha256`` is its hash.
    """

    name: str
    description: str
    wavelength_nm: float
    devices: Mapping[str, DeviceSpec]
    roles: Roles
    optics: Optics
    calibration: Calibration
    thresholds: Thresholds
    retry: Retry
    simulation: Simulation | None
    resolved_text: str = field(repr=False)
    sha256: str
    source_path: str = field(compare=False)
    extends: tuple[str, ...] = field(compare=False)
    tree: YMap | None = field(default=None, compare=False, repr=False)

    @property
    def is_simulated(self) -> bool:
        return self.simulation is not None

    def locate(self, path: str) -> tuple[str, int]:
        """(file, line) where the dotted ``path`` (``devices.pm_hH.options.timeout_s``) was written.

        Falls back to the deepest part of the path that exists, so a message can always point somewhere.
        """
        where = (self.source_path, 1)
        node: YNode | None = self.tree
        for part in path.split("."):
            if isinstance(node, YSeq) and part.isdigit() and int(part) < len(node.items):
                node = node.items[int(part)]
                where = (node.file, node.line)
                continue
            entry = node.entry(part) if isinstance(node, YMap) else None
            if entry is None:
                break
            where = (node.file, entry.key_line)  # type: ignore[union-attr]
            if isinstance(entry.value, YScalar):
                where = (entry.value.file, entry.value.line)
            node = entry.value
        return where

    def device_for(self, role: str) -> DeviceSpec | None:
        """The device playing ``role`` (one of the single-device roles), or None."""
        if role not in ROLE_NAMES or role == "detectors":
            raise ValueError(f"not a single-device role: {role!r}")
        name = getattr(self.roles, role)
        return None if name is None else self.devices[name]


def _frozen_value(node: YNode, what: str) -> Any:
    if isinstance(node, YMap):
        return MappingProxyType({e.key: _frozen_value(e.value, f"{what}.{e.key}") for e in node.entries})
    if isinstance(node, YSeq):
        return tuple(_frozen_value(item, f"{what}[{i}]") for i, item in enumerate(node.items))
    return node.value


def plugin_names() -> frozenset[str]:
    """Driver names (``family.kind``) registered under the ``lightloom.drivers`` entry-point group.

    No plugin code is imported.
    """
    try:
        return frozenset(ep.name for ep in importlib.metadata.entry_points(group=PLUGIN_GROUP))
    except Exception:  # a broken distribution's metadata must not stop a bench from validating
        return frozenset()


def _limits(sec: Section) -> Limits:
    sec.check_keys(("min_deg", "max_deg", "speed_deg_per_s", "acceleration_deg_per_s2"))
    lo = sec.number("min_deg", "deg", ge=-3600.0, le=3600.0)
    hi = sec.number("max_deg", "deg", ge=-3600.0, le=3600.0)
    if not lo < hi:
        fail(f"{sec.name('min_deg')} must be below max_deg, got min_deg {lo:g} and max_deg {hi:g}",
             sec.node.get("max_deg") or sec.node)
    return Limits(
        lo,
        hi,
        sec.number("speed_deg_per_s", "deg/s", gt=0.0, le=10_000.0),
        sec.number("acceleration_deg_per_s2", "deg/s^2", gt=0.0, le=1.0e6),
    )


def _device(name: str, key_line: int, node: YNode, plugins: frozenset[str]) -> DeviceSpec:
    what = f"devices.{name}"
    if not _DEVICE_NAME.match(name):
        raise InputError(
            f"device name '{name}' must start with a letter and use only letters, digits, '_' and '-'"
            " (at most 64 characters)",
            node.file,
            key_line,
        )
    sec = Section.of(node, what, "bench", "driver, address, options, ...")
    driver_node = sec.require("driver", "FAMILY.KIND such as sim.rotation_stage or visa.power_meter")
    driver = read_text(driver_node, sec.name("driver"))
    family, dot, kind = driver.rpartition(".")
    if not dot or not family:
        fail(f"{sec.name('driver')}: expected FAMILY.KIND such as sim.rotation_stage, got '{driver}'", driver_node)
    if kind not in DEVICE_KINDS:
        fail(f"{sec.name('driver')}: unknown device kind '{kind}'{aside(kind, DEVICE_KINDS)}; expected one of"
             f" {', '.join(DEVICE_KINDS)}", driver_node)
    if family not in DRIVER_FAMILIES and driver not in plugins:
        known = [f"{f}.{kind}" for f in DRIVER_FAMILIES] + sorted(plugins)
        fail(f"{sec.name('driver')}: unknown driver '{driver}'{aside(driver, known)}; expected sim.{kind},"
             f" visa.{kind}, serial.{kind} or an installed plugin driver"
             f" ({', '.join(sorted(plugins)) or 'none installed'})",
             driver_node)
    if driver not in plugins and (family == "opencv") != (kind == "camera" and family != "sim"):
        fail(f"{sec.name('driver')}: '{driver}' is not a driver; cameras use sim.camera, opencv.camera or"
             " a plugin driver, and the opencv family has cameras only", driver_node)
    sec.check_keys(_COMMON_DEVICE_KEYS + _KIND_KEYS[kind])

    address = None
    if family == "sim":
        if sec.has("address"):
            fail(f"{sec.name('address')}: a sim.* device runs in process and takes no address; remove it"
                 " (or use a visa./serial. driver to reach a served simulator)", sec.node.get("address"))
    elif family in ("visa", "serial"):
        example = "TCPIP::127.0.0.1::5025::SOCKET" if family == "visa" else "/dev/ttyUSB0 or socket://127.0.0.1:5025"
        address = read_text(sec.require("address", f"the instrument's address, e.g. {example}"), sec.name("address"))
        if family == "visa" and "::" not in address:
            fail(f"{sec.name('address')}: expected a VISA resource name such as {example}, got '{address}'",
                 sec.node.get("address"))
    elif sec.has("address"):
        address = sec.text("address")

    options: Mapping[str, Any] = MappingProxyType({})
    opt = sec.section("options", "driver-specific settings")
    if opt is not None:
        options = _frozen_value(opt.node, opt.path)

    limits = None
    if kind == "rotation_stage":
        lim = sec.section("limits", "min_deg, max_deg, speed_deg_per_s, acceleration_deg_per_s2", required=True)
        limits = _limits(lim)  # type: ignore[arg-type]

    states: tuple[str, ...] = ()
    if kind == "actuator":
        seq = sec.seq("states", "the positions it can take, e.g. [in, out]", required=True)
        assert seq is not None
        values = []
        for i, item in enumerate(seq.items):
            state = read_text(item, f"{sec.name('states')}[{i}]")
            if state in values:
                fail(f"{sec.name('states')}: '{state}' is listed twice", item)
            values.append(state)
        if len(values) < 2:
            fail(f"{sec.name('states')}: an actuator needs at least two states, e.g. [in, out]", seq)
        states = tuple(values)

    return DeviceSpec(
        name=name,
        driver=driver,
        family=family,
        kind=kind,
        address=address,
        options=options,
        limits=limits,
        backlash_deg=sec.number("backlash_deg", "deg", 0.0, ge=0.0, le=10.0),
        settle_s=sec.number("settle_s", "s", 0.0, ge=0.0, le=60.0),
        overhead_s=sec.number("overhead_s", "s", 0.0, ge=0.0, le=10.0),
        states=states,
        switch_s=sec.number("switch_s", "s", 0.0, ge=0.0, le=60.0),
        description=sec.text("description", ""),
        line=key_line,
    )


def _devices(sec: Section, plugins: frozenset[str]) -> dict[str, DeviceSpec]:
    devices: dict[str, DeviceSpec] = {}
    for entry in sec.node.entries:
        if isinstance(entry.value, YScalar) and entry.value.value is None:
            continue  # an extending bench removes a device of its base with `name: null`
        devices[entry.key] = _device(entry.key, entry.key_line, entry.value, plugins)
    if not devices:
        fail("devices: the bench has no devices; list at least a shutter and a detector", sec.node)
    return devices


def _device_ref(node: YNode, what: str, devices: Mapping[str, DeviceSpec], kinds: tuple[str, ...],
                purpose: str) -> str:
    name = read_text(node, what)
    if name not in devices:
        fail(f"{what}: no device named '{name}'{aside(name, devices)}; devices are"
             f" {', '.join(devices)}", node)
    kind = devices[name].kind
    if kind not in kinds:
        fail(f"{what}: '{name}' is a {kind}, but {purpose} needs a {' or '.join(kinds)}", node)
    return name


def _roles(sec: Section, devices: Mapping[str, DeviceSpec], optics: Optics) -> Roles:
    sec.check_keys(ROLE_NAMES)
    used: dict[str, str] = {}

    def role(key: str, kinds: tuple[str, ...], purpose: str, required: bool = False) -> str | None:
        node = sec.require(key, f"a device name ({purpose})") if required else sec.get(key)
        if node is None:
            return None
        name = _device_ref(node, sec.name(key), devices, kinds, purpose)
        if name in used:
            fail(f"{sec.name(key)}: '{name}' already plays {used[name]}; each device plays one role", node)
        used[name] = key
        return name

    qwp = role("quarter_wave_plate", ("rotation_stage",), "the quarter-wave plate")
    hwp = role("half_wave_plate", ("rotation_stage",), "the half-wave plate")
    converter = role("mode_converter", ("actuator",), "the mode converter (an actuator with states in and out)")
    if converter is not None and not {"in", "out"} <= set(devices[converter].states):
        fail(f"{sec.name('mode_converter')}: actuator '{converter}' has states"
             f" {', '.join(devices[converter].states)}; the mode converter needs states in and out",
             sec.get("mode_converter"))  # type: ignore[arg-type]
    converter_angle = role("converter_angle", ("rotation_stage",), "the mode-converter rotation")
    if converter_angle is not None and converter is None:
        fail(f"{sec.name('converter_angle')}: a converter_angle stage needs a mode_converter role too",
             sec.get("converter_angle"))  # type: ignore[arg-type]
    rotator = role("image_rotator", ("rotation_stage",), "the image rotator")
    shutter = role("shutter", ("shutter",), "the shutter (closed on every exit of a run)", required=True)
    reference = role("reference", DETECTOR_KINDS, "the reference (pick-off) detector")

    seq = sec.seq("detectors", "at least one {device: NAME, sorter_port: h|v, splitter_port: H|V}", required=True)
    assert seq is not None
    if not seq.items:
        fail(f"{sec.name('detectors')}: expected at least one detector, got an empty list", seq)
    ports: list[DetectorPort] = []
    seen_pairs: dict[tuple[str | None, str | None], str] = {}
    for i, item in enumerate(seq.items):
        what = f"{sec.name('detectors')}[{i}]"
        if isinstance(item, YScalar):
            dev_node, sorter_node, splitter_node, at = item, None, None, item
        else:
            d = Section.of(item, what, "bench", "device, sorter_port, splitter_port")
            d.check_keys(("device", "sorter_port", "splitter_port"))
            dev_node = d.require("device", "the name of a power_meter or photon_counter")
            sorter_node, splitter_node, at = d.get("sorter_port"), d.get("splitter_port"), d.node
        name = _device_ref(dev_node, f"{what}.device", devices, DETECTOR_KINDS, "a detector")
        if name in used:
            fail(f"{what}.device: '{name}' already plays {used[name]}; each device plays one role", dev_node)
        used[name] = "a detector"
        sorter = _port(sorter_node, f"{what}.sorter_port", SORTER_PORTS, optics.parity_sorter is not None,
                       "parity sorter", "optics.parity_sorter", at)
        splitter = _port(splitter_node, f"{what}.splitter_port", SPLITTER_PORTS,
                         optics.polarizing_splitter is not None, "polarizing splitter",
                         "optics.polarizing_splitter", at)
        pair = (sorter, splitter)
        if pair in seen_pairs:
            fail(f"{what}: '{name}' sits at the same port ({DetectorPort(name, sorter, splitter).label}) as"
                 f" '{seen_pairs[pair]}'; each port has one detector", at)
        seen_pairs[pair] = name
        ports.append(DetectorPort(name, sorter, splitter))
    kinds = {devices[p.device].kind for p in ports}
    if len(kinds) > 1:
        fail(f"{sec.name('detectors')}: mixes {' and '.join(sorted(kinds))}; use detectors of one kind", seq)
    return Roles(qwp, hwp, converter, converter_angle, rotator, shutter, reference, tuple(ports))  # type: ignore[arg-type]


def _port(node: YNode | None, what: str, labels: tuple[str, str], present: bool, optic: str, key: str,
          at: YNode) -> str | None:
    if node is None:
        if present:
            fail(f"{what}: the bench has a {optic} ({key}), so each detector needs {what.rsplit('.', 1)[1]}"
                 f" {' or '.join(labels)}", at)
        return None
    if not present:
        fail(f"{what}: the bench has no {optic}; remove {what.rsplit('.', 1)[1]} or add {key}", node)
    return choice(node, what, labels)


def _optics(sec: Section | None) -> Optics:
    if sec is None:
        return Optics(None, None)
    sec.check_keys(("polarizing_splitter", "parity_sorter"))
    return Optics(_splitter(sec.section("polarizing_splitter", "extinction")),
                  _sorter(sec.section("parity_sorter", "visibility")))


def _splitter(sec: Section | None, default: PolarizingSplitter | None = None) -> PolarizingSplitter | None:
    if sec is None:
        return default
    sec.check_keys(("extinction",))
    fallback = default.extinction if default else 0.0
    return PolarizingSplitter(sec.number("extinction", "", fallback, ge=0.0, lt=0.5))


def _sorter(sec: Section | None, default: ParitySorter | None = None) -> ParitySorter | None:
    if sec is None:
        return default
    sec.check_keys(("visibility",))
    fallback = default.visibility if default else 1.0
    return ParitySorter(sec.number("visibility", "", fallback, gt=0.0, le=1.0))


def _plate(sec: Section | None, default: PlateCalibration) -> PlateCalibration:
    if sec is None:
        return default
    sec.check_keys(("fast_axis_offset_deg", "retardance_deg"))
    return PlateCalibration(
        sec.number("fast_axis_offset_deg", "deg", default.fast_axis_offset_deg, ge=-180.0, le=180.0),
        sec.number("retardance_deg", "deg", default.retardance_deg, gt=0.0, lt=360.0),
    )


def _converter(sec: Section | None, default: ConverterCalibration) -> ConverterCalibration:
    if sec is None:
        return default
    sec.check_keys(("axis_deg", "axis_offset_deg", "retardance_deg"))
    return ConverterCalibration(
        sec.number("axis_deg", "deg", default.axis_deg, ge=-720.0, le=720.0),
        sec.number("axis_offset_deg", "deg", default.axis_offset_deg, ge=-180.0, le=180.0),
        sec.number("retardance_deg", "deg", default.retardance_deg, gt=0.0, lt=360.0),
    )


def _rotator(sec: Section | None, default: RotatorCalibration) -> RotatorCalibration:
    if sec is None:
        return default
    sec.check_keys(("axis_offset_deg",))
    return RotatorCalibration(sec.number("axis_offset_deg", "deg", default.axis_offset_deg, ge=-180.0, le=180.0))


def _port_gain(sec: Section | None, devices: Mapping[str, DeviceSpec], defaults: Mapping[str, float]
               ) -> Mapping[str, float]:
    gains = dict(defaults)
    if sec is not None:
        for entry in sec.node.entries:
            if sec.get(entry.key) is None:
                continue  # `device: null` in an extending bench drops the base's entry
            _device_ref(YScalar(entry.key, entry.key_line, sec.node.file, entry.key), sec.name(entry.key),
                        devices, DETECTOR_KINDS, "a port gain")
            gains[entry.key] = sec.number(entry.key, "", gt=0.0, le=1000.0)
    return MappingProxyType(gains)


_IDEAL_QWP = PlateCalibration(0.0, 90.0)
_IDEAL_HWP = PlateCalibration(0.0, 180.0)
_IDEAL_CONVERTER = ConverterCalibration(45.0, 0.0, 90.0)
_IDEAL_ROTATOR = RotatorCalibration(0.0)


def _calibration(sec: Section | None, devices: Mapping[str, DeviceSpec], roles: Roles) -> Calibration:
    unit_gains = {p.device: 1.0 for p in roles.detectors}
    if sec is None:
        return Calibration(_IDEAL_QWP, _IDEAL_HWP, _IDEAL_CONVERTER, _IDEAL_ROTATOR, MappingProxyType(unit_gains), None)
    sec.check_keys(("quarter_wave_plate", "half_wave_plate", "mode_converter", "image_rotator",
                    "port_gain", "reference_fraction"))
    return Calibration(
        _plate(sec.section("quarter_wave_plate", "fast_axis_offset_deg, retardance_deg"), _IDEAL_QWP),
        _plate(sec.section("half_wave_plate", "fast_axis_offset_deg, retardance_deg"), _IDEAL_HWP),
        _converter(sec.section("mode_converter", "axis_deg, axis_offset_deg, retardance_deg"), _IDEAL_CONVERTER),
        _rotator(sec.section("image_rotator", "axis_offset_deg"), _IDEAL_ROTATOR),
        _port_gain(sec.section("port_gain", "detector device -> relative gain"), devices, unit_gains),
        sec.number("reference_fraction", "", None, gt=0.0, le=1.0),
    )


def _thresholds(sec: Section | None) -> Thresholds:
    if sec is None:
        return Thresholds(0.3, 900.0, 0.05)
    sec.check_keys(("beam_loss_fraction", "beam_wait_s", "drift_fraction"))
    return Thresholds(
        sec.number("beam_loss_fraction", "", 0.3, gt=0.0, lt=1.0),
        sec.number("beam_wait_s", "s", 900.0, gt=0.0, le=7 * 24 * 3600.0),
        sec.number("drift_fraction", "", 0.05, gt=0.0, le=1.0),
    )


def _retry(sec: Section | None) -> Retry:
    if sec is None:
        return Retry(4, 0.1, 5.0)
    sec.check_keys(("attempts", "backoff_s", "max_backoff_s", "shutter_close_s"))
    attempts = sec.integer("attempts", 4, ge=1, le=100)
    backoff = sec.number("backoff_s", "s", 0.1, ge=0.0, le=60.0)
    return Retry(attempts, backoff, sec.number("max_backoff_s", "s", max(5.0, backoff), ge=backoff, le=3600.0),
                 sec.number("shutter_close_s", "s", 60.0, ge=0.0, le=3600.0))


def _source(sec: Section) -> SimSource:
    sec.check_keys(("power", "state"))
    power = sec.number("power", "W", gt=0.0, le=10.0)
    st = sec.section("state", "ket: [4 complex numbers] or density_matrix: 4x4", required=True)
    assert st is not None
    st.check_keys(("ket", "density_matrix"))
    given = [k for k in ("ket", "density_matrix") if st.has(k)]
    if len(given) != 1:
        files = {e.key: getattr(e.value, "file", None) for e in st.node.entries}
        hint = ""
        if len(given) == 2 and files.get("ket") != files.get("density_matrix"):
            # an overlay gave one while its base gives the other: mappings merge key by key
            base = "density_matrix" if files.get("ket") == st.node.file else "ket"
            other = "ket" if base == "density_matrix" else "density_matrix"
            hint = f"; the base bench gives {base}: write `{base}: null` beside {other} to replace it"
        fail(f"{st.where}: give exactly one of ket (4 complex numbers, basis |H,h>, |H,v>, |V,h>,"
             f" |V,v>) or density_matrix (4x4){hint}", st.node)
    if given[0] == "ket":
        ket = np.array(normalized_ket(st.require("ket", ""), st.name("ket"), 4))
        return SimSource(power, frozen_matrix(np.outer(ket, ket.conj())), "ket")
    return SimSource(power, density_matrix(st.require("density_matrix", ""), st.name("density_matrix"), 4),
                     "density_matrix")


def _table(sec: Section | None, calibration: Calibration, optics: Optics, devices: Mapping[str, DeviceSpec]
           ) -> Table:
    def sub(key: str, hint: str) -> Section | None:
        return sec.section(key, hint) if sec is not None else None

    if sec is not None:
        sec.check_keys(("quarter_wave_plate", "half_wave_plate", "mode_converter", "image_rotator",
                        "polarizing_splitter", "parity_sorter", "port_gain", "reference_fraction"))
        for key, present in (("polarizing_splitter", optics.polarizing_splitter),
                             ("parity_sorter", optics.parity_sorter)):
            if sec.has(key) and present is None:
                fail(f"{sec.name(key)}: the bench has no {key.replace('_', ' ')} (optics.{key}); add it there"
                     " or remove this entry", sec.get(key))  # type: ignore[arg-type]
    reference_fraction = calibration.reference_fraction
    if sec is not None:
        reference_fraction = sec.number("reference_fraction", "", reference_fraction, gt=0.0, le=1.0)
    return Table(
        _plate(sub("quarter_wave_plate", "fast_axis_offset_deg, retardance_deg"), calibration.quarter_wave_plate),
        _plate(sub("half_wave_plate", "fast_axis_offset_deg, retardance_deg"), calibration.half_wave_plate),
        _converter(sub("mode_converter", "axis_deg, axis_offset_deg, retardance_deg"), calibration.mode_converter),
        _rotator(sub("image_rotator", "axis_offset_deg"), calibration.image_rotator),
        _splitter(sub("polarizing_splitter", "extinction"), optics.polarizing_splitter),
        _sorter(sub("parity_sorter", "visibility"), optics.parity_sorter),
        _port_gain(sub("port_gain", "detector device -> relative gain"), devices, calibration.port_gain),
        reference_fraction,
    )


def _noise(sec: Section | None) -> Noise:
    if sec is None:
        return Noise(0.0, 0.0, 0.0, 1.0e12, 0.0)
    sec.check_keys(("meter_offset_w", "meter_noise_w", "relative_noise", "counts_per_w", "dark_counts_per_s"))
    return Noise(
        sec.number("meter_offset_w", "W", 0.0, ge=0.0, le=1.0),
        sec.number("meter_noise_w", "W", 0.0, ge=0.0, le=1.0),
        sec.number("relative_noise", "", 0.0, ge=0.0, le=1.0),
        sec.number("counts_per_w", "1/W", 1.0e12, gt=0.0, le=1.0e20),
        sec.number("dark_counts_per_s", "1/s", 0.0, ge=0.0, le=1.0e9),
    )


def _drift(sec: Section | None) -> Drift:
    if sec is None:
        return Drift(0.0, 3600.0)
    sec.check_keys(("amplitude", "period_s"))
    return Drift(sec.number("amplitude", "", 0.0, ge=0.0, lt=1.0),
                 sec.number("period_s", "s", 3600.0, gt=0.0, le=1.0e7))


def _faults(seq: YSeq | None, devices: Mapping[str, DeviceSpec]) -> tuple[FaultSpec, ...]:
    """The injected faults: values read at their lines, then the rules every fault follows
    (model.faults.check_fault, the same the simulators apply)."""
    if seq is None:
        return ()
    faults = []
    for i, item in enumerate(seq.items):
        sec = Section.of(item, f"simulation.faults[{i}]", "bench", "kind, device, at_s or probability")
        sec.check_keys(FAULT_KEYS)
        values: dict[str, object] = {"kind": sec.choice("kind", FAULT_KINDS)}
        if sec.has("device"):
            node = sec.get("device")
            device = read_text(node, sec.name("device"))  # type: ignore[arg-type]
            if values["kind"] != "beam_loss" and device not in devices:
                fail(f"{sec.name('device')}: no device named '{device}'{aside(device, devices)}; devices"
                     f" are {', '.join(devices)}", node)  # type: ignore[arg-type]
            values["device"] = device
        for key, unit in (("at_s", "s"), ("probability", ""), ("duration_s", "s"), ("residual", "")):
            value = sec.number(key, unit, None, ge=0.0, le=1.0e7)
            if value is not None:
                values[key] = value
        if sec.has("count"):
            values["count"] = sec.integer("count", ge=1, le=10**9)
        try:
            faults.append(check_fault(values))
        except FaultRuleError as exc:
            node = sec.get(exc.key) if exc.key and sec.has(exc.key) else sec.node
            fail(f"{sec.name(exc.key) if exc.key else sec.where}: {exc.detail}", node)  # type: ignore[arg-type]
    return tuple(faults)


def _simulation(sec: Section | None, calibration: Calibration, optics: Optics,
                devices: Mapping[str, DeviceSpec]) -> Simulation | None:
    if sec is None:
        return None
    sec.check_keys(("seed", "time_scale", "source", "table", "noise", "drift", "faults"))
    source = sec.section("source", "power (W) and state", required=True)
    assert source is not None
    return Simulation(
        seed=sec.integer("seed", 0, ge=0, le=2**63 - 1),
        time_scale=sec.number("time_scale", "", 0.0, ge=0.0, le=1000.0),
        source=_source(source),
        table=_table(sec.section("table", "true imperfections"), calibration, optics, devices),
        noise=_noise(sec.section("noise", "meter_offset_w, meter_noise_w, relative_noise, counts_per_w")),
        drift=_drift(sec.section("drift", "amplitude, period_s")),
        faults=_faults(sec.seq("faults", "a list of {kind, device, at_s | probability}"), devices),
    )


def _without_nulls(data: Any) -> Any:
    # A null mapping value means "absent" everywhere in a bench, so the resolved text leaves it out.
    if isinstance(data, dict):
        return {k: _without_nulls(v) for k, v in data.items() if v is not None}
    if isinstance(data, list):
        return [_without_nulls(v) for v in data]
    return data


def _bench_from_tree(root: YMap, source_path: str, extends: tuple[str, ...]) -> Bench:
    sec = Section.of(root, "", "bench", "bench: NAME, devices: {...}, roles: {...}")
    sec.check_keys(_TOP_KEYS)
    name = read_text(sec.require("bench", "the bench's name"), "bench")
    plugins = plugin_names()
    devices = _devices(sec.section("devices", "device name -> driver, address, ...", required=True),  # type: ignore[arg-type]
                       plugins)
    optics = _optics(sec.section("optics", "polarizing_splitter, parity_sorter"))
    roles_sec = sec.section("roles", "which device plays which part", required=True)
    roles = _roles(roles_sec, devices, optics)  # type: ignore[arg-type]
    calibration = _calibration(sec.section("calibration", "what you believe about the table"), devices, roles)
    if roles.reference is not None and calibration.reference_fraction is None:
        fail("calibration.reference_fraction: missing; the bench has a reference detector"
             f" ('{roles.reference}'), so give the fraction of the beam it sees, e.g. 0.01",
             sec.node.get("calibration") or roles_sec.node.get("reference"))  # type: ignore[arg-type]
    sim_sec = sec.section("simulation", "seed, time_scale, source, table, noise, drift, faults")
    if sim_sec is None:
        devices_node = sec.node.get("devices")
        assert isinstance(devices_node, YMap)
        for dev in devices.values():
            if dev.is_simulated:
                spec = devices_node.get(dev.name)
                driver_node = spec.get("driver") if isinstance(spec, YMap) else None
                fail(
                    f"devices.{dev.name}.driver: '{dev.driver}' is simulated, but the bench has no simulation:"
                    " section; add one (see the built-in sim bench) or use a visa./serial. driver",
                    driver_node or devices_node,
                )
    resolved_text = dump_plain(_without_nulls(to_plain(root)))
    return Bench(
        name=name,
        description=sec.text("description", ""),
        wavelength_nm=sec.number("wavelength_nm", "nm", gt=0.0, le=100_000.0),
        devices=MappingProxyType(devices),
        roles=roles,
        optics=optics,
        calibration=calibration,
        thresholds=_thresholds(sec.section("thresholds", "beam_loss_fraction, beam_wait_s, drift_fraction")),
        retry=_retry(sec.section("retry", "attempts, backoff_s, max_backoff_s, shutter_close_s")),
        simulation=_simulation(sim_sec, calibration, optics, devices),
        resolved_text=resolved_text,
        sha256=hashlib.sha256(resolved_text.encode("utf-8")).hexdigest(),
        source_path=source_path,
        extends=extends,
        tree=root,
    )


def _identity(source: builtins.Source) -> str:
    return str(Path(source.file).resolve())


def _without(node: YMap, key: str) -> YMap:
    return YMap(tuple(e for e in node.entries if e.key != key), node.line, node.file)


def _resolve(root: YNode, directory: Path | None, chain: tuple[tuple[str, str], ...]
             ) -> tuple[YMap, tuple[str, ...]]:
    """Merge ``root`` over the benches it extends; ``chain`` holds (identity, file) of the extending files."""
    sec = Section.of(root, "", "bench", "bench: NAME, devices: {...}, roles: {...}")
    if "protocol" in sec.node and "bench" not in sec.node:
        raise InputError("this is a protocol file, not a bench; give it as PROTOCOL, and a bench with --bench",
                         sec.node.file, sec.key_line("protocol"))
    # A bench that extends another inherits its name unless it gives one (an overlay can be three lines).
    node = sec.get("extends")
    if node is None or sec.has("bench"):
        read_text(sec.require("bench", "the bench's name (or extends: a base bench whose name it takes)"),
                  "bench")
    if node is None:
        return _without(sec.node, "extends"), ()
    spec = read_text(node, "extends")
    try:
        parent = builtins.find("bench", spec, directory)
    except InputError as exc:
        fail(f"extends: {exc.message}", node)
    identity = _identity(parent)
    if identity in (i for i, _ in chain):
        loop = " -> ".join([f for _, f in chain] + [parent.file])
        fail(f"extends: cycle {loop}; remove one of these extends", node)
    if len(chain) >= MAX_EXTENDS_DEPTH:
        fail(f"extends: more than {MAX_EXTENDS_DEPTH} levels of extends; flatten the benches", node)
    parent_root = parse_bytes(parent.data, parent.file)
    parent_tree, parent_chain = _resolve(parent_root, parent.directory, chain + ((identity, parent.file),))
    merged = merge(parent_tree, _without(sec.node, "extends"))
    assert isinstance(merged, YMap)
    return merged, (parent.file,) + parent_chain


def parse_bench(text: str, path: str, *, directory: Path | None = None) -> Bench:
    """Parse bench YAML ``text``; ``path`` names it in messages; relative ``extends`` use ``directory``.

    ``directory`` defaults to the directory of ``path``. Parsing a Bench's ``resolved_text`` gives an
    equal Bench.

    Raises
    ------
    BenchError
        ``file:line: what is wrong and what is expected`` (the file where the bad value was written).
    """
    with retyped(BenchError):
        base = Path(path).resolve().parent if directory is None else directory
        root = parse_text(text, path)
        merged, chain = _resolve(root, base, ((str(Path(path).resolve()), path),))
        return _bench_from_tree(merged, path, chain)


def load_bench(path_or_builtin_name: str | Path) -> Bench:
    """Read a bench from a file path, or a built-in bench by name (``sim``), resolving ``extends``."""
    with retyped(BenchError):
        source = builtins.find("bench", str(path_or_builtin_name))
        root = parse_bytes(source.data, source.file)
        merged, chain = _resolve(root, source.directory, ((_identity(source), source.file),))
        return _bench_from_tree(merged, source.file, chain)
