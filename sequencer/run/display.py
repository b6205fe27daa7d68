"""What a run shows on a terminal (rich): progress, pass counter, ETA with the waits, last readings, warnings.

Quiet when standard output is not a terminal: the log file beside the data has everything.
The panel is rendered afresh several times a second (rich's Live display calls it), so elapsed
time and the countdown of a wait between passes keep moving while the runner sleeps.
"""

from __future__ import annotations

import math
import time
from collections import deque
from dataclasses import dataclass
from typing import Callable

import numpy as np
from rich.console import Console, Group, RenderableType
from rich.live import Live
from rich.panel import Panel
from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn
from rich.table import Table
from rich.text import Text

from lightloom.sequencer.model.records import Reading
from lightloom.sequencer.model.steps import Step
from lightloom.sequencer.run.runner import hms


@dataclass
class Schedule:
    """What is left of a run, for its ETA: estimated work per pass and when each pass may start.

    ``work_left_s[p]`` is the estimated time of the steps of pass p not yet done (moves, dwell,
    overheads; no waits), ``pass_due[p]`` the bench time (UNIX s) before which pass p may not
    start (``run_start + p * interval``). The time to finish is then the later of "now plus all
    the work" and, for every pass, "its start time plus the work from it on": O(passes) numpy.
    """

    work_left_s: np.ndarray
    pass_due: np.ndarray

    @classmethod
    def of(
        cls, work_s: np.ndarray, pass_index: np.ndarray, done: np.ndarray, passes: int,
        run_start: float, pass_interval_s: float,
    ) -> Schedule:
        """From per-step estimated work (s), per-step pass index and the mask of steps done."""
        left = np.bincount(pass_index[~done], weights=work_s[~done], minlength=passes)
        due = run_start + np.arange(len(left)) * max(0.0, pass_interval_s)
        return cls(left.astype(float), due)

    def step_done(self, pass_index: int, work_s: float) -> None:
        """Take one step's estimated work off what is left."""
        if 0 <= pass_index < len(self.work_left_s):
            self.work_left_s[pass_index] = max(0.0, self.work_left_s[pass_index] - work_s)

    def seconds_left(self, now: float, speed: float = 1.0) -> float:
        """Bench seconds from ``now`` to the end, with the work scaled by ``speed`` (measured/estimated)."""
        work = self.work_left_s * speed
        if not work.size:
            return 0.0
        from_each_pass = np.cumsum(work[::-1])[::-1]
        started = self.work_left_s > 0
        latest = np.max(np.where(started, self.pass_due + from_each_pass, -np.inf), initial=-np.inf)
        return float(max(from_each_pass[0], latest - now, 0.0))


class TerminalMonitor:
    """A live panel for runs watched by a person; implements the runner's RunMonitor."""

    def __init__(
        self,
        console: Console,
        title: str,
        port_names: tuple[str, ...],
        units: str,
        schedule: Schedule,
        *,
        steps_done: int,
        steps_total: int,
        passes: int,
        work_s: np.ndarray,
        now: Callable[[], float],
        wall: Callable[[], float] = time.monotonic,
    ) -> None:
        self.console = console
        self.title = title
        self.port_names = port_names
        self.units = units
        self.schedule = schedule
        self.passes = passes
        self.work_s = work_s
        self.now = now
        self.wall = wall
        self.t0 = wall()
        self.done = steps_done
        self.total = steps_total
        pending = np.flatnonzero(schedule.work_left_s > 0)
        self.pass_now = int(pending[0]) + 1 if pending.size else passes  # 1-based
        self._work_done_s = 0.0
        self._busy_wall_s = 0.0
        self._waiting: tuple[float, float, int] | None = None  # (wall start, seconds, pass number)
        self._step_wall = wall()
        self.last: deque[tuple[Step, Reading]] = deque(maxlen=5)
        self.warnings: deque[str] = deque(maxlen=4)
        self.ref0: float | None = None
        self.ref_now: float | None = None
        self.progress = Progress(
            TextColumn("{task.description}"), BarColumn(bar_width=None), TaskProgressColumn(),
            TextColumn("{task.completed}/{task.total} steps"), console=console, expand=True,
        )
        self.task = self.progress.add_task("steps", total=steps_total, completed=steps_done)
        self.live = Live(self, console=console, refresh_per_second=4, transient=False)

    def __enter__(self) -> "TerminalMonitor":
        self.live.__enter__()
        return self

    def __exit__(self, *exc) -> None:
        self.live.refresh()
        self.live.__exit__(*exc)

    # RunMonitor ----------------------------------------------------------------
    def step_done(self, step: Step, reading: Reading, steps_done: int, steps_total: int) -> None:
        wall = self.wall()
        self._waiting = None
        estimated = float(self.work_s[step.index]) if step.index < len(self.work_s) else 0.0
        self.schedule.step_done(step.pass_index, estimated)
        self._work_done_s += estimated
        self._busy_wall_s += wall - self._step_wall
        self._step_wall = wall
        self.done, self.total = steps_done, steps_total
        self.pass_now = step.pass_index + 1
        self.progress.update(self.task, completed=steps_done, total=steps_total)
        self.last.append((step, reading))
        if not math.isnan(reading.reference_w) and step.kind != "background":
            if self.ref0 is None:
                self.ref0 = reading.reference_w
            self.ref_now = reading.reference_w

    def waiting(self, seconds: float, pass_number: int, passes: int) -> None:
        """The runner waits ``seconds`` (bench time) before pass ``pass_number`` (1-based) starts."""
        self._waiting = (self.wall(), seconds, pass_number)

    def warning(self, message: str) -> None:
        self.warnings.append(message)

    def info(self, message: str) -> None:
        self.warnings.append(message)

    # rendering -----------------------------------------------------------------
    def seconds_left(self) -> float:
        """Estimated seconds to the end: the work left (scaled by the speed measured so far) and the waits."""
        speed = 1.0
        if self._work_done_s > 1.0 and self._busy_wall_s > 0:
            speed = min(10.0, max(0.1, self._busy_wall_s / self._work_done_s))
        return self.schedule.seconds_left(self.now(), speed)

    def __rich__(self) -> RenderableType:
        wall = self.wall()
        elapsed = wall - self.t0
        if self._waiting is not None:
            start, seconds, number = self._waiting
            left = max(0.0, seconds - (wall - start))
            self._step_wall = wall  # a wait is not work: the speed estimate skips it
            self.progress.update(self.task, description=f"waiting {math.ceil(left / 60)} min for pass {number} of {self.passes}")
        else:
            self.progress.update(self.task, description=f"pass {max(1, self.pass_now)} of {self.passes}")
        head = Text(
            f"elapsed {hms(elapsed)}   left ~{hms(self.seconds_left())}   "
            f"pass {max(1, self.pass_now)}/{self.passes}"
        )
        table = Table(box=None, pad_edge=False)
        table.add_column("step", justify="right")
        table.add_column("kind")
        table.add_column("setting")
        for name in self.port_names:
            table.add_column(name, justify="right")
        for step, reading in list(self.last):
            table.add_row(str(step.index), step.kind, step.label, *[f"{v:.4g}" for v in reading.values])
        parts: list[RenderableType] = [self.progress, head, table]
        if self.ref0:
            drift = (self.ref_now or self.ref0) / self.ref0 - 1.0
            parts.append(Text(f"reference drift since start: {drift:+.2%}"))
        for w in list(self.warnings):
            parts.append(Text(f"! {w}", style="yellow"))
        return Panel(Group(*parts), title=self.title, subtitle=f"units: {self.units}")
