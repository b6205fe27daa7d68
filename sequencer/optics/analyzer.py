"""The analyzer chain of a bench as an optics model: element settings -> the POVM element of every port.

The beam meets, on the polarization factor, a quarter-wave plate then a half-wave plate then a
polarizing beam splitter; on the spatial factor, an astigmatic pi/2 mode converter (in or out, at an
angle) then an image rotator then a parity sorter. Elements act on different factors, so their
relative order between factors does not matter. A port (sorter output h|v, splitter output H|V)
measures E = gain * K^dagger K, K = (A_p (x) B_s)(U_pol (x) U_sp), a positive operator on the joint
space in the basis order |H,h>, |H,v>, |V,h>, |V,v>. Absent splitter/sorter: the identity on that factor.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from lightloom.sequencer.model.elements import COLUMN, CONVERTER_IN_CODE, CONVERTER_OUT_CODE
from lightloom.sequencer.model.vocabulary import ELEMENT_NAMES
from lightloom.sequencer.optics import jones

Complex = NDArray[np.complex128]

# Columns of a settings vector (n, 5) and the converter's codes, as model.elements defines them.
QWP, HWP, CONVERTER, CONVERTER_ANGLE, ROTATOR = (COLUMN[name] for name in ELEMENT_NAMES)
CONVERTER_IN, CONVERTER_OUT = CONVERTER_IN_CODE, CONVERTER_OUT_CODE


@dataclass(frozen=True)
class PlateModel:
    """A wave plate on a rotation stage: optical fast axis = commanded angle + offset (deg)."""

    retardance_deg: float
    fast_axis_offset_deg: float = 0.0


@dataclass(frozen=True)
class ConverterModel:
    """The pi/2 mode converter on an in/out actuator.

    ``rotatable``: its angle is set by a converter_angle stage (commanded + offset); otherwise it is
    mounted at ``axis_deg`` (+ offset).
    """

    retardance_deg: float = 90.0
    axis_deg: float = 45.0
    axis_offset_deg: float = 0.0
    rotatable: bool = False


@dataclass(frozen=True)
class RotatorModel:
    """The image rotator on a rotation stage: optical axis = commanded angle + offset (deg)."""

    axis_offset_deg: float = 0.0


@dataclass(frozen=True)
class AnalyzerModel:
    """What the analyzer chain is made of, with its calibration (None = element absent)."""

    quarter_wave_plate: PlateModel | None = None
    half_wave_plate: PlateModel | None = None
    mode_converter: ConverterModel | None = None
    image_rotator: RotatorModel | None = None
    splitter_extinction: float | None = None
    sorter_visibility: float | None = None

    @property
    def analyzes_polarization(self) -> bool:
        return self.splitter_extinction is not None

    @property
    def analyzes_spatial(self) -> bool:
        return self.sorter_visibility is not None


@dataclass(frozen=True)
class PortModel:
    """A detector port: which sorter output (h|v|None) and splitter output (H|V|None), and its gain."""

    name: str
    sorter_port: str | None = None
    splitter_port: str | None = None
    gain: float = 1.0


def complete_port_set(pairs: "list[tuple[str | None, str | None]]") -> bool:
    """True when the (sorter output, splitter output) pairs of several detector ports are every
    combination of the outputs they use: each setting then measures a complete set of projectors
    whose sum is the total power."""
    distinct = set(pairs)
    sorter = {a for a, _ in distinct}
    splitter = {b for _, b in distinct}
    return len(pairs) > 1 and len(distinct) == len(pairs) == len(sorter) * len(splitter)


def park_settings(n: int = 1) -> NDArray[np.float64]:
    """Element settings (n, 5) with every stage at 0 deg and the converter out."""
    s = np.zeros((n, len(ELEMENT_NAMES)))
    s[:, CONVERTER] = CONVERTER_OUT
    return s


def polarization_unitary(model: AnalyzerModel, settings: ArrayLike) -> Complex:
    """Jones matrix U_pol = HWP . QWP for settings (n, 5) (deg), shape (n, 2, 2)."""
    s = np.atleast_2d(np.asarray(settings, dtype=float))
    u = np.broadcast_to(np.eye(2, dtype=np.complex128), (s.shape[0], 2, 2)).copy()
    q = model.quarter_wave_plate
    if q is not None:
        t = np.radians(np.nan_to_num(s[:, QWP]) + q.fast_axis_offset_deg)
        u = jones.retarder(t, np.radians(q.retardance_deg)) @ u
    h = model.half_wave_plate
    if h is not None:
        t = np.radians(np.nan_to_num(s[:, HWP]) + h.fast_axis_offset_deg)
        u = jones.retarder(t, np.radians(h.retardance_deg)) @ u
    return u


def spatial_unitary(model: AnalyzerModel, settings: ArrayLike) -> Complex:
    """Mode transformation U_sp = rotator . converter for settings (n, 5), shape (n, 2, 2)."""
    s = np.atleast_2d(np.asarray(settings, dtype=float))
    n = s.shape[0]
    u = np.broadcast_to(np.eye(2, dtype=np.complex128), (n, 2, 2)).copy()
    c = model.mode_converter
    if c is not None:
        if c.rotatable:
            axis = np.nan_to_num(s[:, CONVERTER_ANGLE]) + c.axis_offset_deg
        else:
            axis = np.full(n, c.axis_deg + c.axis_offset_deg)
        conv = jones.mode_converter(np.radians(axis), np.radians(c.retardance_deg))
        inserted = np.nan_to_num(s[:, CONVERTER]) > 0.5
        u = np.where(inserted[:, None, None], conv @ u, u)
    r = model.image_rotator
    if r is not None:
        a = np.radians(np.nan_to_num(s[:, ROTATOR]) + r.axis_offset_deg)
        u = jones.image_rotator(a) @ u
    return u


def _output_kraus(model: AnalyzerModel, port: PortModel) -> tuple[Complex, Complex]:
    eye = np.eye(2, dtype=np.complex128)
    a = eye
    if port.splitter_port is not None and model.splitter_extinction is not None:
        a = jones.splitter_ports(model.splitter_extinction)["HV".index(port.splitter_port)]
    b = eye
    if port.sorter_port is not None and model.sorter_visibility is not None:
        b = jones.sorter_ports(model.sorter_visibility)["hv".index(port.sorter_port)]
    return a, b


def port_operators(
    model: AnalyzerModel, ports: tuple[PortModel, ...], settings: ArrayLike
) -> Complex:
    """POVM element of every port for every setting: shape (n_settings, n_ports, 4, 4).

    ``settings`` is (n, 5) in degrees (converter 1 = in, 0 = out), ordered as ELEMENT_NAMES.
    """
    s = np.atleast_2d(np.asarray(settings, dtype=float))
    up = polarization_unitary(model, s)
    us = spatial_unitary(model, s)
    out = np.empty((s.shape[0], len(ports), 4, 4), dtype=np.complex128)
    for j, port in enumerate(ports):
        a, b = _output_kraus(model, port)
        kp = a @ up  # (n, 2, 2)
        ks = b @ us
        ep = np.swapaxes(kp.conj(), -1, -2) @ kp
        es = np.swapaxes(ks.conj(), -1, -2) @ ks
        out[:, j] = port.gain * np.einsum("nij,nkl->nikjl", ep, es).reshape(-1, 4, 4)
    return out


def probabilities(state: ArrayLike, operators: ArrayLike) -> NDArray[np.float64]:
    """tr(rho E) for a ket (d,) or density matrix (d, d) and operators (..., d, d)."""
    st = np.asarray(state, dtype=np.complex128)
    e = np.asarray(operators, dtype=np.complex128)
    if st.ndim == 1:
        return np.einsum("i,...ij,j->...", st.conj(), e, st).real
    return np.einsum("ji,...ij->...", st, e).real
