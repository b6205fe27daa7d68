"""The inverse problem: analyzer settings that send a requested target state to a given port.

Closed form for ideal retardances (any calibration offsets): a quarter-wave plate with its fast
axis along the major axis of the target's ellipse makes it linear, and a half-wave plate at half
that azimuth turns it onto the splitter's axis (Hecht, Optics, ch. 8; Goldstein, Polarized Light,
ch. 4). The spatial analyzer is the same with the mode converter and the image rotator (Padgett and
Courtial, Opt. Lett. 24, 430 (1999)); with the converter at a fixed angle, a target is reachable
when the converter turns it into a linear (Hermite-Gauss) mode. Retardance errors are handled by a
few Levenberg-Marquardt polishing steps from the closed form; the achieved probability is
returned so callers can refuse a setting that cannot project well enough.
"""

from __future__ import annotations

import cmath
import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from lightloom.sequencer.errors import OpticsError
from lightloom.sequencer.optics.analyzer import (
    AnalyzerModel,
    ConverterModel,
    PlateModel,
    RotatorModel,
)
from lightloom.sequencer.optics import jones
from lightloom.sequencer.optics.states import normalize_ket

Complex = NDArray[np.complex128]

# Below this projection probability a target counts as unreachable by the analyzer on the table.
REACHABLE_PROBABILITY = 0.98


@dataclass(frozen=True)
class PolarizationSetting:
    """Commanded plate angles (deg; None = plate absent) and the achieved probability at the port."""

    quarter_wave_plate_deg: float | None
    half_wave_plate_deg: float | None
    probability: float


@dataclass(frozen=True)
class SpatialSetting:
    """Converter in/out and angle (deg, None when fixed or absent), rotator angle, achieved probability."""

    converter_in: bool
    converter_angle_deg: float | None
    image_rotator_deg: float | None
    probability: float


def _wrap180(angle_deg: float) -> float:
    """Plate and rotator angles are periodic in 180 deg: map to [0, 180)."""
    a = float(np.mod(angle_deg, 180.0))
    return 0.0 if abs(a - 180.0) < 1e-9 else a


def _azimuth_ellipticity(ket: Complex) -> tuple[float, float]:
    """Azimuth psi and ellipticity chi (rad) of a 2-vector on the Poincare sphere."""
    a, b = ket
    s1 = abs(a) ** 2 - abs(b) ** 2
    s2 = 2 * (np.conj(a) * b).real
    s3 = 2 * (np.conj(a) * b).imag
    return 0.5 * np.arctan2(s2, s1), 0.5 * np.arcsin(np.clip(s3, -1.0, 1.0))


def _projection(u: Complex, ket: Complex, port_index: int) -> float:
    return float(abs(u[port_index] @ ket) ** 2)


def _two_element_closed_form(
    ket: Complex, port_index: int, first_retardance: float, second_retardance: float,
    first_offset: float, second_offset: float,
) -> tuple[float, float, float]:
    """(first_deg, second_deg, probability) for a quarter-wave-like then half-wave-like pair."""
    psi, chi = _azimuth_ellipticity(ket)
    best: tuple[float, float, float] | None = None
    for sign in (+1.0, -1.0):
        q_opt = psi
        theta = psi + sign * chi  # azimuth of the linear state leaving the first element
        h_opt = 0.5 * (theta + port_index * np.pi / 2)
        u = jones.retarder(h_opt, second_retardance) @ jones.retarder(q_opt, first_retardance)
        p = _projection(u, ket, port_index)
        cand = (np.degrees(q_opt) - first_offset, np.degrees(h_opt) - second_offset, p)
        if best is None or p > best[2]:
            best = cand
    assert best is not None
    return best


def _retarder_one(theta: float, retardance: float) -> Complex:
    """jones.retarder for one angle and one retardance (rad), in scalar arithmetic: the polish
    evaluates it thousands of times, where numpy's per-call overhead would dominate."""
    c, s = math.cos(theta), math.sin(theta)
    e = cmath.exp(1j * retardance)
    off = (1 - e) * c * s
    phase = cmath.exp(-0.5j * retardance)
    return np.array([[(c * c + e * s * s) * phase, off * phase], [off * phase, (s * s + e * c * c) * phase]])


def _loss_of(amp):
    """1 - probability from the amplitude left at the other output (the elements are unitary)."""
    return lambda x: abs(amp(x)) ** 2


