"""Pure parsers turning an instrument's reply text into numbers, flags, lists and error entries."""

from __future__ import annotations

import math
import re

_ERROR_ENTRY = re.compile(r'^\s*([+-]?\d+)\s*(?:[,;]\s*"?(.*?)"?\s*)?$')
_SEPARATORS = re.compile(r"[,;\s]+")


class ReplyError(ValueError):
    """A reply that does not hold what was asked for; the message says why."""


def extract(text: str, pattern: re.Pattern[str] | None) -> str:
    """The value part of ``text``: the pattern's one group when given, else the stripped text."""
    if pattern is None:
        return text.strip()
    match = pattern.search(text)
    if match is None or match.group(1) is None:
        raise ReplyError(f"it does not match reply_pattern {pattern.pattern!r}")
    return match.group(1).strip()


def parse_float(text: str, pattern: re.Pattern[str] | None = None, scale: float = 1.0) -> float:
    """A finite number from ``text``, multiplied by ``scale`` (e.g. 1e-3 for a reply in mW)."""
    value_text = extract(text, pattern)
    try:
        value = float(value_text)
    except ValueError:
        raise ReplyError(f"{value_text!r} is not a number") from None
    value *= scale
    if not math.isfinite(value):
        raise ReplyError(f"{value_text!r} is not a finite number")
    return value


def parse_count(text: str, pattern: re.Pattern[str] | None = None, scale: float = 1.0) -> int:
    """A non-negative whole number of counts from ``text`` (after ``scale``)."""
    value = parse_float(text, pattern, scale)
    nearest = round(value)
    if abs(value - nearest) > 1e-6 * max(1.0, abs(value)):
        raise ReplyError(f"{value!r} is not a whole number of counts")
    if nearest < 0:
        raise ReplyError(f"{nearest} counts is negative")
    return int(nearest)


def parse_flag(text: str, pattern: re.Pattern[str] | None = None) -> bool:
    """A yes/no reply: a number (non-zero is true) or ON/OFF, TRUE/FALSE."""
    value_text = extract(text, pattern).upper()
    if value_text in ("ON", "TRUE"):
        return True
    if value_text in ("OFF", "FALSE"):
        return False
    try:
        value = float(value_text)
    except ValueError:
        raise ReplyError(f"{value_text!r} is neither a number nor ON/OFF") from None
    if not math.isfinite(value):
        raise ReplyError(f"{value_text!r} is not a finite number")
    return value != 0


def parse_pair(
    text: str, pattern: re.Pattern[str] | None = None, scale: float = 1.0
) -> tuple[float, float]:
    """Two numbers ``low, high`` separated by a comma, semicolon or blanks, in increasing order."""
    parts = [p for p in _SEPARATORS.split(extract(text, pattern)) if p]
    if len(parts) != 2:
        raise ReplyError(f"expected two numbers 'min,max', got {len(parts)} item(s)")
    low, high = (parse_float(p, None, scale) for p in parts)
    if not low < high:
        raise ReplyError(f"the first number ({low:g}) is not below the second ({high:g})")
    return low, high


def parse_list(text: str, pattern: re.Pattern[str] | None = None) -> tuple[str, ...]:
    """Comma-separated names, stripped, none empty."""
    items = tuple(item.strip() for item in extract(text, pattern).split(","))
    if not items or any(not item for item in items):
        raise ReplyError("expected comma-separated names, found an empty one")
    return items


def parse_error_entry(text: str) -> tuple[int, str]:
    """An error-queue entry ``code,"message"`` (SCPI-99, SYSTem:ERRor): code 0 means no error."""
    match = _ERROR_ENTRY.match(text)
    if match is None:
        raise ReplyError("expected an error entry such as '0,\"No error\"'")
    return int(match.group(1)), (match.group(2) or "").strip()
