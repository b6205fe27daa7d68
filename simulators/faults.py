"""Fault injection for the simulated bench: plain-data fault specs evaluated against the clock and an RNG."""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass
from typing import Iterable, Mapping

import numpy as np

from lightloom.sequencer.model.faults import (  # noqa: F401 (the simulators' tests and callers use these names from here)
    FAULT_KEYS, FaultSpec, FaultSpecError, parse_fault, parse_faults,
)
from lightloom.sequencer.model.vocabulary import LINK_FAULTS


def merge_intervals(intervals: Iterable[tuple[float, float]]) -> tuple[tuple[float, float], ...]:
    """Sorted union of half-open time intervals ``[start, end)`` in s (``end`` may be inf)."""
    merged: list[list[float]] = []
    for start, end in sorted(intervals):
        if merged and start <= merged[-1][1]:
            merged[-1][1] = max(merged[-1][1], end)
        else:
            merged.append([start, end])
    return tuple((a, b) for a, b in merged)


_GARBLE_TABLE = str.maketrans("0123456789.-+eE,", "@%&*!$^(){}[]<>|")


def garble_reply(text: str) -> str:
    """A corrupted, printable, single-line version of a reply that parses as no number or state."""
    return "~#" + text.translate(_GARBLE_TABLE)[::-1] + "#~"


@dataclass(frozen=True)
class FaultEvent:
    """A fault that fired: virtual time in s, device and kind."""

    t_s: float
    device: str
    kind: str


class FaultInjector:
    """Evaluates fault specs against virtual time and per-fault random streams.

    Parameters
    ----------
    specs : iterable of dict or FaultSpec
        Fault descriptions (see FaultSpec and parse_fault).
    rng : numpy.random.Generator, optional
        Source of the per-fault random streams; needed when any spec has a probability. Each
        spec gets its own stream drawn from ``rng`` at construction, so the outcome for one
        device does not depend on how operations on other devices interleave.
    """

    def __init__(self, specs: Iterable[Mapping[str, object] | FaultSpec] = (), rng: np.random.Generator | None = None) -> None:
        self._specs = parse_faults(specs)
        if rng is None and any(s.probability is not None for s in self._specs):
            raise FaultSpecError("faults with a 'probability' need a random generator: pass rng=np.random.default_rng(seed)")
        seeds = (
            rng.integers(0, 2**63 - 1, size=len(self._specs)) if rng is not None else np.zeros(len(self._specs), dtype=np.int64)
        )
        self._streams = [np.random.default_rng(int(s)) for s in seeds]
        self._fired = [0] * len(self._specs)
        self._dynamic_stuck: dict[str, list[tuple[float, float]]] = {}
        self._events: list[FaultEvent] = []
        self._lock = threading.Lock()

    @property
    def specs(self) -> tuple[FaultSpec, ...]:
        """The validated fault specs, in the given order."""
        return self._specs

    @property
    def events(self) -> tuple[FaultEvent, ...]:
        """Link faults and per-move stuck faults that fired so far, in order."""
        with self._lock:
            return tuple(self._events)

    def validate_devices(self, names: Iterable[str]) -> None:
        """Raise FaultSpecError if a device fault names a device not in ``names``."""
        known = set(names)
        for i, spec in enumerate(self._specs):
            if spec.kind != "beam_loss" and spec.device not in known:
                raise FaultSpecError(
                    f"fault #{i + 1} ({spec.kind}) names device {spec.device!r}, which is not on the bench; "
                    f"devices: {', '.join(sorted(known)) or '(none)'}"
                )

    def _in_window(self, spec: FaultSpec, t_s: float) -> bool:
        if t_s < spec.window_start_s:
            return False
        return spec.duration_s is None or t_s < spec.window_start_s + spec.duration_s

    def link_fault(self, device: str, t_s: float, *, query: bool = True) -> str | None:
        """The link fault (``timeout``, ``garbled``, ``drop``) hitting this operation, or None.

        Call once per operation; a fault that fires is used up. ``query=False`` marks a command
        that expects no reply: only ``drop`` can hit it (a write has no reply to lose or garble).
        """
        with self._lock:
            for i, spec in enumerate(self._specs):
                if spec.kind not in LINK_FAULTS or spec.device != device:
                    continue
                if not query and spec.kind != "drop":
                    continue
                if self._fired[i] >= spec.max_count or not self._in_window(spec, t_s):
                    continue
                if spec.probability is not None and not self._streams[i].random() < spec.probability:
                    continue
                self._fired[i] += 1
                self._events.append(FaultEvent(t_s, device, spec.kind))
                return spec.kind
        return None

    def on_move_start(self, device: str, t_s: float) -> None:
        """Tell the injector that ``device`` starts a move at ``t_s``; a per-move stuck fault may fire."""
        with self._lock:
            for i, spec in enumerate(self._specs):
                if spec.kind != "stuck" or spec.device != device or spec.probability is None:
                    continue
                if t_s < spec.window_start_s or self._fired[i] >= spec.max_count:
                    continue
                if not self._streams[i].random() < spec.probability:
                    continue
                self._fired[i] += 1
                end = math.inf if spec.duration_s is None else t_s + spec.duration_s
                self._dynamic_stuck.setdefault(device, []).append((t_s, end))
                self._events.append(FaultEvent(t_s, device, "stuck"))

    def stuck_intervals(self, device: str) -> tuple[tuple[float, float], ...]:
        """Sorted, merged ``[start, end)`` virtual-time intervals in s during which ``device`` cannot move."""
        with self._lock:
            fixed = [
                (s.at_s, math.inf if s.duration_s is None else s.at_s + s.duration_s)
                for s in self._specs
                if s.kind == "stuck" and s.device == device and s.probability is None and s.at_s is not None
            ]
            return merge_intervals(fixed + self._dynamic_stuck.get(device, []))

    def is_stuck(self, device: str, t_s: float) -> bool:
        """Whether ``device`` is stuck at virtual time ``t_s``."""
        return any(a <= t_s < b for a, b in self.stuck_intervals(device))

    def beam_factor(self, t_s: float | np.ndarray) -> float | np.ndarray:
        """Factor in [0, 1] by which the source power is multiplied at virtual time(s) ``t_s``."""
        t = np.asarray(t_s, dtype=float)
        factor = np.ones_like(t)
        for spec in self._specs:
            if spec.kind != "beam_loss":
                continue
            start = spec.window_start_s
            end = math.inf if spec.duration_s is None else start + spec.duration_s
            factor = np.where((t >= start) & (t < end), factor * spec.residual, factor)
        return float(factor) if factor.ndim == 0 else factor
