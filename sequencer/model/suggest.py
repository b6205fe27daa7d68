"""The one "did you mean" helper for every message about a mistyped name (files, options, drivers)."""

from __future__ import annotations

import difflib
from collections.abc import Iterable


def nearest(word: str, choices: Iterable[str], cutoff: float = 0.6) -> str | None:
    """The choice closest to ``word`` (a match ignoring case first), or None.

    ``cutoff`` is difflib's similarity ratio below which nothing is suggested.
    """
    options = list(choices)
    for option in options:
        if option.lower() == word.lower():
            return option
    close = difflib.get_close_matches(word, options, n=1, cutoff=cutoff)
    return close[0] if close else None


def suggestion(word: str, choices: Iterable[str], cutoff: float = 0.6) -> str:
    """``"; did you mean 'x'?"`` for the nearest choice, or an empty string (ends a message)."""
    close = nearest(word, choices, cutoff)
    return f"; did you mean '{close}'?" if close else ""


def aside(word: str, choices: Iterable[str], cutoff: float = 0.6) -> str:
    """``" (did you mean 'x'?)"`` for the nearest choice, or an empty string (inside a message)."""
    close = nearest(word, choices, cutoff)
    return f" (did you mean '{close}'?)" if close else ""
