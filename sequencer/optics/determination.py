"""What a set of measurement operators determines: the joint state, one factor's state, or which parts.

A reading of a port estimates tr(rho E) for its operator E; linear combinations of readings give
tr(rho M) for every M in the real span of the operators, and nothing else. The state of a factor
(polarization or spatial mode) is determined when the span holds sigma_i (x) 1 for its four Stokes
operators (sigma_0 = 1, sigma_1 = Z, sigma_2 = X, sigma_3 = Y, as in optics.stokes), the joint
state when the span is the whole space of Hermitian operators (informationally complete sets; e.g.
James, Kwiat, Munro, White, Phys. Rev. A 64, 052312 (2001), section II). With S0 included, the
absolute power is determined too, so a complete set needs d^2 independent operators, not d^2 - 1.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass
from types import MappingProxyType
from typing import Mapping, Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from lightloom.sequencer.optics.stokes import PAULI

KINDS: tuple[str, ...] = ("joint-state", "polarization-state", "spatial-state", "partial", "scan")
"""What a protocol determines on a bench (the ``determines`` of validate and dry-run)."""

STATE_KIND: Mapping[tuple[str, ...], str] = MappingProxyType(
    {
        ("polarization", "spatial"): "joint-state",
        ("polarization",): "polarization-state",
        ("spatial",): "spatial-state",
    }
)

# Per factor, the pair of projectors and the physicist's name of each Stokes basis (S1, S2, S3).
BASES: Mapping[str, tuple[tuple[str, str, str], ...]] = MappingProxyType(
    {
        "polarization": (
            ("H", "V", "horizontal/vertical (H/V)"), ("D", "A", "diagonal (D/A)"), ("R", "L", "circular (R/L)"),
        ),
        "spatial": (("h", "v", "h/v"), ("d", "a", "diagonal (d/a)"), ("l+", "l-", "orbital (l+/l-)")),
    }
)

RANK_TOLERANCE = 1e-6
"""Singular values below this fraction of the largest count as zero (operators are normalised first)."""

MAX_AMPLIFICATION = 50.0
"""A component counts as determined only when some combination of the readings, each normalised to
unit size, gives it with coefficients of norm at most this (1 for a projector read with its
partner). Beyond it the readings reach the component only through a small imperfection of the
elements (a quarter-wave plate of 91.2 deg where 90 was meant, say), and its estimate carries a
reading's noise amplified that many times."""


@dataclass(frozen=True)
class Determination:
    """What the operators determine.

    ``kind``: one of KINDS. ``state``: the state the operators determine, for a scan as well
    (a quarter-wave plate turned in front of a polarizer is a polarimeter), else None. ``missing``: what lacks, one phrase each ("polarization: no circular
    (R/L) projection"), empty unless ``kind`` is partial. ``stokes``: per factor of the space, which
    of S0..S3 of that factor's reduced state the operators determine. ``rank``: dimension of the real
    span of the operators, out of ``full_rank`` = d^2.
    """

    kind: str
    missing: tuple[str, ...]
    stokes: Mapping[str, tuple[bool, bool, bool, bool]]
    rank: int
    full_rank: int
    state: str | None = None
    """The state kind the operators determine ("polarization-state", ...), a scan's too; None if none."""

    @property
    def complete(self) -> bool:
        """True when the analysed state is fully determined."""
        return self.kind in STATE_KIND.values()


def _pauli_products(n_factors: int) -> tuple[tuple[tuple[int, ...], ...], NDArray[np.complex128]]:
    indices = tuple(itertools.product(range(4), repeat=n_factors))
    mats = []
    for idx in indices:
        m = np.ones((1, 1), dtype=np.complex128)
        for i in idx:
            m = np.kron(m, PAULI[i])
        mats.append(m)
    return indices, np.array(mats)


def _coordinates(operators: NDArray[np.complex128], paulis: NDArray[np.complex128]) -> NDArray[np.float64]:
    """Unit-normalised Pauli-product coordinates tr(E P_k) of the non-zero operators (real for Hermitian E)."""
    coords = np.einsum("kji,nij->nk", paulis, operators).real
    norms = np.linalg.norm(coords, axis=1)
    return coords[norms > 0] / norms[norms > 0, None]


