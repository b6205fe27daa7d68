"""The simulated camera: the transverse field of the source state, through the table's imperfect
polarization analyzer, onto a pixel grid with background, shot and read noise, bit depth and
saturation, and a small beam walk as the half-wave plate turns.

A pixel at (x, y) (centre of the pixel, sensor coordinates) collects the mean number of electrons

    n(x, y) = P T eta (lambda / h c) a tr[J(x', y') E_pol] + b T

where P is the power at the analyzer (drift, shutter, beam loss included) times the camera's
``transmission`` (a neutral-density filter), T the exposure, eta the quantum efficiency, a the pixel
area in waist units, J the local coherency matrix of the source state (sequencer.optics.transverse,
from the density matrix, so mixtures are exact), E_pol the polarization POVM element of the port
(the port's 4x4 operator traced over the spatial factor, divided by 2: the camera sees the beam
through the polarization analyzer only), b the background (dark current and stray light,
electrons/s per pixel). x' = (x - c)/w0 with the beam centre c moved by ``walk_px`` along the
direction of the half-wave plate's angle (a slightly wedged plate). The camera reads
Poisson(n) + N(0, read_noise_e) electrons, divides by ``electrons_per_adu`` (times 10^(gain_db/20)),
rounds and clips to the bit depth.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any, Callable, ClassVar, Mapping

import numpy as np
from numpy.typing import NDArray

from lightloom.drivers.camera import (
    CAMERA_OPTION_KEYS, Camera, CameraSettings, Frame, average_frames, settings_from_options,
)
from lightloom.drivers.errors import LimitViolation
from lightloom.drivers.options import DriverConfigError
from lightloom.sequencer.optics.transverse import coherency
from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import SimDevice
from lightloom.simulators.faults import FaultInjector

PLANCK_J_S = 6.62607015e-34  # exact (SI 2019)
LIGHT_M_PER_S = 299792458.0  # exact (SI)

SIM_OPTION_KEYS = (
    "sensor", "pixel_um", "waist_um", "centre_px", "transmission", "quantum_efficiency",
    "background_e_per_s", "read_noise_e", "electrons_per_adu", "walk_px",
)


@dataclass(frozen=True)
class SensorModel:
    """The simulated sensor and beam geometry (device ``options`` of a ``sim.camera``).

    ``sensor`` is (rows, columns) in sensor pixels, ``centre_px`` (x, y) the beam centre
    (default the middle of the sensor), ``walk_px`` the radius of the circle the centre runs on as
    the half-wave plate turns.
    """

    sensor: tuple[int, int] = (64, 64)
    pixel_um: float = 6.0
    waist_um: float = 60.0
    centre_px: tuple[float, float] | None = None
    transmission: float = 1.0e-6
    quantum_efficiency: float = 0.6
    background_e_per_s: float = 2000.0
    read_noise_e: float = 5.0
    electrons_per_adu: float = 8.0
    walk_px: float = 0.2

    @property
    def centre(self) -> tuple[float, float]:
        """Beam centre (x, y) in sensor pixels."""
        if self.centre_px is not None:
            return self.centre_px
        return ((self.sensor[1] - 1) / 2.0, (self.sensor[0] - 1) / 2.0)


def _positive(options: Mapping[str, Any], key: str, default: float, *, zero_ok: bool = False) -> float:
    value = options.get(key, default)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or (
        value < 0 if zero_ok else value <= 0
    ):
        raise DriverConfigError(
            f"option {key} is {value!r}; expected a {'non-negative' if zero_ok else 'positive'} number", key
        )
    return float(value)


def _pair(options: Mapping[str, Any], key: str, integer: bool) -> tuple | None:
    value = options.get(key)
    if value is None:
        return None
    kind = int if integer else (int, float)
    if not isinstance(value, (list, tuple)) or len(value) != 2 or not all(
        isinstance(v, kind) and not isinstance(v, bool) for v in value
    ):
        raise DriverConfigError(f"option {key} is {value!r}; expected two {'whole ' if integer else ''}numbers", key)
    return tuple(int(v) if integer else float(v) for v in value)


def sensor_from_options(options: Mapping[str, Any]) -> SensorModel:
    """The SensorModel of a ``sim.camera``'s options; DriverConfigError names a bad key."""
    unknown = sorted(set(options) - set(SIM_OPTION_KEYS) - set(CAMERA_OPTION_KEYS))
    if unknown:
        raise DriverConfigError(
            f"unknown option {unknown[0]!r} for sim.camera; known: "
            f"{', '.join(SIM_OPTION_KEYS + CAMERA_OPTION_KEYS)}", unknown[0],
        )
    d = SensorModel()
    sensor = _pair(options, "sensor", True) or d.sensor
    if min(sensor) < 2 or max(sensor) > 8192:
        raise DriverConfigError(f"option sensor is {list(sensor)}; expected [rows, columns], 2..8192", "sensor")
    qe = _positive(options, "quantum_efficiency", d.quantum_efficiency)
    transmission = _positive(options, "transmission", d.transmission)
    if qe > 1 or transmission > 1:
        key = "quantum_efficiency" if qe > 1 else "transmission"
        raise DriverConfigError(f"option {key} must be at most 1", key)
    return SensorModel(
        sensor=sensor,  # type: ignore[arg-type]
        pixel_um=_positive(options, "pixel_um", d.pixel_um),
        waist_um=_positive(options, "waist_um", d.waist_um),
        centre_px=_pair(options, "centre_px", False),  # type: ignore[arg-type]
        transmission=transmission,
        quantum_efficiency=qe,
        background_e_per_s=_positive(options, "background_e_per_s", d.background_e_per_s, zero_ok=True),
        read_noise_e=_positive(options, "read_noise_e", d.read_noise_e, zero_ok=True),
        electrons_per_adu=_positive(options, "electrons_per_adu", d.electrons_per_adu),
        walk_px=_positive(options, "walk_px", d.walk_px, zero_ok=True),
    )


