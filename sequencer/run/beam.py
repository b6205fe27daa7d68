"""The one rule for watching the beam: what measures the source power, reading by reading.

A pick-off reference meter measures it directly. Without one, the detector ports measure it only
when they form a complete set (every combination of the splitter and sorter outputs they use):
then the gain-corrected sum of a setting's ports is the total power whatever the state. Otherwise
a dark projector cannot be told from a lost beam, and nothing watches it. Of the two, BeamWatch
uses the one that stands furthest above its own noise. The runner and the session (its warning, and the
watch of a resumed run) use these functions.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from lightloom.sequencer.optics.analyzer import complete_port_set
from lightloom.sequencer.plan.compiler import TableModel


def ports_watch_the_beam(table: TableModel) -> bool:
    """True when the detector ports' gain-corrected sum is the source power (a complete set)."""
    return complete_port_set([(p.sorter_port, p.splitter_port) for p in table.ports])


# Lit readings whose median sets the baseline and whose spread tells whether a monitor sees the
# beam above its own noise; until they are in, nothing is judged. The noise comes from their
# second differences, which scatter widely over few readings: of white noise, 5 readings give an
# estimate below 0.13 of the true std once in 160 runs, 10 readings once in 60,000 (simulated,
# common practice, no source). With 5, a 1 % pick-off at 1 uW (true signal to noise about 1.3)
# now and then looked 10x above its noise, was chosen, and paused the run on its noise.
SETTLE_READINGS = 10
# A monitor watches the beam only when its baseline stands this many of its own reading-to-reading
# stds above zero: a loss at the default 30% threshold is then 7 stds away, so noise never pauses a
# night (common practice, no source).
MIN_SIGNAL_TO_NOISE = 10.0


@dataclass(frozen=True)
class MonitorLevels:
    """One reading's levels of the two possible beam monitors (None where a monitor is absent)."""

    reference: float | None
    ports: float | None


def monitor_levels(kind: str, values: np.ndarray, reference_w: float, table: TableModel) -> MonitorLevels:
    """The pick-off meter's level and, for a complete set of ports, their gain-corrected sum."""
    ref = None if math.isnan(reference_w) else float(reference_w)
    ports = None
    if kind != "background" and ports_watch_the_beam(table):
        gains = np.array([p.gain for p in table.ports])
        ports = float(np.sum(np.asarray(values) / gains))
    return MonitorLevels(ref, ports)


