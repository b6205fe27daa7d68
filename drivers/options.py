"""Bench options of the VISA and serial driver families: schema, defaults, and validation."""

from __future__ import annotations

import dataclasses
import math
import re
import string
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Callable, Mapping

from lightloom.sequencer.model.checks import finite_number, is_flag, is_text, one_of, within
from lightloom.sequencer.model.suggest import suggestion
from lightloom.sequencer.model.vocabulary import IDENTITY_WORD, MESSAGE_FAMILIES, MESSAGE_KINDS

FAMILIES = MESSAGE_FAMILIES
"""The families this package implements (``sim`` devices live with the simulators)."""

# The simulated instruments' command set (served by simulators/scpi_server.py): a bench for them needs no `commands`.
DEFAULT_COMMANDS: Mapping[str, Mapping[str, str | None]] = MappingProxyType(
    {
        "rotation_stage": {
            "move": "ANGL {angle_deg:.4f}",
            "position": "ANGL?",
            "busy": "BUSY?",
            "home": "HOME",
            "limits": "LIM?",
            "speed": "SPD?",
        },
        "actuator": {
            "set_state": "STATE {state}",
            "state": "STATE?",
            "busy": "BUSY?",
            "states": "STATES?",
        },
        "shutter": {"open": "SHUT OPEN", "close": "SHUT CLOSE", "state": "SHUT?"},
        "power_meter": {
            "read": "MEAS?",
            "set_integration": "INT {integration_s:g}",
            "set_wavelength": "WAV {wavelength_nm:g}",
            "set_range": "RANGE {range_w:g}",
            "auto_range": "RANGE AUTO",
            "zero": "ZERO",
        },
        "photon_counter": {"read": "COUNT?", "set_gate": "GATE {gate_s:g}"},
    }
)

# The value each operation's template must contain, with a sample used to try the format spec.
COMMAND_FIELDS: Mapping[str, tuple[str, Any]] = MappingProxyType(
    {
        "move": ("angle_deg", 12.5),
        "set_state": ("state", "in"),
        "set_integration": ("integration_s", 0.1),
        "set_wavelength": ("wavelength_nm", 808.0),
        "set_range": ("range_w", 1e-3),
        "set_gate": ("gate_s", 0.1),
    }
)

# Operations whose reply is parsed; reply_scale and reply_pattern may name these.
QUERY_OPERATIONS = frozenset({"position", "busy", "limits", "speed", "state", "states", "read"})

# Limits keys a bench may give a rotation stage. Acceleration is accepted for the motion
# estimate of the dry-run; the driver itself does not need it.
STAGE_LIMIT_KEYS = (
    "min_deg",
    "max_deg",
    "travel_deg",
    "speed_deg_per_s",
    "acceleration_deg_per_s2",
    "backlash_deg",
)
# An actuator's limits are the states the bench allows it to take.
ACTUATOR_LIMIT_KEYS = ("states",)


class DriverConfigError(ValueError):
    """A bad driver name, address, option or limit in a bench.

    ``key`` is the dotted path of the offending entry below the device (``"options.timeout_s"``,
    ``"options.commands.move"``, ``"limits.min_deg"``, ``"driver"``, ``"address"``), so the bench
    loader can point at its line; ``message`` says what is wrong and what is expected.
    """

    def __init__(self, message: str, key: str | None = None) -> None:
        self.message = message
        self.key = key
        super().__init__(message)

    @property
    def path(self) -> tuple[str, ...]:
        """``key`` split into its parts; empty when the error is not about one entry."""
        return tuple(self.key.split(".")) if self.key else ()


@dataclass(frozen=True)
class LineSettings:
    """How to talk to the instrument: terminations, timeout, encoding and line parameters."""

    read_termination: str
    write_termination: str
    timeout_s: float
    encoding: str
    visa_library: str = "@py"
    baud_rate: int | None = None
    data_bits: int | None = None
    parity: str | None = None
    stop_bits: float | None = None
    flow_control: str | None = None


@dataclass(frozen=True)
class DeviceConfig:
    """Everything a template-driven device needs, validated; built by ``parse_config``."""

    driver: str
    kind: str
    line: LineSettings
    identity: str | None
    idn_query: str
    error_query: str | None
    check_errors: bool
    opc_query: str | None
    init_commands: tuple[str, ...]
    commands: Mapping[str, str | None]
    fields: Mapping[str, Any]
    reply_scale: Mapping[str, float]
    reply_pattern: Mapping[str, re.Pattern[str]]
    poll_interval_s: float
    settle_s: float
    kind_options: Mapping[str, Any] = field(default_factory=lambda: MappingProxyType({}))
    limits: Mapping[str, Any] = field(default_factory=lambda: MappingProxyType({}))


