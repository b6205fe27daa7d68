"""Physics-backed simulated devices (stage, actuator, shutter, power meter, photon counter) on a shared clock.

Each device implements its interface from drivers.interfaces, spends virtual time on the injected
SimClock, draws noise from an injected numpy Generator, and raises the typed errors of
drivers.errors. A detector reads the true optical power at its port through an injected callable
(the table's light model). Link faults (timeout, garbled reply, dropped connection) from an
injected FaultInjector are raised in process; when a device is served by the SCPI server, the
server enacts them on the wire instead (see ``SimDevice.link_faults_suspended``).
"""

from __future__ import annotations

import math
import numbers
import threading
from contextlib import contextmanager
from typing import Callable, ClassVar, Iterator

import numpy as np

from lightloom.drivers.errors import BadReply, ConnectionLost, DeviceFault, InstrumentTimeout, LimitViolation
from lightloom.drivers.interfaces import DiscreteActuator, PhotonCounter, PowerMeter, RotationStage, Shutter
from lightloom.sequencer.model.vocabulary import IDENTITY_WORD
from lightloom.sequencer.plan.kinematics import move_time_s
from lightloom.simulators.clock import SimClock
from lightloom.simulators.faults import FaultInjector, garble_reply

__all__ = [
    "ACTUATOR", "COUNTER", "DEVICE_KINDS", "POWERMETER", "SHUTTER", "STAGE",
    "SimActuator", "SimDevice", "SimPhotonCounter", "SimPowerMeter", "SimRotationStage", "SimShutter",
    "home_time_s", "homing_waypoints_deg", "identity_string", "move_time_s", "profile_displacement_deg",
    "resume_time_s", "unpaused_elapsed_s",
]

IDENTITY_MAKER = "lightloom"
IDENTITY_VERSION = "0.1"

STAGE = IDENTITY_WORD["rotation_stage"]
ACTUATOR = IDENTITY_WORD["actuator"]
SHUTTER = IDENTITY_WORD["shutter"]
POWERMETER = IDENTITY_WORD["power_meter"]
COUNTER = IDENTITY_WORD["photon_counter"]
DEVICE_KINDS: tuple[str, ...] = (STAGE, ACTUATOR, SHUTTER, POWERMETER, COUNTER)


def identity_string(kind: str, name: str) -> str:
    """The IEEE 488.2 ``*IDN?`` answer of a simulated device: ``lightloom,SIM-<KIND>,<name>,0.1``."""
    return f"{IDENTITY_MAKER},SIM-{kind},{name},{IDENTITY_VERSION}"


# --------------------------------------------------------------------------- kinematics (pure)
# Move durations come from sequencer.kinematics.move_time_s (re-exported here), the one definition
# of the trapezoidal profile that the dry-run estimate, the ordering and these stages share.


def _check_motion_parameters(name: str, speed: float, accel: float) -> None:
    if not (math.isfinite(speed) and speed > 0):
        raise ValueError(f"stage {name!r}: speed_deg_per_s must be finite and > 0, got {speed!r}")
    if not accel > 0:
        raise ValueError(f"stage {name!r}: acceleration_deg_per_s2 must be > 0 (inf for instant), got {accel!r}")


def profile_displacement_deg(
    distance_deg: float, speed_deg_per_s: float, acceleration_deg_per_s2: float, t_s: float
) -> float:
    """Signed displacement along the trapezoidal profile of ``move_time_s`` at ``t_s`` after the start, deg.

    Accelerate at ``a`` to the peak speed ``min(v, sqrt(|d| a))``, cruise, decelerate at ``a``
    (standard point-to-point profile, common practice, no source). Clipped to 0 before the start
    and to ``distance_deg`` after the end; ``acceleration_deg_per_s2 = inf`` gives constant speed.
    """
    d = abs(distance_deg)
    if d == 0.0 or t_s <= 0.0:
        return 0.0
    total_s = float(move_time_s(d, speed_deg_per_s, acceleration_deg_per_s2))
    if t_s >= total_s:
        return float(distance_deg)
    sign = 1.0 if distance_deg > 0 else -1.0
    v, a = float(speed_deg_per_s), float(acceleration_deg_per_s2)
    if math.isinf(a):
        return sign * v * t_s
    v_peak = min(v, math.sqrt(d * a))
    t_ramp = v_peak / a
    if t_s < t_ramp:
        x = 0.5 * a * t_s * t_s
    elif t_s < total_s - t_ramp:
        x = 0.5 * v_peak * t_ramp + v_peak * (t_s - t_ramp)
    else:
        x = d - 0.5 * a * (total_s - t_s) ** 2
    return sign * x


def homing_waypoints_deg(position_deg: float, home_deg: float, backoff_deg: float) -> tuple[float, ...]:
    """Motor waypoints of the homing sequence, deg: the last leg always approaches home from below.

    From above ``home_deg - backoff_deg`` the axis first drives down to that point, then up to
    home; from below it drives straight up. Ending on a positive-going leg of at least the
    backlash leaves the play taken up on the positive side, so the optic then sits exactly at home.
    """
    start_deg = home_deg - backoff_deg
    if position_deg > start_deg:
        return (start_deg, home_deg)
    return (home_deg,)


