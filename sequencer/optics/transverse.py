"""Transverse fields of the first-order modes at the waist, and the local polarization of a joint state.

Coordinates are in units of the waist radius w0 (xi = x / w0, eta = y / w0). The Hermite-Gauss
functions follow Siegman, Lasers (1986), ch. 16 (from memory; the same form is quoted in the
encyclopedic literature on Hermite-Gaussian modes):

    u_n(x) = (2/pi)^(1/4) (2^n n! w0)^(-1/2) H_n(sqrt2 x / w0) exp(-x^2 / w0^2)

with H_n the physicists' Hermite polynomials (H_0 = 1, H_1(z) = 2z). In waist units (w0 = 1) the
first-order pair is

    h = HG(1,0) = u_1(xi) u_0(eta) = 2 sqrt(2/pi) xi  exp(-(xi^2 + eta^2))   (lobes along x)
    v = HG(0,1) = u_0(xi) u_1(eta) = 2 sqrt(2/pi) eta exp(-(xi^2 + eta^2))   (lobes along y)

each normalised to a unit integral of |u|^2 over the plane (in units of w0^2). With this choice
l+- = (h +- i v)/sqrt2 is proportional to (xi +- i eta) exp(-r^2), the charge +-1 vortex; the radial
mode (|H,h> + |V,v>)/sqrt2 has the field (xi, eta) exp(-r^2), along the radius, and the azimuthal
mode (|V,h> - |H,v>)/sqrt2 the field (-eta, xi) exp(-r^2), along the azimuth: the decomposition of
cylindrical vector beams into HG(1,0) and HG(0,1) with x and y polarization (Zhan, Adv. Opt.
Photon. 1, 1 (2009), from memory). The x, y axes are those of the Jones vectors (H along x).

The field of a joint state, in the basis |H,h>, |H,v>, |V,h>, |V,v>, is the Jones vector at every
point, E_p(x, y) = sum_m c_(p,m) u_m(x, y). For a density matrix the local coherency (polarization)
matrix is linear in rho:

    J_pq(x, y) = sum_(m, m') rho_((p,m),(q,m')) u_m(x, y) u_m'(x, y)^*

and the local Stokes parameters are S_k = tr(J sigma_k) with the Pauli matrices of
sequencer.optics.stokes (S1 = H - V, S2 = D - A, S3 = R - L; (1, i)/sqrt2 has S3 = +1). Equivalently
S_k(x, y) = tr[rho (sigma_k (x) |w><w|)] with w = (u_h, u_v)^* at the point: the expectation of a
Pauli matrix on the polarization times the (unnormalised) projector on the local mode vector. For a
pure state J = E E^dagger. Because the modes are orthonormal, the integral of J over the plane is the
reduced polarization state tr_spatial(rho): the integrated local Stokes maps are the beam's
polarization Stokes vector times its power.

Every function takes arrays of coordinates (any matching shape) and returns arrays of that shape
with the component axes last; nothing here draws or reads files.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from lightloom.sequencer.optics.states import as_density
from lightloom.sequencer.optics.stokes import PAULI

Complex = NDArray[np.complex128]
Real = NDArray[np.float64]

# 2 sqrt(2/pi): the amplitude factor of the first-order pair at the waist, w0 = 1.
_FIRST_ORDER = 2.0 * np.sqrt(2.0 / np.pi)
POLARIZER_ANGLES_DEG: tuple[float, ...] = (0.0, 45.0, 90.0, 135.0)


def first_order_modes(x: ArrayLike, y: ArrayLike) -> Real:
    """The fields (h, v) = (HG(1,0), HG(0,1)) at the waist, at coordinates in waist units.

    Parameters
    ----------
    x, y : arrays of the same (or broadcastable) shape, in units of the waist radius w0.

    Returns
    -------
    ndarray (..., 2): u_h and u_v in units of 1/w0 (unit integral of |u|^2 over the plane in w0^2).
    """
    xi, eta = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(y, dtype=float))
    g = _FIRST_ORDER * np.exp(-(xi**2 + eta**2))
    return np.stack([xi * g, eta * g], axis=-1)


def field(ket: ArrayLike, x: ArrayLike, y: ArrayLike) -> Complex:
    """Jones vector (E_H, E_V) of a pure joint state at every point, shape (..., 2).

    ``ket`` has 4 amplitudes in the basis |H,h>, |H,v>, |V,h>, |V,v> (normalised here). The
    intensity |E_H|^2 + |E_V|^2 is a power density in units of (beam power) / w0^2.
    """
    k = np.asarray(ket, dtype=np.complex128).reshape(4)
    k = k / np.linalg.norm(k)
    u = first_order_modes(x, y).astype(np.complex128)
    return np.einsum("pm,...m->...p", k.reshape(2, 2), u)


def coherency(state: ArrayLike, x: ArrayLike, y: ArrayLike) -> Complex:
    """Local 2x2 polarization (coherency) matrix J_pq = <E_p E_q^*> at every point, shape (..., 2, 2).

    ``state`` is a 4-ket or a 4x4 density matrix (normalised to unit trace here). Linear in the
    density matrix: a mixture gives the mixture of the components' matrices, never the matrix of a
    single "average" field.
    """
    rho = as_density(state).reshape(2, 2, 2, 2)  # (p, m, q, m')
    u = first_order_modes(x, y).astype(np.complex128)
    return np.einsum("pmqn,...m,...n->...pq", rho, u, u.conj())


def local_stokes(state: ArrayLike, x: ArrayLike, y: ArrayLike) -> Real:
    """Local Stokes parameters [S0, S1, S2, S3] at every point, shape (..., 4), per w0^2.

    S0 is the intensity; S1 = H - V, S2 = D - A, S3 = R - L. Computed from the density matrix
    (see the module docstring), so they are exact for mixed states.
    """
    j = coherency(state, x, y)
    return np.einsum("kqp,...pq->...k", PAULI, j).real


def degree_of_polarization(stokes: ArrayLike, floor: float = 0.0) -> Real:
    """sqrt(S1^2 + S2^2 + S3^2) / S0 point by point; NaN where S0 <= ``floor`` (no light)."""
    s = np.asarray(stokes, dtype=float)
    s0 = s[..., 0]
    with np.errstate(invalid="ignore", divide="ignore"):
        dop = np.linalg.norm(s[..., 1:], axis=-1) / s0
    return np.where(s0 > floor, np.clip(dop, 0.0, 1.0), np.nan)


def orientation_deg(stokes: ArrayLike) -> Real:
    """Orientation psi of the polarization ellipse's major axis, (1/2) atan2(S2, S1), in (-90, 90] deg."""
    s = np.asarray(stokes, dtype=float)
    return np.degrees(0.5 * np.arctan2(s[..., 2], s[..., 1]))