# ---- value checks: each takes the dotted key and the value, returns the normalised value ----


def _fail(key: str, expected: str, value: Any) -> DriverConfigError:
    return DriverConfigError(f"{key} must be {expected}, got {value!r}", key)


def _number(key: str, value: Any) -> float:
    number = finite_number(value)
    if number is None:
        raise _fail(key, "a finite number", value)
    return number


def _positive(key: str, value: Any) -> float:
    number = _number(key, value)
    if not within(number, gt=0):
        raise _fail(key, "a number > 0", value)
    return number


def _non_negative(key: str, value: Any) -> float:
    number = _number(key, value)
    if not within(number, ge=0):
        raise _fail(key, "a number >= 0", value)
    return number


def _optional_positive(key: str, value: Any) -> float | None:
    return None if value is None else _positive(key, value)


def _text(key: str, value: Any) -> str:
    if not is_text(value, allow_empty=True) or not value:
        raise _fail(key, "a non-empty string", value)
    return value


def _optional_text(key: str, value: Any) -> str | None:
    return None if value is None else _text(key, value)


def _flag(key: str, value: Any) -> bool:
    if not is_flag(value):
        raise _fail(key, "true or false", value)
    return value


def _termination(key: str, value: Any) -> str:
    text = _text(key, value)
    if text not in ("\n", "\r", "\r\n"):
        raise _fail(key, 'one of "\\n", "\\r", "\\r\\n"', value)
    return text


def _encoding(key: str, value: Any) -> str:
    text = _text(key, value)
    try:
        "".encode(text)
    except LookupError:
        raise _fail(key, "a text encoding such as 'ascii' or 'latin-1'", value) from None
    return text


def _string_list(key: str, value: Any) -> tuple[str, ...]:
    if isinstance(value, str) or not isinstance(value, (list, tuple)):
        raise _fail(key, "a list of strings", value)
    return tuple(_text(f"{key}[{i}]", item) for i, item in enumerate(value))


def _optional_string_list(key: str, value: Any) -> tuple[str, ...] | None:
    return None if value is None else _string_list(key, value)


def _string_map(key: str, value: Any) -> Mapping[str, str]:
    if not isinstance(value, Mapping):
        raise _fail(key, "a mapping of names to strings", value)
    return MappingProxyType(
        {_text(key, k): _text(f"{key}.{k}", v) for k, v in value.items()}
    )


def _fields(key: str, value: Any) -> Mapping[str, Any]:
    if not isinstance(value, Mapping):
        raise _fail(key, "a mapping of template field names to numbers or strings", value)
    out: dict[str, Any] = {}
    for name, item in value.items():
        if not isinstance(name, str) or not name.isidentifier():
            raise _fail(key, "a mapping whose keys are identifiers", name)
        if isinstance(item, bool) or not isinstance(item, (int, float, str)):
            raise _fail(f"{key}.{name}", "a number or a string", item)
        out[name] = item
    return MappingProxyType(out)


def _choice(*allowed: Any) -> Callable[[str, Any], Any]:
    def check(key: str, value: Any) -> Any:
        if value is None:
            return None
        if not one_of(value, allowed):
            raise _fail(key, "one of " + ", ".join(repr(a) for a in allowed), value)
        return value

    return check


def _optional_baud(key: str, value: Any) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or not within(value, gt=0):
        raise _fail(key, "a positive integer (bits per second)", value)
    return value


@dataclass(frozen=True)
class _Option:
    default: Any
    check: Callable[[str, Any], Any]


_COMMON: Mapping[str, _Option] = {
    "read_termination": _Option("\n", _termination),
    "write_termination": _Option("\n", _termination),
    "timeout_s": _Option(2.0, _positive),
    "encoding": _Option("ascii", _encoding),
    "identity": _Option(None, _optional_text),  # default set per kind in option_defaults
    "idn_query": _Option("*IDN?", _text),
    "error_query": _Option("SYST:ERR?", _optional_text),
    "check_errors": _Option(False, _flag),
    "opc_query": _Option("*OPC?", _optional_text),
    "init_commands": _Option((), _string_list),
    "commands": _Option(None, lambda key, value: value),  # checked by _commands
    "fields": _Option(MappingProxyType({}), _fields),
    "reply_scale": _Option(None, lambda key, value: value),  # checked by _per_query
    "reply_pattern": _Option(None, lambda key, value: value),  # checked by _per_query
    "poll_interval_s": _Option(0.02, _positive),
    "settle_s": _Option(0.0, _non_negative),
}

