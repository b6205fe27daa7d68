"""Which settings of the correction stack turn a measured joint state into a target: the optimisation.

The fidelity of rho, after local unitaries Up (x) Us, to a pure target |t> is

    F = <t| (Up (x) Us) rho (Up (x) Us)^dagger |t> = (1/4) tr(T^T Op^ R Os^T)

with R_ij = tr(rho s_i (x) s_j) and T_ij = tr(|t><t| s_i (x) s_j) the Pauli (Bloch) coefficient
matrices (s_0 = I, s_1..3 = Z, X, Y as in sequencer.optics.stokes) and Op^ = diag(1, Op), Os^ the
rotations Up, Us make on the Poincare spheres (SU(2) -> SO(3)). For one factor fixed, F is linear in
the other rotation, and its maximum over SO(3) is an orthogonal Procrustes problem with a closed
form (SVD with the determinant fixed; Umeyama, IEEE TPAMI 13, 376 (1991), from memory).

Best fidelity under any local unitaries:
- maximally entangled target: one factor suffices (every maximally entangled state is
  (I (x) V)|Phi+>, and (A (x) B)|Phi+> = (I (x) B A^T)|Phi+>), so Procrustes on the polarization
  rotation with the spatial one left alone is the global optimum, equal to the fully entangled
  fraction (closed form, Hill-Wootters magic basis; for a pure state with Schmidt coefficients
  sqrt(l1), sqrt(l2) it is (sqrt(l1) + sqrt(l2))^2 / 2, Horodecki, Horodecki, Horodecki, PRA 60,
  1888 (1999), from memory);
- a pure state and any pure target: |<t|(Up (x) Us)|psi>|^2 is at most (sum_k s_k(t) s_k(psi))^2,
  Schmidt coefficients in decreasing order, with equality when the Schmidt bases are aligned (von
  Neumann's trace inequality): closed form; for a mixed state the mixture of these maxima over
  its eigenvectors bounds the optimum from above;
- a mixed state and any other pure target: alternating Procrustes from many starts (each step exact, monotone),
  with a certificate: the states reachable from |t> by local unitaries are, in the magic basis
  x = a + i b, those with |x^T x| = C (the target's concurrence), i.e. |a|^2 = (1 + C)/2,
  |b|^2 = (1 - C)/2, a . b = 0 after a phase; the Lagrangian dual of maximising x^dagger rho x over
  that set is min over (delta, nu) of 2 lambda_max(Q - N(delta, nu)), an upper bound valid at any
  (delta, nu) (weak duality). When these bounds leave a gap above the tolerance, a branch and
  bound certifies the optimum: the target is unchanged by opposite phases on its Schmidt vectors,
  so only two angles of the spatial rotation matter (its coset modulo turns about the spatial
  Schmidt axis), each changing F by at most 1/2 per radian, and the polarization optimum is closed
  form for each. The reported gap is the bound minus the value reached.

The lab's stack: the quarter-half-quarter polarization stack is universal, so the polarization
rotation is always the Procrustes optimum; the spatial elements (converter in/out at an angle,
rotator in/out at an angle) are searched by branch and bound over their angles with a Lipschitz
bound (|dF/d angle| <= 2 per radian for either element, the commutator bound ||[P, G]|| <=
spread(G)/2 for a projector P), which certifies the optimum to a stated tolerance.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import minimize
from scipy.spatial.transform import Rotation

from lightloom.sequencer.analysis.estimate.merit import fully_entangled_fraction
from lightloom.sequencer.errors import OpticsError
from lightloom.sequencer.optics.correction import (
    StackSettings, polarization_angles, polarization_stack, spatial_stack, stack_unitary,
)
from lightloom.sequencer.optics.states import as_density, normalize_ket
from lightloom.sequencer.optics.stokes import PAULI

Complex = NDArray[np.complex128]
Real = NDArray[np.float64]

MAXIMALLY_ENTANGLED = 1.0 - 1e-9  # concurrence above which a target counts as maximally entangled
PURE_WITHIN = 1e-10  # a state whose largest eigenvalue is this close to 1 is treated as pure
LIPSCHITZ_PER_RAD = 2.0
SEARCH_TOLERANCE = 1e-3  # branch and bound stops when the bound is within this of the best value
MAX_EVALUATIONS = 400_000
STARTS = 48
# Settings are preferred with fewer elements in the beam when they reach the best within this.
SIMPLER_WITHIN = 1e-9

_SIGMA = PAULI[1:]  # Z, X, Y: the Stokes axes S1, S2, S3
_S = 1.0 / np.sqrt(2.0)
# Hill-Wootters magic basis (columns), in which the concurrence of a ket x is |x^T x|.
MAGIC = np.array(
    [[_S, 1j * _S, 0, 0], [0, 0, 1j * _S, _S], [0, 0, 1j * _S, -_S], [_S, -1j * _S, 0, 0]],
    dtype=np.complex128,
)
_YY = np.kron(PAULI[3], PAULI[3])


def concurrence_of_ket(ket: ArrayLike) -> float:
    """|<t*| Y (x) Y |t>| of a normalised two-qubit ket (Wootters, PRL 80, 2245 (1998))."""
    k = normalize_ket(ket)
    return float(abs(k @ _YY @ k))


def bloch_coefficients(rho: ArrayLike) -> Real:
    """R_ij = tr(rho s_i (x) s_j), i, j = 0..3 (s = I, Z, X, Y); works on stacks (..., 4, 4)."""
    r = np.asarray(rho, dtype=np.complex128).reshape(*np.shape(rho)[:-2], 2, 2, 2, 2)
    return np.einsum("iba,jdc,...acbd->...ij", PAULI, PAULI, r).real


def rotation_of(unitary: ArrayLike) -> Real:
    """The rotation O_ki = tr(s_k U s_i U^dagger)/2 (k, i = Z, X, Y) that U makes on the Poincare
    sphere; stacks (..., 2, 2) -> (..., 3, 3)."""
    u = np.asarray(unitary, dtype=np.complex128)[..., None, :, :]
    conj = u @ _SIGMA @ np.swapaxes(u.conj(), -1, -2)  # (..., i, 2, 2): U s_i U^dagger
    return 0.5 * np.einsum("kab,...iba->...ki", _SIGMA, conj).real


def unitary_of(rotation: ArrayLike) -> Complex:
    """A 2x2 unitary U (up to sign) with rotation_of(U) = ``rotation`` (a proper rotation, 3x3):
    U = cos(phi/2) I - i sin(phi/2) n . s for the rotation by phi about n (s = Z, X, Y)."""
    vec = Rotation.from_matrix(np.asarray(rotation, dtype=float)).as_rotvec()
    phi = float(np.linalg.norm(vec))
    if phi < 1e-15:
        return np.eye(2, dtype=np.complex128)
    n = vec / phi
    return np.cos(phi / 2) * np.eye(2) - 1j * np.sin(phi / 2) * np.einsum("k,kab->ab", n, _SIGMA)


def procrustes(n: ArrayLike) -> tuple[Real, Real]:
    """argmax and max of tr(O N) over proper rotations O, for a stack of 3x3 matrices N."""
    u, s, vt = np.linalg.svd(np.asarray(n, dtype=float))
    v = np.swapaxes(vt, -1, -2)
    d = np.sign(np.linalg.det(v @ np.swapaxes(u, -1, -2)))
    d = np.where(d == 0, 1.0, d)
    s_fixed = s.copy()
    s_fixed[..., 2] *= d
    v_fixed = v.copy()
    v_fixed[..., :, 2] *= d[..., None]
    return v_fixed @ np.swapaxes(u, -1, -2), s_fixed.sum(axis=-1)


def procrustes_value(n: ArrayLike) -> Real:
    """max of tr(O N) over proper rotations, without the argmax: s1 + s2 + sign(det N) s3 (singular
    values s1 >= s2 >= s3), for searches that need only the value."""
    a = np.asarray(n, dtype=float)
    sv = np.linalg.svd(a, compute_uv=False)
    sign = np.where(np.linalg.det(a) < 0, -1.0, 1.0)
    return sv[..., 0] + sv[..., 1] + sign * sv[..., 2]


def _hat(o: Real) -> Real:
    out = np.zeros(o.shape[:-2] + (4, 4))
    out[..., 0, 0] = 1.0
    out[..., 1:, 1:] = o
    return out


def _best_polarization(r: Real, t: Real, os_: Real) -> tuple[Real, Real]:
    """For spatial rotations os_ (n, 3, 3): the best polarization rotations and the fidelities."""
    m = r @ np.swapaxes(_hat(os_), -1, -2) @ t.T
    op, val = procrustes(m[..., 1:, 1:])
    return op, 0.25 * (m[..., 0, 0] + val)


def _best_polarization_value(r: Real, t: Real, os_: Real) -> Real:
    """The fidelities of _best_polarization, fast (for searches)."""
    m = r @ np.swapaxes(_hat(os_), -1, -2) @ t.T
    return 0.25 * (m[..., 0, 0] + procrustes_value(m[..., 1:, 1:]))


def _best_spatial(r: Real, t: Real, op: Real) -> tuple[Real, Real]:
    m = r.T @ np.swapaxes(_hat(op), -1, -2) @ t
    os_, val = procrustes(m[..., 1:, 1:])
    return os_, 0.25 * (m[..., 0, 0] + val)


def _alternate(r: Real, t: Real, os_: Real, iterations: int = 400) -> tuple[Real, Real, Real]:
    """Alternating exact maximisation over each factor from starts os_ (n, 3, 3), vectorised."""
    op, val = _best_polarization(r, t, os_)
    for _ in range(iterations):
        os_, _ = _best_spatial(r, t, op)
        op, new = _best_polarization(r, t, os_)
        done = np.all(new - val < 1e-14)
        val = new
        if done:
            break
    return op, os_, val


def dual_bound(rho: ArrayLike, concurrence: float) -> float:
    """Upper bound on max <x| rho |x> over kets of the given concurrence (Lagrangian dual, see module)."""
    rm = MAGIC.conj().T @ as_density(rho) @ MAGIC
    s, a = rm.real, rm.imag
    al = np.sqrt((1.0 + concurrence) / 2.0)
    be = np.sqrt(max(0.0, (1.0 - concurrence) / 2.0))
    q = np.block([[al * al * s, al * be * a.T], [al * be * a, be * be * s]])
    eye = np.eye(4)

    def value(p: NDArray[np.float64]) -> float:
        delta, nu = p
        n0 = np.block([[-0.5 * delta * eye, 0.5 * nu * eye], [0.5 * nu * eye, 0.5 * delta * eye]])
        return 2.0 * float(np.linalg.eigvalsh(q - n0)[-1])

    best = value(np.zeros(2))
    for start in ([0.0, 0.0], [-(al * al - be * be), 0.0], [0.5, 0.5], [-0.5, -0.5]):
        res = minimize(value, np.asarray(start), method="Nelder-Mead",
                       options={"xatol": 1e-12, "fatol": 1e-14, "maxiter": 4000})
        best = min(best, value(res.x))  # re-evaluated: any point is a valid bound
    return min(best, float(np.linalg.eigvalsh(as_density(rho))[-1]))


def _spatial_schmidt_axis(target: ArrayLike) -> Real:
    """Poincare-sphere axis (S1, S2, S3) of the target's leading spatial Schmidt vector."""
    psi = normalize_ket(target).reshape(2, 2)  # rows: polarization, columns: spatial
    _, _, vh = np.linalg.svd(psi)
    b = vh[0]  # |t> = sum_k s_k |u_k> (x) |conj(v_k)>, and conj(v_0) = vh[0]
    return np.einsum("a,kab,b->k", b.conj(), _SIGMA, b).real


