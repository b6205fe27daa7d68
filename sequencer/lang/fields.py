"""Typed getters over the line-keeping YAML tree, shared by the protocol and bench languages.

Every problem raises ``InputError(message, file, line)`` with a message that says what is wrong and
what is expected, e.g. ``dwell_s must be > 0 s and at most 3600 s, got -1``.
"""

from __future__ import annotations

import math
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Iterator, NoReturn, Sequence

import numpy as np

from lightloom.sequencer.errors import InputError, OpticsError
from lightloom.sequencer.optics.states import normalize_density, parse_complex
from lightloom.sequencer.lang.yamlsafe import YMap, YNode, YScalar, YSeq, clip
from lightloom.sequencer.model.checks import (  # noqa: F401 (the languages import fmt and range_phrase from here)
    UNIT_WORDS, finite_number, fmt, is_flag, is_number, is_text, one_of, range_phrase, unit_phrase, whole_number,
    within,
)
from lightloom.sequencer.model.suggest import aside, nearest, suggestion  # noqa: F401 (the languages import them from here)

MISSING: object = object()
"""Default marker: the key is required."""

HERMITIAN_TOLERANCE = 1e-9
PSD_TOLERANCE = 1e-9


def fail(message: str, node: YNode) -> NoReturn:
    """Raise an InputError at ``node``'s file and line."""
    raise InputError(message, node.file, node.line)


def described(node: YNode) -> str:
    """What the user wrote, for a ``got ...`` clause."""
    if isinstance(node, YMap):
        return "a mapping"
    if isinstance(node, YSeq):
        return "a list"
    if node.value is None:
        return "nothing (null)"
    if isinstance(node.value, bool):
        return node.text or ("true" if node.value else "false")
    return node.shown()


def expect_map(node: YNode, what: str, hint: str = "") -> YMap:
    """``node`` as a mapping, or an error saying ``what`` should be one."""
    if not isinstance(node, YMap):
        extra = f" ({hint})" if hint else ""
        fail(f"{what}: expected a mapping of keys{extra}, got {described(node)}", node)
    return node


def expect_seq(node: YNode, what: str, hint: str = "") -> YSeq:
    """``node`` as a list, or an error saying ``what`` should be one."""
    if not isinstance(node, YSeq):
        extra = f" ({hint})" if hint else ""
        fail(f"{what}: expected a list{extra}, got {described(node)}", node)
    return node


def number(
    node: YNode,
    what: str,
    unit: str = "",
    *,
    gt: float | None = None,
    ge: float | None = None,
    lt: float | None = None,
    le: float | None = None,
) -> float:
    """A finite number within the given bounds (``unit`` is used in messages only)."""
    value = node.value if isinstance(node, YScalar) else None
    if not is_number(value):
        fail(f"{what}: expected a number{unit_phrase(unit)}, got {described(node)}", node)
    x = finite_number(value)
    if x is None and isinstance(value, int):
        fail(f"{what}: {clip(str(value))} is beyond the range of numbers (about 1.8e308);"
             f" expected an ordinary number{unit_phrase(unit)}", node)
    if x is None:
        fail(f"{what}: expected a finite number{unit_phrase(unit)}, got {described(node)}", node)
    if not within(x, gt, ge, lt, le):
        fail(f"{what} must be {range_phrase(unit, gt, ge, lt, le)}, got {clip(node.text) or fmt(x)}", node)
    return x


def integer(node: YNode, what: str, *, ge: int | None = None, le: int | None = None) -> int:
    """A whole number within the given bounds."""
    value = whole_number(node.value if isinstance(node, YScalar) else None)
    if value is None:
        fail(f"{what}: expected a whole number, got {described(node)}", node)
    if not within(value, ge=ge, le=le):
        fail(f"{what} must be a whole number {range_phrase('', ge=ge, le=le)}, got {clip(str(value))}", node)
    return value


def text(node: YNode, what: str, *, allow_empty: bool = False) -> str:
    """A text value (numbers and booleans are not silently turned into text)."""
    value = node.value if isinstance(node, YScalar) else None
    if not is_text(value, allow_empty=True):
        quote = " (quote it)" if isinstance(node, YScalar) and node.value is not None else ""
        fail(f"{what}: expected text{quote}, got {described(node)}", node)
    if not is_text(value, allow_empty=allow_empty):
        fail(f"{what}: expected non-empty text, got an empty string", node)
    return value


def boolean(node: YNode, what: str) -> bool:
    """``true`` or ``false``."""
    value = node.value if isinstance(node, YScalar) else None
    if not is_flag(value):
        fail(f"{what}: expected true or false, got {described(node)}", node)
    return value


