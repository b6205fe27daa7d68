"""The correction stack a lab puts in the beam to steer it: what its elements do and how to set them.

Polarization arm: a quarter-wave plate, a half-wave plate and a quarter-wave plate, met by the beam
in that order, M = Q(q2) H(h) Q(q1). Such a stack realises every SU(2) polarization transformation
up to a global phase (Simon and Mukunda, Phys. Lett. A 143, 165 (1990); explained with elementary
means by Bagini et al., Eur. J. Phys. 17, 279 (1996)); ``polarization_angles`` finds the three
angles for a given unitary.

Spatial factor: the pi/2 mode converter (quarter-wave analogue, in or out, its axis set by a stage
or fixed by its mount) followed by the image rotator (a reflection of the image about the axis at
its angle a; up to a global phase the half-wave analogue, it turns a mode by 2a), W = Rot(a) C(t),
with the matrices of sequencer.optics.jones. Two elements of this kind do not reach every SU(2):
a converter and a rotator together have two angles for a three-parameter group, so the advisor
optimises over what they can do (sequencer.analysis.advice).

Angles are in degrees, ideal retardances (the stack is set once, by hand or by stage).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import least_squares

from lightloom.sequencer.errors import OpticsError
from lightloom.sequencer.optics import jones

Complex = NDArray[np.complex128]

# A decomposition is accepted when the stack equals the unitary to this (Frobenius norm, up to phase).
DECOMPOSITION_TOLERANCE = 1e-9


@dataclass(frozen=True)
class StackSettings:
    """Settings of the correction stack (deg). ``None``: the element is out of the beam.

    ``mode_converter_deg`` is the converter's axis when it is in (its mount angle if fixed).
    """

    quarter_wave_plate_1_deg: float
    half_wave_plate_deg: float
    quarter_wave_plate_2_deg: float
    mode_converter_deg: float | None = None
    image_rotator_deg: float | None = None

    def as_json(self) -> dict:
        return {
            "quarter_wave_plate_1_deg": self.quarter_wave_plate_1_deg,
            "half_wave_plate_deg": self.half_wave_plate_deg,
            "quarter_wave_plate_2_deg": self.quarter_wave_plate_2_deg,
            "mode_converter": "out" if self.mode_converter_deg is None else "in",
            "mode_converter_deg": self.mode_converter_deg,
            "image_rotator": "out" if self.image_rotator_deg is None else "in",
            "image_rotator_deg": self.image_rotator_deg,
        }


def polarization_stack(q1_deg: ArrayLike, h_deg: ArrayLike, q2_deg: ArrayLike) -> Complex:
    """Jones matrix Q(q2) H(h) Q(q1) of the quarter-half-quarter stack, shape (..., 2, 2)."""
    q1, h, q2 = (np.radians(np.asarray(a, dtype=float)) for a in (q1_deg, h_deg, q2_deg))
    return jones.quarter_wave_plate(q2) @ jones.half_wave_plate(h) @ jones.quarter_wave_plate(q1)


def spatial_stack(converter_deg: ArrayLike | None, rotator_deg: ArrayLike | None) -> Complex:
    """Mode transformation Rot(a) C(t) of converter (axis t, or out: None) then rotator (a, or None)."""
    shape: tuple[int, ...] = ()
    for a in (converter_deg, rotator_deg):
        if a is not None:
            shape = np.broadcast_shapes(shape, np.shape(a))
    u = np.broadcast_to(np.eye(2, dtype=np.complex128), shape + (2, 2)).copy()
    if converter_deg is not None:
        u = jones.mode_converter(np.radians(np.asarray(converter_deg, dtype=float))) @ u
    if rotator_deg is not None:
        u = jones.image_rotator(np.radians(np.asarray(rotator_deg, dtype=float))) @ u
    return u


def stack_unitary(settings: StackSettings) -> Complex:
    """The 4x4 transformation (polarization stack) (x) (spatial stack) in the joint basis order."""
    p = polarization_stack(
        settings.quarter_wave_plate_1_deg, settings.half_wave_plate_deg, settings.quarter_wave_plate_2_deg
    )
    s = spatial_stack(settings.mode_converter_deg, settings.image_rotator_deg)
    return np.kron(p, s)


def _wrap180(a: float) -> float:
    w = float(np.mod(a, 180.0))
    return 0.0 if abs(w - 180.0) < 1e-9 or abs(w) < 1e-12 else w


def phase_distance(a: Complex, b: Complex) -> float:
    """min over phi of ||a - e^{i phi} b|| (Frobenius): how far two 2x2 unitaries are as optics."""
    t = np.trace(b.conj().T @ a)
    phase = t / abs(t) if abs(t) > 1e-15 else 1.0
    return float(np.linalg.norm(a - phase * b))


def polarization_angles(unitary: ArrayLike) -> tuple[float, float, float]:
    """Angles (q1, h, q2) in [0, 180) deg with Q(q2) H(h) Q(q1) equal to ``unitary`` up to a phase.

    Least squares from a grid of starts (the stack is universal, so an exact solution exists);
    the result is checked to DECOMPOSITION_TOLERANCE.

    Raises
    ------
    OpticsError
        If ``unitary`` is not a 2x2 unitary matrix.
    """
    u = np.asarray(unitary, dtype=np.complex128)
    if u.shape != (2, 2) or np.abs(u.conj().T @ u - np.eye(2)).max() > 1e-8:
        raise OpticsError("a polarization transformation must be a 2x2 unitary matrix")

    def residual(x: NDArray[np.float64]) -> NDArray[np.float64]:
        m = polarization_stack(x[0], x[1], x[2])
        t = np.trace(u.conj().T @ m)
        phase = t / abs(t) if abs(t) > 1e-15 else 1.0
        d = (m - phase * u).ravel()
        return np.concatenate([d.real, d.imag])

    starts = np.array(np.meshgrid(*(np.arange(0.0, 180.0, 30.0),) * 3, indexing="ij")).reshape(3, -1).T
    q1, h, q2 = np.radians(starts.T)
    ms = jones.quarter_wave_plate(q2) @ jones.half_wave_plate(h) @ jones.quarter_wave_plate(q1)
    overlap = np.abs(np.einsum("ij,nij->n", u.conj(), ms))
    best = None
    for i in np.argsort(-overlap)[:8]:
        res = least_squares(residual, starts[i], method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15)
        err = float(np.linalg.norm(res.fun))
        if best is None or err < best[1]:
            best = (res.x, err)
        if err < DECOMPOSITION_TOLERANCE:
            break
    assert best is not None
    x, err = best
    if err >= DECOMPOSITION_TOLERANCE:  # pragma: no cover - the stack is universal
        raise OpticsError(f"no quarter-half-quarter setting found for this transformation (residual {err:.2g})")
    return _wrap180(x[0]), _wrap180(x[1]), _wrap180(x[2])


__all__ = [
    "StackSettings",
    "polarization_stack",
    "spatial_stack",
    "stack_unitary",
    "polarization_angles",
    "phase_distance",
]
