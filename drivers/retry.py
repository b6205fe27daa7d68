"""Bounded retry with exponential back-off for transient instrument errors; sleep is injected."""

from __future__ import annotations

import time
from typing import Callable, TypeVar

from lightloom.drivers.errors import ConnectionLost, InstrumentError, InstrumentTimeout
from lightloom.drivers.interfaces import Device, Shutter

T = TypeVar("T")

OnRetry = Callable[[int, InstrumentError, float], None]


def backoff_delays_s(attempts: int, backoff_s: float, max_backoff_s: float) -> list[float]:
    """Pauses before attempts 2..N: ``backoff_s``, doubling each time, capped at ``max_backoff_s``."""
    return [min(backoff_s * 2.0**k, max_backoff_s) for k in range(max(attempts - 1, 0))]


def call_with_retry(
    fn: Callable[[], T],
    attempts: int = 3,
    backoff_s: float = 0.1,
    max_backoff_s: float = 2.0,
    on_retry: OnRetry | None = None,
    sleep: Callable[[float], None] = time.sleep,
    *,
    device: Device | None = None,
) -> T:
    """Call ``fn`` until it succeeds, at most ``attempts`` times.

    Only transient InstrumentErrors (timeout, garbled reply, dropped connection) are retried;
    any other exception leaves at once. Before each new attempt: ``on_retry(attempt, error,
    delay_s)`` where ``attempt`` is the number of the attempt that failed (1-based), then
    ``sleep(delay_s)``, then, after ConnectionLost or InstrumentTimeout, ``device.reconnect()``
    (a reply that timed out may still arrive and would pair with the next query). A transient
    error from that reconnect counts as the failure of that attempt.

    Returns
    -------
    Whatever ``fn`` returns.

    Raises
    ------
    InstrumentError
        The last transient error once every attempt has failed, unchanged.
    """
    if attempts < 1:
        raise ValueError(f"attempts must be at least 1, got {attempts}")
    if backoff_s < 0 or max_backoff_s < 0:
        raise ValueError("backoff_s and max_backoff_s must be >= 0")
    delays = backoff_delays_s(attempts, backoff_s, max_backoff_s)
    needs_reconnect = False
    for attempt in range(1, attempts + 1):
        try:
            if needs_reconnect and device is not None:
                device.reconnect()
            return fn()
        except InstrumentError as error:
            if not error.transient or attempt == attempts:
                raise
            needs_reconnect = isinstance(error, (ConnectionLost, InstrumentTimeout))
            delay = delays[attempt - 1]
            if on_retry is not None:
                on_retry(attempt, error, delay)
            sleep(delay)
    raise AssertionError("unreachable: the loop returns or raises")


def close_shutter_within(
    shutter: Shutter,
    budget_s: float,
    *,
    backoff_s: float,
    max_backoff_s: float,
    now: Callable[[], float],
    sleep: Callable[[float], None],
    log: Callable[[str], None] = lambda line: None,
) -> bool:
    """Close ``shutter`` until it reads back closed, for up to ``budget_s`` seconds of ``now``.

    Between attempts: a pause of ``backoff_s``, doubling up to ``max_backoff_s``, then a reconnect,
    so an instrument that restarts or a link that comes back within the budget still receives the
    close. Whatever goes wrong (any error, a second Ctrl-C or stop request) the next attempt is
    made: the shutter comes first. Returns True once closed, False when the budget is spent.
    """
    deadline = now() + budget_s
    delay = backoff_s
    attempt = 0
    reconnect = False
    while True:
        attempt += 1
        try:
            if reconnect:
                shutter.reconnect()
            shutter.close_beam()
            if not shutter.is_open():
                if attempt > 1:
                    log(f"shutter closed at attempt {attempt}")
                return True
            log("the shutter still reads back open after the close command; retrying")
        except (SystemExit, GeneratorExit):
            raise
        except BaseException as exc:  # noqa: BLE001 - the shutter must be tried again whatever happened
            if isinstance(exc, Exception):
                log(f"closing the shutter failed at attempt {attempt} ({exc}); retrying")
            else:
                log("stop requested again while closing the shutter; closing it first")
        reconnect = True
        left = deadline - now()
        if left <= 0:
            log(f"gave up closing the shutter after {attempt} attempts over {budget_s:g} s")
            return False
        pause = min(max(delay, 1e-3), left)
        delay = min(max(2.0 * delay, 1e-3), max_backoff_s)
        try:
            sleep(pause)
        except (SystemExit, GeneratorExit):
            raise
        except BaseException:  # noqa: BLE001
            log("stop requested again while closing the shutter; closing it first")