def choice(node: YNode, what: str, choices: Sequence[str]) -> str:
    """One of ``choices`` (case-sensitive), with the nearest one suggested otherwise."""
    value = node.value if isinstance(node, YScalar) else None
    if isinstance(value, bool):
        # YAML 1.1 reads on/off/yes/no as booleans.
        fail(f"{what} must be one of {', '.join(choices)}; got {described(node)} (quote the value)", node)
    if not isinstance(value, str) or not one_of(value, choices):
        hint = suggestion(str(value), choices) if isinstance(value, str) else ""
        fail(f"{what} must be one of {', '.join(choices)}; got {described(node)}{hint}", node)
    return value


@dataclass(frozen=True)
class Section:
    """A mapping in a file, with its dotted path for messages (``""`` for the top level).

    ``top`` names the top level in messages (``protocol``, ``bench``).
    """

    node: YMap
    path: str
    top: str

    @classmethod
    def of(cls, node: YNode, path: str, top: str, hint: str = "") -> "Section":
        return cls(expect_map(node, path or top, hint), path, top)

    @property
    def where(self) -> str:
        return self.path or self.top

    @property
    def line(self) -> int:
        return self.node.line

    def name(self, key: str) -> str:
        """The dotted name of ``key`` (``background.dwell_s``)."""
        return f"{self.path}.{key}" if self.path else key

    def check_keys(self, allowed: Sequence[str]) -> None:
        """Refuse keys not in ``allowed``, suggesting the nearest valid one."""
        for entry in self.node.entries:
            if entry.key not in allowed:
                hint = suggestion(entry.key, allowed)
                raise InputError(
                    f"unknown key '{clip(entry.key)}' in {self.where}{hint or ';'}"
                    f" expected one of: {', '.join(sorted(allowed))}",
                    self.node.file,
                    entry.key_line,
                )

    def get(self, key: str) -> YNode | None:
        """The value node of ``key``; None when absent or written as null."""
        node = self.node.get(key)
        if isinstance(node, YScalar) and node.value is None:
            return None
        return node

    def has(self, key: str) -> bool:
        return self.get(key) is not None

    def key_line(self, key: str) -> int:
        entry = self.node.entry(key)
        return self.node.line if entry is None else entry.key_line

    def require(self, key: str, expected: str) -> YNode:
        """The value node of ``key``, or an error saying it is missing and what it should be."""
        node = self.get(key)
        if node is None:
            entry = self.node.entry(key)
            line = self.node.line if entry is None else entry.key_line
            where = self.path or f"the {self.top} file"
            raise InputError(f"missing key '{key}' in {where}; expected {expected}", self.node.file, line)
        return node

    def section(self, key: str, hint: str = "", *, required: bool = False) -> "Section | None":
        """The sub-mapping under ``key`` as a Section (None when absent, unless required)."""
        node = self.require(key, f"a mapping{f' ({hint})' if hint else ''}") if required else self.get(key)
        if node is None:
            return None
        return Section.of(node, self.name(key), self.top, hint)

    def seq(self, key: str, hint: str = "", *, required: bool = False) -> YSeq | None:
        node = self.require(key, f"a list{f' ({hint})' if hint else ''}") if required else self.get(key)
        if node is None:
            return None
        return expect_seq(node, self.name(key), hint)

    def number(
        self,
        key: str,
        unit: str = "",
        default: object = MISSING,
        *,
        gt: float | None = None,
        ge: float | None = None,
        lt: float | None = None,
        le: float | None = None,
    ) -> float:
        node = self._value(key, default, f"a number{unit_phrase(unit)}")
        if node is None:
            return default  # type: ignore[return-value]
        return number(node, self.name(key), unit, gt=gt, ge=ge, lt=lt, le=le)

    def integer(self, key: str, default: object = MISSING, *, ge: int | None = None, le: int | None = None) -> int:
        node = self._value(key, default, "a whole number")
        if node is None:
            return default  # type: ignore[return-value]
        return integer(node, self.name(key), ge=ge, le=le)

    def text(self, key: str, default: object = MISSING) -> str:
        node = self._value(key, default, "text")
        if node is None:
            return default  # type: ignore[return-value]
        return text(node, self.name(key))

    def boolean(self, key: str, default: object = MISSING) -> bool:
        node = self._value(key, default, "true or false")
        if node is None:
            return default  # type: ignore[return-value]
        return boolean(node, self.name(key))

    def choice(self, key: str, choices: Sequence[str], default: object = MISSING) -> str:
        node = self._value(key, default, f"one of {', '.join(choices)}")
        if node is None:
            return default  # type: ignore[return-value]
        return choice(node, self.name(key), choices)

    def _value(self, key: str, default: object, expected: str) -> YNode | None:
        node = self.get(key)
        if node is None and default is MISSING:
            return self.require(key, expected)
        return node


