"""Building devices by driver name: the built-in families, plug-ins through entry points, errors."""

from __future__ import annotations

import textwrap

import pytest

from lightloom.drivers.interfaces import PowerMeter, RotationStage, Shutter
from lightloom.drivers.message_devices import MessageRotationStage
from lightloom.drivers.options import DriverConfigError
from lightloom.drivers.registry import BUILTIN_DRIVERS, create_device, known_drivers
from lightloom.drivers.serial_transport import SerialTransport
from lightloom.drivers.visa_transport import VisaTransport


def test_builtin_drivers_build_the_interface_of_their_kind_without_connecting():
    stage = create_device("hwp", "visa.rotation_stage", "TCPIP::127.0.0.1::1::SOCKET", {}, None)
    meter = create_device("pm", "serial.power_meter", "socket://127.0.0.1:1", {}, None)
    assert isinstance(stage, RotationStage) and isinstance(stage.transport, VisaTransport)
    assert isinstance(meter, PowerMeter) and isinstance(meter.transport, SerialTransport)
    assert not stage.transport.is_open and not meter.transport.is_open


def test_limits_reach_the_device():
    stage = create_device(
        "hwp", "serial.rotation_stage", "COM3", {}, {"min_deg": -45, "max_deg": 45}
    )
    assert isinstance(stage, MessageRotationStage) and stage.limits_deg == (-45.0, 45.0)


def test_unknown_driver_lists_the_known_ones_and_the_nearest():
    with pytest.raises(DriverConfigError) as caught:
        create_device("pm", "visa.powermeter", "TCPIP::h::1::SOCKET", {}, None, plugins={})
    text = str(caught.value)
    assert caught.value.key == "driver"
    assert "did you mean 'visa.power_meter'" in text and "serial.shutter" in text


def test_sim_drivers_are_referred_to_the_simulators_package():
    with pytest.raises(DriverConfigError, match="simulators package"):
        create_device("pm", "sim.power_meter", None, {}, None, plugins={})


def test_missing_address_is_a_config_error_on_the_address_key():
    with pytest.raises(DriverConfigError) as caught:
        create_device("pm", "serial.power_meter", None, {}, None)
    assert caught.value.key == "address"


def test_malformed_visa_address_is_a_config_error_on_the_address_key():
    with pytest.raises(DriverConfigError) as caught:
        create_device("pm", "visa.power_meter", "TCPIP:127.0.0.1:5025", {}, None)
    assert caught.value.key == "address" and "VISA resource name" in str(caught.value)


def test_bad_option_reaches_the_caller_as_a_config_error():
    with pytest.raises(DriverConfigError) as caught:
        create_device("pm", "visa.power_meter", "TCPIP::h::1::SOCKET", {"tiemout_s": 1}, None)
    assert caught.value.key == "options.tiemout_s"


def _install_plugin(tmp_path, monkeypatch, module: str, source: str, target: str) -> None:
    """A distribution on sys.path with ``module`` that registers ``acme.shutter`` = ``target``
    under lightloom.drivers. Each test names its own module: imports are cached per process."""
    (tmp_path / f"{module}.py").write_text(textwrap.dedent(source))
    info = tmp_path / "acme_drivers-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: acme-drivers\nVersion: 0.1\n")
    (info / "entry_points.txt").write_text(f"[lightloom.drivers]\nacme.shutter = {target}\n")
    monkeypatch.syspath_prepend(str(tmp_path))


PLUGIN = """
    from lightloom.drivers.interfaces import Shutter

    class AcmeShutter(Shutter):
        def __init__(self, name, address, options):
            self.name, self.address, self.options, self.opened = name, address, dict(options), False
        def open(self):
            self.opened = True
        def close_beam(self):
            self.opened = False
        def is_open(self):
            return self.opened

    def make(name, driver, address, options, limits):
        return AcmeShutter(name, address, options)
"""


def test_plugin_registered_by_entry_point_is_listed_and_built(tmp_path, monkeypatch):
    _install_plugin(tmp_path, monkeypatch, "acme_drivers", PLUGIN, "acme_drivers:make")
    assert "acme.shutter" in known_drivers()
    assert known_drivers()[: len(BUILTIN_DRIVERS)] == BUILTIN_DRIVERS
    shutter = create_device("sh", "acme.shutter", "usb:7", {"speed": "fast"}, None)
    assert isinstance(shutter, Shutter)
    assert (shutter.name, shutter.address, shutter.options) == ("sh", "usb:7", {"speed": "fast"})


def test_plugin_that_cannot_be_imported_names_its_entry_point(tmp_path, monkeypatch):
    _install_plugin(tmp_path, monkeypatch, "acme_present", PLUGIN, "acme_missing_module:make")
    with pytest.raises(DriverConfigError) as caught:
        create_device("sh", "acme.shutter", None, {}, None)
    assert "acme_missing_module:make" in str(caught.value) and caught.value.key == "driver"


def test_plugin_returning_something_else_than_a_device_is_refused(tmp_path, monkeypatch):
    _install_plugin(
        tmp_path, monkeypatch, "acme_bad", "def make(**kwargs):\n    return 42\n", "acme_bad:make"
    )
    with pytest.raises(DriverConfigError, match="not a drivers Device"):
        create_device("sh", "acme.shutter", None, {}, None)


def test_injected_plugins_replace_the_installed_ones():
    made = []

    def factory(name, driver, address, options, limits):
        made.append((name, driver))
        return create_device(name, "serial.shutter", "COM1", options, limits)

    plugins = {"lab.shutter": lambda: factory}
    device = create_device("sh", "lab.shutter", None, {}, None, plugins=plugins)
    assert isinstance(device, Shutter) and made == [("sh", "lab.shutter")]
    assert "lab.shutter" in known_drivers({"lab.shutter": lambda: factory})