def home_time_s(
    position_deg: float,
    speed_deg_per_s: float,
    acceleration_deg_per_s2: float,
    backoff_deg: float,
    home_deg: float = 0.0,
) -> float:
    """Duration of the homing sequence from ``position_deg``, s (settling excluded)."""
    points = (position_deg,) + homing_waypoints_deg(position_deg, home_deg, backoff_deg)
    return float(sum(move_time_s(b - a, speed_deg_per_s, acceleration_deg_per_s2) for a, b in zip(points, points[1:])))


def unpaused_elapsed_s(t0_s: float, t_s: float, pauses: tuple[tuple[float, float], ...]) -> float:
    """Time elapsed from ``t0_s`` to ``t_s`` outside the merged ``[start, end)`` pause intervals, s."""
    if t_s <= t0_s:
        return 0.0
    elapsed = t_s - t0_s
    for start, end in pauses:
        overlap = min(end, t_s) - max(start, t0_s)
        if overlap > 0:
            elapsed -= overlap
    return max(elapsed, 0.0)


def resume_time_s(t0_s: float, active_s: float, pauses: tuple[tuple[float, float], ...]) -> float:
    """The time at which ``active_s`` seconds of unpaused time have passed since ``t0_s`` (inf if never)."""
    t = t0_s
    remaining = active_s
    for start, end in pauses:
        if end <= t:
            continue
        start = max(start, t)
        if start - t >= remaining:
            break
        remaining -= start - t
        t = end
        if math.isinf(t):
            return math.inf
    return t + remaining


# --------------------------------------------------------------------------- common device behaviour


def _check_name(name: str) -> str:
    if not isinstance(name, str) or not name or any(c in name for c in ",;\"'") or any(c.isspace() or not c.isprintable() for c in name):
        raise ValueError(
            f"device name must be a non-empty printable word without spaces, commas, quotes or semicolons, got {name!r}"
        )
    return name


class SimDevice:
    """State shared by every simulated device: name, kind, clock, faults, link state.

    Parameters
    ----------
    name : str
        The bench's name for the device (appears in ``*IDN?`` and in every error).
    clock : SimClock
        The simulation clock on which the device spends time.
    faults : FaultInjector, optional
        Injected faults; link faults are raised by every interface method (an "operation").
    """

    kind: ClassVar[str] = ""

    def __init__(self, name: str, clock: SimClock, faults: FaultInjector | None = None) -> None:
        self.name = _check_name(name)
        self.clock = clock
        self.faults = faults
        self._lock = threading.RLock()
        self._connected = True
        self._dropped = False
        self._served = threading.local()

    def identity(self) -> str:
        """The ``*IDN?`` answer: ``lightloom,SIM-<KIND>,<name>,0.1``."""
        return identity_string(self.kind, self.name)

    def connect(self) -> None:
        """Open the (simulated) connection; clears a dropped link. Idempotent."""
        with self._lock:
            self._connected = True
            self._dropped = False

    def close(self) -> None:
        """Close the (simulated) connection; operations then raise ConnectionLost until connect()."""
        with self._lock:
            self._connected = False

    def reset(self) -> None:
        """Return to the power-on settings (``*RST``)."""

    def pending_s(self) -> float:
        """Virtual seconds until the pending operation ends (0 at rest, inf if it never will)."""
        return 0.0

    def rest_at(self, t_s: float) -> None:
        """Re-anchor the state of this device, at rest now, at virtual time ``t_s`` (s).

        A device at rest is the same at any time; this moves the time its last change is dated to,
        so the clock can be set to ``t_s`` (earlier or later) without replaying or cutting a move.
        Devices without a time-dated state do nothing.
        """

    @contextmanager
    def link_faults_suspended(self) -> Iterator[None]:
        """While active in this thread, operations skip the in-process link checks and link faults.

        The SCPI server wraps each served command in this: on the wire the server enacts link
        faults itself (no reply, a garbled reply, a closed socket) and owns the connection state.
        """
        depth = getattr(self._served, "depth", 0)
        self._served.depth = depth + 1
        try:
            yield
        finally:
            self._served.depth = depth

    def _operation(self, op: str) -> None:
        """Gate every interface call: closed or dropped link, then injected link faults."""
        if getattr(self._served, "depth", 0):
            return
        with self._lock:
            if not self._connected:
                raise ConnectionLost(self.name, op, "the connection is closed", hint="call connect() first")
            if self._dropped:
                raise ConnectionLost(
                    self.name, op, "the connection dropped (simulated fault)", hint="call reconnect() and retry"
                )
        if self.faults is None:
            return
        kind = self.faults.link_fault(self.name, self.clock.now())
        if kind == "drop":
            with self._lock:
                self._dropped = True
            raise ConnectionLost(self.name, op, "the connection dropped (simulated fault)", hint="call reconnect() and retry")
        if kind == "timeout":
            raise InstrumentTimeout(self.name, op, "no reply in time (simulated fault)", hint="retry the operation")
        if kind == "garbled":
            raise BadReply(
                self.name, op, f"unparseable reply {garble_reply('0')!r} (simulated fault)", hint="retry the operation"
            )

    def _stuck_intervals(self) -> tuple[tuple[float, float], ...]:
        return () if self.faults is None else self.faults.stuck_intervals(self.name)


