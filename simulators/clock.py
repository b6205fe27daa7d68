"""The simulation clock shared by the simulated devices: real time, scaled time, or instant virtual time."""

from __future__ import annotations

import math
import threading
import time
from typing import Callable

_WALL_RESOLUTION_S = 1e-6


class SimClock:
    """Virtual seconds since the start of a simulation, injected into every simulated device.

    Parameters
    ----------
    time_scale : float
        Wall seconds per virtual second. 1 runs in real time, 0.01 a hundred times faster, 0 is
        instant: virtual time then advances only when a device spends time (a move, a settle, an
        integration) and nothing sleeps, so a single-threaded run is exactly reproducible.
    start_s : float
        Virtual time at construction, s.
    wall : callable
        Monotonic wall clock in s (injected for tests; ``time.monotonic`` by default).
    wall_sleep : callable
        Wall-time sleep in s (``time.sleep`` by default).

    Notes
    -----
    With ``time_scale > 0`` virtual time follows the wall clock, ``now = start + wall / scale``,
    so several threads waiting at once overlap as real instruments do. With ``time_scale == 0``
    waiting is ``advance_to``: the clock jumps to the latest deadline anyone waited for, so two
    threads that wait concurrently also overlap instead of adding up.
    """

    def __init__(
        self,
        time_scale: float = 0.0,
        *,
        start_s: float = 0.0,
        wall: Callable[[], float] = time.monotonic,
        wall_sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        if not (math.isfinite(time_scale) and time_scale >= 0.0):
            raise ValueError(
                f"time_scale must be a finite number >= 0 (1 real time, 0.01 faster, 0 instant), got {time_scale!r}"
            )
        if not math.isfinite(start_s):
            raise ValueError(f"start_s must be finite, got {start_s!r}")
        self._scale = float(time_scale)
        self._wall = wall
        self._wall_sleep = wall_sleep
        self._lock = threading.Lock()
        self._start_s = float(start_s)
        self._wall0 = wall()
        self._virtual_s = float(start_s)

    @property
    def time_scale(self) -> float:
        """Wall seconds per virtual second (0 = instant)."""
        return self._scale

    def now(self) -> float:
        """Virtual time in s since the start of the simulation (never decreases)."""
        if self._scale == 0.0:
            with self._lock:
                return self._virtual_s
        following = self._start_s + (self._wall() - self._wall0) / self._scale
        with self._lock:
            return max(following, self._virtual_s)

    def advance_to(self, t_s: float) -> None:
        """Wait until virtual time ``t_s`` (s); a time already past returns at once.

        Instant clocks jump to ``t_s``; scaled clocks sleep ``(t_s - now) * time_scale`` of wall
        time, in a loop, and ``now() >= t_s`` holds on return (virtual time keeps a floor at the
        latest deadline reached, so rounding in the wall clock never leaves it just short).
        """
        if math.isnan(t_s):
            raise ValueError("advance_to: the target time is NaN")
        if math.isinf(t_s) and t_s > 0:
            raise ValueError("advance_to: the target time is infinite; the wait would never return")
        if self._scale == 0.0:
            with self._lock:
                if t_s > self._virtual_s:
                    self._virtual_s = float(t_s)
            return
        while True:
            remaining_wall_s = (t_s - self.now()) * self._scale
            if remaining_wall_s <= _WALL_RESOLUTION_S:
                break
            self._wall_sleep(remaining_wall_s)
        with self._lock:
            # The last sub-microsecond is not slept; the floor makes now() >= t_s hold anyway.
            if t_s > self._virtual_s:
                self._virtual_s = float(t_s)

    def rebase(self, t_s: float) -> None:
        """Set an instant clock to ``t_s`` (s), earlier or later than now.

        Only for a table whose devices are all at rest and re-anchored at ``t_s`` (see
        SimulatedTable.continue_at_step): a resumed run's readings then stand at the virtual times
        an uninterrupted run would have had. Scaled clocks follow the wall clock and refuse.
        """
        if self._scale != 0.0:
            raise ValueError("rebase: only an instant clock (time_scale 0) can be set; a scaled one follows the wall clock")
        if not math.isfinite(t_s):
            raise ValueError(f"rebase: the time must be finite, got {t_s!r}")
        with self._lock:
            self._virtual_s = float(t_s)

    def sleep(self, virtual_s: float) -> None:
        """Spend ``virtual_s`` virtual seconds (wall time ``virtual_s * time_scale``)."""
        if not (math.isfinite(virtual_s) and virtual_s >= 0.0):
            raise ValueError(f"sleep: the duration must be finite and >= 0 s, got {virtual_s!r}")
        self.advance_to(self.now() + virtual_s)