def _polish(amp, x0: NDArray[np.float64]) -> tuple[NDArray[np.float64], float]:
    """Drive the amplitude at the other output to its minimum from x0 (deg), Levenberg-Marquardt;
    return (x, probability).

    One or two angles and a two-component residual (the amplitude's real and imaginary parts): a
    few damped Gauss-Newton steps in numpy, with a central-difference Jacobian, converge from the
    closed form or a grid point in well under the time scipy.optimize takes to import.
    """
    def residual(x: NDArray[np.float64]) -> NDArray[np.float64]:
        a = amp(x)
        return np.array([a.real, a.imag])

    x = np.array(x0, dtype=float)
    r = residual(x)
    cost = float(r @ r)
    damping, eye, h = 1e-3, np.eye(len(x)), 1e-6
    for _ in range(100):
        jac = np.column_stack([(residual(x + h * e) - residual(x - h * e)) / (2 * h) for e in eye])
        accepted = False
        while damping < 1e12:
            system = np.vstack([jac, np.sqrt(damping) * eye])
            step = np.linalg.lstsq(system, np.concatenate([-r, np.zeros(len(x))]), rcond=None)[0]
            if float(np.max(np.abs(step))) < 1e-12:
                break  # converged: the next step is below any stage's resolution by far
            trial = residual(x + step)
            trial_cost = float(trial @ trial)
            if trial_cost < cost:
                x, r, cost, accepted = x + step, trial, trial_cost, True
                damping = max(damping / 3.0, 1e-12)
                break
            damping *= 4.0
        if not accepted or cost < 1e-30:
            break
    return x, 1.0 - float(abs(amp(x)) ** 2)


def polarization_setting(target: ArrayLike, port: str, model: AnalyzerModel) -> PolarizationSetting:
    """Plate angles that send the polarization ``target`` ket to splitter port ``port`` ('H' or 'V').

    Raises
    ------
    OpticsError
        If the plates on the table cannot project onto the target.
    """
    ket = normalize_ket(target)
    idx = "HV".index(port)
    q, h = model.quarter_wave_plate, model.half_wave_plate
    if q is not None and h is not None:
        rq, rh = np.radians(q.retardance_deg), np.radians(h.retardance_deg)
        q_deg, h_deg, p = _two_element_closed_form(
            ket, idx, rq, rh, q.fast_axis_offset_deg, h.fast_axis_offset_deg
        )
        if p < 1.0 - 1e-12:
            def loss_amp(x: NDArray[np.float64]) -> complex:
                u = _retarder_one(np.radians(x[1] + h.fast_axis_offset_deg), rh) @ _retarder_one(
                    np.radians(x[0] + q.fast_axis_offset_deg), rq
                )
                return complex(u[1 - idx] @ ket)

            x, p2 = _polish(loss_amp, np.array([q_deg, h_deg]))
            if p2 > p:
                q_deg, h_deg, p = float(x[0]), float(x[1]), p2
        return _checked(PolarizationSetting(_wrap180(q_deg), _wrap180(h_deg), p), "polarization", ket)
    plate, slot = (q, "q") if q is not None else (h, "h")
    if plate is None:
        p = float(abs(ket[idx]) ** 2)
        return _checked(PolarizationSetting(None, None, p), "polarization", ket)
    r = np.radians(plate.retardance_deg)

    def loss1_amp(x: NDArray[np.float64]) -> complex:
        u = _retarder_one(np.radians(x[0] + plate.fast_axis_offset_deg), r)
        return complex(u[1 - idx] @ ket)
    loss1 = _loss_of(loss1_amp)

    grid = np.linspace(0.0, 180.0, 181)
    start = grid[int(np.argmin([loss1(np.array([g])) for g in grid]))]
    x, p = _polish(loss1_amp, np.array([start]))
    angle = _wrap180(float(x[0]))
    setting = PolarizationSetting(angle if slot == "q" else None, angle if slot == "h" else None, p)
    return _checked(setting, "polarization", ket)


def polarization_setting_variants(target: ArrayLike, port: str, model: AnalyzerModel) -> list[PolarizationSetting]:
    """Every plate setting found that sends ``target`` to ``port`` as well as polarization_setting does.

    A quarter-wave plate along either principal axis of the target's ellipse makes it linear (the
    half-wave plate then follows), and for a circular target any quarter-wave axis does; the
    scheduler picks the variant that moves least. The first element is polarization_setting's.
    """
    base = polarization_setting(target, port, model)
    q, h = model.quarter_wave_plate, model.half_wave_plate
    if q is None or h is None:
        return [base]
    ket = normalize_ket(target)
    idx = "HV".index(port)
    rq, rh = np.radians(q.retardance_deg), np.radians(h.retardance_deg)
    psi, chi = _azimuth_ellipticity(ket)
    if abs(abs(chi) - np.pi / 4) < 1e-6:
        axes = np.radians([0.0, 45.0, 90.0, 135.0])
    else:
        axes = np.array([psi + np.pi / 2])
    out = [base]
    for q_opt in axes:
        theta, _ = _azimuth_ellipticity(jones.retarder(q_opt, rq) @ ket)
        h_opt = 0.5 * (theta + idx * np.pi / 2)

        def loss_amp(x: NDArray[np.float64]) -> complex:
            u = _retarder_one(np.radians(x[1] + h.fast_axis_offset_deg), rh) @ _retarder_one(
                np.radians(x[0] + q.fast_axis_offset_deg), rq
            )
            return complex(u[1 - idx] @ ket)
        loss = _loss_of(loss_amp)

        x = np.array([np.degrees(q_opt) - q.fast_axis_offset_deg, np.degrees(h_opt) - h.fast_axis_offset_deg])
        p = 1.0 - loss(x)
        if p < base.probability - 1e-12:
            x2, p2 = _polish(loss_amp, x)
            if p2 > p:
                x, p = x2, p2
        if p < base.probability - 1e-9:
            continue
        cand = PolarizationSetting(_wrap180(float(x[0])), _wrap180(float(x[1])), p)
        if all(_angle_distance(cand.quarter_wave_plate_deg, o.quarter_wave_plate_deg) > 1e-3
               or _angle_distance(cand.half_wave_plate_deg, o.half_wave_plate_deg) > 1e-3 for o in out):
            out.append(cand)
    return out