def _mean_light_w(clock: SimClock, light: Callable[[], float], duration_s: float, samples: int) -> float:
    """Mean of ``light()`` sampled at the midpoints of ``samples`` equal slices of ``duration_s``; spends it."""
    t0 = clock.now()
    total = 0.0
    for k in range(samples):
        clock.advance_to(t0 + (k + 0.5) * duration_s / samples)
        total += float(light())
    clock.advance_to(t0 + duration_s)
    return total / samples


def _check_positive(device: str, op: str, what: str, value: float, upper: float) -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not (0.0 < float(value) <= upper):
        raise LimitViolation(device, op, f"{what} must be in (0, {upper:g}], got {value!r}", hint=f"choose a {what} in range")
    return float(value)


# --------------------------------------------------------------------------- rotation stage


class SimRotationStage(SimDevice, RotationStage):
    """A motorised rotation mount with trapezoidal kinematics, travel limits, backlash and settling.

    Parameters
    ----------
    name, clock, faults
        See SimDevice.
    limits_deg : (float, float)
        Travel limits (min, max), deg; a move outside raises LimitViolation and does not start.
    speed_deg_per_s, acceleration_deg_per_s2 : float
        Profile parameters of ``move_time_s``.
    backlash_deg : float
        Width of the play between motor and optic, deg (>= 0).
    settle_s : float
        Time after the end of the profile before the stage reports settled, s.
    initial_deg : float
        Motor angle at start, deg; the play starts taken up on the positive side.
    home_backoff_deg : float, optional
        How far below home the homing sequence starts its final upward leg, deg
        (default ``max(1, 2 * backlash_deg)``; must be >= the backlash).
    home_timeout_s : float
        Virtual seconds ``home()`` waits before declaring the homing failed.

    Notes
    -----
    Backlash model (a play, or dead band, of width ``b``): the optic angle ``o`` stays within
    ``[m, m + b]`` of the motor angle ``m`` (the encoder, which ``position_deg`` reads back). While
    the motor turns it drags the optic by the near edge of the band: a positive-going move leaves
    ``o = m`` and a negative-going one ``o = m + b``. After a reversal the motor turns ``b`` before
    the optic moves at all, and from then on the optic lags the motor by ``b``. Approaching a
    target from below therefore puts the optic exactly on target (the convention of the
    calibration and of homing), from above ``b`` past it.

    Motion: a new move starts from the current profile position as if from rest (a retarget
    mid-move drops the current velocity). A ``stuck`` fault pauses the profile clock: the motor,
    the read-back and the optic stay put while stuck, and the profile resumes where it stopped.
    """

    kind: ClassVar[str] = STAGE

    def __init__(
        self,
        name: str,
        clock: SimClock,
        *,
        limits_deg: tuple[float, float] = (-360.0, 360.0),
        speed_deg_per_s: float = 20.0,
        acceleration_deg_per_s2: float = 40.0,
        backlash_deg: float = 0.0,
        settle_s: float = 0.05,
        initial_deg: float = 0.0,
        home_backoff_deg: float | None = None,
        home_timeout_s: float = 120.0,
        faults: FaultInjector | None = None,
    ) -> None:
        super().__init__(name, clock, faults)
        lo, hi = (float(x) for x in limits_deg)
        if not lo < hi:
            raise ValueError(f"stage {name!r}: limits_deg must be (min, max) with min < max, got {limits_deg!r}")
        _check_motion_parameters(name, float(speed_deg_per_s), float(acceleration_deg_per_s2))
        if not (math.isfinite(backlash_deg) and backlash_deg >= 0):
            raise ValueError(f"stage {name!r}: backlash_deg must be >= 0, got {backlash_deg!r}")
        if not (math.isfinite(settle_s) and settle_s >= 0):
            raise ValueError(f"stage {name!r}: settle_s must be >= 0, got {settle_s!r}")
        if not lo <= initial_deg <= hi:
            raise ValueError(f"stage {name!r}: initial_deg {initial_deg} is outside the limits [{lo}, {hi}]")
        backoff = max(1.0, 2.0 * backlash_deg) if home_backoff_deg is None else float(home_backoff_deg)
        if backoff < backlash_deg:
            raise ValueError(f"stage {name!r}: home_backoff_deg ({backoff}) must be >= backlash_deg ({backlash_deg})")
        self._limits = (lo, hi)
        self._speed = float(speed_deg_per_s)
        self._accel = float(acceleration_deg_per_s2)
        self._backlash = float(backlash_deg)
        self._settle_s = float(settle_s)
        self._home_backoff = backoff
        self.home_timeout_s = float(home_timeout_s)
        self._set_rest(clock.now(), float(initial_deg), float(initial_deg))

    # plan: from (t0, m0, o0) the motor runs the legs (start, end, duration) back to back
    def _set_rest(self, t_s: float, motor_deg: float, optic_deg: float) -> None:
        self._t0 = t_s
        self._m0 = motor_deg
        self._o0 = optic_deg
        self._legs: tuple[tuple[float, float, float], ...] = ()
        self._target = motor_deg
        self._busy_floor = -math.inf

    def _set_plan(self, t_s: float, waypoints: tuple[float, ...]) -> None:
        motor, optic = self._state_at(t_s)
        moving = self._motion_end() > t_s
        legs = []
        start = motor
        for point in waypoints:
            if point != start:
                legs.append((start, point, float(move_time_s(point - start, self._speed, self._accel))))
                start = point
        if not legs and not moving:
            return
        self._t0, self._m0, self._o0 = t_s, motor, optic
        self._legs = tuple(legs)
        self._target = waypoints[-1]
        self._busy_floor = -math.inf if legs else t_s + self._settle_s
        if legs and self.faults is not None:
            self.faults.on_move_start(self.name, t_s)

    def _state_at(self, t_s: float) -> tuple[float, float]:
        with self._lock:
            t0, motor, optic, legs = self._t0, self._m0, self._o0, self._legs
        tau = unpaused_elapsed_s(t0, t_s, self._stuck_intervals())
        b = self._backlash
        for start, end, duration in legs:
            if tau >= duration:
                motor = end
                optic = min(max(optic, motor), motor + b)
                tau -= duration
                continue
            motor = start + profile_displacement_deg(end - start, self._speed, self._accel, tau)
            optic = min(max(optic, motor), motor + b)
            break
        return motor, optic

    def _motion_end(self) -> float:
        with self._lock:
            t0, legs = self._t0, self._legs
        if not legs:
            return t0
        return resume_time_s(t0, sum(d for _, _, d in legs), self._stuck_intervals())

    def _busy_until(self) -> float:
        with self._lock:
            legs, floor = self._legs, self._busy_floor
        end = self._motion_end() + self._settle_s if legs else -math.inf
        return max(end, floor)

    def _stalled(self, t_s: float) -> bool:
        return self._motion_end() > t_s and any(a <= t_s < b for a, b in self._stuck_intervals())

    # interface properties (configuration, not operations)
    @property
    def limits_deg(self) -> tuple[float, float]:
        """Travel limits (min, max), deg."""
        return self._limits

    @property
    def speed_deg_per_s(self) -> float:
        """Cruise speed, deg/s."""
        return self._speed

    @property
    def acceleration_deg_per_s2(self) -> float:
        """Acceleration and deceleration, deg/s^2."""
        return self._accel

    @property
    def backlash_deg(self) -> float:
        """Width of the play between motor and optic, deg."""
        return self._backlash

    @property
    def settle_s(self) -> float:
        """Settling time after each move, s."""
        return self._settle_s

    @property
    def target_deg(self) -> float:
        """The last commanded motor target, deg."""
        with self._lock:
            return self._target

    # physics accessors for the light model (no faults, no time spent)
    def optical_angle_deg(self, t_s: float | None = None) -> float:
        """Angle the optic actually has at ``t_s`` (default now), deg: backlash and stuck faults included."""
        return self._state_at(self.clock.now() if t_s is None else t_s)[1]

    def motor_angle_deg(self, t_s: float | None = None) -> float:
        """Motor (encoder) angle at ``t_s`` (default now), deg: what ``position_deg`` reads back."""
        return self._state_at(self.clock.now() if t_s is None else t_s)[0]

    def pending_s(self) -> float:
        """Virtual seconds until the stage is settled (0 at rest, inf if stuck for ever)."""
        return max(0.0, self._busy_until() - self.clock.now())

    # operations
    def move_to_deg(self, angle_deg: float) -> None:
        """Start a move of the motor to ``angle_deg``; returns at once (see wait_settled)."""
        op = f"move_to_deg({angle_deg!r})"
        self._operation(op)
        lo, hi = self._limits
        if isinstance(angle_deg, bool) or not isinstance(angle_deg, numbers.Real) or not lo <= float(angle_deg) <= hi:
            raise LimitViolation(
                self.name, op, f"target {angle_deg!r} deg is outside the travel limits [{lo:g}, {hi:g}] deg",
                hint="check the protocol angles and the bench limits",
            )
        with self._lock:
            self._set_plan(self.clock.now(), (float(angle_deg),))

    def start_home(self) -> None:
        """Start the homing sequence (see homing_waypoints_deg); returns at once."""
        self._operation("start_home")
        with self._lock:
            now = self.clock.now()
            motor, _ = self._state_at(now)
            self._set_plan(now, homing_waypoints_deg(motor, 0.0, self._home_backoff))

    def home(self) -> None:
        """Run the homing sequence to 0 deg and wait until it ends."""
        self.start_home()
        self._wait(self.home_timeout_s, "home")

    def position_deg(self) -> float:
        """Read back the motor angle now, deg (the profile position during a move)."""
        self._operation("position_deg")
        return self.motor_angle_deg()

    def is_busy(self) -> bool:
        """Whether a move or its settling is still pending."""
        self._operation("is_busy")
        return self.pending_s() > 0.0

    def wait_settled(self, timeout_s: float) -> float:
        """Spend the remaining move and settle time; return the settled motor angle, deg.

        Raises DeviceFault when the axis is stalled (stuck) at the deadline, InstrumentTimeout
        when it is still moving; in both cases ``timeout_s`` of virtual time has been spent.
        """
        self._operation("wait_settled")
        return self._wait(timeout_s, "wait_settled")

    def _wait(self, timeout_s: float, op: str) -> float:
        if not (isinstance(timeout_s, numbers.Real) and timeout_s >= 0):
            raise ValueError(f"{op}: timeout_s must be >= 0 s, got {timeout_s!r}")
        now = self.clock.now()
        end = self._busy_until()
        deadline = now + float(timeout_s)
        if end <= now:
            return self.motor_angle_deg()
        if math.isfinite(end) and end <= deadline:
            self.clock.advance_to(end)
            return self.motor_angle_deg()
        if math.isinf(deadline):
            motor = self.motor_angle_deg()
            raise DeviceFault(self.name, op, f"axis stalled at {motor:.4f} deg and will not move again",
                              hint="check the mount for a jam, then home the stage")
        self.clock.advance_to(deadline)
        motor = self.motor_angle_deg()
        target = self.target_deg
        if self._stalled(self.clock.now()):
            raise DeviceFault(
                self.name, op, f"axis stalled at {motor:.4f} deg on its way to {target:.4f} deg; not settled after {timeout_s:g} s",
                hint="check the mount for a jam, then home the stage",
            )
        raise InstrumentTimeout(
            self.name, op, f"not settled after {timeout_s:g} s (at {motor:.4f} deg, moving to {target:.4f} deg)",
            hint="allow more time for the move or lower the speed demand",
        )

    def reset(self) -> None:
        """Stop where the motor is now (``*RST``); limits, speed and backlash state are kept."""
        with self._lock:
            now = self.clock.now()
            motor, optic = self._state_at(now)
            self._set_rest(now, motor, optic)

    def rest_at(self, t_s: float) -> None:
        """Re-anchor the stage, at rest now, at ``t_s`` (see SimDevice.rest_at); ValueError if moving."""
        with self._lock:
            if self.pending_s() > 0.0:
                raise ValueError(f"rest_at: stage {self.name!r} is still moving or settling")
            motor, optic = self._state_at(self.clock.now())
            self._set_rest(float(t_s), motor, optic)

    def place(self, motor_deg: float, optic_deg: float) -> None:
        """Put the stage, at rest now, at ``motor_deg`` with its optic at ``optic_deg`` (deg), at once.

        For setting up a simulated table in a known state (a resumed run's time line, tests);
        the optic must lie within the backlash above the motor. ValueError if moving.
        """
        motor, optic = float(motor_deg), float(optic_deg)
        if not (math.isfinite(motor) and motor <= optic <= motor + self._backlash):
            raise ValueError(f"place: stage {self.name!r}: optic {optic_deg!r} deg must be within "
                             f"[motor, motor + {self._backlash:g}] deg, motor {motor_deg!r} deg")
        with self._lock:
            if self.pending_s() > 0.0:
                raise ValueError(f"place: stage {self.name!r} is still moving or settling")
            self._set_rest(self.clock.now(), motor, optic)


