"""What a run shows on a terminal (rich): progress, ETA, last readings, reference drift, warnings.

Quiet when standard output is not a terminal: the log file beside the data has everything.
"""

from __future__ import annotations

import math
import time
from collections import deque
from typing import Callable

from rich.console import Console, Group
from rich.live import Live
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from lightloom.sequencer.model.steps import Step
from lightloom.sequencer.model.records import Reading


def _clock(seconds: float) -> str:
    if not math.isfinite(seconds) or seconds < 0:
        return "--:--:--"
    s = int(round(seconds))
    return f"{s // 3600:02d}:{(s % 3600) // 60:02d}:{s % 60:02d}"


class TerminalMonitor:
    """A live panel for runs watched by a person; implements the runner's RunMonitor."""

    def __init__(
        self,
        console: Console,
        title: str,
        port_names: tuple[str, ...],
        units: str,
        estimated_seconds: float,
        wall: Callable[[], float] = time.monotonic,
    ) -> None:
        self.console = console
        self.title = title
        self.port_names = port_names
        self.units = units
        self.estimated = estimated_seconds
        self.wall = wall
        self.t0 = wall()
        self.done = 0
        self.total = 0
        self.last: deque[tuple[Step, Reading]] = deque(maxlen=5)
        self.warnings: deque[str] = deque(maxlen=4)
        self.ref0: float | None = None
        self.ref_now: float | None = None
        self.live = Live(self._render(), console=console, refresh_per_second=4, transient=False)

    def __enter__(self) -> "TerminalMonitor":
        self.live.__enter__()
        return self

    def __exit__(self, *exc) -> None:
        self.live.update(self._render())
        self.live.__exit__(*exc)

    def step_done(self, step: Step, reading: Reading, steps_done: int, steps_total: int) -> None:
        self.done, self.total = steps_done, steps_total
        self.last.append((step, reading))
        if not math.isnan(reading.reference_w) and step.kind != "background":
            if self.ref0 is None:
                self.ref0 = reading.reference_w
            self.ref_now = reading.reference_w
        self.live.update(self._render())

    def warning(self, message: str) -> None:
        self.warnings.append(message)
        self.live.update(self._render())

    def info(self, message: str) -> None:
        self.warnings.append(message)
        self.live.update(self._render())

    def _render(self) -> Panel:
        elapsed = self.wall() - self.t0
        frac = self.done / self.total if self.total else 0.0
        eta = elapsed / frac - elapsed if frac > 0 else self.estimated - elapsed
        head = Text(
            f"steps {self.done}/{self.total} ({frac:.0%})   elapsed {_clock(elapsed)}   "
            f"left ~{_clock(eta)}   estimate {_clock(self.estimated)}"
        )
        bar_width = 40
        filled = int(bar_width * frac)
        bar = Text("[" + "#" * filled + "." * (bar_width - filled) + "]")
        table = Table(box=None, pad_edge=False)
        table.add_column("step", justify="right")
        table.add_column("kind")
        table.add_column("setting")
        for name in self.port_names:
            table.add_column(name, justify="right")
        for step, reading in self.last:
            table.add_row(str(step.index), step.kind, step.label, *[f"{v:.4g}" for v in reading.values])
        parts = [head, bar, table]
        if self.ref0:
            drift = (self.ref_now or self.ref0) / self.ref0 - 1.0
            parts.append(Text(f"reference drift since start: {drift:+.2%}"))
        for w in self.warnings:
            parts.append(Text(f"! {w}", style="yellow"))
        return Panel(Group(*parts), title=self.title, subtitle=f"units: {self.units}")