@dataclass
class BeamWatch:
    """Which monitor watches the beam, its baseline, and the verdict on each lit reading.

    The first ``SETTLE_READINGS`` lit readings set each candidate's baseline (their median) and
    noise (from their second differences). Of the monitors at least ``MIN_SIGNAL_TO_NOISE`` above
    their noise, the one furthest above watches (the reference meter on a tie; a 1 % pick-off at
    1 uW is below the bar, the ports' sum far above); when neither is, nothing watches the beam
    and ``choice`` says why. A noisy monitor would otherwise pause the run on its noise, or flag
    every reading as drift.
    """

    loss_fraction: float
    drift_fraction: float
    source: str | None = None  # "reference" | "ports" once chosen
    baseline: float | None = None
    noise: float | None = None
    decided: bool = False
    choice: str = ""
    drifting: bool = False
    _seen: list[MonitorLevels] = field(default_factory=list)

    def settle(self, levels: MonitorLevels) -> bool:
        """Take one lit reading's levels while settling; True when this reading made the choice."""
        if self.decided:
            return False
        self._seen.append(levels)
        if len(self._seen) < SETTLE_READINGS:
            return False
        self.decided = True
        ratios = []
        best: tuple[float, str, float, float, str] | None = None
        for source in ("reference", "ports"):
            xs = [getattr(s, source) for s in self._seen]
            if any(x is None for x in xs):
                continue
            arr = np.asarray(xs, dtype=float)
            # Reading-to-reading noise from second differences (x[i+1] - 2 x[i] + x[i-1] has
            # variance 6 sigma^2 for white noise; common practice, no source): a drift that is
            # smooth over the first readings does not count as noise.
            base, noise = float(np.median(arr)), float(np.sqrt(np.mean(np.diff(arr, 2) ** 2) / 6.0))
            ratio = base / noise if noise > 0 else (math.inf if base > 0 else 0.0)
            name = "the reference meter" if source == "reference" else "the ports' summed power"
            ratios.append(f"{name} {ratio:.1f}x its noise")
            # of the monitors above the bar, the one furthest above its noise (the reference meter
            # on a tie)
            if base > 0 and ratio >= MIN_SIGNAL_TO_NOISE and (best is None or ratio > best[0]):
                best = (ratio, source, base, noise, name)
        if best is not None:
            ratio, source, base, noise, name = best
            self.source, self.baseline, self.noise = source, base, noise
            self.choice = (f"beam watch: {name} at {base:.3g} (reading-to-reading spread {noise:.2g}, "
                           f"{ratio:.0f}x) pauses the run below {self.loss_fraction:.0%} of it")
            return True
        if ratios:
            self.choice = ("warning: nothing watches the beam: " + ", ".join(ratios)
                           + f" over the first {SETTLE_READINGS} readings (at least {MIN_SIGNAL_TO_NOISE:g}x needed), "
                           "so a lost beam would be recorded; raise the pick-off power or the dwell")
        return True

    def level(self, levels: MonitorLevels) -> float | None:
        """The chosen monitor's level in ``levels`` (None when nothing watches)."""
        return None if self.source is None else getattr(levels, self.source)

    def _provisional(self) -> dict[str, float]:
        """While settling: each monitor's first positive lit level."""
        out: dict[str, float] = {}
        for source in ("reference", "ports"):
            for seen in self._seen:
                x = getattr(seen, source)
                if x is not None:
                    if x > 0:
                        out[source] = x
                    break
        return out

    def judge(self, levels: MonitorLevels, *, provisional: bool = True) -> Verdict:
        """The verdict on one lit reading; settling readings are taken in here.

        While settling, a reading is lost when every monitor is below ``loss_fraction`` of its
        first level (both must agree, so a noisy meter alone does not pause the run); the lost
        reading is measured again and does not enter the baseline. ``provisional=False`` (the
        step's reading after such a pause) skips that check, so a single noisy monitor costs at
        most one pause a step while settling.
        """
        if not self.decided:
            first = self._provisional()
            below = [s for s, base in first.items()
                     if getattr(levels, s) is not None and getattr(levels, s) < self.loss_fraction * base]
            if provisional and first and len(below) == len(first):
                s = below[0]
                return Verdict(lost=True, level=getattr(levels, s), baseline=first[s])
            made = self.settle(levels)
            return Verdict(announce=self.choice if made else "", unwatched=made and self.source is None)
        level = self.level(levels)
        if level is None:
            return Verdict()
        assert self.baseline is not None
        if level < self.loss_fraction * self.baseline:
            return Verdict(lost=True, level=level, baseline=self.baseline)
        drift = abs(level / self.baseline - 1.0) > self.drift_fraction
        return Verdict(drift=drift, level=level, baseline=self.baseline)

    def back(self, levels: MonitorLevels) -> float | None:
        """The monitor's level when a probe finds the beam back, else None."""
        if self.decided:
            level = self.level(levels)
            ok = level is not None and self.baseline is not None and level >= self.loss_fraction * self.baseline
            return level if ok else None
        for s, base in self._provisional().items():
            x = getattr(levels, s)
            if x is not None and x >= self.loss_fraction * base:
                return x
        return None


@dataclass(frozen=True)
class Verdict:
    """What the beam watch says of one reading: lost (measure again after the beam is back), drift
    (flag it), and a choice of monitor made on this reading to announce."""

    lost: bool = False
    drift: bool = False
    level: float | None = None
    baseline: float | None = None
    announce: str = ""
    unwatched: bool = False


def settled_watch(rows: list[MonitorLevels], loss_fraction: float, drift_fraction: float) -> BeamWatch:
    """The watch a resumed run continues with, from the levels of its first lit readings."""
    watch = BeamWatch(loss_fraction, drift_fraction)
    for levels in rows[:SETTLE_READINGS]:
        watch.settle(levels)
    return watch
