"""The camera device kind: its settings, a frame, the abstract interface, and the pure frame arithmetic
(region of interest, binning, averaging, saturation) every camera family shares."""

from __future__ import annotations

import math
from abc import abstractmethod
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from lightloom.drivers.interfaces import Device
from lightloom.drivers.options import DriverConfigError

MAX_BIT_DEPTH = 32
MAX_FRAMES_TO_AVERAGE = 10_000


@dataclass(frozen=True)
class Roi:
    """A region of interest on the sensor, in sensor pixels: left column, top row, width, height."""

    x: int
    y: int
    width: int
    height: int

    def __post_init__(self) -> None:
        if min(self.x, self.y) < 0 or min(self.width, self.height) < 1:
            raise ValueError(f"region of interest {self} must have x, y >= 0 and width, height >= 1")


@dataclass(frozen=True)
class CameraSettings:
    """What a camera is set to. ``saturation_level`` is in ADU (default: the largest value the bit
    depth holds); ``binning`` averages ``binning x binning`` blocks (software binning keeps the ADU
    scale, so the saturation level still applies); ``frames_to_average`` frames make one reading."""

    exposure_s: float = 0.01
    gain_db: float = 0.0
    roi: Roi | None = None
    binning: int = 1
    frames_to_average: int = 1
    bit_depth: int = 8
    saturation_level: float | None = None

    def __post_init__(self) -> None:
        if not (math.isfinite(self.exposure_s) and self.exposure_s > 0):
            raise ValueError(f"exposure_s is {self.exposure_s}; expected a positive number of seconds")
        if not math.isfinite(self.gain_db):
            raise ValueError(f"gain_db is {self.gain_db}; expected a finite number of dB")
        if not 1 <= self.binning <= 64:
            raise ValueError(f"binning is {self.binning}; expected an integer 1..64")
        if not 1 <= self.frames_to_average <= MAX_FRAMES_TO_AVERAGE:
            raise ValueError(
                f"frames_to_average is {self.frames_to_average}; expected 1..{MAX_FRAMES_TO_AVERAGE}"
            )
        if not 1 <= self.bit_depth <= MAX_BIT_DEPTH:
            raise ValueError(f"bit_depth is {self.bit_depth}; expected 1..{MAX_BIT_DEPTH}")
        if self.saturation_level is not None and not (
            0 < self.saturation_level <= self.full_scale
        ):
            raise ValueError(
                f"saturation_level is {self.saturation_level}; expected 0 < level <= "
                f"{self.full_scale:g} (the largest {self.bit_depth}-bit value)"
            )

    @property
    def full_scale(self) -> float:
        """The largest value the bit depth holds, ADU."""
        return float(2**self.bit_depth - 1)

    @property
    def saturation_adu(self) -> float:
        """The level at and above which a raw pixel counts as saturated, ADU."""
        return self.full_scale if self.saturation_level is None else float(self.saturation_level)


@dataclass(frozen=True, eq=False)
class Frame:
    """One camera reading: ``data`` (2-D, ADU, float64, averaged over ``n_averaged`` raw frames),
    ``saturated`` (2-D bool: the pixel reached the saturation level in at least one raw frame),
    ``t_s`` the UNIX time the first exposure started, ``exposure_s`` of each raw frame."""

    data: np.ndarray
    saturated: np.ndarray
    t_s: float
    exposure_s: float
    n_averaged: int
    saturation_level: float

    def __post_init__(self) -> None:
        data = np.array(self.data, dtype=np.float64)
        mask = np.array(self.saturated, dtype=bool)
        if data.ndim != 2 or mask.shape != data.shape:
            raise ValueError(
                f"a frame is a 2-D array with a mask of the same shape; got {data.shape} and {mask.shape}"
            )
        data.setflags(write=False)
        mask.setflags(write=False)
        object.__setattr__(self, "data", data)
        object.__setattr__(self, "saturated", mask)

    @property
    def total_adu(self) -> float:
        """The sum of every pixel, ADU (the camera's integrated reading)."""
        return float(self.data.sum())


