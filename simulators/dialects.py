"""Instrument dialects for the served simulators: an instrument's command set as data (command
templates, reply formats, line ending, identity) and the interpreter that speaks it.

A dialect file describes what one kind of instrument accepts and answers, in the operation names
the drivers use (``move``, ``position``, ``read``, ...), so the same templates written in a bench's
``options.commands`` reach it. The built-in dialects live in ``simulators/dialect_files/*.yaml``; any
other YAML file with the same keys can be given by path. The keys are documented in
docs/instruments.md.
"""

from __future__ import annotations

import math
import re
import string
import threading
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from types import MappingProxyType
from typing import Any, Callable, Mapping

import yaml

from lightloom.drivers.errors import DeviceFault, InstrumentError, LimitViolation
from lightloom.drivers.options import COMMAND_FIELDS, DEFAULT_COMMANDS, QUERY_OPERATIONS
from lightloom.simulators.devices import IDENTITY_WORD, SimDevice

TERMINATIONS = ("\n", "\r", "\r\n")
# What each query operation's reply holds by default ({value}; {low}/{high} for limits).
DEFAULT_REPLIES: Mapping[str, str] = MappingProxyType({
    "position": "{value:.6f}",
    "busy": "{value}",
    "limits": "{low:g},{high:g}",
    "speed": "{value:g}",
    "state": "{value}",
    "states": "{value}",
    "read": "{value:.6e}",
})
_NUMBER = r"([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)"
_WORD = r"(\S+)"
_KEYS = (
    "dialect", "kind", "description", "termination", "identity", "identity_query", "error_query",
    "opc_query", "reset", "accepts", "commands", "replies", "scale", "flag_words", "state_words",
    "state_map",
)


class DialectError(ValueError):
    """A dialect file that cannot be used; the message names the file and the key."""


@dataclass(frozen=True)
class Dialect:
    """One instrument's command set, validated (see the module docstring and docs/instruments.md).

    ``commands`` maps the drivers' operation names to the instrument's templates (None: the
    instrument has no such command); ``replies`` maps query operations to reply formats;
    ``scale`` multiplies SI values (W, deg, s) into the instrument's units in replies.
    """

    name: str
    kind: str
    description: str
    termination: str
    identity: str
    identity_query: str
    error_query: str | None
    opc_query: str | None
    reset: str | None
    accepts: tuple[str, ...]
    commands: Mapping[str, str | None]
    replies: Mapping[str, str]
    scale: Mapping[str, float]
    flag_words: tuple[str, str]
    state_words: tuple[str, str]
    state_map: Mapping[str, str] = field(default_factory=lambda: MappingProxyType({}))


def builtin_dialects() -> tuple[str, ...]:
    """Names of the dialects shipped with lightloom."""
    folder = resources.files("lightloom.simulators.dialect_files")
    return tuple(sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".yaml")))


def load_dialect(name_or_path: str | Path) -> Dialect:
    """A dialect by built-in name (``scpi-power-meter``) or YAML path. Raises DialectError."""
    text = str(name_or_path)
    if text in builtin_dialects():
        source = resources.files("lightloom.simulators.dialect_files") / f"{text}.yaml"
        return parse_dialect(source.read_text(encoding="utf-8"), f"dialect {text}")
    path = Path(text)
    if not path.is_file():
        raise DialectError(
            f"{text}: no such dialect file, and not a built-in dialect "
            f"({', '.join(builtin_dialects())})"
        )
    return parse_dialect(path.read_text(encoding="utf-8"), str(path))


