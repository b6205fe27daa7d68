"""The live screen: a pass counter, waits that tick, an ETA with the waits that is right after a resume."""

from __future__ import annotations

import io

import numpy as np
from rich.console import Console

from lightloom.sequencer.model.records import Reading
from lightloom.sequencer.model.steps import Step
from lightloom.sequencer.run.display import Schedule, TerminalMonitor
from lightloom.sequencer.run.runner import hms


def test_durations_read_as_hours_minutes_seconds():
    assert [hms(x) for x in (0, 22.4, 3599.6, 41421.9, 360000)] == [
        "0:00:00", "0:00:22", "1:00:00", "11:30:22", "100:00:00"]
    assert hms(float("nan")) == "-:--:--"


def _night(passes=4, per_pass=10, work=2.0, interval=1800.0):
    pass_index = np.repeat(np.arange(passes), per_pass)
    return np.full(passes * per_pass, work), pass_index, interval


def test_time_left_counts_the_waits_between_passes():
    work, pass_index, interval = _night()
    schedule = Schedule.of(work, pass_index, np.zeros(len(work), bool), 4, run_start=1000.0,
                           pass_interval_s=interval)
    # Last pass starts at 1000 + 3 * 1800 and takes 20 s: 5420 s from t = 1000.
    assert schedule.seconds_left(now=1000.0) == 5420.0
    # Without waits (interval 0) only the work is left.
    flat = Schedule.of(work, pass_index, np.zeros(len(work), bool), 4, 1000.0, 0.0)
    assert flat.seconds_left(now=1000.0) == 80.0


def test_time_left_after_a_resume_is_the_work_and_waits_still_ahead():
    work, pass_index, interval = _night()
    done = pass_index < 2  # two passes recorded before the kill
    done[20:25] = True     # and half of the third
    schedule = Schedule.of(work, pass_index, done, 4, run_start=1000.0, pass_interval_s=interval)
    now = 1000.0 + 2 * 1800.0 + 10.0   # resumed in the third pass
    # 10 s of pass 3 left, then pass 4 at 1000 + 5400 for 20 s.
    assert schedule.seconds_left(now) == (1000.0 + 5400.0 + 20.0) - now
    schedule.step_done(2, 2.0)
    assert schedule.seconds_left(now) == (1000.0 + 5400.0 + 20.0) - now
    late = 1000.0 + 6000.0  # running late: the work left decides
    assert schedule.seconds_left(late) == 28.0


def _step(i: int, pass_index: int) -> Step:
    return Step(i, "measure", pass_index, 0, 0, (0.0,) * 5, 0.5, "H x h", ("H,h",))


def _reading(i: int) -> Reading:
    return Reading(i, "measure", 0, 0, 0, np.zeros(5), np.zeros(5), np.array([1e-3]), 2e-3,
                   np.zeros((1, 4, 4)), 0.5, 0.0, 0.5)


class _Clock:
    def __init__(self) -> None:
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


def _monitor(done_steps: int = 0):
    work, pass_index, interval = _night()
    done = np.zeros(len(work), bool)
    done[:done_steps] = True
    wall, bench = _Clock(), _Clock()
    bench.t = 1000.0
    schedule = Schedule.of(work, pass_index, done, 4, run_start=1000.0, pass_interval_s=interval)
    console = Console(file=io.StringIO(), width=100, force_terminal=False, record=True)
    monitor = TerminalMonitor(console, "night", ("det",), "W", schedule, steps_done=done_steps,
                              steps_total=len(work), passes=4, work_s=work, now=bench, wall=wall)
    return monitor, console, wall, bench


def _screen(monitor, console) -> str:
    console.print(monitor)
    return console.export_text(clear=True)


def test_the_screen_shows_the_pass_counter_and_h_mm_ss():
    monitor, console, wall, bench = _monitor()
    monitor.step_done(_step(11, 1), _reading(11), 12, 40)
    text = _screen(monitor, console)
    assert "pass 2 of 4" in text and "12/40 steps" in text
    assert "left ~1:30:" in text and "elapsed 0:00:00" in text


def test_the_screen_keeps_ticking_during_a_wait_between_passes():
    monitor, console, wall, bench = _monitor(done_steps=10)
    monitor.step_done(_step(9, 0), _reading(9), 10, 40)
    monitor.waiting(1790.0, 2, 4)
    first = _screen(monitor, console)
    assert "waiting 30 min for pass 2 of 4" in first
    wall.t += 600.0
    bench.t += 600.0
    later = _screen(monitor, console)
    assert "waiting 20 min for pass 2 of 4" in later and "elapsed 0:10:00" in later
    assert "left ~1:20:" in later  # the wait is part of what is left, and it shrinks


def test_right_after_a_resume_the_eta_is_the_remaining_plan_not_zero_or_infinite():
    monitor, console, wall, bench = _monitor(done_steps=30)
    bench.t = 1000.0 + 3 * 1800.0 + 1.0
    text = _screen(monitor, console)
    assert "30/40 steps" in text and "pass 4 of 4" in text
    assert "left ~0:00:20" in text  # pass 4: 10 steps of 2 s, due a second ago