def _align_s1_to(axis: Real) -> Real:
    """A rotation taking the S1 axis (1, 0, 0) to the unit vector ``axis``."""
    e1 = np.array([1.0, 0.0, 0.0])
    n = axis / np.linalg.norm(axis)
    cross = np.cross(e1, n)
    sin, cos = float(np.linalg.norm(cross)), float(e1 @ n)
    if sin < 1e-12:
        return np.eye(3) if cos > 0 else np.diag([-1.0, -1.0, 1.0])
    return Rotation.from_rotvec(cross / sin * np.arctan2(sin, cos)).as_matrix()


def _coset_rotations(base: Real, angles: Real) -> Real:
    """base . R_2(beta) . R_1(gamma) for angle rows (n, 2) = (beta, gamma): R_k turns about the
    S_k axis. (base R_2 R_1)^T applied to base's S1 image covers the sphere."""
    b, g = angles[:, 0], angles[:, 1]
    cb, sb, cg, sg = np.cos(b), np.sin(b), np.cos(g), np.sin(g)
    n = len(b)
    r2 = np.zeros((n, 3, 3))
    r2[:, 0, 0], r2[:, 0, 2], r2[:, 1, 1], r2[:, 2, 0], r2[:, 2, 2] = cb, sb, 1.0, -sb, cb
    r1 = np.zeros((n, 3, 3))
    r1[:, 0, 0], r1[:, 1, 1], r1[:, 1, 2], r1[:, 2, 1], r1[:, 2, 2] = 1.0, cg, -sg, sg, cg
    return base @ r2 @ r1