def crop_and_bin(raw: np.ndarray, roi: Roi | None, binning: int) -> np.ndarray:
    """Cut ``roi`` out of a 2-D ``raw`` frame and average ``binning x binning`` blocks (rows and
    columns that do not fill a block are dropped). Returns float64."""
    image = np.asarray(raw, dtype=np.float64)
    if image.ndim != 2:
        raise ValueError(f"a raw frame must be 2-D, got shape {image.shape}")
    if roi is not None:
        if roi.y + roi.height > image.shape[0] or roi.x + roi.width > image.shape[1]:
            raise ValueError(
                f"region of interest {roi.width}x{roi.height} at ({roi.x}, {roi.y}) does not fit "
                f"a {image.shape[1]}x{image.shape[0]} sensor"
            )
        image = image[roi.y: roi.y + roi.height, roi.x: roi.x + roi.width]
    if binning > 1:
        rows, cols = image.shape[0] // binning, image.shape[1] // binning
        if rows == 0 or cols == 0:
            raise ValueError(f"binning {binning} is larger than the {image.shape} region")
        image = image[: rows * binning, : cols * binning]
        image = image.reshape(rows, binning, cols, binning).mean(axis=(1, 3))
    return image


def saturation_mask(raw: np.ndarray, roi: Roi | None, binning: int, level: float) -> np.ndarray:
    """Pixels of the cropped, binned frame with at least one raw pixel at or above ``level``."""
    hit = crop_and_bin(np.asarray(raw) >= level, roi, binning)
    return hit > 0


def average_frames(raws: list[np.ndarray], settings: CameraSettings, t_s: float) -> Frame:
    """One reading from raw sensor frames: crop, bin, average and mark saturation (pure)."""
    if not raws:
        raise ValueError("no raw frame to average")
    level = settings.saturation_adu
    total = None
    mask = None
    for raw in raws:
        image = crop_and_bin(raw, settings.roi, settings.binning)
        hit = saturation_mask(raw, settings.roi, settings.binning, level)
        total = image if total is None else total + image
        mask = hit if mask is None else mask | hit
    assert total is not None and mask is not None
    return Frame(total / len(raws), mask, t_s, settings.exposure_s, len(raws), level)


class Camera(Device):
    """An imaging detector. ``read_frame`` exposes ``frames`` raw frames of ``exposure_s`` each
    and returns their average as one Frame."""

    @property
    @abstractmethod
    def settings(self) -> CameraSettings:
        """The settings in force (exposure, gain, region of interest, binning, bit depth...)."""

    @abstractmethod
    def configure(self, settings: CameraSettings) -> CameraSettings:
        """Apply ``settings``; return what the camera actually took."""

    @abstractmethod
    def read_frame(self, exposure_s: float | None = None, frames: int | None = None) -> Frame:
        """Expose and return one (averaged) frame; None keeps the configured value."""


def _integer(options: Mapping[str, Any], key: str, default: int) -> int:
    value = options.get(key, default)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or value != int(value):
        raise DriverConfigError(f"option {key} is {value!r}; expected a whole number", key)
    return int(value)


def _number(options: Mapping[str, Any], key: str, default: float | None) -> float | None:
    value = options.get(key, default)
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise DriverConfigError(f"option {key} is {value!r}; expected a number", key)
    return float(value)


CAMERA_OPTION_KEYS = (
    "exposure_s", "gain_db", "roi", "binning", "frames_to_average", "bit_depth", "saturation_level",
)


def settings_from_options(options: Mapping[str, Any]) -> CameraSettings:
    """CameraSettings from a bench device's ``options`` (keys ``CAMERA_OPTION_KEYS``; ``roi`` is
    ``[x, y, width, height]`` in sensor pixels). Raises DriverConfigError naming the key."""
    roi_value = options.get("roi")
    roi = None
    if roi_value is not None:
        if not isinstance(roi_value, (list, tuple)) or len(roi_value) != 4 or not all(
            isinstance(v, int) and not isinstance(v, bool) for v in roi_value
        ):
            raise DriverConfigError(
                f"option roi is {roi_value!r}; expected [x, y, width, height] in whole pixels", "roi"
            )
        try:
            roi = Roi(*roi_value)
        except ValueError as error:
            raise DriverConfigError(f"option roi: {error}", "roi") from None
    values = {
        "exposure_s": _number(options, "exposure_s", 0.01),
        "gain_db": _number(options, "gain_db", 0.0),
        "binning": _integer(options, "binning", 1),
        "frames_to_average": _integer(options, "frames_to_average", 1),
        "bit_depth": _integer(options, "bit_depth", 8),
        "saturation_level": _number(options, "saturation_level", None),
    }
    try:
        return CameraSettings(roi=roi, **values)  # type: ignore[arg-type]
    except ValueError as error:
        key = next((k for k in values if str(error).startswith(k)), "options")
        raise DriverConfigError(f"option {error}", key) from None
