"""The simulation clock: instant virtual time, scaled wall time, thread safety."""

from __future__ import annotations

import threading
import time

import pytest

from lightloom.simulators.clock import SimClock


class FakeWall:
    """A wall clock that only moves when slept on."""

    def __init__(self) -> None:
        self.t = 1000.0
        self.slept: list[float] = []

    def __call__(self) -> float:
        return self.t

    def sleep(self, dt: float) -> None:
        self.slept.append(dt)
        self.t += dt


def test_instant_clock_does_not_advance_by_itself() -> None:
    clock = SimClock(0.0)
    before = clock.now()
    time.sleep(0.01)
    assert clock.now() == before == 0.0


def test_instant_clock_sleep_advances_virtual_time_exactly_without_sleeping() -> None:
    clock = SimClock(0.0, start_s=2.0)
    wall0 = time.perf_counter()
    clock.sleep(3600.0)
    clock.sleep(0.25)
    assert clock.now() == 3602.25
    assert time.perf_counter() - wall0 < 0.1


def test_advance_to_never_moves_backwards() -> None:
    clock = SimClock(0.0)
    clock.advance_to(5.0)
    clock.advance_to(3.0)
    assert clock.now() == 5.0


def test_scaled_clock_sleeps_scaled_wall_time_and_follows_the_wall() -> None:
    wall = FakeWall()
    clock = SimClock(0.01, wall=wall, wall_sleep=wall.sleep)
    clock.sleep(2.0)
    assert sum(wall.slept) == pytest.approx(0.02)
    assert clock.now() == pytest.approx(2.0)
    wall.t += 0.5  # half a wall second later: fifty virtual seconds
    assert clock.now() == pytest.approx(52.0)


def test_scaled_clock_real_sleep_takes_scaled_wall_time() -> None:
    clock = SimClock(0.01)
    wall0 = time.perf_counter()
    clock.sleep(3.0)
    elapsed = time.perf_counter() - wall0
    assert clock.now() >= 3.0
    assert 0.03 <= elapsed < 0.08


def test_invalid_time_scale_is_refused() -> None:
    with pytest.raises(ValueError, match="time_scale"):
        SimClock(-1.0)


def test_infinite_wait_is_refused() -> None:
    with pytest.raises(ValueError, match="never return"):
        SimClock(0.0).advance_to(float("inf"))


def test_concurrent_waits_end_at_the_latest_deadline() -> None:
    clock = SimClock(0.0)
    targets = [float(t) for t in range(1, 201)]
    barrier = threading.Barrier(8)

    def worker(offset: int) -> None:
        barrier.wait()
        for t in targets[offset::8]:
            clock.advance_to(t)

    threads = [threading.Thread(target=worker, args=(i,)) for i in range(8)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    assert clock.now() == max(targets)


def test_time_seen_by_concurrent_readers_never_decreases() -> None:
    clock = SimClock(0.0)
    seen: list[list[float]] = [[] for _ in range(4)]

    def reader(i: int) -> None:
        for _ in range(2000):
            seen[i].append(clock.now())

    def writer() -> None:
        for _ in range(2000):
            clock.sleep(0.001)

    threads = [threading.Thread(target=reader, args=(i,)) for i in range(4)] + [threading.Thread(target=writer)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    assert all(b >= a for s in seen for a, b in zip(s, s[1:]))
    assert clock.now() == pytest.approx(2.0)
