"""Safe YAML reading into a small tree that remembers the file and 1-based line of every key and value."""

from __future__ import annotations

import math
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator, Union

import yaml

from lightloom.sequencer.errors import InputError

MAX_BYTES = 1 << 20
"""Largest file read, in bytes (1 MiB): our files are a few kB; anything bigger is a mistake."""

MAX_ALIASES = 20
"""Most alias uses (``*name``) in one file."""

MAX_NODES = 10_000
"""Most nodes in the tree after alias expansion: stops "billion laughs" files early."""

_LARGEST_FLOAT = int(sys.float_info.max)

TOO_MANY_VALUES = (
    f"too many values: this file holds more than {MAX_NODES} (keys and list items included), the most"
    " lightloom reads; shorten the list (a protocol measures at most 10000 points: for long series use"
    " measure.scan or sweep.passes)"
)

MAX_DEPTH = 50
"""Deepest nesting of mappings and sequences."""

# YAML 1.1 (what PyYAML resolves) reads ``1e-3`` as text because it wants a dot in the mantissa;
# people write it anyway, so a plain (unquoted) scalar of this shape is read as a number.
_EXPONENT_FLOAT = re.compile(r"^[-+]?(?:[0-9][0-9_]*(?:\.[0-9_]*)?|\.[0-9_]+)[eE][-+]?[0-9]+$")

_TAG = "tag:yaml.org,2002:"
_KIND_NAMES = {"int": "a number", "float": "a number", "bool": "a boolean", "null": "null", "timestamp": "a date"}


@dataclass(frozen=True)
class YScalar:
    """A scalar: text, int, float, bool or None (``null`` or an empty value)."""

    value: str | int | float | bool | None
    line: int
    file: str
    text: str = ""
    quoted: bool = False

    def shown(self) -> str:
        """The value as written, for error messages."""
        if self.quoted or isinstance(self.value, str):
            return repr(clip(self.text))
        return self.text if self.text else "nothing"


@dataclass(frozen=True)
class YSeq:
    """A sequence of nodes."""

    items: tuple["YNode", ...]
    line: int
    file: str

    def __iter__(self) -> Iterator["YNode"]:
        return iter(self.items)

    def __len__(self) -> int:
        return len(self.items)


@dataclass(frozen=True)
class YEntry:
    """One ``key: value`` of a mapping, with the line of the key."""

    key: str
    key_line: int
    value: "YNode"


