"""Abstract device interfaces, one per kind of device, with units in the names and read-back."""

from __future__ import annotations

from abc import ABC, abstractmethod


class Device(ABC):
    """Anything on the table. ``name`` is the bench's name for it."""

    name: str

    def connect(self) -> None:
        """Open the connection and check identity where supported. Idempotent."""

    def close(self) -> None:
        """Release the connection. Idempotent; never raises for an already-closed device."""

    def reconnect(self) -> None:
        """Drop and re-open the connection (after a transient fault)."""
        self.close()
        self.connect()


class RotationStage(Device):
    """A motorised rotation mount. Angles in degrees."""

    @abstractmethod
    def move_to_deg(self, angle_deg: float) -> None:
        """Start a move to ``angle_deg`` (absolute). Returns without waiting; see wait_settled."""

    @abstractmethod
    def position_deg(self) -> float:
        """Read back the current position in degrees."""

    @abstractmethod
    def wait_settled(self, timeout_s: float) -> float:
        """Block until the stage is at rest; return the settled position in degrees."""

    @abstractmethod
    def home(self) -> None:
        """Run the homing sequence and wait until it ends."""

    @property
    @abstractmethod
    def limits_deg(self) -> tuple[float, float]:
        """Travel limits (min, max) in degrees."""

    @property
    @abstractmethod
    def speed_deg_per_s(self) -> float:
        """Cruise speed in degrees per second."""

    @property
    def backlash_deg(self) -> float:
        """Backlash to take up by approaching every target from the same side, degrees."""
        return 0.0


class DiscreteActuator(Device):
    """A device with a few named states: a flip mount, a mode converter in or out."""

    @abstractmethod
    def set_state(self, state: str) -> None:
        """Start moving to ``state`` (one of ``states``)."""

    @abstractmethod
    def state(self) -> str:
        """Read back the current state."""

    @abstractmethod
    def wait_settled(self, timeout_s: float) -> str:
        """Block until the actuator is at rest; return the state."""

    @property
    @abstractmethod
    def states(self) -> tuple[str, ...]:
        """The states this actuator accepts."""


class Shutter(Device):
    """A beam shutter."""

    @abstractmethod
    def open(self) -> None:
        """Open the shutter (the beam goes through)."""

    @abstractmethod
    def close_beam(self) -> None:
        """Close the shutter (block the beam). Must be safe to call at any time, repeatedly."""

    @abstractmethod
    def is_open(self) -> bool:
        """Read back the shutter state."""


class PowerMeter(Device):
    """An optical power meter. Powers in watts."""

    @abstractmethod
    def read_power_w(self, integration_s: float) -> float:
        """Integrate for ``integration_s`` seconds and return the mean power in W."""

    @abstractmethod
    def set_wavelength_nm(self, wavelength_nm: float) -> None:
        """Set the calibration wavelength, nm."""

    def set_range_w(self, range_w: float | None) -> None:
        """Set the measurement range in W; None selects auto-range."""

    def zero(self) -> None:
        """Take the dark reading as the zero offset (shutter closed)."""


class PhotonCounter(Device):
    """A photon counter."""

    @abstractmethod
    def read_counts(self, gate_s: float) -> int:
        """Count for ``gate_s`` seconds and return the number of counts."""