def parse_dialect(text: str, where: str) -> Dialect:
    """Validate a dialect's YAML text; ``where`` names it in messages. Raises DialectError."""
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise DialectError(f"{where}: not valid YAML ({' '.join(str(exc).split())})") from None
    if not isinstance(data, Mapping):
        raise DialectError(f"{where}: expected a mapping with keys {', '.join(_KEYS)}")
    unknown = sorted(set(map(str, data)) - set(_KEYS))
    if unknown:
        raise DialectError(f"{where}: unknown key {unknown[0]!r}; expected some of {', '.join(_KEYS)}")

    def text_of(key: str, default: Any = ..., allow_none: bool = False) -> Any:
        value = data.get(key, default)
        if value is ...:
            raise DialectError(f"{where}: {key} is missing")
        if value is None and allow_none:
            return None
        if not isinstance(value, str) or not value:
            raise DialectError(f"{where}: {key} must be a non-empty string, got {value!r}")
        return value

    kind = text_of("kind")
    if kind not in DEFAULT_COMMANDS:
        raise DialectError(f"{where}: kind must be one of {', '.join(DEFAULT_COMMANDS)}, got {kind!r}")
    termination = text_of("termination", "\n")
    if termination not in TERMINATIONS:
        raise DialectError(f"{where}: termination must be one of \"\\n\", \"\\r\", \"\\r\\n\", got {termination!r}")
    ops = DEFAULT_COMMANDS[kind]
    commands = _mapping(data, "commands", where)
    for op in commands:
        if op not in ops:
            raise DialectError(f"{where}: commands.{op}: a {kind} has no operation {op!r} ({', '.join(ops)})")
    merged: dict[str, str | None] = {op: commands.get(op) for op in ops}
    for op, template in merged.items():
        if template is not None:
            _check_template(where, op, template)
    replies = _mapping(data, "replies", where)
    for op, fmt in replies.items():
        if op not in ops or op not in QUERY_OPERATIONS:
            raise DialectError(f"{where}: replies.{op}: not a query of a {kind}")
        if not isinstance(fmt, str):
            raise DialectError(f"{where}: replies.{op} must be a string")
    scale = _mapping(data, "scale", where)
    for op, factor in scale.items():
        if isinstance(factor, bool) or not isinstance(factor, (int, float)) or not math.isfinite(factor) or factor == 0:
            raise DialectError(f"{where}: scale.{op} must be a finite non-zero number, got {factor!r}")
    flags = _pair(data, "flag_words", ("1", "0"), where)
    words = _pair(data, "state_words", ("OPEN", "CLOSED"), where)
    state_map = _mapping(data, "state_map", where)
    accepts = data.get("accepts", []) or []
    if not isinstance(accepts, list) or not all(isinstance(a, str) and a for a in accepts):
        raise DialectError(f"{where}: accepts must be a list of command strings")
    return Dialect(
        name=text_of("dialect"),
        kind=kind,
        description=str(data.get("description", "")),
        termination=termination,
        identity=text_of("identity"),
        identity_query=text_of("identity_query", "*IDN?"),
        error_query=text_of("error_query", None, allow_none=True),
        opc_query=text_of("opc_query", None, allow_none=True),
        reset=text_of("reset", None, allow_none=True),
        accepts=tuple(accepts),
        commands=MappingProxyType(merged),
        replies=MappingProxyType({**{op: DEFAULT_REPLIES[op] for op in ops if op in DEFAULT_REPLIES}, **replies}),
        scale=MappingProxyType({op: float(f) for op, f in scale.items()}),
        flag_words=flags,
        state_words=words,
        state_map=MappingProxyType({str(k): str(v) for k, v in state_map.items()}),
    )


def _mapping(data: Mapping[str, Any], key: str, where: str) -> Mapping[str, Any]:
    value = data.get(key) or {}
    if not isinstance(value, Mapping):
        raise DialectError(f"{where}: {key} must be a mapping")
    return value


def _pair(data: Mapping[str, Any], key: str, default: tuple[str, str], where: str) -> tuple[str, str]:
    value = data.get(key, list(default))
    if not (isinstance(value, list) and len(value) == 2 and all(isinstance(v, str) and v for v in value)):
        raise DialectError(f"{where}: {key} must be two words [yes, no], got {value!r}")
    return value[0], value[1]


def _check_template(where: str, op: str, template: str) -> None:
    try:
        names = [name for _, name, _, _ in string.Formatter().parse(template) if name is not None]
    except ValueError as exc:
        raise DialectError(f"{where}: commands.{op}: bad template {template!r}: {exc}") from None
    needed = COMMAND_FIELDS.get(op)
    expected = [needed[0]] if needed else []
    if names != expected:
        want = f"exactly one field {{{needed[0]}}}" if needed else "no field"
        raise DialectError(f"{where}: commands.{op}: template {template!r} must hold {want}")


def command_regex(template: str) -> re.Pattern[str]:
    """The lines a template accepts: its literal text (case and runs of blanks free) with the
    field as a number, or as one word for ``{state}``."""
    parts = []
    for literal, name, _, _ in string.Formatter().parse(template):
        parts.append(r"\s+".join(re.escape(piece) for piece in literal.split(" ")) if literal else "")
        if name is not None:
            parts.append(_WORD if name == "state" else _NUMBER)
    return re.compile("".join(parts), re.IGNORECASE)