_LINE = {
    "baud_rate": _optional_baud,
    "data_bits": _choice(5, 6, 7, 8),
    "parity": _choice("none", "even", "odd", "mark", "space"),
    "stop_bits": _choice(1, 1.5, 2),
    "flow_control": _choice("none", "xonxoff", "rtscts", "dsrdtr"),
}

_FAMILY: Mapping[str, Mapping[str, _Option]] = {
    # On VISA the line parameters apply to serial (ASRL) resources only, and only when given.
    "visa": {"visa_library": _Option("@py", _text)}
    | {name: _Option(None, check) for name, check in _LINE.items()},
    "serial": {
        "baud_rate": _Option(9600, _optional_baud),
        "data_bits": _Option(8, _LINE["data_bits"]),
        "parity": _Option("none", _LINE["parity"]),
        "stop_bits": _Option(1, _LINE["stop_bits"]),
        "flow_control": _Option("none", _LINE["flow_control"]),
    },
}

_KIND: Mapping[str, Mapping[str, _Option]] = {
    "rotation_stage": {
        "home_timeout_s": _Option(60.0, _positive),
        "backlash_deg": _Option(0.0, _non_negative),
    },
    "actuator": {
        "states": _Option(None, _optional_string_list),
        "state_map": _Option(MappingProxyType({}), _string_map),
    },
    "shutter": {
        "open_reply": _Option("OPEN", _text),
        "closed_reply": _Option("CLOSED", _text),
        "verify": _Option(True, _flag),
    },
    "power_meter": {"wavelength_nm": _Option(None, _optional_positive)},
    "photon_counter": {},
}


def split_driver(driver: str) -> tuple[str, str]:
    """Split ``"visa.rotation_stage"`` into ``("visa", "rotation_stage")``, or raise."""
    family, _, kind = driver.partition(".") if isinstance(driver, str) else ("", "", "")
    if family not in FAMILIES or kind not in MESSAGE_KINDS:
        names = [f"{f}.{k}" for f in FAMILIES for k in MESSAGE_KINDS]
        raise DriverConfigError(
            f"unknown driver {driver!r}{_nearest(str(driver), names)}; "
            f"the message-based drivers are {', '.join(names)}",
            "driver",
        )
    return family, kind


def option_defaults(driver: str) -> Mapping[str, Any]:
    """Every option key a ``visa.<kind>`` or ``serial.<kind>`` driver accepts, with its default."""
    family, kind = split_driver(driver)
    table = {name: option.default for name, option in _schema(family, kind).items()}
    table["identity"] = f"lightloom,SIM-{IDENTITY_WORD[kind]}"
    table["commands"] = MappingProxyType(dict(DEFAULT_COMMANDS[kind]))
    table["reply_scale"] = 1.0
    return MappingProxyType(table)


def check_options(
    kind_family: str, options: Mapping[str, Any], states: tuple[str, ...] | list[str] | None = None
) -> None:
    """Validate a device's ``options`` for driver ``kind_family`` (e.g. ``"serial.shutter"``).

    ``states``: an actuator's states as the bench gives them beside its options (then the options
    need not name them).

    Raises
    ------
    DriverConfigError
        With ``key`` the dotted path of the first bad entry and the nearest valid name for a
        misspelt key.
    """
    family, kind = split_driver(kind_family)
    _parse(family, kind, options, {"states": list(states)} if kind == "actuator" and states else None)


def check_limits(kind_family: str, limits: Mapping[str, Any] | None) -> None:
    """Validate a device's ``limits`` (a mapping or a dataclass) for driver ``kind_family``.

    A rotation stage takes min_deg, max_deg (or travel_deg: [min, max]), speed_deg_per_s,
    acceleration_deg_per_s2 and backlash_deg; an actuator takes states; other kinds none.
    Raises DriverConfigError.
    """
    _, kind = split_driver(kind_family)
    _limits(kind, limits)


def parse_config(
    driver: str, options: Mapping[str, Any] | None, limits: Mapping[str, Any] | None
) -> DeviceConfig:
    """Validate ``options`` and ``limits`` and return the device's frozen configuration."""
    family, kind = split_driver(driver)
    return _parse(family, kind, options or {}, limits)


def _schema(family: str, kind: str) -> dict[str, _Option]:
    return {**_COMMON, **_FAMILY[family], **_KIND[kind]}