@dataclass(frozen=True)
class YMap:
    """A mapping with text keys, in file order, without duplicates."""

    entries: tuple[YEntry, ...]
    line: int
    file: str
    _index: dict[str, YEntry] = field(init=False, repr=False, compare=False, hash=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_index", {e.key: e for e in self.entries})

    def __contains__(self, key: object) -> bool:
        return key in self._index

    def __len__(self) -> int:
        return len(self.entries)

    def keys(self) -> tuple[str, ...]:
        return tuple(e.key for e in self.entries)

    def get(self, key: str) -> "YNode | None":
        entry = self._index.get(key)
        return None if entry is None else entry.value

    def entry(self, key: str) -> YEntry | None:
        return self._index.get(key)


YNode = Union[YScalar, YSeq, YMap]


def clip(text: str, limit: int = 40) -> str:
    """``text`` shortened to ``limit`` characters for an error message."""
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _line_of(text: str, position: int) -> int:
    return text.count("\n", 0, max(position, 0)) + 1


class _Loader(yaml.SafeLoader):
    """PyYAML's safe composer, refusing tags, counting aliases and bounding depth."""

    def __init__(self, stream: str, file: str) -> None:
        super().__init__(stream)
        self.file = file
        self.alias_uses = 0
        self.depth = 0
        self.composed = 0

    def compose_node(self, parent: Any, index: Any) -> Any:
        event = self.peek_event()
        line = event.start_mark.line + 1
        self.composed += 1
        if self.composed > MAX_NODES:
            # Stop a huge file while composing, before PyYAML builds every node of it.
            raise InputError(TOO_MANY_VALUES, self.file, line)
        if isinstance(event, yaml.AliasEvent):
            self.alias_uses += 1
            if self.alias_uses > MAX_ALIASES:
                raise InputError(
                    f"more than {MAX_ALIASES} alias uses (*name); write the values out instead",
                    self.file,
                    line,
                )
        elif getattr(event, "tag", None) is not None:
            raise InputError(
                f"explicit YAML tag '{event.tag}' is not allowed; write plain values (quote text if needed)",
                self.file,
                line,
            )
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise InputError(f"nesting deeper than {MAX_DEPTH} levels; flatten the structure", self.file, line)
        try:
            return super().compose_node(parent, index)
        finally:
            self.depth -= 1


class _Converter:
    """Turns composed PyYAML nodes into YScalar/YSeq/YMap, expanding aliases within a node budget."""

    def __init__(self, loader: _Loader, file: str) -> None:
        self.loader = loader
        self.file = file
        self.nodes = 0

    def convert(self, node: yaml.Node, depth: int = 0) -> YNode:
        line = node.start_mark.line + 1
        self.nodes += 1
        if self.nodes > MAX_NODES:
            if self.loader.alias_uses:
                message = f"more than {MAX_NODES} values after expanding aliases; write the file without aliases"
            else:
                message = TOO_MANY_VALUES
            raise InputError(message, self.file, line)
        if depth > MAX_DEPTH:
            raise InputError(
                f"nesting deeper than {MAX_DEPTH} levels (a recursive alias?); write the values out",
                self.file,
                line,
            )
        if isinstance(node, yaml.ScalarNode):
            return self.scalar(node, line)
        if isinstance(node, yaml.SequenceNode):
            return YSeq(tuple(self.convert(item, depth + 1) for item in node.value), line, self.file)
        if isinstance(node, yaml.MappingNode):
            return self.mapping(node, line, depth)
        raise InputError("unsupported YAML node", self.file, line)

    def mapping(self, node: yaml.MappingNode, line: int, depth: int) -> YMap:
        entries: list[YEntry] = []
        seen: dict[str, int] = {}
        for key_node, value_node in node.value:
            key_line = key_node.start_mark.line + 1
            if not isinstance(key_node, yaml.ScalarNode):
                raise InputError("a key must be plain text, not a list or mapping", self.file, key_line)
            if key_node.tag == _TAG + "merge":
                raise InputError("merge keys '<<' are not supported; write the keys out", self.file, key_line)
            if key_node.tag != _TAG + "str":
                kind = _KIND_NAMES.get(key_node.tag[len(_TAG):], "non-text value")
                raise InputError(
                    f"key {key_node.value!r} is read as {kind}; keys must be text (quote it)",
                    self.file,
                    key_line,
                )
            key = key_node.value
            if key in seen:
                raise InputError(
                    f"duplicate key '{key}' (first at line {seen[key]}); keep only one",
                    self.file,
                    key_line,
                )
            seen[key] = key_line
            self.nodes += 1
            entries.append(YEntry(key, key_line, self.convert(value_node, depth + 1)))
        return YMap(tuple(entries), line, self.file)

    def scalar(self, node: yaml.ScalarNode, line: int) -> YScalar:
        text = node.value
        quoted = node.style is not None
        tag = node.tag[len(_TAG):] if node.tag.startswith(_TAG) else node.tag
        value: str | int | float | bool | None
        try:
            if tag == "null":
                value = None
            elif tag == "bool":
                value = bool(self.loader.construct_yaml_bool(node))
            elif tag == "int":
                value = int(self.loader.construct_yaml_int(node))
            elif tag == "float":
                value = float(self.loader.construct_yaml_float(node))
            elif tag == "str" and not quoted and _EXPONENT_FLOAT.match(text):
                value = float(text.replace("_", ""))
            elif tag in ("str", "timestamp", "value"):
                value = text
            elif tag == "merge":
                raise InputError("merge keys '<<' are not supported; write the keys out", self.file, line)
            else:
                raise InputError(f"unsupported YAML value type '{node.tag}'", self.file, line)
        except (ValueError, OverflowError):
            raise InputError(
                f"cannot read {clip(text)!r} as {_KIND_NAMES.get(tag, tag)}; write an ordinary number",
                self.file,
                line,
            ) from None
        if isinstance(value, int) and not isinstance(value, bool) and abs(value) > _LARGEST_FLOAT:
            digits = len(text.lstrip("+-").replace("_", ""))
            raise InputError(
                f"{clip(text)!r} ({digits} digits) is beyond the range of numbers lightloom can use"
                " (about 1.8e308); write a value of ordinary size",
                self.file,
                line,
            )
        if isinstance(value, float) and not math.isfinite(value):
            raise InputError(
                f"{clip(text)!r} is not a finite number; NaN and infinities are not allowed, write a finite value",
                self.file,
                line,
            )
        return YScalar(value, line, self.file, text, quoted)


def decode(data: bytes, file: str) -> str:
    """Check size, emptiness and UTF-8 of a file's bytes; return its text (a leading BOM dropped)."""
    if len(data) > MAX_BYTES:
        raise InputError(
            f"file is {len(data)} bytes, larger than the {MAX_BYTES} byte (1 MiB) limit; is this the right file?",
            file,
            1,
        )
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise InputError(
            f"not UTF-8 text (byte 0x{data[exc.start]:02x} at offset {exc.start}); save the file as UTF-8",
            file,
            line,
        ) from None
    if text.startswith("\ufeff"):
        text = text[1:]
    if not text.strip():
        raise InputError("file is empty; expected a YAML mapping of keys", file, 1)
    return text


def parse_text(text: str, file: str) -> YNode:
    """Parse one YAML document from ``text`` into the line-keeping tree."""
    loader: _Loader | None = None
    try:
        loader = _Loader(text, file)
        root = loader.get_single_node()
        if root is None:
            raise InputError("file has no content (only comments?); expected a YAML mapping of keys", file, 1)
        return _Converter(loader, file).convert(root)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else 1
        what = exc.problem or "syntax error"
        if exc.context:
            opened = exc.context_mark.line + 1 if exc.context_mark is not None else None
            where = f" started at line {opened}" if opened is not None and opened != line else ""
            what = f"{what} ({exc.context}{where})"
        raise InputError(f"not valid YAML: {what}", file, line) from None
    except yaml.reader.ReaderError as exc:
        raise InputError(
            f"character U+{int(exc.character):04X} is not allowed in YAML text; remove it",
            file,
            _line_of(text, exc.position),
        ) from None
    except yaml.YAMLError as exc:
        raise InputError(f"not valid YAML: {' '.join(str(exc).split())}", file, 1) from None
    finally:
        if loader is not None:
            loader.dispose()


def parse_bytes(data: bytes, file: str) -> YNode:
    """Decode and parse a file's bytes; every problem is an InputError at its file and line."""
    return parse_text(decode(data, file), file)


def read_file(path: str | Path, file: str | None = None) -> tuple[str, YNode]:
    """Read and parse a YAML file, refusing over-large files before reading them whole.

    Returns the decoded text and the tree. ``file`` is the name used in messages (default: ``path``).
    """
    shown = str(path) if file is None else file
    try:
        with open(path, "rb") as handle:
            data = handle.read(MAX_BYTES + 1)
            if len(data) > MAX_BYTES:
                data += handle.read()
    except IsADirectoryError:
        raise InputError("is a directory; expected a YAML file", shown, 1) from None
    except OSError as exc:
        raise InputError(f"cannot read the file: {exc.strerror}", shown, 1) from None
    text = decode(data, shown)
    return text, parse_text(text, shown)


def to_plain(node: YNode) -> Any:
    """The tree as plain Python data (dicts, lists, scalars), lines dropped."""
    if isinstance(node, YScalar):
        return node.value
    if isinstance(node, YSeq):
        return [to_plain(item) for item in node.items]
    return {e.key: to_plain(e.value) for e in node.entries}


def merge(base: YNode, override: YNode) -> YNode:
    """Deep-merge two trees: mappings merge key by key, anything else in ``override`` replaces.

    Each value keeps the file and line where it was written, so errors point at the right file.
    """
    if not (isinstance(base, YMap) and isinstance(override, YMap)):
        return override
    entries = {e.key: e for e in base.entries}
    order = list(base.keys())
    for e in override.entries:
        if e.key in entries:
            old = entries[e.key]
            entries[e.key] = YEntry(e.key, e.key_line, merge(old.value, e.value))
        else:
            entries[e.key] = e
            order.append(e.key)
    return YMap(tuple(entries[k] for k in order), override.line, override.file)


class _Dumper(yaml.SafeDumper):
    """SafeDumper that quotes text this module would read back as a number (``1e-3``)."""

    def represent_str(self, data: str) -> yaml.ScalarNode:
        if _EXPONENT_FLOAT.match(data):
            return self.represent_scalar(_TAG + "str", data, style="'")
        return super().represent_str(data)


_Dumper.add_representer(str, _Dumper.represent_str)


def dump_plain(data: Any) -> str:
    """Render plain data as YAML (flow style for innermost collections) that reads back to the same data."""
    return yaml.dump(
        data, Dumper=_Dumper, sort_keys=False, default_flow_style=None, allow_unicode=True, width=100
    )
