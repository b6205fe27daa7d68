"""Test helper: serve a simulated twin of a hardware bench on loopback, each device speaking a
dialect, and rewrite the bench's addresses to reach it through pyvisa-py and pyserial."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import yaml

from lightloom.sequencer.lang.bench import parse_bench
from lightloom.simulators.dialects import load_dialect
from lightloom.simulators.scpi_server import LoopbackServer
from lightloom.simulators.table import SimulatedTable

REPO = Path(__file__).resolve().parents[1]
EXAMPLES = REPO / "docs" / "examples" / "benches"

# The dialect each example device class speaks (simulators/dialect_files).
DIALECT_OF_KIND = {
    "rotation_stage": "ascii-rotation-stage",
    "shutter": "relay-shutter",
    "power_meter": "scpi-power-meter",
    "photon_counter": "photon-counter",
    "actuator": "flip-mount",
}
_SIM_KEYS = ("limits", "backlash_deg", "settle_s", "states", "switch_s", "overhead_s")


@dataclass
class Twin:
    server: LoopbackServer
    table: SimulatedTable
    bench_path: Path
    log: Path
    data: dict[str, Any]

    def stop(self) -> None:
        self.server.stop()


def simulated_twin_text(hardware: Mapping[str, Any], power_w: float, faults: list | None = None) -> str:
    """The hardware bench with every device simulated (same names, roles, limits and calibration)."""
    twin = {k: v for k, v in hardware.items() if k not in ("devices", "extends")}
    twin["bench"] = f"{hardware['bench']}-twin"
    twin["devices"] = {
        name: {"driver": "sim." + dev["driver"].split(".", 1)[1], **{k: dev[k] for k in _SIM_KEYS if k in dev}}
        for name, dev in hardware["devices"].items()
    }
    twin["simulation"] = {
        "seed": 3,
        "time_scale": 0,
        "source": {"power": power_w, "state": {"ket": ["0.8", "0.6j", "0", "0"]}},
        "faults": faults or [],
    }
    return yaml.safe_dump(twin, sort_keys=False)


def serve_twin(
    hardware_path: Path,
    folder: Path,
    *,
    power_w: float = 1e-3,
    dialects: Mapping[str, str] | None = None,
    faults: list | None = None,
    swap: tuple[str, str] | None = None,
    time_scale: float = 0.01,
    edit=None,
) -> Twin:
    """Serve the simulated twin of ``hardware_path``; write the hardware bench with loopback addresses.

    ``dialects``: device kind -> dialect (default DIALECT_OF_KIND); ``swap``: two device names
    whose addresses are exchanged in the written bench (a swapped cable); ``edit``: a function
    applied to the written bench's data before it is saved.
    """
    hardware = yaml.safe_load(hardware_path.read_text())
    twin_bench = parse_bench(simulated_twin_text(hardware, power_w, faults), str(folder / "twin.yaml"))
    table = SimulatedTable(twin_bench, time_scale=time_scale)
    for device in table.devices.values():
        device.connect()
    chosen = {**DIALECT_OF_KIND, **(dialects or {})}
    by_device = {name: load_dialect(chosen[spec.kind]) for name, spec in twin_bench.devices.items()}
    log = folder / "commands.jsonl"
    server = LoopbackServer(table.devices, log_path=log, dialects=by_device).start()
    addresses = server.addresses()
    for name, dev in hardware["devices"].items():
        a = addresses[name]
        dev["address"] = a.serial_url if dev["driver"].startswith("serial.") else a.visa_address
    if swap is not None:
        one, two = hardware["devices"][swap[0]], hardware["devices"][swap[1]]
        one["address"], two["address"] = two["address"], one["address"]
    if edit is not None:
        edit(hardware)
    path = folder / hardware_path.name
    path.write_text(yaml.safe_dump(hardware, sort_keys=False))
    return Twin(server, table, path, log, hardware)