class _Refused(Exception):
    def __init__(self, code: int, detail: str) -> None:
        super().__init__(detail)
        self.code = code


@dataclass(frozen=True)
class DialectResult:
    """The outcome of one command: the reply line (None for none) and the error code it pushed."""

    reply: str | None
    error: int | None = None


class DialectInstrument:
    """A simulated device speaking ``dialect``: matches each line against the dialect's templates,
    acts on the device, formats the reply. Errors go to a queue read by ``error_query`` (when the
    dialect has one) as ``code,"text"``; a refused command has no reply."""

    def __init__(self, device: SimDevice, dialect: Dialect, *, opc_timeout_s: float = 60.0) -> None:
        if device.kind != IDENTITY_WORD[dialect.kind]:
            raise ValueError(
                f"device {device.name!r} is a {device.kind}; dialect {dialect.name!r} is for a {dialect.kind}"
            )
        self.device = device
        self.dialect = dialect
        self.opc_timeout_s = float(opc_timeout_s)
        self.lock = threading.Lock()
        self._errors: list[tuple[int, str]] = []
        self._from_bench = dict(dialect.state_map)
        self._to_bench = {v.casefold(): k for k, v in dialect.state_map.items()}
        self._table: list[tuple[re.Pattern[str], str, Callable[[str], str | None]]] = []
        fixed = {
            dialect.identity_query: ("identity", lambda _: dialect.identity.format(name=device.name)),
        }
        if dialect.error_query:
            fixed[dialect.error_query] = ("error", lambda _: self._pop_error())
        if dialect.opc_query:
            fixed[dialect.opc_query] = ("opc", lambda _: self._wait_complete())
        if dialect.reset:
            fixed[dialect.reset] = ("reset", lambda _: self._reset())
        for line in dialect.accepts:
            fixed[line] = ("accepted", lambda _: None)
        for line, (op, act) in fixed.items():
            self._table.append((re.compile(re.escape(line), re.IGNORECASE), op, act))
        handlers = self._handlers()
        for op, template in dialect.commands.items():
            if template is not None:
                self._table.append((command_regex(template), op, handlers[op]))

    @property
    def error_codes(self) -> tuple[int, ...]:
        """Codes waiting in the error queue, oldest first."""
        return tuple(code for code, _ in self._errors)

    def is_query(self, line: str) -> bool:
        """Whether ``line`` asks for a reply (for the served link faults)."""
        op = self._match(line)[0]
        return op in QUERY_OPERATIONS or op in ("identity", "error", "opc")

    def execute(self, line: str, stop: threading.Event | None = None) -> DialectResult:
        """Run one command line."""
        del stop  # the dialect's operation-complete query waits on the virtual clock only
        op, handler, arg = self._match(line)
        try:
            if handler is None:
                raise _Refused(-113, f"not understood: {line[:40]!r}")
            return DialectResult(handler(arg))
        except _Refused as exc:
            self._push(exc.code, str(exc))
            return DialectResult(None, exc.code)
        except (LimitViolation, ValueError) as exc:
            self._push(-222, _short(exc))
            return DialectResult(None, -222)
        except (DeviceFault, InstrumentError) as exc:
            self._push(-240, _short(exc))
            return DialectResult(None, -240)

    def _match(self, line: str) -> tuple[str | None, Callable[[str], str | None] | None, str]:
        text = " ".join(line.split())
        for pattern, op, handler in self._table:
            m = pattern.fullmatch(text)
            if m is not None:
                return op, handler, (m.group(1) if m.groups() else "")
        return None, None, ""

    def _push(self, code: int, text: str) -> None:
        if len(self._errors) < 16:
            self._errors.append((code, text.replace('"', "'")))

    def _pop_error(self) -> str:
        code, text = self._errors.pop(0) if self._errors else (0, "No error")
        return f'{code},"{text}"'

    def _reset(self) -> None:
        self.device.reset()
        self._errors.clear()

    def _wait_complete(self) -> str | None:
        pending = self.device.pending_s()
        if pending > self.opc_timeout_s:
            self._push(-240, f"operation not complete after {self.opc_timeout_s:g} s")
            return None
        self.device.clock.sleep(max(pending, 0.0))
        return "1"

    def _reply(self, op: str, **values: Any) -> str:
        factor = self.dialect.scale.get(op, 1.0)
        scaled = {k: v * factor if isinstance(v, float) else v for k, v in values.items()}
        return self.dialect.replies[op].format(**scaled)

    def _flag(self, op: str, value: bool) -> str:
        return self._reply(op, value=self.dialect.flag_words[0 if value else 1])

    def _handlers(self) -> dict[str, Callable[[str], str | None]]:
        dev: Any = self.device
        kind = self.dialect.kind
        if kind == "rotation_stage":
            return {
                "move": lambda a: dev.move_to_deg(_real(a)),
                "position": lambda _: self._reply("position", value=float(dev.position_deg())),
                "busy": lambda _: self._flag("busy", dev.is_busy()),
                "home": lambda _: dev.start_home(),
                "limits": lambda _: self._reply("limits", low=float(dev.limits_deg[0]), high=float(dev.limits_deg[1])),
                "speed": lambda _: self._reply("speed", value=float(dev.speed_deg_per_s)),
            }
        if kind == "actuator":
            return {
                "set_state": lambda a: dev.set_state(self._to_bench.get(a.casefold(), a)),
                "state": lambda _: self._reply("state", value=self._from_bench.get(dev.state(), dev.state())),
                "busy": lambda _: self._flag("busy", dev.is_busy()),
                "states": lambda _: self._reply("states", value=",".join(self._from_bench.get(s, s) for s in dev.states)),
            }
        if kind == "shutter":
            return {
                "open": lambda _: dev.open(),
                "close": lambda _: dev.close_beam(),
                "state": lambda _: self._reply("state", value=self.dialect.state_words[0 if dev.is_open() else 1]),
            }
        if kind == "power_meter":
            return {
                "read": lambda _: self._reply("read", value=float(dev.measure_w())),
                "set_integration": lambda a: dev.set_integration_s(_real(a)),
                "set_wavelength": lambda a: dev.set_wavelength_nm(_real(a)),
                "set_range": lambda a: dev.set_range_w(_real(a)),
                "auto_range": lambda _: dev.set_range_w(None),
                "zero": lambda _: dev.zero(),
            }
        return {
            "read": lambda _: self._reply("read", value=int(dev.count())),
            "set_gate": lambda a: dev.set_gate_s(_real(a)),
        }