def _unit(size: int, k: int) -> NDArray[np.float64]:
    e = np.zeros(size)
    e[k] = 1.0
    return e


def _unit_rows(coords: NDArray[np.float64]) -> NDArray[np.float64]:
    norms = np.linalg.norm(coords, axis=1)
    return coords[norms > 1e-12] / norms[norms > 1e-12, None]


def _span_basis(coords: NDArray[np.float64]) -> NDArray[np.float64]:
    """Orthonormal rows spanning the real span of ``coords`` (one operator per row)."""
    if coords.shape[0] == 0:
        return np.zeros((0, coords.shape[1]))
    _, s, vt = np.linalg.svd(coords, full_matrices=False)
    return vt[s > RANK_TOLERANCE * s[0]]


def _rank(m: NDArray[np.float64]) -> int:
    if m.size == 0:
        return 0
    s = np.linalg.svd(m, compute_uv=False)
    return int((s > 1e-6 * max(float(s[0]), 1e-300)).sum()) if s[0] > 1e-9 else 0


def _amplification(coords: NDArray[np.float64], vector: NDArray[np.float64]) -> float:
    """Norm of the smallest coefficients c with sum_i c_i coords_i = ``vector`` (inf when none), over
    the distinct rows: a property of the set of settings, not of how often each is read."""
    if coords.shape[0] == 0:
        return float("inf")
    coords = np.unique(np.round(coords, 9), axis=0)
    c, *_ = np.linalg.lstsq(coords.T, vector, rcond=None)
    if np.linalg.norm(coords.T @ c - vector) > 1e-6 * np.linalg.norm(vector):
        return float("inf")
    return float(np.linalg.norm(c))


def _overlap(basis: NDArray[np.float64], vector: NDArray[np.float64]) -> float:
    """Length of the unit ``vector``'s projection onto the span (0: orthogonal, 1: inside)."""
    v = vector / np.linalg.norm(vector)
    return float(np.linalg.norm(basis @ v))


def _in_span(basis: NDArray[np.float64], vector: NDArray[np.float64]) -> bool:
    v = vector / np.linalg.norm(vector)
    residual = v - basis.T @ (basis @ v)
    return bool(np.linalg.norm(residual) < 1e-6)