# --------------------------------------------------------------------------- discrete actuator


class SimActuator(SimDevice, DiscreteActuator):
    """A device with named states (flip mount, mode converter in/out) and a switch time.

    The beam sees the old state until the switch completes; a ``stuck`` fault pauses the switch.

    Parameters
    ----------
    states : tuple of str
        Accepted states (default ``("in", "out")``).
    initial_state : str, optional
        State at start (default: the first of ``states``).
    switch_s : float
        Time a switch takes, s.
    """

    kind: ClassVar[str] = ACTUATOR

    def __init__(
        self,
        name: str,
        clock: SimClock,
        *,
        states: tuple[str, ...] = ("in", "out"),
        initial_state: str | None = None,
        switch_s: float = 0.5,
        faults: FaultInjector | None = None,
    ) -> None:
        super().__init__(name, clock, faults)
        states = tuple(states)
        if len(states) < 2 or len(set(states)) != len(states) or any(_bad_token(s) for s in states):
            raise ValueError(f"actuator {name!r}: states must be two or more distinct words, got {states!r}")
        initial = states[0] if initial_state is None else initial_state
        if initial not in states:
            raise ValueError(f"actuator {name!r}: initial_state {initial!r} is not one of {states}")
        if not (math.isfinite(switch_s) and switch_s >= 0):
            raise ValueError(f"actuator {name!r}: switch_s must be >= 0, got {switch_s!r}")
        self._states = states
        self._switch_s = float(switch_s)
        self._from = initial
        self._to = initial
        self._t0 = clock.now()

    @property
    def states(self) -> tuple[str, ...]:
        """The states this actuator accepts."""
        return self._states

    @property
    def switch_s(self) -> float:
        """Time a switch takes, s."""
        return self._switch_s

    def _switch_end(self) -> float:
        with self._lock:
            t0, moving = self._t0, self._from != self._to
        if not moving:
            return t0
        return resume_time_s(t0, self._switch_s, self._stuck_intervals())

    def optical_state(self, t_s: float | None = None) -> str:
        """The state the beam sees at ``t_s`` (default now): the old one until the switch completes."""
        t = self.clock.now() if t_s is None else t_s
        end = self._switch_end()
        with self._lock:
            return self._to if t >= end else self._from

    def pending_s(self) -> float:
        """Virtual seconds until the switch completes (inf if stuck for ever)."""
        return max(0.0, self._switch_end() - self.clock.now())

    def set_state(self, state: str) -> None:
        """Start switching to ``state``; returns at once."""
        op = f"set_state({state!r})"
        self._operation(op)
        if state not in self._states:
            raise LimitViolation(self.name, op, f"unknown state {state!r}; this actuator accepts {', '.join(self._states)}",
                                 hint="check the protocol setting and the bench's states")
        with self._lock:
            now = self.clock.now()
            current = self.optical_state(now)
            self._from, self._to, self._t0 = current, state, now
        if current != state and self.faults is not None:
            self.faults.on_move_start(self.name, now)

    def state(self) -> str:
        """Read back the state the actuator is in now."""
        self._operation("state")
        return self.optical_state()

    def is_busy(self) -> bool:
        """Whether a switch is still under way."""
        self._operation("is_busy")
        return self.pending_s() > 0.0

    def wait_settled(self, timeout_s: float) -> str:
        """Spend the remaining switch time; return the state. DeviceFault if stuck, as for the stage."""
        self._operation("wait_settled")
        if not (isinstance(timeout_s, numbers.Real) and timeout_s >= 0):
            raise ValueError(f"wait_settled: timeout_s must be >= 0 s, got {timeout_s!r}")
        now = self.clock.now()
        end = self._switch_end()
        deadline = now + float(timeout_s)
        if end <= now:
            return self.optical_state()
        if math.isfinite(end) and end <= deadline:
            self.clock.advance_to(end)
            return self.optical_state()
        if math.isfinite(deadline):
            self.clock.advance_to(deadline)
        if math.isinf(deadline) or any(a <= self.clock.now() < b for a, b in self._stuck_intervals()):
            raise DeviceFault(
                self.name, "wait_settled", f"stalled while switching to {self._to!r}; not done after {timeout_s:g} s",
                hint="check the actuator for a jam, then switch it again",
            )
        raise InstrumentTimeout(
            self.name, "wait_settled", f"still switching to {self._to!r} after {timeout_s:g} s",
            hint="allow at least the switch time",
        )

    def reset(self) -> None:
        """Stop where it is (``*RST``): the state the beam sees now."""
        with self._lock:
            now = self.clock.now()
            current = self.optical_state(now)
            self._from = self._to = current
            self._t0 = now

    def rest_at(self, t_s: float) -> None:
        """Re-anchor the actuator, at rest now, at ``t_s`` (see SimDevice.rest_at); ValueError if switching."""
        with self._lock:
            if self.pending_s() > 0.0:
                raise ValueError(f"rest_at: actuator {self.name!r} is still switching")
            self._from = self._to = self.optical_state()
            self._t0 = float(t_s)