def _schmidt(ket: ArrayLike) -> tuple[Complex, Real, Complex]:
    """SVD of the 2x2 coefficient matrix (rows polarization, columns spatial) of a ket."""
    return np.linalg.svd(normalize_ket(ket).reshape(2, 2))


def _pure_overlap(ket: ArrayLike, target: ArrayLike) -> float:
    """max over local unitaries of |<t| (Up (x) Us) |psi>|^2 = (sum_k s_k(t) s_k(psi))^2, the Schmidt
    coefficients in decreasing order (von Neumann's trace inequality, with equality when the
    singular vectors are aligned; von Neumann, Tomsk Univ. Rev. 1, 286 (1937), from memory)."""
    return float(np.dot(_schmidt(ket)[1], _schmidt(target)[1]) ** 2)


def _pure_optimum(ket: ArrayLike, target: ArrayLike) -> "LocalOptimum":
    """The closed-form optimum for a pure state: Up = C A^dagger, Us = conj(D) B^T, with psi's
    matrix A S B^dagger and the target's C S' D^dagger, so (Up (x) Us)|psi> has matrix C S D^dagger."""
    a, _, bh = _schmidt(ket)
    c, _, dh = _schmidt(target)
    up = c @ a.conj().T
    us = dh.T @ bh.conj()  # conj(D) B^T with D = dh^dagger, B = bh^dagger
    value = _pure_overlap(ket, target)
    return LocalOptimum(value, up, us, value,
                        "closed form for a pure state: Schmidt coefficients aligned (von Neumann trace inequality)")