def determination(
    operators: ArrayLike,
    factors: Sequence[str],
    analyzes: Sequence[str],
    *,
    scan: bool = False,
) -> Determination:
    """What readings of ``operators`` determine about the ``analyzes`` factors.

    Parameters
    ----------
    operators
        Measurement operators (n, d, d), Hermitian, d = 2 ** len(factors), in the basis order of
        ``factors`` (polarization (x) spatial).
    factors
        The factors of the space, e.g. ("polarization", "spatial") for 4x4 operators.
    analyzes
        The factors whose state is wanted (a subset of ``factors``).
    scan
        The readings are a scan (against an angle or time), not meant to give a state: ``kind`` is
        ``scan`` whatever the span; ``stokes`` still says what the operators determine.

    Returns
    -------
    Determination
    """
    factors = tuple(factors)
    wanted = tuple(f for f in factors if f in analyzes)
    if not wanted or len(wanted) != len(set(analyzes)):
        raise ValueError(f"analyzes {tuple(analyzes)} must be a non-empty subset of the factors {factors}")
    n = len(factors)
    d = 2**n
    ops = np.asarray(operators, dtype=np.complex128).reshape(-1, d, d)
    indices, paulis = _pauli_products(n)
    coords = _coordinates(ops, paulis)
    basis = _span_basis(coords)
    position = {idx: k for k, idx in enumerate(indices)}

    def determined(idx: tuple[int, ...]) -> bool:
        e = np.zeros(len(indices))
        e[position[idx]] = 1.0
        return _in_span(basis, e) and _amplification(coords, e) <= MAX_AMPLIFICATION

    def local(f: int, i: int) -> tuple[int, ...]:
        return tuple(i if g == f else 0 for g in range(n))

    stokes = {
        factor: tuple(determined(local(f, i)) for i in range(4)) for f, factor in enumerate(factors)
    }
    missing: list[str] = []
    for f, factor in enumerate(factors):
        if factor not in wanted:
            continue
        if all(stokes[factor]):
            continue
        # Name what lacks from what the readings would give with the other factors' outputs summed: the
        # bases this factor's settings cover. If that is more than the readings give, say why.
        foreign = [k for k, idx in enumerate(indices) if any(i for g, i in enumerate(idx) if g != f)]
        summed = coords.copy()
        summed[:, foreign] = 0.0
        summed_basis = _span_basis(_unit_rows(summed))
        summed_rows = _unit_rows(summed)
        spanned = [_in_span(summed_basis, _unit(len(indices), position[local(f, i)])) for i in range(4)]
        gain = [_amplification(summed_rows, _unit(len(indices), position[local(f, i)])) for i in range(4)]
        if len(wanted) > 1:
            # a joint state is estimated from the readings themselves, not from their sums over the
            # other factor's outputs: a component reached only weakly by them is missing
            gain = [max(g, _amplification(coords, _unit(len(indices), position[local(f, i)]))) for i, g in enumerate(gain)]
        covered = [ok and g <= MAX_AMPLIFICATION for ok, g in zip(spanned, gain)]
        if not covered[0]:
            missing.append(f"{factor}: no total power (no complete basis such as "
                           f"{BASES[factor][0][0]} with {BASES[factor][0][1]})")
        for i, (plus, minus, name) in enumerate(BASES[factor], start=1):
            if covered[i]:
                continue
            if spanned[i] and math.isfinite(gain[i]):
                missing.append(f"{factor}: {plus}/{minus} reached only weakly, through an imperfection of the"
                               f" elements (a reading's noise amplified {gain[i]:.0f} times): add a setting that"
                               f" measures {plus}")
                continue
            p_plus = _projector_determined(summed_basis, position, local(f, 0), local(f, i), +1)
            p_minus = _projector_determined(summed_basis, position, local(f, 0), local(f, i), -1)
            seen = _overlap(summed_basis, _unit(len(indices), position[local(f, i)]))
            if p_plus and not p_minus:
                missing.append(f"{factor}: {plus} without {minus}")
            elif p_minus and not p_plus:
                missing.append(f"{factor}: {minus} without {plus}")
            elif seen > 0.1:  # measured, but not apart from the other components (one output only)
                missing.append(f"{factor}: {plus}/{minus} only in part (one output without the other)")
            else:
                missing.append(f"{factor}: no {name} projection")
        # The readings' own span holds r - rank(foreign part) operators of this factor alone; summing the
        # other factors' outputs would give rank(summed): more means the readings are tangled with them.
        alone = basis.shape[0] - _rank(basis[:, foreign])
        if len(wanted) == 1 and summed_basis.shape[0] > alone:
            others = " and ".join(g for g in factors if g != factor)
            missing.append(f"{factor}: the readings also depend on the {others} state (measure both outputs"
                           f" of the {others} analysis, or give targets so that lightloom does)")
    if len(wanted) > 1 and not missing:
        for idx in indices:
            if all(idx) and not determined(idx):
                pairs = [f"{BASES[factors[g]][i - 1][0]}/{BASES[factors[g]][i - 1][1]}" for g, i in enumerate(idx)]
                missing.append(f"joint: no {' x '.join(pairs)} correlation")
    rank = int(basis.shape[0])
    if scan:
        kind = "scan"
    elif missing:
        kind = "partial"
    else:
        kind = STATE_KIND[wanted]
    return Determination(kind, tuple(missing) if kind == "partial" else (), MappingProxyType(stokes), rank, d * d,
                         None if missing else STATE_KIND[wanted])


def _projector_determined(
    basis: NDArray[np.float64], position: Mapping[tuple[int, ...], int],
    identity: tuple[int, ...], axis: tuple[int, ...], sign: int,
) -> bool:
    """True when (1 + sign * sigma_axis) / 2 lies in the span (the projector onto one basis state)."""
    v = np.zeros(len(position))
    v[position[identity]] = 1.0
    v[position[axis]] = float(sign)
    return _in_span(basis, v)