def _bad_token(text: object) -> bool:
    return not isinstance(text, str) or not text or any(c.isspace() or c in ",;\"'" or not c.isprintable() for c in text)


# --------------------------------------------------------------------------- shutter


class SimShutter(SimDevice, Shutter):
    """A beam shutter; ``open`` and ``close_beam`` take ``switch_s`` and return when done.

    ``*RST`` (reset) closes it at once: the power-on state of the simulated shutter is closed.
    """

    kind: ClassVar[str] = SHUTTER

    def __init__(
        self,
        name: str,
        clock: SimClock,
        *,
        switch_s: float = 0.0,
        initially_open: bool = False,
        faults: FaultInjector | None = None,
    ) -> None:
        super().__init__(name, clock, faults)
        if not (math.isfinite(switch_s) and switch_s >= 0):
            raise ValueError(f"shutter {name!r}: switch_s must be >= 0, got {switch_s!r}")
        self._switch_s = float(switch_s)
        self._was_open = bool(initially_open)
        self._will_be_open = bool(initially_open)
        self._change_at = clock.now()

    def transmits(self, t_s: float | None = None) -> bool:
        """Whether the beam passes at ``t_s`` (default now); for the light model, no faults."""
        t = self.clock.now() if t_s is None else t_s
        with self._lock:
            return self._will_be_open if t >= self._change_at else self._was_open

    def _set(self, open_: bool) -> None:
        with self._lock:
            now = self.clock.now()
            self._was_open = self.transmits(now)
            self._will_be_open = open_
            self._change_at = now + (self._switch_s if self._was_open != open_ else 0.0)
            done = self._change_at
        self.clock.advance_to(done)

    def open(self) -> None:
        """Open the shutter (the beam goes through); returns when open."""
        self._operation("open")
        self._set(True)

    def close_beam(self) -> None:
        """Close the shutter; returns when closed. Safe to repeat."""
        self._operation("close_beam")
        self._set(False)

    def is_open(self) -> bool:
        """Read back whether the shutter is open now."""
        self._operation("is_open")
        return self.transmits()

    def reset(self) -> None:
        """Close at once (``*RST``)."""
        with self._lock:
            now = self.clock.now()
            self._was_open = self._will_be_open = False
            self._change_at = now

    def rest_at(self, t_s: float) -> None:
        """Re-anchor the shutter, at rest now, at ``t_s`` (see SimDevice.rest_at); ValueError if switching."""
        with self._lock:
            now = self.clock.now()
            if now < self._change_at:
                raise ValueError(f"rest_at: shutter {self.name!r} is still switching")
            self._was_open = self._will_be_open = self.transmits(now)
            self._change_at = float(t_s)