def _nearest(key: str, valid: list[str] | tuple[str, ...]) -> str:
    return suggestion(key, valid, cutoff=0.5)


def _parse(
    family: str, kind: str, options: Mapping[str, Any], limits: Mapping[str, Any] | None
) -> DeviceConfig:
    driver = f"{family}.{kind}"
    if not isinstance(options, Mapping):
        raise DriverConfigError(f"options of a {driver} device must be a mapping", "options")
    schema = _schema(family, kind)
    for key in options:
        if key not in schema:
            raise DriverConfigError(
                f"unknown option {key!r} for driver {driver}{_nearest(str(key), list(schema))} "
                f"(valid: {', '.join(sorted(schema))})",
                f"options.{key}",
            )
    values = {
        name: option.check(f"options.{name}", options[name]) if name in options else option.default
        for name, option in schema.items()
    }
    if "identity" not in options:
        values["identity"] = f"lightloom,SIM-{IDENTITY_WORD[kind]}"
    fields = values["fields"]
    parsed_limits = _limits(kind, limits)
    commands = _commands(kind, options.get("commands"), fields)
    reply_scale = _per_query(kind, "reply_scale", options.get("reply_scale"), _scale)
    reply_pattern = _per_query(kind, "reply_pattern", options.get("reply_pattern"), _regex)
    if values["check_errors"] and values["error_query"] is None:
        raise DriverConfigError(
            "check_errors is true but error_query is null: give the error query (e.g. 'SYST:ERR?')",
            "options.check_errors",
        )
    if kind in ("rotation_stage", "actuator") and commands["busy"] is None and (
        values["opc_query"] is None
    ):
        raise DriverConfigError(
            f"a {kind} needs commands.busy or opc_query to know when it has stopped; "
            "both are null",
            "options.commands.busy",
        )
    if kind == "shutter" and values["verify"] and commands["state"] is None:
        raise DriverConfigError(
            "verify is true but commands.state is null: give the shutter's state query, "
            "or set verify: false",
            "options.verify",
        )
    if (
        kind == "actuator"
        and values["states"] is None
        and commands["states"] is None
        and "states" not in parsed_limits
    ):
        raise DriverConfigError(
            "an actuator needs its states: give the bench's states, options.states or "
            "commands.states",
            "options.states",
        )
    line = LineSettings(
        read_termination=values["read_termination"],
        write_termination=values["write_termination"],
        timeout_s=values["timeout_s"],
        encoding=values["encoding"],
        visa_library=values.get("visa_library", "@py"),
        baud_rate=values["baud_rate"],
        data_bits=values["data_bits"],
        parity=values["parity"],
        stop_bits=values["stop_bits"],
        flow_control=values["flow_control"],
    )
    kind_options = MappingProxyType({name: values[name] for name in _KIND[kind]})
    return DeviceConfig(
        driver=driver,
        kind=kind,
        line=line,
        identity=values["identity"],
        idn_query=values["idn_query"],
        error_query=values["error_query"],
        check_errors=values["check_errors"],
        opc_query=values["opc_query"],
        init_commands=values["init_commands"],
        commands=commands,
        fields=fields,
        reply_scale=reply_scale,
        reply_pattern=reply_pattern,
        poll_interval_s=values["poll_interval_s"],
        settle_s=values["settle_s"],
        kind_options=kind_options,
        limits=parsed_limits,
    )


def _commands(kind: str, given: Any, fields: Mapping[str, Any]) -> Mapping[str, str | None]:
    defaults = DEFAULT_COMMANDS[kind]
    if given is None:
        given = {}
    if not isinstance(given, Mapping):
        raise _fail("options.commands", "a mapping of operation names to command templates", given)
    merged = dict(defaults)
    for op, template in given.items():
        key = f"options.commands.{op}"
        if op not in defaults:
            raise DriverConfigError(
                f"unknown command {op!r} for a {kind}{_nearest(str(op), list(defaults))} "
                f"(valid: {', '.join(defaults)})",
                key,
            )
        if template is not None:
            _check_template(key, op, _text(key, template), fields)
        merged[op] = template
    return MappingProxyType(merged)