@dataclass(frozen=True)
class LocalOptimum:
    """The best fidelity under any local unitaries, the unitaries, and its certificate."""

    value: float
    polarization: Complex  # 2x2
    spatial: Complex  # 2x2
    upper_bound: float
    method: str


def best_local(rho: ArrayLike, target: ArrayLike, rng: np.random.Generator | None = None,
               tol: float = SEARCH_TOLERANCE) -> LocalOptimum:
    """max over Up, Us of <t|(Up (x) Us) rho (Up (x) Us)^dagger|t> for a pure target ket ``t``."""
    r = bloch_coefficients(as_density(rho))
    t = bloch_coefficients(as_density(target))
    c = concurrence_of_ket(target)
    if c >= MAXIMALLY_ENTANGLED:
        op, val = _best_polarization(r, t, np.eye(3)[None])
        fef = float(fully_entangled_fraction(as_density(rho)[None])[0])
        return LocalOptimum(float(val[0]), unitary_of(op[0]), np.eye(2, dtype=np.complex128), fef,
                            "closed form: a unitary on the polarization alone; value = fully entangled fraction")
    weights, vectors = np.linalg.eigh(as_density(rho))
    if weights[-1] >= 1.0 - PURE_WITHIN:
        return _pure_optimum(vectors[:, -1], target)
    rng = rng if rng is not None else np.random.default_rng(0)
    starts = np.concatenate([np.eye(3)[None], Rotation.random(STARTS, random_state=rng).as_matrix()])
    op, os_, val = _alternate(r, t, starts)
    i = int(np.argmax(val))
    value = float(val[i])
    best_op, best_os = op[i], os_[i]
    # the maximum of a mixture is at most the mixture of its components' maxima (closed form each)
    spectral = float(sum(w * _pure_overlap(vectors[:, k], target) for k, w in enumerate(weights) if w > 0))
    bound = min(dual_bound(rho, c), spectral)
    how = (f"alternating Procrustes from {STARTS + 1} starts; upper bound: Lagrangian dual and the "
           "eigen-decomposition bound")
    if bound - value > tol:
        # The target is unchanged by opposite phases on its Schmidt vectors, so only the spatial
        # rotation's coset modulo turns about the spatial Schmidt axis matters: two angles, each
        # a Poincare-sphere rotation with |dF/d angle| <= 1/2 per rad; the polarization optimum is
        # closed form for each. Branch and bound over those two angles certifies the optimum.
        base = _align_s1_to(_spatial_schmidt_axis(target))

        def g(angles: Real) -> Real:
            return _best_polarization_value(r, t, _coset_rotations(base, angles))

        bb_value, bb_x, bb_bound, evals = branch_and_bound(g, [np.pi, 2 * np.pi], 0.5, tol, MAX_EVALUATIONS)
        if bb_bound < bound:
            bound = bb_bound
            how = (f"alternating Procrustes from {STARTS + 1} starts; upper bound: branch and bound over the "
                   f"spatial rotation modulo the target's symmetry ({evals} evaluations)")
        if bb_value > value + 1e-12:  # the starts missed the optimum: take the searched one
            os_bb = _coset_rotations(base, bb_x[None])[0]
            op_bb, v_bb = _best_polarization(r, t, os_bb[None])
            if float(v_bb[0]) > value:
                value, best_os, best_op = float(v_bb[0]), os_bb, op_bb[0]
    return LocalOptimum(value, unitary_of(best_op), unitary_of(best_os), max(bound, value), how)