# --------------------------------------------------------------------------- detectors


class SimPowerMeter(SimDevice, PowerMeter):
    """An optical power meter reading the true power at its port through ``light``.

    A reading of integration time ``T`` is

        mean(light) + offset_w - zero_w + N(0, sigma),
        sigma = sqrt(noise_w**2 + (relative_noise * mean(light))**2) / sqrt(T / 1 s)

    where ``mean(light)`` averages ``light()`` at the midpoints of ``samples_per_reading`` equal
    slices of ``T`` (the clock is advanced to each), and ``zero_w`` is the dark reading taken by
    ``zero()``. White-noise averaging gives the 1/sqrt(T) (common practice, no source). With a
    range set, readings saturate at the range; auto-range never saturates.

    Parameters
    ----------
    light : callable
        ``light() -> W``: instantaneous true power at this port at the clock's current time
        (port gain, shutter and beam loss are in it).
    rng : numpy.random.Generator
        Noise source; the same seed gives the same readings.
    offset_w : float
        Zero offset added to every reading, W.
    noise_w : float
        Absolute noise standard deviation for a 1 s integration, W.
    relative_noise : float
        Noise standard deviation as a fraction of the power, for a 1 s integration.
    integration_s : float
        Default integration time (``INT``), s.
    wavelength_nm : float
        Calibration wavelength, nm; ``wavelength_limits_nm`` bounds it.
    range_w : float or None
        Measurement range, W (None = auto).
    max_integration_s : float
        Longest allowed integration, s.
    samples_per_reading : int
        Instants at which ``light`` is sampled per reading.
    """

    kind: ClassVar[str] = POWERMETER

    def __init__(
        self,
        name: str,
        clock: SimClock,
        light: Callable[[], float],
        rng: np.random.Generator,
        *,
        offset_w: float = 0.0,
        noise_w: float = 0.0,
        relative_noise: float = 0.0,
        integration_s: float = 0.1,
        wavelength_nm: float = 800.0,
        wavelength_limits_nm: tuple[float, float] = (400.0, 1100.0),
        range_w: float | None = None,
        max_integration_s: float = 60.0,
        samples_per_reading: int = 4,
        faults: FaultInjector | None = None,
    ) -> None:
        super().__init__(name, clock, faults)
        if noise_w < 0 or relative_noise < 0 or not math.isfinite(offset_w):
            raise ValueError(f"power meter {name!r}: noise_w and relative_noise must be >= 0 and offset_w finite")
        if samples_per_reading < 1:
            raise ValueError(f"power meter {name!r}: samples_per_reading must be >= 1, got {samples_per_reading}")
        self._light = light
        self._rng = rng
        self.offset_w = float(offset_w)
        self.noise_w = float(noise_w)
        self.relative_noise = float(relative_noise)
        self._wavelength_limits = (float(wavelength_limits_nm[0]), float(wavelength_limits_nm[1]))
        self._max_integration_s = float(max_integration_s)
        self._samples = int(samples_per_reading)
        self._defaults = (float(integration_s), float(wavelength_nm), range_w)
        self._zero_w = 0.0
        self._integration_s = _check_positive(name, "integration_s", "integration time in s", integration_s, max_integration_s)
        self._wavelength_nm = float(wavelength_nm)
        self._range_w: float | None = None
        self._apply_wavelength("wavelength_nm", wavelength_nm)
        self._apply_range("range_w", range_w)

    @property
    def integration_s(self) -> float:
        """Default integration time (``INT``), s."""
        return self._integration_s

    @property
    def wavelength_nm(self) -> float:
        """Calibration wavelength, nm."""
        return self._wavelength_nm

    @property
    def range_w(self) -> float | None:
        """Measurement range in W, None for auto."""
        return self._range_w

    @property
    def zero_w(self) -> float:
        """The dark reading subtracted from every reading, W."""
        return self._zero_w

    def _apply_wavelength(self, op: str, wavelength_nm: float) -> None:
        lo, hi = self._wavelength_limits
        if isinstance(wavelength_nm, bool) or not isinstance(wavelength_nm, numbers.Real) or not lo <= wavelength_nm <= hi:
            raise LimitViolation(self.name, op, f"wavelength {wavelength_nm!r} nm is outside [{lo:g}, {hi:g}] nm",
                                 hint="set the source wavelength in the bench")
        self._wavelength_nm = float(wavelength_nm)

    def _apply_range(self, op: str, range_w: float | None) -> None:
        if range_w is not None:
            range_w = _check_positive(self.name, op, "range in W", range_w, math.inf)
        self._range_w = range_w

    def set_integration_s(self, integration_s: float) -> None:
        """Set the default integration time (``INT``), s."""
        op = f"set_integration_s({integration_s!r})"
        self._operation(op)
        self._integration_s = _check_positive(self.name, op, "integration time in s", integration_s, self._max_integration_s)

    def set_wavelength_nm(self, wavelength_nm: float) -> None:
        """Set the calibration wavelength, nm."""
        op = f"set_wavelength_nm({wavelength_nm!r})"
        self._operation(op)
        self._apply_wavelength(op, wavelength_nm)

    def set_range_w(self, range_w: float | None) -> None:
        """Set the range in W (None = auto); readings saturate at a set range."""
        op = f"set_range_w({range_w!r})"
        self._operation(op)
        self._apply_range(op, range_w)

    def _raw_reading_w(self, integration_s: float) -> float:
        mean_w = _mean_light_w(self.clock, self._light, integration_s, self._samples)
        sigma = math.hypot(self.noise_w, self.relative_noise * mean_w) / math.sqrt(integration_s)
        return mean_w + self.offset_w + sigma * float(self._rng.standard_normal())

    def read_power_w(self, integration_s: float) -> float:
        """Integrate for ``integration_s`` virtual seconds and return the mean power, W."""
        op = f"read_power_w({integration_s!r})"
        self._operation(op)
        t = _check_positive(self.name, op, "integration time in s", integration_s, self._max_integration_s)
        value = self._raw_reading_w(t) - self._zero_w
        if self._range_w is not None:
            value = min(value, self._range_w)
        return value

    def measure_w(self) -> float:
        """One reading at the default integration time (``MEAS?``), W."""
        return self.read_power_w(self._integration_s)

    def zero(self, integration_s: float | None = None) -> None:
        """Take a dark reading (default integration time) as the zero; do it with the shutter closed."""
        op = "zero"
        self._operation(op)
        t = self._integration_s if integration_s is None else _check_positive(
            self.name, op, "integration time in s", integration_s, self._max_integration_s)
        self._zero_w = self._raw_reading_w(t)

    def use_rng(self, rng: np.random.Generator) -> None:
        """Draw the noise of the next readings from ``rng`` (a simulated table gives each step its
        own stream, so a resumed run continues the same random stream)."""
        self._rng = rng

    def reset(self) -> None:
        """Integration time, wavelength and range back to their initial values (``*RST``); the zero is kept."""
        self._integration_s, self._wavelength_nm, self._range_w = self._defaults