def _check_template(key: str, op: str, template: str, fields: Mapping[str, Any]) -> None:
    needed = COMMAND_FIELDS.get(op)
    allowed = dict(fields)
    if needed is not None:
        allowed[needed[0]] = needed[1]
    try:
        names = {name for _, name, _, _ in string.Formatter().parse(template) if name is not None}
    except ValueError as error:
        raise DriverConfigError(f"{key}: bad template {template!r}: {error}", key) from None
    for name in names:
        if name not in allowed:
            hint = _nearest(name, list(allowed))
            usable = ", ".join(f"{{{n}}}" for n in allowed) or "none"
            raise DriverConfigError(
                f"{key}: template {template!r} uses unknown field {{{name}}}{hint} "
                f"(usable here: {usable}; add constants under options.fields)",
                key,
            )
    if needed is not None and needed[0] not in names:
        raise DriverConfigError(
            f"{key}: template {template!r} must contain {{{needed[0]}}}", key
        )
    try:
        template.format(**allowed)
    except (ValueError, IndexError, KeyError) as error:
        raise DriverConfigError(f"{key}: template {template!r} cannot be filled: {error}", key)


def _scale(key: str, value: Any) -> float:
    number = _number(key, value)
    if number == 0:
        raise _fail(key, "a non-zero number", value)
    return number


def _regex(key: str, value: Any) -> re.Pattern[str]:
    text = _text(key, value)
    try:
        pattern = re.compile(text)
    except re.error as error:
        raise DriverConfigError(f"{key}: {text!r} is not a valid regular expression: {error}", key)
    if pattern.groups != 1:
        raise DriverConfigError(
            f"{key}: {text!r} must have exactly one group (...) around the value, "
            f"it has {pattern.groups}",
            key,
        )
    return pattern


def _per_query(
    kind: str,
    option: str,
    given: Any,
    check: Callable[[str, Any], Any],
) -> Mapping[str, Any]:
    """A value for every query operation of ``kind``, from one value or a per-operation map."""
    queries = [op for op in DEFAULT_COMMANDS[kind] if op in QUERY_OPERATIONS]
    key = f"options.{option}"
    if given is None:
        return MappingProxyType({})
    if isinstance(given, Mapping):
        out = {}
        for op, value in given.items():
            if op not in queries:
                raise DriverConfigError(
                    f"{key}: {op!r} is not a query of a {kind}{_nearest(str(op), queries)} "
                    f"(queries: {', '.join(queries)})",
                    f"{key}.{op}",
                )
            out[op] = check(f"{key}.{op}", value)
        return MappingProxyType(out)
    value = check(key, given)
    return MappingProxyType({op: value for op in queries})


def _limits(kind: str, limits: Any) -> Mapping[str, Any]:
    if limits is None:
        return MappingProxyType({})
    if dataclasses.is_dataclass(limits) and not isinstance(limits, type):
        limits = dataclasses.asdict(limits)
    if not isinstance(limits, Mapping):
        raise DriverConfigError(f"limits of a {kind} must be a mapping", "limits")
    valid = {"rotation_stage": STAGE_LIMIT_KEYS, "actuator": ACTUATOR_LIMIT_KEYS}.get(kind, ())
    out: dict[str, Any] = {}
    for key, value in limits.items():
        path = f"limits.{key}"
        if key not in valid:
            listed = ", ".join(valid) if valid else "none"
            raise DriverConfigError(
                f"unknown limit {key!r} for a {kind}{_nearest(str(key), valid)} (valid: {listed})",
                path,
            )
        if key == "travel_deg":
            if isinstance(value, (str, bytes)) or not isinstance(value, (list, tuple)) or len(
                value
            ) != 2:
                raise _fail(path, "a list [min_deg, max_deg]", value)
            out[key] = (_number(f"{path}[0]", value[0]), _number(f"{path}[1]", value[1]))
        elif key == "states":
            out[key] = _string_list(path, value)
            if not out[key]:
                raise _fail(path, "a non-empty list of state names", value)
        elif key in ("min_deg", "max_deg"):
            out[key] = _number(path, value)
        elif key == "backlash_deg":
            out[key] = _non_negative(path, value)
        else:
            out[key] = _positive(path, value)
    if "travel_deg" in out and ("min_deg" in out or "max_deg" in out):
        raise DriverConfigError(
            "give either travel_deg or min_deg/max_deg, not both", "limits.travel_deg"
        )
    if "travel_deg" in out:
        out["min_deg"], out["max_deg"] = out.pop("travel_deg")
    if out.get("min_deg", -math.inf) >= out.get("max_deg", math.inf):
        raise DriverConfigError(
            f"limits.min_deg ({out['min_deg']:g}) must be below limits.max_deg "
            f"({out['max_deg']:g})",
            "limits.min_deg",
        )
    return MappingProxyType(out)