# ---------------------------------------------------------------- the lab's stack


@dataclass(frozen=True)
class SpatialChoice:
    """One way of using the spatial elements: which are in, and the angles searched (deg ranges)."""

    name: str
    converter: bool
    rotator: bool


def _spatial_unitaries(choice: SpatialChoice, angles_rad: Real, converter_axis_deg: float | None) -> Complex:
    """Spatial stacks for angle rows (n, d): columns are the free angles (converter axis if it turns,
    then rotator)."""
    n = angles_rad.shape[0]
    col = 0
    conv = None
    if choice.converter:
        if converter_axis_deg is None:
            conv = np.degrees(angles_rad[:, col])
            col += 1
        else:
            conv = np.full(n, converter_axis_deg)
    rot = np.degrees(angles_rad[:, col]) if choice.rotator else None
    u = spatial_stack(conv, rot)
    return np.broadcast_to(u, (n, 2, 2))


def _ranges(choice: SpatialChoice, converter_axis_deg: float | None) -> list[float]:
    """Period (rad) of each free angle: a converter repeats after 180 deg, a rotator (up to phase)
    after 90 deg."""
    out = []
    if choice.converter and converter_axis_deg is None:
        out.append(np.pi)
    if choice.rotator:
        out.append(np.pi / 2)
    return out