def _real(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise _Refused(-222, f"not a number: {text!r}") from None
    if not math.isfinite(value):
        raise _Refused(-222, f"not a finite number: {text!r}")
    return value


def _short(exc: Exception) -> str:
    text = exc.message if isinstance(exc, InstrumentError) else str(exc)
    return " ".join(text.split())[:120]


def reply_pattern(fmt: str) -> str | None:
    """A driver ``reply_pattern`` (one group around the value) for reply format ``fmt``, or None
    when the reply is the bare value."""
    pieces = list(string.Formatter().parse(fmt))
    if len(pieces) == 1 and not pieces[0][0] and pieces[0][1] is not None:
        return None
    if not any(name == "value" for _, name, _, _ in pieces):
        return None
    out = []
    for literal, name, _, _ in pieces:
        out.append(re.escape(literal).replace("\\ ", " ") if literal else "")
        if name is not None:
            out.append(r"(\S+)" if name == "value" else r"\S+")
    return "".join(out)


def driver_options(dialect: Dialect, name: str) -> dict[str, Any]:
    """The bench ``options`` with which the lightloom VISA/serial driver speaks ``dialect`` to the
    device ``name`` (the identity check uses the part of the identity before the device name)."""
    options: dict[str, Any] = {
        "read_termination": dialect.termination,
        "write_termination": dialect.termination,
        "timeout_s": 2.0,
        "identity": dialect.identity.split("{", 1)[0].strip(" ,") or dialect.identity.format(name=name),
        "idn_query": dialect.identity_query,
        "error_query": dialect.error_query,
        "check_errors": dialect.error_query is not None,
        "opc_query": dialect.opc_query,
        "commands": dict(dialect.commands),
    }
    patterns = {
        op: p for op, fmt in dialect.replies.items()
        if dialect.commands.get(op) is not None and (p := reply_pattern(fmt)) is not None
    }
    if patterns:
        options["reply_pattern"] = patterns
    if dialect.scale:
        options["reply_scale"] = {op: 1.0 / f for op, f in dialect.scale.items()}
    if dialect.kind == "shutter":
        options["open_reply"], options["closed_reply"] = dialect.state_words
    if dialect.kind == "actuator" and dialect.state_map:
        options["state_map"] = dict(dialect.state_map)
    return options
