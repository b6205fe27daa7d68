"""Jones matrices (2x2, vectorised over angle arrays) for polarization elements and their spatial analogues.

Conventions follow sympy.physics.optics.polarization: a retarder at angle theta (fast axis from the
horizontal) with retardance delta is R(theta) diag(1, e^{i delta}) R(-theta) e^{-i delta/2}
(Hecht, Optics, ch. 8; Goldstein, Polarized Light, ch. 4). The same matrices act on the first-order
Hermite-Gauss pair (h, v): the astigmatic pi/2 mode converter is the quarter-wave-plate analogue
(Beijersbergen et al., Opt. Commun. 96, 123 (1993)); the image rotator (e.g. a Dove prism) set at
angle a reflects the image about the axis at a, so it turns a mode by 2a, the half-wave-plate
analogue (Padgett and Courtial, Opt. Lett. 24, 430 (1999)). All angles here are in radians.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

Complex = NDArray[np.complex128]


def rotation(theta: ArrayLike) -> NDArray[np.float64]:
    """Rotation matrices R(theta) = [[cos, -sin], [sin, cos]], shape (..., 2, 2)."""
    t = np.asarray(theta, dtype=float)
    c, s = np.cos(t), np.sin(t)
    return np.stack([np.stack([c, -s], -1), np.stack([s, c], -1)], -2)


def retarder(theta: ArrayLike, retardance: ArrayLike) -> Complex:
    """Linear retarder with fast axis at ``theta`` and retardance ``retardance`` (rad), shape (..., 2, 2)."""
    t = np.asarray(theta, dtype=float)
    d = np.asarray(retardance, dtype=float)
    t, d = np.broadcast_arrays(t, d)
    c, s = np.cos(t), np.sin(t)
    e = np.exp(1j * d)
    off = (1 - e) * c * s
    m = np.stack([np.stack([c**2 + e * s**2, off], -1), np.stack([off, s**2 + e * c**2], -1)], -2)
    return m * np.exp(-0.5j * d)[..., None, None]


def half_wave_plate(theta: ArrayLike, retardance_error: ArrayLike = 0.0) -> Complex:
    """Half-wave plate at ``theta`` (rad) with retardance pi + ``retardance_error``."""
    return retarder(theta, np.pi + np.asarray(retardance_error, dtype=float))


def quarter_wave_plate(theta: ArrayLike, retardance_error: ArrayLike = 0.0) -> Complex:
    """Quarter-wave plate at ``theta`` (rad) with retardance pi/2 + ``retardance_error``."""
    return retarder(theta, np.pi / 2 + np.asarray(retardance_error, dtype=float))


def polarizer(theta: ArrayLike, extinction: float = 0.0) -> Complex:
    """Linear polarizer with transmission axis at ``theta`` (rad).

    ``extinction`` is the power transmission of the blocked axis (0 for an ideal polarizer).
    """
    r = rotation(theta).astype(np.complex128)
    core = np.diag([1.0, np.sqrt(extinction)]).astype(np.complex128)
    return r @ core @ np.swapaxes(r, -1, -2)


def splitter_ports(extinction: float = 0.0) -> tuple[Complex, Complex]:
    """Kraus operators (transmitted H port, reflected V port) of a lossless polarizing beam splitter.

    ``extinction`` is the fraction of the wrong polarization reaching each port; the two POVM
    elements sum to the identity for any value.
    """
    a, b = np.sqrt(1.0 - extinction), np.sqrt(extinction)
    return (
        np.diag([a, b]).astype(np.complex128),
        np.diag([b, a]).astype(np.complex128),
    )


def mode_converter(theta: ArrayLike, retardance: ArrayLike = np.pi / 2) -> Complex:
    """Astigmatic mode converter with its cylinder axis at ``theta`` (rad) acting on (h, v).

    The pi/2 converter (retardance pi/2, the Gouy-phase difference) turns the mode at 45 deg to its
    axis into a Laguerre-Gauss mode: with the axis at 0, d goes to l+ = (h + i v)/sqrt2.
    """
    return retarder(theta, retardance)


def image_rotator(alpha: ArrayLike) -> Complex:
    """Image rotator set at ``alpha`` (rad): reflection about the axis at alpha, turning modes by 2 alpha.

    h (lobes along x) goes to the mode with lobes at 2 alpha; l+ goes to l- (the image is mirrored).
    """
    a = 2.0 * np.asarray(alpha, dtype=float)
    c, s = np.cos(a), np.sin(a)
    return np.stack([np.stack([c, s], -1), np.stack([s, -c], -1)], -2).astype(np.complex128)


def sorter_ports(visibility: float = 1.0) -> tuple[Complex, Complex]:
    """Kraus operators (h port, v port) of a lossless parity sorter with fringe ``visibility``.

    The interferometer sends h to one output and v to the other whatever the polarization; a
    visibility V < 1 leaks (1 - V)/2 of each mode into the wrong output (Leach et al., PRL 88,
    257901 (2002), for the principle).
    """
    a, b = np.sqrt((1.0 + visibility) / 2.0), np.sqrt((1.0 - visibility) / 2.0)
    return (
        np.diag([a, b]).astype(np.complex128),
        np.diag([b, a]).astype(np.complex128),
    )