def branch_and_bound(g, periods: list[float], lipschitz: float, tol: float, max_evaluations: int,
                     floor: float = -np.inf, enough: float = np.inf) -> tuple[float, Real, float, int]:
    """Maximise g over the box prod [0, period) with a Lipschitz bound (L1 metric, per radian).

    ``g`` maps (n, d) angle rows to (n,) values. Returns (best value, its angles, certified upper
    bound, evaluations). The bound is the largest of the best value and the bounds of every cell
    discarded or left when the evaluation budget ran out. Cells that cannot beat ``floor`` (a value
    reached elsewhere) + tol are discarded too; the bound then holds where it exceeds ``floor``.
    The search stops as soon as a value reaches ``enough`` (then the bound is infinite: the caller
    holds a better one).
    """
    d = len(periods)
    if d == 0:
        v = float(g(np.zeros((1, 0)))[0])
        return v, np.zeros(0), v, 1
    per = np.asarray(periods)
    n0 = 96 if d == 1 else 32
    h = per / n0 / 2.0
    axes = [np.arange(n0) * (p / n0) + p / n0 / 2.0 for p in per]
    centres = np.array(list(itertools.product(*axes)))
    vals = g(centres)
    evals = len(vals)
    i = int(np.argmax(vals))
    best, best_x = float(vals[i]), centres[i].copy()
    discarded = -np.inf
    signs = np.array(list(itertools.product((-1.0, 1.0), repeat=d)))
    while True:
        ub = vals + lipschitz * float(h.sum())
        active = ub > max(best, floor) + tol
        if (~active).any():
            discarded = max(discarded, float(ub[~active].max()))
        centres, vals, ub = centres[active], vals[active], ub[active]
        if len(centres) == 0:
            break
        if best >= enough:
            return best, np.mod(best_x, per), np.inf, evals
        if evals + len(centres) * len(signs) > max_evaluations:
            discarded = max(discarded, float(ub.max()))
            break
        h = h / 2.0
        centres = (centres[:, None, :] + signs[None] * h[None, None, :]).reshape(-1, d)
        vals = g(centres)
        evals += len(vals)
        i = int(np.argmax(vals))
        if vals[i] > best:
            best, best_x = float(vals[i]), centres[i].copy()
    return best, np.mod(best_x, per), max(best, discarded), evals


@dataclass(frozen=True)
class Advice:
    """What the advisor found for one state and target."""

    settings: StackSettings
    fidelity: float  # reached with the settings (point estimate of the state)
    fidelity_upper_bound: float  # certified bound on what the lab's elements can reach
    search: str  # how the lab's optimum was found and certified
    best_local: LocalOptimum
    unitary: Complex  # 4x4 of the settings
    best_unitary: Complex  # 4x4 local unitary reaching best_local
    fidelity_now: float  # without any correction
    target_concurrence: float
    spatial_universal: bool = False


def _choices() -> list[SpatialChoice]:
    """Ways of using the spatial elements, simplest first (fewest elements in the beam)."""
    return [
        SpatialChoice("none", False, False),
        SpatialChoice("rotator", False, True),
        SpatialChoice("converter", True, False),
        SpatialChoice("converter+rotator", True, True),
    ]