def ellipticity_deg(stokes: ArrayLike) -> Real:
    """Ellipticity angle chi of the polarized part, (1/2) asin(S3 / |S|), in [-45, 45] deg.

    Positive chi is right-handed (S3 > 0, the handedness of sympy.physics.optics.polarization);
    0 where the light is unpolarized.
    """
    s = np.asarray(stokes, dtype=float)
    p = np.linalg.norm(s[..., 1:], axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(p > 0, s[..., 3] / np.where(p > 0, p, 1.0), 0.0)
    return np.degrees(0.5 * np.arcsin(np.clip(ratio, -1.0, 1.0)))


def handedness(stokes: ArrayLike, tolerance: float = 1e-3) -> NDArray[np.int8]:
    """+1 right-handed (S3 > 0), -1 left-handed, 0 linear or unpolarized (|S3| <= tolerance * S0)."""
    s = np.asarray(stokes, dtype=float)
    sign = np.sign(s[..., 3])
    return np.where(np.abs(s[..., 3]) > tolerance * np.abs(s[..., 0]), sign, 0).astype(np.int8)


def polarizer_intensity(stokes: ArrayLike, angle_deg: ArrayLike) -> Real:
    """Intensity behind an ideal linear polarizer with its axis at ``angle_deg`` (from horizontal).

    I = (S0 + S1 cos 2a + S2 sin 2a) / 2 (Goldstein, Polarized Light, ch. 4). ``stokes`` (..., 4)
    and ``angle_deg`` broadcast against its leading shape.
    """
    s = np.asarray(stokes, dtype=float)
    a = np.radians(np.asarray(angle_deg, dtype=float))
    return 0.5 * (s[..., 0] + s[..., 1] * np.cos(2 * a) + s[..., 2] * np.sin(2 * a))


def analyzed_intensity(state: ArrayLike, jones_matrix: ArrayLike, x: ArrayLike, y: ArrayLike) -> Real:
    """Intensity behind any polarization optics with Jones matrix M (2x2, or a stack broadcasting
    against the points): tr(M J M^dagger) at every point, e.g. a wave plate then a polarizer in
    front of a camera. Same units as S0."""
    j = coherency(state, x, y)
    m = np.asarray(jones_matrix, dtype=np.complex128)
    return np.einsum("...ap,...pq,...aq->...", m, j, m.conj()).real


def grid(half_width: float = 2.5, points: int = 41) -> tuple[Real, Real]:
    """A square grid of ``points`` x ``points`` coordinates over [-half_width, half_width] (waist units).

    Returns (x, y), each (points, points), x varying along the second axis (image convention).
    """
    if points < 2 or not np.isfinite(half_width) or half_width <= 0:
        raise ValueError("a grid needs at least 2 points per side and a positive finite half width")
    t = np.linspace(-half_width, half_width, points)
    return np.meshgrid(t, t, indexing="xy")


__all__ = [
    "POLARIZER_ANGLES_DEG",
    "first_order_modes",
    "field",
    "coherency",
    "local_stokes",
    "degree_of_polarization",
    "orientation_deg",
    "ellipticity_deg",
    "handedness",
    "polarizer_intensity",
    "analyzed_intensity",
    "grid",
]
