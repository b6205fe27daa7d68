"""One set of value checks for every input language: protocol, bench, driver options and faults.

Pure predicates on plain Python values (what YAML, JSON or a dict hands over) and the phrases
that describe a range. Each caller words the place its own way (``FILE:LINE`` for the languages,
the dotted option key for drivers, the fault entry for faults), so these return values or None
and never raise. Imports only the standard library.
"""

from __future__ import annotations

import math
from typing import Any, Collection

UNIT_WORDS: dict[str, str] = {
    "s": "seconds",
    "deg": "degrees",
    "W": "watts",
    "nm": "nanometres",
    "deg/s": "degrees per second",
    "deg/s^2": "degrees per second squared",
    "1/W": "counts per second per watt",
    "1/s": "counts per second",
}


def is_number(value: Any) -> bool:
    """True for an int or float (a boolean is not a number, though Python says it is)."""
    return not isinstance(value, bool) and isinstance(value, (int, float))


def finite_number(value: Any) -> float | None:
    """``value`` as a finite float, or None if it is not a number, not finite or beyond float range."""
    if not is_number(value):
        return None
    try:
        x = float(value)
    except OverflowError:
        return None
    return x if math.isfinite(x) else None


def whole_number(value: Any) -> int | None:
    """``value`` as an int (a float with no fraction counts), or None."""
    if isinstance(value, float) and value.is_integer():
        return int(value)
    if isinstance(value, bool) or not isinstance(value, int):
        return None
    return value


def within(
    x: float, gt: float | None = None, ge: float | None = None, lt: float | None = None, le: float | None = None
) -> bool:
    """True if ``x`` meets every bound given (NaN meets none)."""
    return not (
        (gt is not None and not x > gt)
        or (ge is not None and not x >= ge)
        or (lt is not None and not x < lt)
        or (le is not None and not x <= le)
    )


def is_text(value: Any, *, allow_empty: bool = False) -> bool:
    """True for a string (empty or blank only when ``allow_empty``)."""
    return isinstance(value, str) and (allow_empty or bool(value.strip()))


def is_flag(value: Any) -> bool:
    """True for ``True`` or ``False`` only (not 0, 1 or "yes")."""
    return isinstance(value, bool)


def one_of(value: Any, allowed: Collection[Any]) -> bool:
    """True if ``value`` is one of ``allowed`` (a boolean never is, though ``True == 1``)."""
    return not isinstance(value, bool) and value in allowed


def fmt(x: float) -> str:
    """A number as a short human string (``0.5``, ``3600``, ``1e-09``)."""
    if isinstance(x, int) or (isinstance(x, float) and x.is_integer() and abs(x) < 1e15):
        return str(int(x))
    return f"{x:g}"


def unit_phrase(unit: str) -> str:
    """`` in seconds`` for ``s`` (empty for no unit)."""
    if not unit:
        return ""
    return f" in {UNIT_WORDS.get(unit, unit)}"


def _with_unit(x: float, unit: str) -> str:
    return f"{fmt(x)} {unit}" if unit else fmt(x)


def range_phrase(
    unit: str,
    gt: float | None = None,
    ge: float | None = None,
    lt: float | None = None,
    le: float | None = None,
) -> str:
    """``"> 0 s and at most 3600 s"`` for the given bounds."""
    parts = []
    if gt is not None:
        parts.append(f"> {_with_unit(gt, unit)}")
    if ge is not None:
        parts.append(f">= {_with_unit(ge, unit)}")
    if lt is not None:
        parts.append(f"< {_with_unit(lt, unit)}")
    if le is not None:
        parts.append(f"at most {_with_unit(le, unit)}")
    return " and ".join(parts)
