"""The words every layer shares, said once: device kinds, roles, elements, fault kinds, reading and event kinds.

Files, the command line and the run file spell these words exactly so; every other module
imports them from here (drivers and simulators included) rather than repeating them.
"""

from __future__ import annotations

from types import MappingProxyType
from typing import Mapping

MESSAGE_KINDS: tuple[str, ...] = ("rotation_stage", "actuator", "shutter", "power_meter", "photon_counter")
"""Device kinds reached by text messages (the visa and serial families)."""

DEVICE_KINDS: tuple[str, ...] = MESSAGE_KINDS + ("camera",)
"""What a bench device is (the ``kind`` a driver implements)."""

DETECTOR_KINDS: tuple[str, ...] = ("power_meter", "photon_counter", "camera")
"""Device kinds that give detector readings."""

MESSAGE_FAMILIES: tuple[str, ...] = ("visa", "serial")
"""Driver families that speak text messages to an instrument."""

DRIVER_FAMILIES: tuple[str, ...] = ("sim",) + MESSAGE_FAMILIES + ("opencv",)
"""Built-in driver families: the part of a driver name before the dot (``visa.power_meter``);
``opencv`` has cameras only."""

ANALYZERS: tuple[str, str] = ("polarization", "spatial")
"""The analysed factors, in basis order (polarization (x) spatial)."""

ELEMENT_NAMES: tuple[str, ...] = (
    "quarter_wave_plate",
    "half_wave_plate",
    "mode_converter",
    "converter_angle",
    "image_rotator",
)
"""Analyzer elements, in the order the run file stores their settings."""

STAGE_ELEMENTS: tuple[str, ...] = ("quarter_wave_plate", "half_wave_plate", "converter_angle", "image_rotator")
"""Elements set by a rotation stage (angles in deg); the mode converter is on an in/out actuator."""

ELEMENT_FACTOR: Mapping[str, str] = MappingProxyType(
    {
        "quarter_wave_plate": "polarization",
        "half_wave_plate": "polarization",
        "mode_converter": "spatial",
        "converter_angle": "spatial",
        "image_rotator": "spatial",
    }
)
"""The factor of the state each element acts on."""

ROLE_NAMES: tuple[str, ...] = ELEMENT_NAMES + ("shutter", "reference", "detectors")
"""The keys of a bench's ``roles:`` section."""

CONVERTER_STATES: tuple[str, str] = ("in", "out")
"""The mode converter's two positions: in the beam or out of it."""

SORTER_PORTS: tuple[str, str] = ("h", "v")
"""Parity sorter outputs."""

SPLITTER_PORTS: tuple[str, str] = ("H", "V")
"""Polarizing beam splitter outputs."""

LINK_FAULTS: tuple[str, ...] = ("timeout", "garbled", "drop")
"""Faults of the link to an instrument: raised in process, enacted on the wire when served."""

FAULT_KINDS: tuple[str, ...] = LINK_FAULTS + ("stuck", "beam_loss")
"""Faults a simulated bench can inject."""

READING_KINDS: tuple[str, ...] = ("measure", "background", "reference")
"""measure: an analyzer reading; background: shutter closed; reference: a source-drift check."""

EVENT_KINDS: tuple[str, ...] = (
    "start", "resume", "pause", "beam_lost", "beam_back", "drift", "fault", "interrupted",
    "complete", "note",
)
"""What a run reports happening."""

RUN_STATUSES: tuple[str, ...] = ("running", "complete", "interrupted", "fault")
"""Where a run stands."""

PORT_UNITS: tuple[str, ...] = ("W", "counts", "ADU")
"""Units of detector readings: power meters give W, photon counters counts, cameras the sum of a
frame's pixels in ADU."""

ORDERS: tuple[str, ...] = ("as-written", "shuffled", "least-motion")
"""How a protocol's settings may be ordered."""

IDENTITY_WORD: Mapping[str, str] = MappingProxyType(
    {
        "rotation_stage": "STAGE",
        "actuator": "ACTUATOR",
        "shutter": "SHUTTER",
        "power_meter": "POWERMETER",
        "photon_counter": "COUNTER",
        "camera": "CAMERA",
    }
)
"""The word for each device kind in the simulated instruments' ``*IDN?`` reply (``lightloom,SIM-STAGE``)."""