def _angle_distance(a: float | None, b: float | None) -> float:
    if a is None or b is None:
        return 0.0
    d = abs(a - b) % 180.0
    return min(d, 180.0 - d)


def spatial_setting(target: ArrayLike, port: str, model: AnalyzerModel) -> SpatialSetting:
    """Converter and rotator settings that send the spatial ``target`` ket to sorter port ``port`` ('h'|'v').

    Linear (Hermite-Gauss) targets use the rotator alone with the converter out; other targets need
    the converter in, at a stage-set angle (general) or at its mounting angle.

    Raises
    ------
    OpticsError
        If the spatial analyzer on the table cannot project onto the target.
    """
    ket = normalize_ket(target)
    idx = "hv".index(port)
    conv, rot = model.mode_converter, model.image_rotator
    psi, chi = _azimuth_ellipticity(ket)
    rot_offset = rot.axis_offset_deg if rot is not None else 0.0
    if abs(chi) < 1e-9 or conv is None:
        # Linear target: the rotator turns the mode at azimuth psi onto the port's axis.
        if rot is None:
            p = float(abs(ket[idx]) ** 2)
            return _checked(SpatialSetting(False, None, None, p), "spatial", ket)
        a = 0.5 * (psi + idx * np.pi / 2)
        u = jones.image_rotator(a)
        p = _projection(u, ket, idx)
        return _checked(SpatialSetting(False, None, _wrap180(np.degrees(a) - rot_offset), p), "spatial", ket)
    rc = np.radians(conv.retardance_deg)
    if rot is None:
        raise OpticsError(
            "the spatial analyzer has a mode converter but no image rotator; it cannot project onto "
            "a chosen Laguerre-Gauss or elliptical mode (add an image_rotator role)"
        )
    if conv.rotatable:
        c_deg, a_deg, p = _two_element_closed_form(ket, idx, rc, np.pi, conv.axis_offset_deg, rot_offset)
        # The rotator is a reflection, not a retarder: check the closed form with the real matrix.
        def loss_amp(x: NDArray[np.float64]) -> complex:
            u = jones.image_rotator(np.radians(x[1] + rot_offset)) @ jones.mode_converter(
                np.radians(x[0] + conv.axis_offset_deg), rc
            )
            return complex(u[1 - idx] @ ket)
        loss = _loss_of(loss_amp)

        p = 1.0 - loss(np.array([c_deg, a_deg]))
        if p < 1.0 - 1e-12:
            x, p2 = _polish(loss_amp, np.array([c_deg, a_deg]))
            if p2 > p:
                c_deg, a_deg, p = float(x[0]), float(x[1]), p2
        return _checked(SpatialSetting(True, _wrap180(c_deg), _wrap180(a_deg), p), "spatial", ket)
    # Converter at its mounting angle: it must make the target linear; the rotator does the rest.
    axis = np.radians(conv.axis_deg + conv.axis_offset_deg)
    phi = jones.mode_converter(axis, rc) @ ket
    psi_out, _ = _azimuth_ellipticity(phi)
    a = 0.5 * (psi_out + idx * np.pi / 2)
    u = jones.image_rotator(a) @ jones.mode_converter(axis, rc)
    p = _projection(u, ket, idx)
    setting = SpatialSetting(True, None, _wrap180(np.degrees(a) - rot_offset), p)
    if p < REACHABLE_PROBABILITY:
        raise OpticsError(
            f"the spatial target cannot be reached with the mode converter fixed at "
            f"{conv.axis_deg + conv.axis_offset_deg:g} deg (best projection {p:.3f}); with a fixed "
            "converter only Hermite-Gauss modes and modes the converter makes linear are reachable, "
            "such as l+ and l-; add a converter_angle stage role for general targets"
        )
    return setting


def _checked(setting, factor: str, ket: Complex):
    if setting.probability < REACHABLE_PROBABILITY:
        raise OpticsError(
            f"the {factor} analyzer on this bench cannot project onto the target "
            f"({ket[0]:.3f}, {ket[1]:.3f}): best projection {setting.probability:.3f}; "
            "the bench lacks an element this target needs (e.g. a quarter-wave plate or mode converter)"
        )
    return setting


__all__ = [
    "PolarizationSetting",
    "SpatialSetting",
    "polarization_setting",
    "polarization_setting_variants",
    "spatial_setting",
    "PlateModel",
    "ConverterModel",
    "RotatorModel",
]