def complex_value(node: YNode, what: str) -> complex:
    """A complex number written as text (``"0.1-0.2j"``) or as a plain number."""
    value = node.value if isinstance(node, YScalar) else None
    if isinstance(value, bool) or not isinstance(value, (str, int, float)):
        fail(f"{what}: expected a complex number such as '0.6' or '0.1-0.2j', got {described(node)}", node)
    try:
        return parse_complex(value)
    except ValueError:
        fail(
            f"{what}: cannot read {described(node)} as a complex number; write e.g. '0.6', '0.8j' or '0.1-0.2j'",
            node,
        )


def complex_list(node: YNode, what: str, n: int) -> tuple[complex, ...]:
    """A list of exactly ``n`` complex numbers."""
    seq = expect_seq(node, what, f"{n} complex numbers")
    if len(seq) != n:
        fail(f"{what}: expected {n} complex numbers, got {len(seq)}", seq)
    return tuple(complex_value(item, f"{what}[{i}]") for i, item in enumerate(seq.items))


def normalized_ket(node: YNode, what: str, n: int) -> tuple[complex, ...]:
    """A ket of ``n`` complex amplitudes, scaled to unit norm; a zero vector is an error."""
    amplitudes = complex_list(node, what, n)
    # Scale by the largest amplitude first: squares of amplitudes near 1e200 overflow.
    largest = max(abs(a) for a in amplitudes)
    if largest == 0.0 or not math.isfinite(largest):
        fail(f"{what}: the ket is zero; give at least one non-zero amplitude", node)
    scaled = [a / largest for a in amplitudes]
    norm = math.sqrt(sum(abs(a) ** 2 for a in scaled))
    if largest * norm < 1e-12:
        fail(f"{what}: the ket is zero; give at least one non-zero amplitude", node)
    return tuple(a / norm for a in scaled)


def density_matrix(node: YNode, what: str, n: int) -> tuple[tuple[complex, ...], ...]:
    """An ``n`` x ``n`` Hermitian positive-semidefinite matrix, scaled to unit trace."""
    seq = expect_seq(node, what, f"{n} rows of {n} complex numbers")
    if len(seq) != n:
        fail(f"{what}: expected {n} rows of {n} complex numbers, got {len(seq)} rows", seq)
    rows = [complex_list(row, f"{what}[{i}]", n) for i, row in enumerate(seq.items)]
    m = np.array(rows, dtype=np.complex128)
    scale = max(1.0, float(np.abs(m).max()))
    # Report the entry below the diagonal: people write the upper triangle first and copy it down.
    bad = np.argwhere(np.tril(np.abs(m - m.conj().T) > HERMITIAN_TOLERANCE * scale))
    if bad.size:
        i, j = (int(x) for x in bad[0])
        fail(
            f"{what}: not Hermitian: entry [{i}][{j}] must be the complex conjugate of entry [{j}][{i}]",
            seq.items[i],
        )
    eigenvalues = np.linalg.eigvalsh(0.5 * (m + m.conj().T))
    if eigenvalues.min() < -PSD_TOLERANCE * scale:
        fail(
            f"{what}: not positive semidefinite (smallest eigenvalue {eigenvalues.min():.3g});"
            " a density matrix has no negative eigenvalues",
            seq,
        )
    try:
        rho = normalize_density(m, tol=PSD_TOLERANCE)
    except OpticsError as exc:
        fail(f"{what}: {exc}", seq)
    return frozen_matrix(rho)


def frozen_matrix(m: np.ndarray) -> tuple[tuple[complex, ...], ...]:
    """A complex matrix as a tuple of tuples, for frozen dataclasses that compare equal by value."""
    return tuple(tuple(complex(x) for x in row) for row in np.asarray(m, dtype=np.complex128))


@contextmanager
def retyped(error_class: type[InputError]) -> Iterator[None]:
    """Re-raise plain InputErrors from the block as ``error_class`` (ProtocolError, BenchError)."""
    try:
        yield
    except InputError as exc:
        if type(exc) is not InputError:
            raise
        raise error_class(exc.message, exc.file, exc.line) from None
