"""Template-driven devices: each interface kind mapped onto command templates over a transport."""

from __future__ import annotations

import math
import time
from typing import Any, Callable

from lightloom.drivers.errors import (
    BadReply,
    DeviceFault,
    IdentityMismatch,
    InstrumentTimeout,
    LimitViolation,
    NotSupported,
)
from lightloom.drivers.interfaces import (
    DiscreteActuator,
    PhotonCounter,
    PowerMeter,
    RotationStage,
    Shutter,
)
from lightloom.drivers.options import DeviceConfig
from lightloom.drivers.replies import (
    ReplyError,
    extract,
    parse_count,
    parse_error_entry,
    parse_flag,
    parse_float,
    parse_list,
    parse_pair,
)
from lightloom.drivers.transport import LineTransport

_MAX_QUEUED_ERRORS = 32
_REPLY_HINT = (
    "check options.reply_pattern / reply_scale and that the address is the right instrument"
)


class MessageDevice:
    """What every template-driven device shares: connect with identity check, templated writes
    and queries, reply parsing, the error queue and waiting for motion to end.

    Operations connect on first use; after a transient error the session stays as it is until
    ``reconnect()``.
    """

    def __init__(
        self,
        name: str,
        transport: LineTransport,
        config: DeviceConfig,
        clock: Callable[[], float] = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        self.name = name
        self.transport = transport
        self.config = config
        self._clock = clock
        self._sleep = sleep
        self._connected = False

    # ---- session ----

    def connect(self) -> None:
        if self._connected:
            return
        self.transport.open()
        self._forget()
        try:
            self._check_identity()
            if self.config.check_errors:
                self._drain_error_queue()
            for command in self.config.init_commands:
                self._send(command)
            self._connected = True
            self._on_connect()
        except BaseException:
            self._connected = False
            self.transport.close()
            raise

    def close(self) -> None:
        self._connected = False
        self.transport.close()

    def reconnect(self) -> None:
        self.close()
        self.connect()

    def _on_connect(self) -> None:
        """Kind-specific set-up once the identity is checked (re-applied on every reconnect)."""

    def _forget(self) -> None:
        """Drop cached instrument state: a new session may meet a power-cycled instrument."""

    def _ensure_connected(self) -> None:
        if not self._connected:
            self.connect()

    def _check_identity(self) -> None:
        expected = self.config.identity
        if expected is None:
            return
        reply = self.transport.query_line(self.config.idn_query)
        if expected not in reply:
            raise IdentityMismatch(
                self.name,
                self.config.idn_query,
                f"the instrument at {self.transport.address} answers {reply!r}, "
                f"which does not contain {expected!r}",
                "check the address points at the right instrument, or correct options.identity "
                "(null skips the check)",
            )

    # ---- commands ----

    def _command(self, op: str, **values: Any) -> str:
        template = self.config.commands.get(op)
        if template is None:
            raise NotSupported(
                self.name,
                None,
                f"this {self.config.kind} has no command for {op!r} "
                f"(options.commands.{op} is null)",
                f"give the instrument's command as options.commands.{op} in the bench",
            )
        return template.format(**self.config.fields, **values)

    def _send(self, command: str) -> None:
        self.transport.write_line(command)
        if self.config.check_errors:
            self._raise_queued_errors(command)

    def _write(self, op: str, **values: Any) -> None:
        self._ensure_connected()
        self._send(self._command(op, **values))

    def _query(self, op: str, timeout_s: float | None = None, **values: Any) -> tuple[str, str]:
        """Send the query of ``op``; return (command, reply)."""
        self._ensure_connected()
        command = self._command(op, **values)
        return command, self.transport.query_line(command, timeout_s)

    def _parsed(
        self, op: str, parse: Callable[..., Any], *args: Any, timeout_s: float | None = None
    ) -> Any:
        """Query ``op`` and parse its reply with ``parse(reply, pattern, *args)``."""
        command, reply = self._query(op, timeout_s)
        try:
            return parse(reply, self.config.reply_pattern.get(op), *args)
        except ReplyError as why:
            raise BadReply(
                self.name, command, f"cannot use the reply {reply!r}: {why}", _REPLY_HINT
            ) from None

    def _query_float(self, op: str, timeout_s: float | None = None) -> float:
        scale = self.config.reply_scale.get(op, 1.0)
        return self._parsed(op, parse_float, scale, timeout_s=timeout_s)

    # ---- the error queue (SCPI-99 SYSTem:ERRor) ----

    def _read_error_queue(self) -> list[tuple[int, str]]:
        query = self.config.error_query
        assert query is not None, "parse_config refuses check_errors without error_query"
        entries = []
        for _ in range(_MAX_QUEUED_ERRORS):
            reply = self.transport.query_line(query)
            try:
                code, message = parse_error_entry(reply)
            except ReplyError as why:
                raise BadReply(self.name, query, f"cannot use the reply {reply!r}: {why}") from None
            if code == 0:
                break
            entries.append((code, message))
        return entries

    def _drain_error_queue(self) -> None:
        self._read_error_queue()

    def _raise_queued_errors(self, command: str) -> None:
        entries = self._read_error_queue()
        if entries:
            code, message = entries[0]
            more = f" (and {len(entries) - 1} more)" if len(entries) > 1 else ""
            raise DeviceFault(
                self.name,
                command,
                f"the instrument reports error {code} {message!r} after this command{more}",
                "check the command template in options.commands and the value's range",
            )

    # ---- waiting for motion ----

    def _wait_idle(self, timeout_s: float, what: str) -> None:
        """Poll ``busy`` (or block on the operation-complete query) until idle or timeout."""
        deadline = self._clock() + timeout_s
        if self.config.commands.get("busy") is not None:
            while self._parsed("busy", parse_flag):
                remaining = deadline - self._clock()
                if remaining <= 0:
                    raise InstrumentTimeout(
                        self.name,
                        self.config.commands["busy"],
                        f"still {what} {timeout_s:g} s after it was asked to",
                        "is the axis blocked or the move long? check the device, or allow "
                        "more time to settle",
                    )
                self._sleep(min(self.config.poll_interval_s, remaining))
        else:
            query = self.config.opc_query
            assert query is not None, "parse_config refuses a device with neither busy nor opc"
            self._ensure_connected()
            try:
                reply = self.transport.query_line(query, max(deadline - self._clock(), 1e-3))
            except InstrumentTimeout as timeout:
                raise InstrumentTimeout(
                    self.name,
                    query,
                    f"still {what} {timeout_s:g} s after it was asked to",
                    "is the axis blocked or the move long? check the device, or allow more "
                    "time to settle",
                ) from timeout
            try:
                done = parse_flag(reply)
            except ReplyError as why:
                raise BadReply(self.name, query, f"cannot use the reply {reply!r}: {why}") from None
            if not done:
                raise BadReply(self.name, query, f"operation-complete query answered {reply!r}")
        if self.config.settle_s > 0:
            self._sleep(self.config.settle_s)


class MessageRotationStage(MessageDevice, RotationStage):
    """A rotation stage. The travel limits enforced are the tighter of the bench's ``limits`` and
    what the instrument reports (``commands.limits``); with neither, travel is unbounded."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._reported_limits: tuple[float, float] | None = None
        self._reported_speed: float | None = None

    def _on_connect(self) -> None:
        if self.config.commands.get("limits") is not None:
            self._reported_limits = self._parsed(
                "limits", parse_pair, self.config.reply_scale.get("limits", 1.0)
            )
        if "speed_deg_per_s" not in self.config.limits and self.config.commands.get("speed"):
            speed = self._query_float("speed")
            if speed <= 0:
                raise BadReply(self.name, self.config.commands["speed"], f"speed {speed:g} <= 0")
            self._reported_speed = speed

    def _forget(self) -> None:
        self._reported_limits = None
        self._reported_speed = None

    @property
    def limits_deg(self) -> tuple[float, float]:
        low = self.config.limits.get("min_deg", -math.inf)
        high = self.config.limits.get("max_deg", math.inf)
        if self._reported_limits is not None:
            low = max(low, self._reported_limits[0])
            high = min(high, self._reported_limits[1])
        return low, high

    @property
    def speed_deg_per_s(self) -> float:
        speed = self.config.limits.get("speed_deg_per_s", self._reported_speed)
        if speed is None:
            raise NotSupported(
                self.name,
                self.config.commands.get("speed"),
                "the stage's speed is not known",
                "set limits.speed_deg_per_s in the bench, or connect first when "
                "commands.speed can ask the instrument",
            )
        return float(speed)

    @property
    def backlash_deg(self) -> float:
        return float(
            self.config.limits.get("backlash_deg", self.config.kind_options["backlash_deg"])
        )

    def move_to_deg(self, angle_deg: float) -> None:
        self._ensure_connected()
        low, high = self.limits_deg
        if not (math.isfinite(angle_deg) and low <= angle_deg <= high):
            raise LimitViolation(
                self.name,
                None,
                f"target {angle_deg:g} deg is outside the travel limits [{low:g}, {high:g}] deg",
                "check the protocol's angles and calibration offsets against the bench's "
                "limits.min_deg / limits.max_deg",
            )
        self._write("move", angle_deg=float(angle_deg))

    def position_deg(self) -> float:
        return self._query_float("position")

    def wait_settled(self, timeout_s: float) -> float:
        self._wait_idle(timeout_s, "moving")
        return self.position_deg()

    def home(self) -> None:
        self._write("home")
        self._wait_idle(self.config.kind_options["home_timeout_s"], "homing")


class MessageActuator(MessageDevice, DiscreteActuator):
    """A device with named states; ``state_map`` translates the bench's names to the instrument's.

    The states are, in order of precedence: ``limits.states`` (what the bench allows),
    ``options.states``, or what ``commands.states`` reports at connect.
    """

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._to_instrument: dict[str, str] = dict(self.config.kind_options["state_map"])
        self._from_instrument = {v: k for k, v in self._to_instrument.items()}
        self._reported_states: tuple[str, ...] | None = None

    def _configured_states(self) -> tuple[str, ...] | None:
        return self.config.limits.get("states", self.config.kind_options["states"])

    def _on_connect(self) -> None:
        if self._configured_states() is None:
            names = self._parsed("states", parse_list)
            self._reported_states = tuple(self._from_instrument.get(n, n) for n in names)

    def _forget(self) -> None:
        self._reported_states = None

    @property
    def states(self) -> tuple[str, ...]:
        configured = self._configured_states()
        if configured is not None:
            return tuple(configured)
        self._ensure_connected()
        assert self._reported_states is not None
        return self._reported_states

    def set_state(self, state: str) -> None:
        if state not in self.states:
            raise LimitViolation(
                self.name,
                None,
                f"state {state!r} is not one of {', '.join(self.states)}",
                "check the protocol's setting and the bench's options.states",
            )
        self._write("set_state", state=self._to_instrument.get(state, state))

    def state(self) -> str:
        command, reply = self._query("state")
        try:
            token = extract(reply, self.config.reply_pattern.get("state"))
        except ReplyError as why:
            raise BadReply(self.name, command, f"cannot use the reply {reply!r}: {why}") from None
        state = self._from_instrument.get(token, token)
        if state not in self.states:
            raise BadReply(
                self.name,
                command,
                f"the instrument reports state {token!r}, not one of {', '.join(self.states)}",
                "check options.states and options.state_map",
            )
        return state

    def wait_settled(self, timeout_s: float) -> str:
        self._wait_idle(timeout_s, "moving")
        return self.state()


class MessageShutter(MessageDevice, Shutter):
    """A beam shutter; with ``verify`` (the default) every open/close is read back."""

    def open(self) -> None:
        self._write("open")
        self._settle_and_verify(expect_open=True)

    def close_beam(self) -> None:
        self._write("close")
        self._settle_and_verify(expect_open=False)

    def is_open(self) -> bool:
        command, reply = self._query("state")
        try:
            token = extract(reply, self.config.reply_pattern.get("state")).casefold()
        except ReplyError as why:
            raise BadReply(self.name, command, f"cannot use the reply {reply!r}: {why}") from None
        open_reply = self.config.kind_options["open_reply"]
        closed_reply = self.config.kind_options["closed_reply"]
        if token == open_reply.casefold():
            return True
        if token == closed_reply.casefold():
            return False
        raise BadReply(
            self.name,
            command,
            f"the shutter reports {reply!r}, neither {open_reply!r} nor {closed_reply!r}",
            "check options.open_reply / options.closed_reply",
        )

    def _settle_and_verify(self, expect_open: bool) -> None:
        if self.config.settle_s > 0:
            self._sleep(self.config.settle_s)
        if not self.config.kind_options["verify"]:
            return
        if self.is_open() != expect_open:
            if expect_open:
                raise DeviceFault(
                    self.name,
                    self.config.commands["open"],
                    "the shutter still reports closed after the open command",
                    "check the shutter controller and its cable",
                )
            raise DeviceFault(
                self.name,
                self.config.commands["close"],
                "the shutter still reports OPEN after the close command: the beam may be on",
                "block the beam by hand, then check the shutter controller and its cable",
            )


class MessagePowerMeter(MessageDevice, PowerMeter):
    """A power meter; the integration time is sent only when it changes, and each reading waits
    for the integration plus ``timeout_s``."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._integration_s: float | None = None
        self._wavelength_nm: float | None = self.config.kind_options["wavelength_nm"]
        self._range_w: float | None = None
        self._range_set = False

    def _on_connect(self) -> None:
        if self._wavelength_nm is not None:
            self._write("set_wavelength", wavelength_nm=self._wavelength_nm)
        if self._range_set:
            self._apply_range()

    def _forget(self) -> None:
        self._integration_s = None

    def read_power_w(self, integration_s: float) -> float:
        _check_positive(self.name, "integration_s", integration_s)
        if self.config.commands.get("set_integration") is not None:
            self._ensure_connected()
            if integration_s != self._integration_s:
                self._integration_s = None
                self._write("set_integration", integration_s=float(integration_s))
                self._integration_s = integration_s
        return self._query_float("read", integration_s + self.config.line.timeout_s)

    def set_wavelength_nm(self, wavelength_nm: float) -> None:
        _check_positive(self.name, "wavelength_nm", wavelength_nm)
        self._write("set_wavelength", wavelength_nm=float(wavelength_nm))
        self._wavelength_nm = float(wavelength_nm)

    def set_range_w(self, range_w: float | None) -> None:
        if range_w is not None:
            _check_positive(self.name, "range_w", range_w)
        self._range_w = None if range_w is None else float(range_w)
        self._range_set = True
        self._ensure_connected()
        self._apply_range()

    def _apply_range(self) -> None:
        if self._range_w is None:
            self._write("auto_range")
        else:
            self._write("set_range", range_w=self._range_w)

    def zero(self) -> None:
        self._write("zero")


class MessagePhotonCounter(MessageDevice, PhotonCounter):
    """A photon counter; the gate is sent only when it changes."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._gate_s: float | None = None

    def _forget(self) -> None:
        self._gate_s = None

    def read_counts(self, gate_s: float) -> int:
        _check_positive(self.name, "gate_s", gate_s)
        if self.config.commands.get("set_gate") is not None:
            self._ensure_connected()
            if gate_s != self._gate_s:
                self._gate_s = None
                self._write("set_gate", gate_s=float(gate_s))
                self._gate_s = gate_s
        return self._parsed(
            "read",
            parse_count,
            self.config.reply_scale.get("read", 1.0),
            timeout_s=gate_s + self.config.line.timeout_s,
        )


def _check_positive(device: str, what: str, value: float) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not (
        math.isfinite(value) and value > 0
    ):
        raise LimitViolation(device, None, f"{what} must be a finite number > 0, got {value!r}")


MESSAGE_DEVICE_CLASSES: dict[str, type[MessageDevice]] = {
    "rotation_stage": MessageRotationStage,
    "actuator": MessageActuator,
    "shutter": MessageShutter,
    "power_meter": MessagePowerMeter,
    "photon_counter": MessagePhotonCounter,
}

__all__ = [
    "MESSAGE_DEVICE_CLASSES",
    "MessageActuator",
    "MessageDevice",
    "MessagePhotonCounter",
    "MessagePowerMeter",
    "MessageRotationStage",
    "MessageShutter",
]
