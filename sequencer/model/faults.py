"""Injected faults of a simulated bench as plain data, and the one set of rules they must follow.

The bench language (which points at the file and line) and the simulators (which take plain
dicts too) both validate a fault with :func:`check_fault`, built on the shared value checks of
``model.checks``; each words the place its own way.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable, Mapping

from lightloom.sequencer.model.checks import finite_number, is_text, one_of, within
from lightloom.sequencer.model.vocabulary import FAULT_KINDS, LINK_FAULTS

FAULT_KEYS: tuple[str, ...] = ("device", "kind", "at_s", "probability", "duration_s", "count", "residual")


class FaultSpecError(ValueError):
    """A fault description that cannot be used; the message names the entry and the key."""


@dataclass(frozen=True)
class FaultSpec:
    """One injected fault, validated.

    Attributes
    ----------
    kind : str
        ``timeout``, ``garbled`` or ``drop`` (link faults), ``stuck`` (a stage or actuator stops
        moving) or ``beam_loss`` (the source power drops; not a device fault).
    device : str or None
        Device name; required for every kind but ``beam_loss``.
    at_s : float or None
        Virtual time in s at which the fault starts.
    probability : float or None
        Per-operation probability (link faults) or per-move probability (``stuck``).
    duration_s : float or None
        Link faults: the window after ``at_s`` in which operations fail. ``stuck`` and
        ``beam_loss``: how long each occurrence lasts. None means no end.
    count : int or None
        Most occurrences. Link faults with ``at_s`` and no window default to 1.
    residual : float
        ``beam_loss`` only: fraction of the power left during the loss (default 0).
    """

    kind: str
    device: str | None = None
    at_s: float | None = None
    probability: float | None = None
    duration_s: float | None = None
    count: int | None = None
    residual: float = 0.0

    @property
    def window_start_s(self) -> float:
        """Virtual time from which the fault may fire, s."""
        return 0.0 if self.at_s is None else self.at_s

    @property
    def max_count(self) -> float:
        """Most occurrences (``inf`` when unbounded)."""
        if self.count is not None:
            return float(self.count)
        if self.kind in LINK_FAULTS and self.probability is None and self.duration_s is None:
            return 1.0
        return math.inf


class FaultRuleError(ValueError):
    """A fault that breaks a rule: ``key`` names the entry at fault (None: the fault as a whole)."""

    def __init__(self, key: str | None, detail: str) -> None:
        super().__init__(detail)
        self.key = key
        self.detail = detail


def _number(item: Mapping[str, object], key: str) -> float | None:
    value = item.get(key)
    if value is None:
        return None
    number = finite_number(value)
    if number is None:
        raise FaultRuleError(key, f"{key!r} must be a finite number, got {value!r}")
    return number


def check_fault(item: Mapping[str, object]) -> FaultSpec:
    """The rules every fault follows, on plain values (keys: FAULT_KEYS); raise FaultRuleError.

    A device fault names its ``device``; ``beam_loss`` blocks the source and names none. Exactly
    one of ``at_s`` (once, at that simulated time) or ``probability`` (per operation, or per move
    for ``stuck``) says when; ``beam_loss`` takes ``at_s`` only. ``duration_s`` > 0, ``count``
    an integer >= 1 (not for beam_loss; for stuck only with ``probability``), ``residual`` in
    [0, 1] for beam_loss only.
    """
    unknown = sorted(str(k) for k in item if k not in FAULT_KEYS)
    if unknown:
        raise FaultRuleError(None, f"unknown key(s) {', '.join(unknown)}; allowed keys: {', '.join(FAULT_KEYS)}")
    kind = item.get("kind")
    if not one_of(kind, FAULT_KINDS):
        raise FaultRuleError("kind", f"'kind' must be one of {', '.join(FAULT_KINDS)}, got {kind!r}")
    device = item.get("device")
    if device is not None and not (is_text(device, allow_empty=True) and device):
        raise FaultRuleError("device", f"'device' must be a device name, got {device!r}")
    if kind == "beam_loss" and device is not None:
        raise FaultRuleError("device", "a beam_loss fault blocks the source and names no device; remove 'device'")
    if kind != "beam_loss" and device is None:
        raise FaultRuleError(None, f"a {kind} fault needs 'device' (the bench name of the device)")
    at_s = _number(item, "at_s")
    probability = _number(item, "probability")
    duration_s = _number(item, "duration_s")
    residual = _number(item, "residual")
    count = item.get("count")
    if at_s is not None and not within(at_s, ge=0):
        raise FaultRuleError("at_s", f"'at_s' must be >= 0 virtual seconds, got {at_s}")
    if probability is not None and not within(probability, ge=0.0, le=1.0):
        raise FaultRuleError("probability", f"'probability' must be in [0, 1], got {probability}")
    if duration_s is not None and not within(duration_s, gt=0):
        raise FaultRuleError("duration_s", f"'duration_s' must be > 0 s (omit it for no end), got {duration_s}")
    if count is not None and (isinstance(count, bool) or not isinstance(count, int) or count < 1):
        raise FaultRuleError("count", f"'count' must be an integer >= 1, got {count!r}")
    if kind == "beam_loss":
        if at_s is None or probability is not None or count is not None:
            raise FaultRuleError(
                None, "beam_loss takes 'at_s', optional 'duration_s' and 'residual' (no 'probability' or 'count')"
            )
        if residual is not None and not within(residual, ge=0.0, le=1.0):
            raise FaultRuleError("residual", f"'residual' must be a fraction in [0, 1], got {residual}")
    elif residual is not None:
        raise FaultRuleError("residual", "'residual' applies to beam_loss only")
    if at_s is None and probability is None:
        raise FaultRuleError(None, "give 'at_s' (virtual s) or 'probability' (per operation)")
    if at_s is not None and probability is not None:
        raise FaultRuleError(
            None, "give exactly one of at_s (once, at that simulated time) or probability (per operation), not both"
        )
    if kind == "stuck" and probability is None and count is not None:
        raise FaultRuleError("count", "'count' applies to a stuck fault only with 'probability' (one stuck per move)")
    return FaultSpec(
        kind=str(kind),
        device=device,
        at_s=at_s,
        probability=probability,
        duration_s=duration_s,
        count=count,
        residual=0.0 if residual is None else residual,
    )


def parse_fault(item: Mapping[str, object], index: int = 0) -> FaultSpec:
    """Validate one fault dict (keys: FAULT_KEYS) into a FaultSpec; raise FaultSpecError naming the entry."""
    if not isinstance(item, Mapping):
        raise FaultSpecError(f"fault #{index + 1}: expected a mapping with keys {', '.join(FAULT_KEYS)}, got {item!r}")
    try:
        return check_fault(item)
    except FaultRuleError as exc:
        raise FaultSpecError(f"fault #{index + 1} ({dict(item)!r}): {exc.detail}") from None


def parse_faults(items: Iterable[Mapping[str, object] | FaultSpec]) -> tuple[FaultSpec, ...]:
    """Validate a list of fault dicts (or FaultSpecs) in order; raise FaultSpecError on the first bad one."""
    return tuple(item if isinstance(item, FaultSpec) else parse_fault(item, i) for i, item in enumerate(items))


