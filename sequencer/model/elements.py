"""Analyzer element settings as a typed value, and their one numeric encoding (the settings vector).

``ElementSettings`` is what crosses layer boundaries: each element is named, and ``None`` means
the bench has no device for it. The optics model and the run file work on the same settings as
float vectors in ``ELEMENT_NAMES`` order (angles in deg, NaN for an absent element, the mode
converter coded 1.0 in / 0.0 out); :meth:`ElementSettings.as_vector` and
:meth:`ElementSettings.from_vector` are the only places that encoding is written or read.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from types import MappingProxyType
from typing import Mapping

import numpy as np

from lightloom.sequencer.model.vocabulary import CONVERTER_STATES, ELEMENT_NAMES, STAGE_ELEMENTS

COLUMN: Mapping[str, int] = MappingProxyType({name: i for i, name in enumerate(ELEMENT_NAMES)})
"""Column of each element in a settings vector."""

CONVERTER_IN_CODE = 1.0
"""The settings-vector code of the mode converter in the beam."""
CONVERTER_OUT_CODE = 0.0
"""The settings-vector code of the mode converter out of the beam."""


@dataclass(frozen=True)
class ElementSettings:
    """Where each analyzer element is set: stage angles in deg, the converter "in" or "out".

    ``None`` means the element is not set (the bench has no device for that role).
    """

    quarter_wave_plate_deg: float | None = None
    half_wave_plate_deg: float | None = None
    mode_converter: str | None = None
    converter_angle_deg: float | None = None
    image_rotator_deg: float | None = None

    def __post_init__(self) -> None:
        if self.mode_converter is not None and self.mode_converter not in CONVERTER_STATES:
            raise ValueError(f"mode_converter is {self.mode_converter!r}; expected one of {CONVERTER_STATES} or None")

    def angle_deg(self, element: str) -> float | None:
        """The angle of a stage element (one of STAGE_ELEMENTS), deg, or None if not set."""
        if element not in STAGE_ELEMENTS:
            raise ValueError(f"{element!r} is not set by a rotation stage; expected one of {STAGE_ELEMENTS}")
        return getattr(self, f"{element}_deg")

    def stage_angles(self) -> dict[str, float]:
        """Every stage element that is set, with its angle (deg), in ELEMENT_NAMES order."""
        out = {}
        for element in STAGE_ELEMENTS:
            value = getattr(self, f"{element}_deg")
            if value is not None:
                out[element] = value
        return {e: out[e] for e in ELEMENT_NAMES if e in out}

    def as_vector(self) -> np.ndarray:
        """The settings vector (5,) in ELEMENT_NAMES order: deg, NaN if unset, converter 1.0/0.0."""
        v = np.full(len(ELEMENT_NAMES), math.nan)
        for element, angle in self.stage_angles().items():
            v[COLUMN[element]] = angle
        if self.mode_converter is not None:
            v[COLUMN["mode_converter"]] = CONVERTER_IN_CODE if self.mode_converter == "in" else CONVERTER_OUT_CODE
        return v

    def as_list(self) -> list[float | None]:
        """The settings vector as a list, None where unset (the step list's JSON form)."""
        return [None if math.isnan(x) else float(x) for x in self.as_vector()]

    @classmethod
    def from_vector(cls, vector: Sequence[float | None] | np.ndarray) -> ElementSettings:
        """Inverse of :meth:`as_vector` (also accepts None for unset, as in :meth:`as_list`)."""
        if len(vector) != len(ELEMENT_NAMES):
            raise ValueError(f"a settings vector has {len(ELEMENT_NAMES)} entries ({', '.join(ELEMENT_NAMES)}), got {len(vector)}")
        values: dict[str, float | str | None] = {}
        for element, x in zip(ELEMENT_NAMES, vector):
            if x is None or math.isnan(float(x)):
                continue
            if element == "mode_converter":
                values[element] = "in" if float(x) > 0.5 else "out"
            else:
                values[f"{element}_deg"] = float(x)
        return cls(**values)  # type: ignore[arg-type]
