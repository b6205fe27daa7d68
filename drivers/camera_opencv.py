"""The OpenCV camera family (driver ``opencv.camera``): USB/V4L2 cameras, video files and image
sequences through ``cv2.VideoCapture``, one code path for all three.

OpenCV is an optional extra (``pip install 'lightloom[camera]'``); it is imported when a camera of
this family is built, so the base install stays light. OpenCV has no portable region of interest
or binning, so both are applied in software after capture; exposure and gain are passed to the
capture backend (``CAP_PROP_EXPOSURE``, ``CAP_PROP_GAIN``) when it takes them (a file does not).
"""

from __future__ import annotations

import time
from typing import Any, Callable, Mapping

import numpy as np

from lightloom.drivers.camera import (
    CAMERA_OPTION_KEYS, Camera, CameraSettings, Frame, average_frames, settings_from_options,
)
from lightloom.drivers.errors import ConnectionLost, DeviceFault
from lightloom.drivers.options import DriverConfigError

DRIVER = "opencv.camera"
# V4L2 takes its absolute exposure in units of 100 us; other backends differ (see docs/camera.md).
DEFAULT_EXPOSURE_UNITS_PER_S = 1.0e4
OPTION_KEYS = CAMERA_OPTION_KEYS + ("exposure_units_per_s", "rewind")


def _cv2() -> Any:
    try:
        import cv2
    except ImportError:
        raise DriverConfigError(
            "driver opencv.camera needs OpenCV: pip install 'lightloom[camera]' "
            "(opencv-python-headless)", "driver",
        ) from None
    return cv2


def capture_source(address: str) -> int | str:
    """A camera index ("0" -> 0) or a path, URL or image-sequence pattern (``frame_%03d.png``)."""
    text = address.strip()
    return int(text) if text.isdigit() else text


def to_gray(image: np.ndarray) -> np.ndarray:
    """One channel from a decoded image: a colour frame becomes the mean of its channels."""
    if image.ndim == 3:
        return image.astype(np.float64).mean(axis=2)
    return image


class OpenCVCamera(Camera):
    """A camera, video file or image sequence read through ``cv2.VideoCapture``.

    ``clock`` returns UNIX seconds and stamps each frame. At the end of a file the camera rewinds
    when ``rewind`` is set, else it reports a DeviceFault.
    """

    def __init__(
        self, name: str, address: str, settings: CameraSettings, *,
        exposure_units_per_s: float = DEFAULT_EXPOSURE_UNITS_PER_S, rewind: bool = False,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.name = name
        self.address = address
        self._settings = settings
        self._units = exposure_units_per_s
        self._rewind = rewind
        self._clock = clock
        self._capture: Any = None

    @property
    def settings(self) -> CameraSettings:
        return self._settings

    def connect(self) -> None:
        if self._capture is not None:
            return
        cv2 = _cv2()
        source = capture_source(self.address)
        if isinstance(source, str) and "%" in source:
            # An image sequence: OpenCV's own reader keeps 16-bit images 16-bit.
            capture = cv2.VideoCapture(source, cv2.CAP_IMAGES)
        else:
            capture = cv2.VideoCapture(source)
        if not capture.isOpened():
            raise ConnectionLost(
                self.name, None, f"OpenCV cannot open {self.address!r}",
                "check the camera index, the device permissions or the file path",
            )
        # Keep 16-bit image sequences 16-bit, where the backend allows it.
        capture.set(cv2.CAP_PROP_CONVERT_RGB, 0)
        self._capture = capture
        self.configure(self._settings)

    def close(self) -> None:
        if self._capture is not None:
            self._capture.release()
            self._capture = None

    def configure(self, settings: CameraSettings) -> CameraSettings:
        self._settings = settings
        if self._capture is not None:
            cv2 = _cv2()
            self._capture.set(cv2.CAP_PROP_EXPOSURE, settings.exposure_s * self._units)
            self._capture.set(cv2.CAP_PROP_GAIN, settings.gain_db)
        return settings

    def _grab(self) -> np.ndarray:
        if self._capture is None:
            self.connect()
        ok, image = self._capture.read()
        if not ok and self._rewind:
            self._capture.set(_cv2().CAP_PROP_POS_FRAMES, 0)
            ok, image = self._capture.read()
        if not ok or image is None:
            raise DeviceFault(
                self.name, "read", f"no frame from {self.address!r}",
                "the camera stopped delivering frames, or the file has no more",
            )
        return to_gray(image)

    def read_frame(self, exposure_s: float | None = None, frames: int | None = None) -> Frame:
        settings = self._settings
        if exposure_s is not None and exposure_s != settings.exposure_s:
            settings = self.configure(_replace(settings, exposure_s=exposure_s))
        count = settings.frames_to_average if frames is None else int(frames)
        t_s = self._clock()
        raws = [self._grab() for _ in range(count)]
        return average_frames(raws, settings, t_s)


def _replace(settings: CameraSettings, **changes: Any) -> CameraSettings:
    from dataclasses import replace

    return replace(settings, **changes)


def create(name: str, address: str | None, options: Mapping[str, Any]) -> OpenCVCamera:
    """Build an ``opencv.camera`` from bench data (nothing is opened until ``connect()``)."""
    unknown = sorted(set(options) - set(OPTION_KEYS))
    if unknown:
        raise DriverConfigError(
            f"unknown option {unknown[0]!r} for {DRIVER}; known: {', '.join(OPTION_KEYS)}", unknown[0]
        )
    if not isinstance(address, str) or not address.strip():
        raise DriverConfigError(
            f"driver {DRIVER} needs an address: a camera index (0), a device (/dev/video0), a video "
            "file or an image-sequence pattern (frames/img_%04d.png)", "address",
        )
    units = options.get("exposure_units_per_s", DEFAULT_EXPOSURE_UNITS_PER_S)
    if isinstance(units, bool) or not isinstance(units, (int, float)) or units <= 0:
        raise DriverConfigError(
            f"option exposure_units_per_s is {units!r}; expected a positive number", "exposure_units_per_s"
        )
    rewind = options.get("rewind", False)
    if not isinstance(rewind, bool):
        raise DriverConfigError(f"option rewind is {rewind!r}; expected true or false", "rewind")
    return OpenCVCamera(
        name, address, settings_from_options(options), exposure_units_per_s=float(units), rewind=rewind
    )