def advise(rho: ArrayLike, target: ArrayLike, *, converter_axis_deg: float | None = None,
           tol: float = SEARCH_TOLERANCE, rng: np.random.Generator | None = None) -> Advice:
    """Settings of the correction stack that bring ``rho`` closest to the pure ``target``.

    Parameters
    ----------
    rho : 4x4 density matrix (or 4-ket) in the basis |H,h>, |H,v>, |V,h>, |V,v>.
    target : 4-ket.
    converter_axis_deg : the converter's fixed mount angle, or None when a stage turns it.
    tol : certification tolerance of the spatial search (fidelity units).
    """
    rho4 = as_density(rho)
    tket = normalize_ket(target)
    if rho4.shape != (4, 4) or tket.shape != (4,):
        raise OpticsError("the advisor works on joint (4x4) states and 4-amplitude targets")
    r = bloch_coefficients(rho4)
    t = bloch_coefficients(as_density(tket))
    local = best_local(rho4, tket, rng, tol)
    c = concurrence_of_ket(tket)
    found: list[tuple[SpatialChoice, float, Real, float, int]] = []
    for choice in _choices():
        if found and max(f[1] for f in found) >= local.value - SIMPLER_WITHIN:
            break  # a simpler use of the elements already reaches the best local fidelity
        def g(angles: Real, choice: SpatialChoice = choice) -> Real:
            us = _spatial_unitaries(choice, angles, converter_axis_deg)
            return _best_polarization_value(r, t, rotation_of(us))
        periods = _ranges(choice, converter_axis_deg)
        if c >= MAXIMALLY_ENTANGLED and choice.name == "none":
            # one factor suffices: the polarization stack alone reaches the local optimum
            v = float(g(np.zeros((1, 0)))[0])
            found.append((choice, v, np.zeros(0), v, 1))
            break
        floor = max((f[1] for f in found), default=-np.inf)
        value, x, ub, evals = branch_and_bound(g, periods, LIPSCHITZ_PER_RAD, tol, MAX_EVALUATIONS, floor,
                                               enough=local.value - SIMPLER_WITHIN)
        if len(x):  # polish the best cell's centre to the exact local maximum
            res = minimize(lambda a, g=g: -float(g(a[None, :])[0]), x, method="Nelder-Mead",
                           options={"xatol": 1e-10, "fatol": 1e-15, "maxiter": 2000})
            if -res.fun > value:
                value, x = float(-res.fun), np.mod(res.x, np.asarray(periods))
        found.append((choice, value, x, max(ub, value), evals))
    best_value = max(f[1] for f in found)
    choice, value, angles, _, _ = next(f for f in found if f[1] >= best_value - SIMPLER_WITHIN)
    if best_value >= local.value - SIMPLER_WITHIN:
        bound = local.upper_bound
    else:
        bound = min(max(f[3] for f in found), local.upper_bound)
    evaluations = sum(f[4] for f in found)
    us = _spatial_unitaries(choice, angles[None, :], converter_axis_deg)[0]
    op, exact = _best_polarization(r, t, rotation_of(us)[None])
    value = float(exact[0])
    q1, h, q2 = polarization_angles(unitary_of(op[0]))
    col = 0
    conv_deg = None
    if choice.converter:
        if converter_axis_deg is None:
            conv_deg = _wrap(np.degrees(angles[col]), 180.0)
            col += 1
        else:
            conv_deg = float(converter_axis_deg)
    rot_deg = _wrap(np.degrees(angles[col]), 90.0) if choice.rotator else None
    settings = StackSettings(q1, h, q2, conv_deg, rot_deg)
    u = stack_unitary(settings)
    reached = fidelity_after(rho4, tket, u)
    if abs(reached - value) > 1e-7:  # pragma: no cover - the optics and the algebra disagree: a bug
        raise AssertionError(f"advised settings reach {reached:.9f}, the optimisation said {value:.9f}")
    if c >= MAXIMALLY_ENTANGLED:
        search = "closed form: the polarization stack alone reaches the best local fidelity"
    elif reached >= local.value - SIMPLER_WITHIN:
        search = (f"the elements reach the best local fidelity, certified within "
                  f"{max(local.upper_bound - local.value, 0.0):.1e} ({local.method})")
    else:
        search = (f"branch and bound over the spatial elements' angles (Lipschitz {LIPSCHITZ_PER_RAD:g} per rad, "
                  f"{evaluations} evaluations); the converter and rotator do not reach every SU(2)")
    if reached > local.value:
        # the stack's transformation is itself local: the search over any local unitary fell short
        local = replace(local, value=reached, polarization=polarization_stack(q1, h, q2),
                        spatial=spatial_stack(conv_deg, rot_deg), upper_bound=max(local.upper_bound, reached))
    best_u = np.kron(local.polarization, local.spatial)
    return Advice(
        settings=settings, fidelity=reached, fidelity_upper_bound=max(bound, reached), search=search,
        best_local=local, unitary=u, best_unitary=best_u,
        fidelity_now=float((tket.conj() @ rho4 @ tket).real), target_concurrence=c,
    )


def _wrap(a: float, period: float) -> float:
    w = float(np.mod(a, period))
    return 0.0 if abs(w - period) < 1e-9 else round(w, 9) + 0.0


def fidelity_after(rho: ArrayLike, target: ArrayLike, unitary: ArrayLike) -> float:
    """<t| U rho U^dagger |t> for a 4x4 unitary ``unitary``."""
    t = normalize_ket(target)
    u = np.asarray(unitary, dtype=np.complex128)
    k = u.conj().T @ t
    return float((k.conj() @ as_density(rho) @ k).real)


def pulled_back_target(target: ArrayLike, unitary: ArrayLike) -> Complex:
    """U^dagger |t><t| U: the fidelity of rho to it is the fidelity of U rho U^dagger to |t>."""
    k = np.asarray(unitary, dtype=np.complex128).conj().T @ normalize_ket(target)
    return np.outer(k, k.conj())
