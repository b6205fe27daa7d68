"""The runner: executes a compiled plan on real or simulated devices, for nights nobody watches.

It is the only part of lightloom with side effects and time. It owns the safety logic: the shutter
is closed first on every way out (end, exception, device fault, Ctrl-C, SIGTERM); transient
instrument faults are retried with bounded back-off and a reconnect; a lost beam pauses the run and
the step is measured again when the beam is back; drift beyond a threshold is flagged. Every
reading goes to the store (durable on return) the moment it is taken.
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Callable, Protocol, TypeVar

import numpy as np

from lightloom.drivers.errors import InstrumentError
from lightloom.drivers.camera import Camera, Frame
from lightloom.drivers.retry import call_with_retry, close_shutter_within
from lightloom.drivers.interfaces import Device, DiscreteActuator, PhotonCounter, PowerMeter, RotationStage, Shutter
from lightloom.sequencer.plan.compiler import TableModel
from lightloom.sequencer.errors import RunFault, StorageError
from lightloom.sequencer.plan.kinematics import approach_path
from lightloom.sequencer.optics.analyzer import port_operators
from lightloom.sequencer.run.beam import BeamWatch, MonitorLevels, monitor_levels
from lightloom.sequencer.model.elements import ElementSettings
from lightloom.sequencer.model.steps import StepList, Step
from lightloom.sequencer.model.records import (
    FLAG_AFTER_BEAM_WAIT, FLAG_DRIFT, FLAG_RETRIED, Event, Reading,
)

T = TypeVar("T")

# A stage read-back further than this from its target (deg) means the axis did not get there.
POSITION_TOLERANCE_DEG = 0.05
# The run file is refreshed every RunPolicy.refresh_s (2 s), stretched up to this when refreshes are slow.
MAX_REFRESH_S = 10.0
# Waits between sweep passes longer than this (s) are spent with the shutter closed.
SHUTTER_CLOSED_WAIT_S = 5.0


class StopRequested(BaseException):
    """Raised in the main thread by the SIGTERM (or SIGHUP) handler: stop safely, like Ctrl-C.

    ``args[0]``, when given, names the signal ("SIGTERM", "SIGHUP").
    """


@dataclass
class Rig:
    """The devices of a bench, by the part they play."""

    stages: dict[str, RotationStage]  # by the element each stage sets (STAGE_ELEMENTS)
    converter: DiscreteActuator | None
    shutter: Shutter
    detectors: tuple[PowerMeter | PhotonCounter, ...]
    reference: PowerMeter | None = None

    def devices(self) -> list[Device]:
        out: list[Device] = [self.shutter, *self.stages.values()]
        if self.converter is not None:
            out.append(self.converter)
        out.extend(self.detectors)
        if self.reference is not None:
            out.append(self.reference)
        return out


@dataclass(frozen=True)
class RunPolicy:
    """Retries, beam-loss and drift thresholds, and timing of the runner."""

    retry_attempts: int = 4
    backoff_s: float = 0.1
    max_backoff_s: float = 5.0
    shutter_close_s: float = 60.0
    beam_loss_fraction: float = 0.3
    beam_wait_s: float = 900.0
    beam_poll_s: float = 5.0
    drift_fraction: float = 0.05
    settle_timeout_s: float = 120.0
    refresh_s: float = 2.0


class FrameSink(Protocol):
    """Where camera frames go, durably, before their reading is recorded."""

    def append(self, step_index: int, frames: Sequence[tuple[int, Frame]]) -> None: ...


class RunMonitor(Protocol):
    """What the runner tells the person (or nobody) watching."""

    def step_done(self, step: Step, reading: Reading, steps_done: int, steps_total: int) -> None: ...

    def warning(self, message: str) -> None: ...

    def info(self, message: str) -> None: ...

    def waiting(self, seconds: float, pass_number: int, passes: int) -> None: ...


class SilentMonitor:
    """A monitor that shows nothing (tests, no terminal)."""

    def step_done(self, step: Step, reading: Reading, steps_done: int, steps_total: int) -> None:
        pass

    def warning(self, message: str) -> None:
        pass

    def info(self, message: str) -> None:
        pass

    def waiting(self, seconds: float, pass_number: int, passes: int) -> None:
        pass


class Runner:
    """Execute ``plan`` on ``rig``, recording into ``store``.

    ``now`` returns UNIX seconds (virtual for simulated benches), ``sleep`` waits (virtual too),
    ``log`` writes a line to the human-readable log.
    """

    def __init__(
        self,
        plan: StepList,
        table: TableModel,
        rig: Rig,
        store,
        policy: RunPolicy,
        *,
        now: Callable[[], float],
        sleep: Callable[[float], None],
        wall: Callable[[], float],
        monitor: RunMonitor | None = None,
        log: Callable[[str], None] = lambda line: None,
        units: str = "W",
        run_start: float | None = None,
        parallel_reads: bool = True,
        frames: FrameSink | None = None,
        frames_averaged: int | None = None,
        begin_reading: Callable[[int], None] | None = None,
        beam_watch: BeamWatch | None = None,
    ) -> None:
        self.plan = plan
        self.table = table
        self.rig = rig
        self.store = store
        self.policy = policy
        self.now = now
        self.sleep = sleep
        self.wall = wall
        self.monitor = monitor or SilentMonitor()
        self.log = log
        self.units = units
        self.run_start = run_start
        # Detectors integrate at once on real (or scaled-time) tables; on an instant simulated
        # table they are read one after the other so that the same seed gives the same readings.
        self.parallel_reads = parallel_reads
        # Camera frames go to ``frames`` before their reading goes to the store (see storage.frames).
        self.frames = frames
        self.frames_averaged = frames_averaged
        self._taken: dict[int, Frame] = {}
        # Told the index of each step just before its detectors are read (a simulated table
        # derives that reading's noise from it, so a resumed run reads what an uninterrupted one would).
        self.begin_reading = begin_reading
        # Which monitor watches the beam and its baseline (given on resume; else settled on the
        # first lit readings, sequencer.run.beam).
        self._beam = beam_watch or BeamWatch(policy.beam_loss_fraction, policy.drift_fraction)
        self._positions: dict[str, float] = {}
        self._converter_state: str | None = None
        self._shutter_open: bool | None = None
        self._retried = False
        self._state_lost = False
        self._may_remove = True
        self._pool = ThreadPoolExecutor(max_workers=max(1, len(rig.detectors) + 1), thread_name_prefix="read")
        self._last_refresh = -math.inf
        self._refresh_every_s = policy.refresh_s

    def _tell(self, fn: Callable[..., None], *args) -> None:
        """Update the display; a closed terminal or a display bug never stops a run."""
        try:
            fn(*args)
        except (Exception, SystemExit) as exc:
            self.log(f"display update failed ({exc!r}); the run goes on")

    # ------------------------------------------------------------------ safety
    def close_shutter_safely(self) -> bool:
        """Close the shutter, retrying with back-off and a reconnect; True once it reads back closed.

        Attempts go on for ``policy.shutter_close_s`` (bench ``retry.shutter_close_s``, 60 s by
        default) on the run's clock, pausing ``backoff_s``, doubling up to ``max_backoff_s``,
        between attempts (drivers.retry.close_shutter_within), so a controller that restarts or a
        rack that comes back within that time still receives the close. Only then does the caller
        warn to block the beam by hand.
        """
        closed = close_shutter_within(
            self.rig.shutter, self.policy.shutter_close_s, backoff_s=self.policy.backoff_s,
            max_backoff_s=self.policy.max_backoff_s, now=self.now, sleep=self.sleep, log=self.log,
        )
        self._shutter_open = False if closed else None
        return closed

    # ------------------------------------------------------------------ retries
    def _call(self, device: Device, what: str, fn: Callable[[], T]) -> T:
        """Run ``fn`` with bounded back-off (drivers.retry) and a reconnect before each new attempt."""
        failed = 0
        reconnect = False

        def attempt() -> T:
            nonlocal reconnect
            if reconnect:
                reconnect = False
                device.reconnect()
                self._forget_state_of(device)
            return fn()

        def on_retry(n: int, exc: InstrumentError, delay: float) -> None:
            nonlocal failed, reconnect
            failed, reconnect = n, True
            self._retried = True
            self.log(f"transient fault on {what} (attempt {n}): {exc}; retrying in {delay:.2f} s")
            self._tell(self.monitor.warning, f"retrying {what}: {exc}")

        try:
            return call_with_retry(
                attempt, self.policy.retry_attempts, self.policy.backoff_s, self.policy.max_backoff_s,
                on_retry, self.sleep,
            )
        except InstrumentError as exc:
            raise RunFault(
                f"{exc} — gave up on {what} after {failed + 1} attempt(s); check the instrument, "
                "then `lightloom resume` the run"
            ) from exc

    def _forget_state_of(self, device: Device) -> None:
        """After a reconnect the instrument, or the whole rack, may have restarted: what we knew of
        every device's state is void, and the step under way is measured again from the start,
        re-commanding the shutter, the converter and every stage (see measure_step).
        """
        if isinstance(device, (RotationStage, DiscreteActuator, Shutter)):
            self._forget_all()

    def _forget_all(self) -> None:
        self._state_lost = True
        self._positions.clear()
        self._converter_state = None
        self._shutter_open = None

    # ------------------------------------------------------------------ what a stand-in is told
    # A resumed run on an instant simulated table replays the transition into its first step on a
    # stand-in runner (run.session); these are the parts of the runner that replay may touch.
    def assume_stage_at(self, role: str, angle_deg: float) -> None:
        """Take stage ``role`` to stand at ``angle_deg`` (deg) as last commanded; no device is moved."""
        self._positions[role] = float(angle_deg)

    def assume_converter_state(self, state: str) -> None:
        """Take the mode converter to be in ``state`` as last set; the device is not touched."""
        self._converter_state = state

    def set_shutter(self, open_: bool) -> None:
        """Open (True) or close (False) the shutter, unless it is already so by the runner's knowledge."""
        self._set_shutter(open_)

    def read_detectors(self, dwell_s: float) -> tuple[np.ndarray, float]:
        """Read every detector for ``dwell_s`` (s): detector values and the reference (NaN: none)."""
        return self._read_all(dwell_s)

    def wait_for_pass(self, step: Step) -> None:
        """Wait, shutter closed when long, until the start time of ``step``'s pass (if it has one)."""
        self._wait_for_pass(step)

    def release_readers(self) -> None:
        """Let the detector-reading threads go, without closing any device (a stand-in's end)."""
        self._pool.shutdown(wait=False)

    # ------------------------------------------------------------------ motion
    def _set_shutter(self, open_: bool) -> None:
        if self._shutter_open == open_:
            return
        sh = self.rig.shutter
        if open_:
            self._call(sh, "opening the shutter", sh.open)
        else:
            self._call(sh, "closing the shutter", sh.close_beam)
        self._shutter_open = open_

    def _move(self, settings: ElementSettings) -> None:
        targets = {name: angle for name, angle in settings.stage_angles().items() if name in self.rig.stages}
        paths = {}
        for i, target in targets.items():
            here = self._positions.get(i)
            if here is not None and abs(here - target) < 1e-9:
                continue
            backlash = self.table.kinematics[i].backlash_deg if i in self.table.kinematics else 0.0
            # Position unknown (first move): approach from below anyway, so backlash is taken up.
            start = here if here is not None else math.inf
            paths[i] = approach_path(start, target, backlash)
        conv_target = None
        if self.rig.converter is not None and settings.mode_converter is not None:
            conv_target = settings.mode_converter
            if conv_target == self._converter_state:
                conv_target = None
        if conv_target is not None:
            c = self.rig.converter
            self._call(c, f"setting {c.name} {conv_target}", lambda: c.set_state(conv_target))
        phases = max((len(p) for p in paths.values()), default=0)
        for phase in range(phases):
            moving = []
            for i, path in paths.items():
                if phase >= len(path):
                    continue
                stage, point = self.rig.stages[i], path[phase]
                self._call(stage, f"moving {stage.name} to {point:.4f} deg", lambda s=stage, p=point: s.move_to_deg(p))
                moving.append((i, stage, point))
            for i, stage, point in moving:
                self._call(
                    stage, f"waiting for {stage.name}",
                    lambda s=stage: s.wait_settled(self.policy.settle_timeout_s),
                )
                self._positions[i] = point
        for i, target in targets.items():
            self._positions[i] = target
        if conv_target is not None:
            c = self.rig.converter
            state = self._call(c, f"waiting for {c.name}", lambda: c.wait_settled(self.policy.settle_timeout_s))
            if state != conv_target and self._state_lost:
                return  # the actuator restarted under us: measure_step measures the step again
            if state != conv_target:
                raise RunFault(f"device '{c.name}' reports state {state!r} after being set {conv_target!r}; check the actuator")
            self._converter_state = conv_target

    def _readback(self, settings: ElementSettings) -> np.ndarray | None:
        """Where the elements are, as a settings vector (None: a device restarted, move again)."""
        angles: dict[str, float] = {}
        for name, commanded in settings.stage_angles().items():
            stage = self.rig.stages.get(name)
            if stage is None:
                continue
            pos = self._call(stage, f"reading the position of {stage.name}", stage.position_deg)
            if abs(pos - commanded) > POSITION_TOLERANCE_DEG and (self._state_lost or self._may_remove):
                # The instrument may have restarted under us (a restarted controller forgets its
                # position): command everything again once before calling the axis stuck.
                self.log(f"{stage.name} reads {pos:.3f} deg instead of {commanded:.3f} deg; moving again")
                self._forget_all()
                return None
            if abs(pos - commanded) > POSITION_TOLERANCE_DEG:
                raise RunFault(
                    f"device '{stage.name}' is at {pos:.3f} deg, not at the commanded {commanded:.3f} deg: "
                    "the axis may be stuck or blocked; check it, then `lightloom resume`"
                )
            angles[f"{name}_deg"] = pos
        converter = None
        if self.rig.converter is not None and settings.mode_converter is not None:
            c = self.rig.converter
            state = self._call(c, f"reading the state of {c.name}", c.state)
            converter = "in" if state == "in" else "out"
        return ElementSettings(mode_converter=converter, **angles).as_vector()

    # ------------------------------------------------------------------ reading
    def _read_one(self, device: PowerMeter | PhotonCounter | Camera, dwell_s: float) -> float:
        if isinstance(device, Camera):
            # A camera exposes for the dwell; its reading is the frame's sum, the frame is kept.
            frame = self._call(device, f"reading {device.name}",
                               lambda: device.read_frame(exposure_s=dwell_s, frames=self.frames_averaged))
            self._taken[self.rig.detectors.index(device)] = frame
            return frame.total_adu
        if isinstance(device, PhotonCounter):
            return float(self._call(device, f"reading {device.name}", lambda: device.read_counts(dwell_s)))
        return float(self._call(device, f"reading {device.name}", lambda: device.read_power_w(dwell_s)))

    def _read_all(self, dwell_s: float) -> tuple[np.ndarray, float]:
        devices: list[PowerMeter | PhotonCounter] = list(self.rig.detectors)
        if self.rig.reference is not None:
            devices.append(self.rig.reference)
        if len(devices) == 1 or not self.parallel_reads:
            values = [self._read_one(d, dwell_s) for d in devices]
        else:
            futures = [self._pool.submit(self._read_one, d, dwell_s) for d in devices]
            values = [f.result() for f in futures]
        ref = values.pop() if self.rig.reference is not None else math.nan
        return np.array(values, dtype=float), ref

    def _wait_for_beam(self, verdict) -> None:
        assert verdict.level is not None and verdict.baseline is not None
        msg = (
            f"beam lost: monitor at {verdict.level:.3g} against {verdict.baseline:.3g} "
            f"(threshold {self.policy.beam_loss_fraction:.0%}); pausing"
        )
        self.store.event(Event(self.now(), "beam_lost", msg))
        self.log(msg)
        self._tell(self.monitor.warning, msg)
        waited = 0.0
        while waited <= self.policy.beam_wait_s:
            self.sleep(self.policy.beam_poll_s)
            waited += self.policy.beam_poll_s
            # Re-command the shutter open: a restarted shutter controller comes back closed.
            self._shutter_open = None
            self._set_shutter(True)
            probe = self._beam.back(self._probe_beam())
            if probe is not None:
                back = f"beam back after {waited:.0f} s (monitor {probe:.3g}); measuring the step again"
                self.store.event(Event(self.now(), "beam_back", back))
                self.log(back)
                self._tell(self.monitor.info, back)
                return
        raise RunFault(
            f"the beam did not come back within {self.policy.beam_wait_s:g} s "
            "(thresholds.beam_wait_s); check the laser and the beam path, then `lightloom resume`"
        )

    def _probe_beam(self) -> MonitorLevels:
        """A short reading of every monitor (reference meter and ports)."""
        values, ref = self._read_all(0.05)
        return monitor_levels("measure", values, ref, self.table)

    # ------------------------------------------------------------------ steps
    def measure_step(self, step: Step) -> Reading:
        """Move, read every port, check the beam; returns the reading (not yet stored)."""
        flags = 0
        redos = 0
        beam_redos = 0
        while True:
            self._retried = False
            self._state_lost = False
            self._may_remove = redos == 0
            self._set_shutter(step.shutter_open)
            self._move(step.settings)
            readback = self._readback(step.settings)
            if self.begin_reading is not None:
                self.begin_reading(step.index)
            t_start = self.now()
            values, ref = self._read_all(step.dwell_s) if readback is not None else (None, math.nan)
            t_end = self.now()
            if readback is None or self._state_lost:
                redos += 1
                if redos > self.policy.retry_attempts:
                    raise RunFault(
                        f"step {step.index}: instruments kept reconnecting in a changed state "
                        f"({redos - 1} times); check them, then `lightloom resume` the run"
                    )
                self.log(f"an instrument reconnected or lost its position during step {step.index}; measuring that step again")
                flags |= FLAG_RETRIED
                continue
            if step.kind != "background":
                verdict = self._beam.judge(monitor_levels(step.kind, values, ref, self.table),
                                           provisional=beam_redos == 0)
                if verdict.announce:
                    self.log(verdict.announce)
                    if verdict.unwatched:
                        self.store.event(Event(self.now(), "note", verdict.announce))
                        self._tell(self.monitor.warning, verdict.announce)
                if verdict.lost:
                    beam_redos += 1
                    if beam_redos > self.policy.retry_attempts:
                        raise RunFault(
                            f"step {step.index}: the beam monitor fell below "
                            f"{self.policy.beam_loss_fraction:.0%} of its baseline {beam_redos} times although a "
                            "probe found the beam back each time; check the monitor (a loose fibre, a noisy "
                            "meter) or raise thresholds.beam_loss_fraction, then `lightloom resume`"
                        )
                    self._wait_for_beam(verdict)
                    flags |= FLAG_AFTER_BEAM_WAIT
                    continue
                if verdict.drift:
                    flags |= FLAG_DRIFT
                    if not self._beam.drifting:
                        self._beam.drifting = True
                        assert verdict.level is not None and verdict.baseline is not None
                        msg = (
                            f"drift: beam monitor at {verdict.level / verdict.baseline:.1%} of its baseline "
                            f"(threshold +-{self.policy.drift_fraction:.0%})"
                        )
                        self.store.event(Event(self.now(), "drift", msg))
                        self.log(msg)
                        self._tell(self.monitor.warning, msg)
                elif verdict.level is not None:
                    self._beam.drifting = False
            if self._retried:
                flags |= FLAG_RETRIED
            operators = port_operators(self.table.analyzer, self.table.ports, readback[None, :])[0]
            return Reading(
                step_index=step.index, kind=step.kind, pass_index=step.pass_index,
                point_index=step.point_index, repeat_index=step.repeat_index,
                commanded=step.settings.as_vector(), readback=readback, values=values,
                reference_w=ref, operators=operators, dwell_s=step.dwell_s,
                t_start=t_start, t_end=t_end, flags=flags,
            )

    def connect(self) -> None:
        """Connect every device (retrying transient faults) and close the shutter."""
        for device in self.rig.devices():
            self._call(device, f"connecting {device.name}", device.connect)
        self._set_shutter(False)
        self._shutter_open = False

    def execute(self, done: set[int] | np.ndarray) -> tuple[str, str]:
        """Run every step of the plan not done; return (status, message).

        ``done`` holds the indices of the steps recorded before, or is a boolean mask over
        the steps. Ctrl-C and SIGTERM (StopRequested) end with "interrupted"; RunFault and a
        disk that refuses to store (StorageError) with "fault". The shutter is closed before
        this returns or raises, whatever happened.
        """
        status, message = "fault", "the run stopped before it started"
        total = len(self.plan.steps)
        mask = _done_mask(done, total)
        n_done = int(np.count_nonzero(mask))
        try:
            self.connect()
            for step in self.plan.steps:
                if mask[step.index]:
                    continue
                self._wait_for_pass(step)
                self._taken = {}
                reading = self.measure_step(step)
                if self.frames is not None and self._taken:
                    self.frames.append(step.index, sorted(self._taken.items()))
                self.store.record(reading)
                n_done += 1
                self.log(_reading_line(step, reading, self.units))
                self._tell(self.monitor.step_done, step, reading, n_done, total)
                if self.wall() - self._last_refresh >= self._refresh_every_s:
                    self._refresh()
            status, message = "complete", f"all {total} steps recorded"
        except (KeyboardInterrupt, StopRequested) as exc:
            status = "interrupted"
            message = "stopped by Ctrl-C" if isinstance(exc, KeyboardInterrupt) else f"stopped by {exc.args[0] if exc.args else 'SIGTERM'}"
            message += f" after {n_done} of {total} steps; `lightloom resume` continues it"
        except RunFault as exc:
            status, message = "fault", exc.one_line()
        except StorageError as exc:
            # The disk refused (full, read-only, failing): stop safely, then let the caller
            # report the one line that says what to do.
            self._finish("fault", exc.one_line())
            raise
        except InstrumentError as exc:
            status, message = "fault", f"{exc}; check the instrument, then `lightloom resume`"
        except BaseException as exc:
            status, message = "fault", f"internal error {exc!r}; the shutter was closed. Please report this."
            self._finish(status, message)
            raise
        message = self._finish(status, message)
        return status, message

    def _refresh(self) -> None:
        """Bring the run file up to the journal; its cost is O(new readings)."""
        t0 = self.wall()
        self.store.refresh("running")
        self._last_refresh = self.wall()
        # A guard, not the rule: a refresh costs O(new readings), but on a loaded machine or a
        # slow disk keep it under ~10% of the time, and the file never more than 10 s behind.
        self._refresh_every_s = max(self.policy.refresh_s, min(MAX_REFRESH_S, 10.0 * (self._last_refresh - t0)))

    def _finish(self, status: str, message: str) -> str:
        """Close the shutter, record the final event, close the devices; return the final message."""
        closed = self.close_shutter_safely()
        if closed:
            self.log("shutter closed (it reads back closed)")
        else:
            message += " — WARNING: the shutter did not confirm closing; block the beam by hand"
            self._tell(self.monitor.warning, "the shutter did not confirm closing: block the beam by hand")
        kind = {"complete": "complete", "interrupted": "interrupted"}.get(status, "fault")
        try:
            self.store.event(Event(self.now(), kind, message))
        except Exception as exc:
            self.log(f"could not record the final event: {exc!r}")
        self.log(f"{status}: {message}")
        self._pool.shutdown(wait=False, cancel_futures=True)
        for device in self.rig.devices():
            try:
                device.close()
            except Exception as exc:
                self.log(f"closing {device.name}: {exc!r}")
        return message

    def _wait_for_pass(self, step: Step) -> None:
        if self.plan.pass_interval_s <= 0 or step.pass_index == 0 or self.run_start is None:
            return
        due = self.run_start + step.pass_index * self.plan.pass_interval_s
        wait = due - self.now()
        if wait > 0:
            # Readers see every reading of the pass before the wait, not after it.
            self._refresh()
            if wait > SHUTTER_CLOSED_WAIT_S:
                # Nobody needs the beam until the next pass: keep it blocked meanwhile.
                self._set_shutter(False)
                self.log("shutter closed while waiting for the next pass")
            number, passes = step.pass_index + 1, self.plan.passes
            self.log(f"pass {number} of {passes}: waiting {hms(wait)} (h:mm:ss) for its start time")
            waiting = getattr(self.monitor, "waiting", None)
            if waiting is not None:
                self._tell(waiting, wait, number, passes)
            self.sleep(wait)


def hms(seconds: float) -> str:
    """A duration as h:mm:ss (``0:00:22``, ``11:30:21``), rounded to the second; ``-:--:--`` if unknown."""
    if not math.isfinite(seconds) or seconds < 0:
        return "-:--:--"
    s = int(round(seconds))
    return f"{s // 3600}:{(s % 3600) // 60:02d}:{s % 60:02d}"


def _done_mask(done: set[int] | np.ndarray, total: int) -> np.ndarray:
    if isinstance(done, np.ndarray) and done.dtype == bool:
        mask = np.zeros(total, dtype=bool)
        mask[: min(total, len(done))] = done[:total]
        return mask
    mask = np.zeros(total, dtype=bool)
    index = np.fromiter(done, dtype=np.int64, count=len(done))
    mask[index[(index >= 0) & (index < total)]] = True
    return mask



def _reading_line(step: Step, reading: Reading, units: str) -> str:
    vals = " ".join(f"{v:.6g}" for v in reading.values)
    ref = "" if math.isnan(reading.reference_w) else f" ref={reading.reference_w:.6g}"
    return f"step {step.index} {step.kind} [{step.label}] {vals} {units}{ref}"