class SimPhotonCounter(SimDevice, PhotonCounter):
    """A photon counter: Poisson counts of mean ``counts_per_w * P * gate + dark_counts_per_s * gate``.

    ``P`` is the mean of ``light()`` over the gate, sampled as for SimPowerMeter. Poisson
    statistics of coherent light and of dark counts (common practice, no source).

    Parameters
    ----------
    light : callable
        ``light() -> W`` at this port at the clock's current time.
    rng : numpy.random.Generator
        Source of the Poisson draws.
    counts_per_w : float
        Detected counts per second per watt (detection efficiency / photon energy), 1/(W s).
    dark_counts_per_s : float
        Dark count rate, 1/s.
    gate_s : float
        Default gate time (``GATE``), s.
    """

    kind: ClassVar[str] = COUNTER

    def __init__(
        self,
        name: str,
        clock: SimClock,
        light: Callable[[], float],
        rng: np.random.Generator,
        *,
        counts_per_w: float,
        dark_counts_per_s: float = 0.0,
        gate_s: float = 0.1,
        max_gate_s: float = 60.0,
        samples_per_reading: int = 4,
        faults: FaultInjector | None = None,
    ) -> None:
        super().__init__(name, clock, faults)
        if not (counts_per_w >= 0 and dark_counts_per_s >= 0 and math.isfinite(counts_per_w)):
            raise ValueError(f"counter {name!r}: counts_per_w and dark_counts_per_s must be finite and >= 0")
        if samples_per_reading < 1:
            raise ValueError(f"counter {name!r}: samples_per_reading must be >= 1, got {samples_per_reading}")
        self._light = light
        self._rng = rng
        self.counts_per_w = float(counts_per_w)
        self.dark_counts_per_s = float(dark_counts_per_s)
        self._max_gate_s = float(max_gate_s)
        self._samples = int(samples_per_reading)
        self._default_gate_s = _check_positive(name, "gate_s", "gate time in s", gate_s, max_gate_s)
        self._gate_s = self._default_gate_s

    @property
    def gate_s(self) -> float:
        """Default gate time (``GATE``), s."""
        return self._gate_s

    def set_gate_s(self, gate_s: float) -> None:
        """Set the default gate time, s."""
        op = f"set_gate_s({gate_s!r})"
        self._operation(op)
        self._gate_s = _check_positive(self.name, op, "gate time in s", gate_s, self._max_gate_s)

    def read_counts(self, gate_s: float) -> int:
        """Count for ``gate_s`` virtual seconds and return the number of counts."""
        op = f"read_counts({gate_s!r})"
        self._operation(op)
        t = _check_positive(self.name, op, "gate time in s", gate_s, self._max_gate_s)
        mean_w = max(_mean_light_w(self.clock, self._light, t, self._samples), 0.0)
        return int(self._rng.poisson((self.counts_per_w * mean_w + self.dark_counts_per_s) * t))

    def count(self) -> int:
        """One count at the default gate time (``COUNT?``)."""
        return self.read_counts(self._gate_s)

    def use_rng(self, rng: np.random.Generator) -> None:
        """Draw the noise of the next readings from ``rng`` (a simulated table gives each step its
        own stream, so a resumed run continues the same random stream)."""
        self._rng = rng

    def reset(self) -> None:
        """Gate time back to its initial value (``*RST``)."""
        self._gate_s = self._default_gate_s
