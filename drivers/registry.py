"""Build devices by driver name: the built-in VISA and serial families and outside plug-ins."""

from __future__ import annotations

from importlib.metadata import entry_points
from typing import Any, Callable, Mapping, Protocol

from lightloom.drivers.interfaces import Device
from lightloom.drivers.message_devices import MESSAGE_DEVICE_CLASSES
from lightloom.drivers.options import FAMILIES, DriverConfigError, parse_config, split_driver
from lightloom.drivers.transport import LineTransport
from lightloom.sequencer.model.suggest import suggestion
from lightloom.sequencer.model.vocabulary import MESSAGE_KINDS

ENTRY_POINT_GROUP = "lightloom.drivers"
CAMERA_DRIVERS = ("opencv.camera",)
BUILTIN_DRIVERS = tuple(f"{family}.{kind}" for family in FAMILIES for kind in MESSAGE_KINDS) + CAMERA_DRIVERS


class DriverFactory(Protocol):
    """What a plug-in registers: called with the same arguments as ``create_device``."""

    def __call__(
        self,
        name: str,
        driver: str,
        address: str | None,
        options: Mapping[str, Any],
        limits: Mapping[str, Any] | None,
    ) -> Device: ...


PluginSource = Mapping[str, Callable[[], DriverFactory]]


def installed_plugins() -> dict[str, Callable[[], DriverFactory]]:
    """Drivers registered by installed distributions under the entry-point group
    ``lightloom.drivers``, as name -> loader (nothing is imported until a loader is called)."""
    found: dict[str, Callable[[], DriverFactory]] = {}
    for point in entry_points(group=ENTRY_POINT_GROUP):
        if point.name not in BUILTIN_DRIVERS:
            found.setdefault(point.name, _loader(point))
    return found


def _loader(point: Any) -> Callable[[], DriverFactory]:
    def load() -> DriverFactory:
        try:
            factory = point.load()
        except Exception as error:  # any import-time failure of outside code
            raise DriverConfigError(
                f"driver {point.name!r} is registered by {point.value!r} (entry-point group "
                f"{ENTRY_POINT_GROUP}) but cannot be loaded: {type(error).__name__}: {error}",
                "driver",
            ) from error
        if not callable(factory):
            raise DriverConfigError(
                f"driver {point.name!r}: {point.value!r} is not callable", "driver"
            )
        return factory

    return load


def known_drivers(plugins: PluginSource | None = None) -> tuple[str, ...]:
    """Every driver name ``create_device`` accepts: the built-ins, then the plug-ins, sorted."""
    extra = installed_plugins() if plugins is None else plugins
    return BUILTIN_DRIVERS + tuple(sorted(n for n in extra if n not in BUILTIN_DRIVERS))


def create_device(
    name: str,
    driver: str,
    address: str | None,
    options: Mapping[str, Any],
    limits: Mapping[str, Any] | None,
    *,
    plugins: PluginSource | None = None,
) -> Device:
    """Build the device ``name`` from plain bench data; nothing is opened until ``connect()``.

    Parameters
    ----------
    name : the bench's name for the device (used in every error message).
    driver : ``visa.<kind>`` or ``serial.<kind>`` with kind one of rotation_stage, actuator,
        shutter, power_meter, photon_counter; ``opencv.camera``; or a plug-in name.
    address : VISA resource name (``TCPIP::host::port::SOCKET``, ``ASRL/dev/ttyUSB0::INSTR``,
        ``ASRLsocket://host:port::INSTR``, ...) or pyserial port / URL (``COM3``,
        ``/dev/ttyUSB0``, ``socket://host:port``).
    options, limits : the bench's mappings; see ``drivers.options.option_defaults``.
    plugins : name -> loader of a factory; by default the installed entry points.

    Raises
    ------
    DriverConfigError
        Unknown driver (with the known ones and the nearest), missing or malformed address,
        bad option or limit; ``key`` says which.
    """
    if driver in CAMERA_DRIVERS:
        from lightloom.drivers.camera_opencv import create as create_camera

        return create_camera(name, address, options)
    if driver in BUILTIN_DRIVERS:
        return _create_message_device(name, driver, address, options, limits)
    source = installed_plugins() if plugins is None else plugins
    if driver in source:
        device = source[driver]()(
            name=name, driver=driver, address=address, options=options, limits=limits
        )
        if not isinstance(device, Device):
            raise DriverConfigError(
                f"driver {driver!r} returned {type(device).__name__}, not a drivers Device",
                "driver",
            )
        return device
    known = known_drivers(source)
    if isinstance(driver, str) and driver.startswith("sim."):
        raise DriverConfigError(
            f"driver {driver!r} is a simulated device, built by the simulators package, not by "
            f"lightloom.drivers.create_device; known here: {', '.join(known)}",
            "driver",
        )
    nearest = suggestion(str(driver), known, cutoff=0.5)
    raise DriverConfigError(
        f"unknown driver {driver!r}{nearest} (known: {', '.join(known)})", "driver"
    )


def _create_message_device(
    name: str,
    driver: str,
    address: str | None,
    options: Mapping[str, Any],
    limits: Mapping[str, Any] | None,
) -> Device:
    family, kind = split_driver(driver)
    config = parse_config(driver, options, limits)
    if not isinstance(address, str) or not address.strip():
        example = "TCPIP::192.168.1.20::5025::SOCKET"
        if family == "serial":
            example = "COM3, /dev/ttyUSB0 or socket://host:port"
        raise DriverConfigError(
            f"driver {driver} needs an address, e.g. {example}", "address"
        )
    transport: LineTransport
    if family == "visa":
        from lightloom.drivers.visa_transport import VisaTransport, check_resource_name

        try:
            check_resource_name(address)
        except ValueError as error:
            raise DriverConfigError(
                f"{address!r} is not a VISA resource name: {error}", "address"
            ) from None
        transport = VisaTransport(name, address, config.line)
    else:
        from lightloom.drivers.serial_transport import SerialTransport

        transport = SerialTransport(name, address, config.line)
    return MESSAGE_DEVICE_CLASSES[kind](name, transport, config)
