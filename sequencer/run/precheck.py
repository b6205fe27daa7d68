"""The pre-night check of a bench: identities, a small move of every stage and back, dark levels
with the shutter closed, and (after confirmation) the beam seen with the shutter open.

The shutter is closed on every way out, retried with back-off and a reconnect like a run's.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

from lightloom.drivers.errors import IdentityMismatch, InstrumentError
from lightloom.drivers.interfaces import PhotonCounter, PowerMeter
from lightloom.drivers.retry import close_shutter_within
from lightloom.sequencer.run.runner import POSITION_TOLERANCE_DEG, Rig

# The beam counts as seen when the reference (or the sum of the ports) rises above its dark level
# by this factor of the dark level's size, and by at least BEAM_FLOOR of the unit.
BEAM_FACTOR = 10.0
BEAM_FLOOR = {"W": 1e-9, "counts/s": 100.0}


@dataclass(frozen=True)
class Check:
    """One line of the result table. ``ok`` None means skipped."""

    device: str
    check: str
    ok: bool | None
    detail: str
    values: dict[str, float] = field(default_factory=dict)

    def to_json(self) -> dict:
        return {"device": self.device, "check": self.check, "ok": self.ok, "detail": self.detail,
                "values": {k: (None if not math.isfinite(v) else v) for k, v in self.values.items()}}


@dataclass(frozen=True)
class ProbeSettings:
    """What the check does: step in deg, detector dwell in s, shutter-close budget and back-off."""

    step_deg: float = 1.0
    dwell_s: float = 0.1
    settle_timeout_s: float = 10.0
    shutter_close_s: float = 60.0
    backoff_s: float = 0.1
    max_backoff_s: float = 5.0


class PreNightCheck:
    """Run the checks on ``rig``; ``names`` maps device objects to roles for the table."""

    def __init__(
        self,
        rig: Rig,
        settings: ProbeSettings,
        *,
        now: Callable[[], float],
        sleep: Callable[[float], None],
        log: Callable[[str], None] = lambda line: None,
    ) -> None:
        self.rig = rig
        self.settings = settings
        self.now = now
        self.sleep = sleep
        self.log = log
        self.checks: list[Check] = []
        self._dark: dict[str, float] = {}
        self._connected: set[str] = set()

    # ------------------------------------------------------------------ helpers
    def _add(self, check: Check) -> Check:
        self.checks.append(check)
        self.log(f"{check.device} {check.check}: {'PASS' if check.ok else 'FAIL' if check.ok is False else 'skipped'} {check.detail}")
        return check

    @property
    def failed(self) -> bool:
        return any(c.ok is False for c in self.checks)

    def _rate(self, device: PowerMeter | PhotonCounter) -> tuple[float, str]:
        dwell = self.settings.dwell_s
        if isinstance(device, PhotonCounter):
            return device.read_counts(dwell) / dwell, "counts/s"
        return device.read_power_w(dwell), "W"

    def _detectors(self) -> list[PowerMeter | PhotonCounter]:
        out = list(self.rig.detectors)
        if self.rig.reference is not None:
            out.append(self.rig.reference)
        return out

    # ------------------------------------------------------------------ checks
    def connect_all(self) -> None:
        """Connect every device; an identity that belongs to another device of the bench is named."""
        mismatches: dict[str, str] = {}
        for device in self.rig.devices():
            try:
                device.connect()
            except IdentityMismatch as exc:
                mismatches[device.name] = exc.message
                self._add(Check(device.name, "identity", False, exc.message))
                continue
            except InstrumentError as exc:
                self._add(Check(device.name, "connect", False, exc.message))
                continue
            self._connected.add(device.name)
            expected = getattr(getattr(device, "config", None), "identity", None)
            self._add(Check(device.name, "identity", True, f"answers with {expected!r}" if expected else "connected"))
        expected_of = {d.name: getattr(getattr(d, "config", None), "identity", None) for d in self.rig.devices()}
        for name, message in mismatches.items():
            answer = message.split(" which does not contain ")[0]
            owners = [o for o, ident in expected_of.items() if o != name and ident and ident in answer]
            # The reply may name the device (a serial number): prefer the owners it names.
            named = [o for o in owners if o in answer]
            owners = named or owners
            if owners:
                like = owners[0] if len(owners) == 1 else "one of " + ", ".join(owners)
                self._add(Check(name, "address", False, f"its address answers like {like}: swapped cables or addresses?"))

    def move_stages(self) -> None:
        """Move every stage a small step and back: time of the move and read-back errors."""
        for role, stage in sorted(self.rig.stages.items()):
            if stage.name not in self._connected:
                continue
            try:
                start = stage.position_deg()
                low, high = stage.limits_deg
                step = self.settings.step_deg if start + self.settings.step_deg <= high else -self.settings.step_deg
                target = start + step
                if not (low <= target <= high):
                    self._add(Check(stage.name, "motion", None, "no room for the test step within the limits"))
                    continue
                t0 = self.now()
                stage.move_to_deg(target)
                there = stage.wait_settled(self.settings.settle_timeout_s)
                move_s = self.now() - t0
                stage.move_to_deg(start)
                back = stage.wait_settled(self.settings.settle_timeout_s)
            except InstrumentError as exc:
                self._add(Check(stage.name, "motion", False, exc.message))
                continue
            error = max(abs(there - target), abs(back - start))
            ok = error <= POSITION_TOLERANCE_DEG
            detail = (f"{step:+g} deg and back: {move_s:.2f} s, read-back error {error:.3f} deg"
                      + ("" if ok else f" (tolerance {POSITION_TOLERANCE_DEG} deg)"))
            self._add(Check(stage.name, "motion", ok, detail, {"move_s": move_s, "readback_error_deg": error}))
        converter = self.rig.converter
        if converter is not None and converter.name in self._connected:
            try:
                first = converter.state()
                other = next(s for s in converter.states if s != first)
                t0 = self.now()
                converter.set_state(other)
                there = converter.wait_settled(self.settings.settle_timeout_s)
                switch_s = self.now() - t0
                converter.set_state(first)
                back = converter.wait_settled(self.settings.settle_timeout_s)
            except (InstrumentError, StopIteration) as exc:
                self._add(Check(converter.name, "motion", False, getattr(exc, "message", "fewer than two states")))
            else:
                ok = there == other and back == first
                self._add(Check(converter.name, "motion", ok, f"{first} -> {other} -> {first}: {switch_s:.2f} s"
                                + ("" if ok else f" (read back {there}, {back})"), {"switch_s": switch_s}))

    def read_dark(self) -> None:
        """Close the shutter and read every detector: the dark level."""
        shutter = self.rig.shutter
        if shutter.name not in self._connected:
            self._add(Check(shutter.name, "shutter", False, "not connected: dark and beam checks need the shutter"))
            return
        try:
            shutter.close_beam()
        except InstrumentError as exc:
            self._add(Check(shutter.name, "shutter", False, f"closing: {exc.message}"))
            return
        for device in self._detectors():
            if device.name not in self._connected:
                continue
            try:
                rate, unit = self._rate(device)
            except InstrumentError as exc:
                self._add(Check(device.name, "dark", False, exc.message))
                continue
            self._dark[device.name] = rate
            self._add(Check(device.name, "dark", True, f"{rate:.4g} {unit} with the shutter closed", {"dark": rate}))

    def check_beam(self) -> None:
        """Open the shutter, read the reference and every port, close the shutter."""
        shutter = self.rig.shutter
        if shutter.name not in self._connected or not self._dark:
            self._add(Check(shutter.name, "beam", None, "skipped: the dark check did not pass"))
            return
        lit: dict[str, float] = {}
        unit = "W"
        try:
            shutter.open()
            self._add(Check(shutter.name, "shutter", True, "opens and reads back open"))
            for device in self._detectors():
                if device.name not in self._dark:
                    continue
                try:
                    lit[device.name], unit = self._rate(device)
                except InstrumentError as exc:
                    self._add(Check(device.name, "beam", False, exc.message))
        except InstrumentError as exc:
            self._add(Check(shutter.name, "shutter", False, f"opening: {exc.message}"))
        finally:
            self.close_shutter()
        if not lit:
            return
        floor = BEAM_FLOOR[unit]
        reference = self.rig.reference
        if reference is not None and reference.name in lit:
            seen = {reference.name: (lit[reference.name], self._dark[reference.name])}
        else:
            ports = [d.name for d in self.rig.detectors if d.name in lit]
            seen = {"ports": (sum(lit[n] for n in ports), sum(self._dark[n] for n in ports))}
        for name, (on, off) in seen.items():
            ok = on - off > max(BEAM_FACTOR * abs(off), floor)
            self._add(Check(name, "beam", ok, f"{on:.4g} {unit} open vs {off:.4g} dark"
                            + ("" if ok else ": the beam is not seen (laser off, beam blocked or misaligned?)"),
                            {"open": on, "dark": off}))
        for device in self.rig.detectors:
            if device.name in lit and device.name in self._dark:
                self._add(Check(device.name, "port", True, f"responds: {lit[device.name]:.4g} {unit} open, "
                                f"{self._dark[device.name]:.4g} dark", {"open": lit[device.name], "dark": self._dark[device.name]}))

    def close_shutter(self) -> bool:
        """Close the shutter, retrying with back-off and a reconnect for ``shutter_close_s``."""
        s = self.settings
        closed = close_shutter_within(
            self.rig.shutter, s.shutter_close_s, backoff_s=s.backoff_s, max_backoff_s=s.max_backoff_s,
            now=self.now, sleep=self.sleep, log=self.log,
        )
        if closed:
            self._add(Check(self.rig.shutter.name, "shutter", True, "closed (reads back closed)"))
        else:
            self._add(Check(self.rig.shutter.name, "shutter", False,
                            "did not confirm closing: BLOCK THE BEAM BY HAND, then check the shutter controller"))
        return closed

    def close_devices(self) -> None:
        for device in self.rig.devices():
            try:
                device.close()
            except Exception as exc:  # closing must never hide the results
                self.log(f"closing {device.name}: {exc!r}")