def polarization_povm(port_operator: NDArray[np.complex128]) -> NDArray[np.complex128]:
    """The 2x2 polarization POVM element a camera sees: tr over the spatial factor of a 4x4 port
    operator (basis |H,h>, |H,v>, |V,h>, |V,v>), divided by 2."""
    e = np.asarray(port_operator, dtype=np.complex128).reshape(2, 2, 2, 2)
    return np.einsum("pmqm->pq", e) / 2.0


def pixel_coordinates(model: SensorModel, hwp_deg: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Pixel centres in waist units relative to the (walked) beam centre, each (rows, columns)."""
    cx, cy = model.centre
    walk = math.radians(hwp_deg)
    cx += model.walk_px * math.cos(walk)
    cy += model.walk_px * math.sin(walk)
    rows, cols = model.sensor
    scale = model.pixel_um / model.waist_um
    x = (np.arange(cols) - cx) * scale
    y = (np.arange(rows) - cy) * scale
    return np.meshgrid(x, y, indexing="xy")


def power_fraction_map(
    state: NDArray[np.complex128], povm: NDArray[np.complex128], model: SensorModel, hwp_deg: float = 0.0
) -> NDArray[np.float64]:
    """Fraction of the beam power each pixel receives behind ``povm`` (rows, columns): tr[J E] a."""
    x, y = pixel_coordinates(model, hwp_deg)
    j = coherency(state, x, y)
    area = (model.pixel_um / model.waist_um) ** 2
    return np.einsum("...pq,qp->...", j, povm).real * area


def mean_electrons(
    fraction: NDArray[np.float64], power_w: float, exposure_s: float, model: SensorModel,
    wavelength_nm: float,
) -> NDArray[np.float64]:
    """Mean electrons per pixel in one exposure: signal plus background."""
    photons_per_j = wavelength_nm * 1e-9 / (PLANCK_J_S * LIGHT_M_PER_S)
    signal = power_w * model.transmission * exposure_s * model.quantum_efficiency * photons_per_j
    return np.clip(fraction, 0.0, None) * signal + model.background_e_per_s * exposure_s


def expected_peak_adu(mean_e: NDArray[np.float64], model: SensorModel, settings: CameraSettings) -> float:
    """The brightest pixel's mean value, ADU (what a dry-run compares with the saturation level)."""
    return float(mean_e.max()) / model.electrons_per_adu * 10 ** (settings.gain_db / 20.0)


def digitize(
    mean_e: NDArray[np.float64], model: SensorModel, settings: CameraSettings, rng: np.random.Generator
) -> NDArray[np.float64]:
    """One raw frame: Poisson shot noise, Gaussian read noise, gain, rounding and clipping (ADU)."""
    electrons = rng.poisson(mean_e).astype(np.float64)
    if model.read_noise_e > 0:
        electrons += rng.normal(0.0, model.read_noise_e, size=electrons.shape)
    adu = np.rint(electrons / model.electrons_per_adu * 10 ** (settings.gain_db / 20.0))
    return np.clip(adu, 0.0, settings.full_scale)


@dataclass(frozen=True)
class CameraLight:
    """What the table tells a simulated camera at the clock's current time."""

    power_w: Callable[[], float]
    povm: Callable[[], NDArray[np.complex128]]
    hwp_deg: Callable[[], float]
    state: NDArray[np.complex128]
    wavelength_nm: float
    epoch_s: float = 0.0
    """UNIX time of the simulated clock's zero (frame timestamps are UNIX seconds)."""


class SimCamera(SimDevice, Camera):
    """A simulated camera behind the polarization analyzer of a simulated table.

    Each raw frame spends its exposure on the simulated clock and sees the power and analyzer
    position at the middle of its exposure.
    """

    kind: ClassVar[str] = "CAMERA"

    def __init__(
        self, name: str, clock: SimClock, light: CameraLight, rng: np.random.Generator,
        model: SensorModel, settings: CameraSettings, faults: FaultInjector | None = None,
    ) -> None:
        super().__init__(name, clock, faults)
        self.light = light
        self.model = model
        self._settings = settings
        self._rng = rng

    @property
    def settings(self) -> CameraSettings:
        return self._settings

    def use_rng(self, rng: np.random.Generator) -> None:
        """Draw the noise of the next frames from ``rng`` (a step's own stream, so a resumed run
        sees the frames an uninterrupted one would)."""
        self._rng = rng

    def configure(self, settings: CameraSettings) -> CameraSettings:
        self._operation("configure")
        self._settings = settings
        return settings

    def expected_electrons(self, exposure_s: float | None = None) -> NDArray[np.float64]:
        """Mean electrons per pixel of one exposure at the current time and positions."""
        fraction = power_fraction_map(self.light.state, self.light.povm(), self.model, self.light.hwp_deg())
        exposure = self._settings.exposure_s if exposure_s is None else exposure_s
        return mean_electrons(fraction, self.light.power_w(), exposure, self.model, self.light.wavelength_nm)

    def read_frame(self, exposure_s: float | None = None, frames: int | None = None) -> Frame:
        self._operation("read_frame")
        settings = self._settings
        if exposure_s is not None:
            if not (0 < exposure_s <= 60.0):
                raise LimitViolation(self.name, "read_frame", f"exposure {exposure_s!r} s outside (0, 60] s")
            settings = replace(settings, exposure_s=float(exposure_s))
        count = settings.frames_to_average if frames is None else int(frames)
        t0 = self.clock.now()
        raws = []
        for k in range(count):
            self.clock.advance_to(t0 + (k + 0.5) * settings.exposure_s)
            raws.append(digitize(self.expected_electrons(settings.exposure_s), self.model, settings, self._rng))
            self.clock.advance_to(t0 + (k + 1) * settings.exposure_s)
        return average_frames(raws, settings, self.light.epoch_s + t0)


def make_sim_camera(
    name: str, options: Mapping[str, Any], clock: SimClock, light: CameraLight, rng: np.random.Generator,
    faults: FaultInjector | None,
) -> SimCamera:
    """A ``sim.camera`` from its bench options (sensor model and camera settings)."""
    model = sensor_from_options(options)
    camera_options = {"bit_depth": 12, **{k: v for k, v in options.items() if k in CAMERA_OPTION_KEYS}}
    settings = settings_from_options(camera_options)
    return SimCamera(name, clock, light, rng, model, settings, faults)


@dataclass(frozen=True)
class ExposureCheck:
    """A dry-run's look at one camera setting: the brightest pixel's expected value at the planned
    exposure, the saturation level, and the longest exposure that keeps the peak at 80% of it."""

    label: str
    exposure_s: float
    peak_adu: float
    saturation_adu: float
    max_exposure_s: float

    @property
    def saturates(self) -> bool:
        return self.peak_adu >= self.saturation_adu


FILL_TARGET = 0.8


def check_exposures(bench: Any, steps: Any) -> list[ExposureCheck]:
    """Expected peak pixel of every distinct measurement setting of ``steps`` on each simulated
    camera of a simulated ``bench`` (no drift, no noise: the mean). Empty for real benches."""
    from lightloom.sequencer.model.elements import COLUMN
    from lightloom.sequencer.optics.analyzer import port_operators
    from lightloom.sequencer.plan.tablemodel import analyzer_model, port_models

    if bench.simulation is None:
        return []
    cameras = [(j, d.device) for j, d in enumerate(bench.roles.detectors)
               if bench.devices[d.device].kind == "camera" and bench.devices[d.device].family == "sim"]
    if not cameras:
        return []
    model = analyzer_model(bench, truth=True)
    ports = port_models(bench, truth=True)
    rho = bench.simulation.source.density()
    fraction = bench.simulation.table.reference_fraction if bench.roles.reference else 0.0
    power = bench.simulation.source.power_w * (1.0 - (fraction or 0.0))
    out: list[ExposureCheck] = []
    seen: set = set()
    for step in steps:
        if step.kind != "measure":
            continue
        vector = np.asarray(step.settings.as_vector(), dtype=float)
        key = (step.label, tuple(np.round(np.nan_to_num(vector, nan=-1.0), 6)), step.dwell_s)
        if key in seen:
            continue
        seen.add(key)
        settings = np.nan_to_num(vector[None, :])
        ops = port_operators(model, ports, settings)[0]
        for j, name in cameras:
            options = bench.devices[name].options
            sensor = sensor_from_options(options)
            camera = settings_from_options({"bit_depth": 12, **{k: v for k, v in options.items()
                                                                if k in CAMERA_OPTION_KEYS}})
            hwp = float(settings[0, COLUMN["half_wave_plate"]])
            electrons = mean_electrons(power_fraction_map(rho, polarization_povm(ops[j]), sensor, hwp),
                                       power, step.dwell_s, sensor, bench.wavelength_nm)
            peak = expected_peak_adu(electrons, sensor, camera)
            level = camera.saturation_adu
            background = sensor.background_e_per_s * step.dwell_s / sensor.electrons_per_adu
            signal = max(peak - background, 1e-12)
            longest = step.dwell_s * max(FILL_TARGET * level - background, 0.0) / signal
            out.append(ExposureCheck(f"{name} {step.label}", step.dwell_s, peak, level, longest))
    return out
