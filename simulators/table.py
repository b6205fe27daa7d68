"""The virtual optical table: a bench's simulated devices and the physics that decides what each
detector sees.

A detector port reads P0 * drift(t) * beam(t) * shutter(t) * tr(rho E_port), where rho is the
source state of ``simulation.source``, E_port the POVM element of that port computed by the optics
model from the TRUE imperfections of the table (``simulation.table``) at the optical positions the
stages and the converter have at that instant (backlash and stuck faults included), and the
meters add their offset and noise. The physics lives in sequencer.optics, once.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np

from lightloom.drivers.interfaces import Device
from lightloom.sequencer.lang.bench import Bench
from lightloom.sequencer.optics.analyzer import (
    CONVERTER, CONVERTER_IN, CONVERTER_OUT,
    park_settings, port_operators, probabilities,
)
from lightloom.sequencer.plan.tablemodel import analyzer_model, port_models
from lightloom.sequencer.model.elements import COLUMN
from lightloom.sequencer.model.vocabulary import STAGE_ELEMENTS
from lightloom.simulators.clock import SimClock
from lightloom.simulators.devices import (
    SimActuator, SimPhotonCounter, SimPowerMeter, SimRotationStage, SimShutter,
)
from lightloom.simulators.faults import FaultInjector

# Spawn-key branch of the per-step detector streams (the construction-time streams use the
# plain children of the seed, whose keys are one number long, so the two never meet).
_STEP_STREAMS = 1

# On an instant table every reading starts on this grid of virtual time (2**-20 s, about 1 us).
# A run's clock zero is a whole UNIX second, so a reading's UNIX start time (whole seconds plus a
# multiple of 2**-20 s, below 2**33 s) is an exact float and gives back its virtual time exactly:
# the one thing a resumed run needs to continue the uninterrupted run's time line to the bit.
READING_GRID_S = 2.0 ** -20


@dataclass(frozen=True)
class Drift:
    """Relative laser power drift: 1 + amplitude sin(2 pi t / period + phase)."""

    amplitude: float
    period_s: float
    phase: float

    def factor(self, t_s: float) -> float:
        if self.amplitude == 0.0 or not math.isfinite(self.period_s) or self.period_s <= 0:
            return 1.0
        return 1.0 + self.amplitude * math.sin(2.0 * math.pi * t_s / self.period_s + self.phase)


class SimulatedTable:
    """All simulated devices of a simulated bench, sharing one clock, one source and one physics."""

    def __init__(
        self,
        bench: Bench,
        *,
        wall_sleep: Callable[[float], None] | None = None,
        time_scale: float | None = None,
        epoch_s: float | None = None,
        start_s: float = 0.0,
    ) -> None:
        sim = bench.simulation
        if sim is None:
            raise ValueError(f"bench '{bench.name}' has no simulation section")
        self.bench = bench
        # UNIX time of virtual time 0: what the runner's clock and the camera's timestamps add.
        self.epoch_s = time.time() if epoch_s is None else float(epoch_s)
        kwargs = {} if wall_sleep is None else {"wall_sleep": wall_sleep}
        self.clock = SimClock(sim.time_scale if time_scale is None else time_scale, start_s=start_s, **kwargs)
        self.seed = sim.seed
        seeds = np.random.SeedSequence(sim.seed)
        fault_seed, drift_seed, *device_seeds = seeds.spawn(2 + len(bench.devices))
        self.faults = FaultInjector(sim.faults, rng=np.random.default_rng(fault_seed))
        self.drift = Drift(sim.drift.amplitude, sim.drift.period_s,
                           float(np.random.default_rng(drift_seed).uniform(0, 2 * math.pi)))
        self.power_w = sim.source.power_w
        self.rho = sim.source.density()
        self.model = analyzer_model(bench, truth=True)
        self.ports = port_models(bench, truth=True)
        self.port_index = {p.name: j for j, p in enumerate(self.ports)}
        # The pick-off takes its fraction of the beam only if the bench has a reference meter.
        fraction = sim.table.reference_fraction if bench.roles.reference else 0.0
        self.reference_fraction = fraction if fraction is not None else 0.01
        self.devices: dict[str, Device] = {}
        self.stage_of: dict[int, SimRotationStage] = {}
        self.converter: SimActuator | None = None
        self.shutter: SimShutter | None = None
        roles = bench.roles
        by_role = {getattr(roles, r): COLUMN[r] for r in STAGE_ELEMENTS if getattr(roles, r)}
        for (name, spec), seed in zip(bench.devices.items(), device_seeds):
            rng = np.random.default_rng(seed)
            self.devices[name] = self._make(name, spec, rng, sim)
            if name in by_role:
                self.stage_of[by_role[name]] = self.devices[name]  # type: ignore[assignment]
        if roles.mode_converter:
            self.converter = self.devices[roles.mode_converter]  # type: ignore[assignment]
        self.shutter = self.devices[roles.shutter]  # type: ignore[assignment]
        self._cache_key: tuple | None = None
        self._cache_probs: np.ndarray | None = None
        self._continue: tuple[int, float, dict[str, tuple[float, float]]] | None = None

    def continue_at_step(self, step_index: int, virtual_s: float,
                         stages: dict[str, tuple[float, float]] | None = None) -> None:
        """Resume the time line of an instant run: when step ``step_index`` begins its reading,
        the table stands at ``virtual_s`` (s), the time an uninterrupted run would have had there.

        After a resume the runner closes the shutter and approaches every stage again; that takes
        virtual time an uninterrupted run did not spend, and the laser drifts with time. Every
        device is at rest when a reading begins, so the table is re-anchored at ``virtual_s``
        (earlier or later than its clock) with nothing cut or replayed: the resumed run then reads
        at the same times, and so the same drift, as the uninterrupted one. Instant tables only.

        ``stages``: device name -> (motor, optic) angles, deg, where the uninterrupted run had each
        stage then. They differ from the resumed run's only by what the runner treats as no move
        (below 1e-9 deg: a target equal to the last one up to rounding is not commanded again).
        """
        if self.clock.time_scale != 0.0:
            raise ValueError("continue_at_step: only an instant table (time_scale 0) can be re-anchored")
        if not math.isfinite(virtual_s) or virtual_s < 0:
            raise ValueError(f"continue_at_step: virtual_s must be finite and >= 0, got {virtual_s!r}")
        self._continue = (int(step_index), float(virtual_s), dict(stages or {}))

    def rest_at(self, virtual_s: float) -> None:
        """Set the clock of an instant table, every device at rest, to ``virtual_s`` (s)."""
        for device in self.devices.values():
            device.rest_at(virtual_s)  # type: ignore[attr-defined]
        self.clock.rebase(virtual_s)

    def begin_step(self, step_index: int) -> None:
        """Give every detector the noise stream of step ``step_index``; on an instant table, start
        the reading on the time grid (READING_GRID_S), at the resumed time line if one is pending.

        Each detector's stream is derived from (seed, device, step index) with numpy's
        SeedSequence, not drawn in sequence from one stream, so a run stopped and resumed reads
        the same noise at every step as an uninterrupted run with the same seed.
        """
        if isinstance(step_index, bool) or not isinstance(step_index, (int, np.integer)) or step_index < 0:
            raise ValueError(f"step_index must be an integer >= 0, got {step_index!r}")
        if self.clock.time_scale == 0.0:
            if self._continue is not None and self._continue[0] == step_index:
                _, at, stages = self._continue
                for name, (motor, optic) in stages.items():
                    self.devices[name].place(motor, optic)  # type: ignore[attr-defined]
                self.rest_at(at)
            self._continue = None
            now = self.clock.now()
            self.clock.advance_to(math.ceil(now / READING_GRID_S) * READING_GRID_S)
        for i, device in enumerate(self.devices.values()):
            if callable(getattr(device, "use_rng", None)):  # the detectors, cameras included
                seq = np.random.SeedSequence(self.seed, spawn_key=(_STEP_STREAMS, i, int(step_index)))
                device.use_rng(np.random.default_rng(seq))

    # ------------------------------------------------------------------ devices
    def _make(self, name, spec, rng, sim) -> Device:
        kind = spec.kind
        if kind == "rotation_stage":
            lim = spec.limits
            return SimRotationStage(
                name, self.clock, limits_deg=(lim.min_deg, lim.max_deg), speed_deg_per_s=lim.speed_deg_per_s,
                acceleration_deg_per_s2=lim.acceleration_deg_per_s2, backlash_deg=spec.backlash_deg,
                settle_s=spec.settle_s, faults=self.faults,
            )
        if kind == "actuator":
            states = spec.states or ("in", "out")
            initial = "out" if "out" in states else states[0]
            return SimActuator(name, self.clock, states=tuple(states), initial_state=initial,
                               switch_s=spec.switch_s + spec.settle_s, faults=self.faults)
        if kind == "shutter":
            return SimShutter(name, self.clock, switch_s=spec.switch_s + spec.settle_s, faults=self.faults)
        if kind == "camera":
            return self._camera(name, spec, rng)
        light = self._light_for(name)
        if kind == "power_meter":
            return SimPowerMeter(
                name, self.clock, light, rng, offset_w=sim.noise.meter_offset_w, noise_w=sim.noise.meter_noise_w,
                relative_noise=sim.noise.relative_noise, wavelength_nm=self.bench.wavelength_nm, faults=self.faults,
            )
        if kind == "photon_counter":
            return SimPhotonCounter(
                name, self.clock, light, rng, counts_per_w=sim.noise.counts_per_w,
                dark_counts_per_s=sim.noise.dark_counts_per_s, faults=self.faults,
            )
        raise ValueError(f"device '{name}': no simulated device of kind {kind!r}")

    def _camera(self, name, spec, rng) -> Device:
        from lightloom.simulators.camera import CameraLight, make_sim_camera, polarization_povm

        j = self.port_index[name]

        def povm() -> np.ndarray:
            s = self.optical_settings()
            return polarization_povm(port_operators(self.model, self.ports, s[None, :])[0][j])

        def hwp_deg() -> float:
            stage = self.stage_of.get(COLUMN["half_wave_plate"])
            return stage.optical_angle_deg() if stage is not None else 0.0

        light = CameraLight(
            power_w=lambda: self.source_power_w() * (1.0 - self.reference_fraction),
            povm=povm, hwp_deg=hwp_deg, state=self.rho, wavelength_nm=self.bench.wavelength_nm,
            epoch_s=self.epoch_s,
        )
        return make_sim_camera(name, spec.options, self.clock, light, rng, self.faults)

    # ------------------------------------------------------------------ physics
    def optical_settings(self, t_s: float | None = None) -> np.ndarray:
        """The element settings the beam sees at ``t_s`` (default now), in ELEMENT_NAMES order."""
        s = park_settings(1)[0]
        for i, stage in self.stage_of.items():
            s[i] = stage.optical_angle_deg(t_s)
        if self.converter is not None:
            s[CONVERTER] = CONVERTER_IN if self.converter.optical_state(t_s) == "in" else CONVERTER_OUT
        return s

    def port_probabilities(self, t_s: float | None = None) -> np.ndarray:
        """tr(rho E_port) for every detector port (gains included) at the current positions."""
        s = self.optical_settings(t_s)
        key = tuple(np.round(s, 12))
        if key != self._cache_key:
            ops = port_operators(self.model, self.ports, s[None, :])[0]
            self._cache_probs = probabilities(self.rho, ops)
            self._cache_key = key
        assert self._cache_probs is not None
        return self._cache_probs

    def source_power_w(self, t_s: float | None = None) -> float:
        """Power arriving at the analyzer at ``t_s``: drift, beam loss and the shutter included, W."""
        t = self.clock.now() if t_s is None else t_s
        if self.shutter is not None and not self.shutter.transmits(t):
            return 0.0
        return self.power_w * self.drift.factor(t) * float(self.faults.beam_factor(t))

    def _light_for(self, name: str) -> Callable[[], float]:
        if name == self.bench.roles.reference:
            return lambda: self.source_power_w() * self.reference_fraction
        if name in {d.device for d in self.bench.roles.detectors}:
            def light() -> float:
                j = self.port_index[name]
                return self.source_power_w() * (1.0 - self.reference_fraction) * float(self.port_probabilities()[j])
            return light
        return lambda: 0.0
