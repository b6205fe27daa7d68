"""What a set of measurement operators determines: joint state, one factor's state, or which parts are missing."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from lightloom.sequencer.optics.determination import MAX_AMPLIFICATION, determination
from lightloom.sequencer.optics.states import POLARIZATION_KETS, SPATIAL_KETS, density

# the identity and the Pauli matrices, written out (common practice, no source)
PAULIS = [np.eye(2), np.array([[1, 0], [0, -1]]), np.array([[0, 1], [1, 0]]), np.array([[0, -1j], [1j, 0]])]

BOTH = ("polarization", "spatial")


def projectors(kets: dict, names: str | list[str]) -> list[np.ndarray]:
    return [density(kets[n]) for n in names]


def pol_only(names: str | list[str]) -> list[np.ndarray]:
    """Polarization projectors on the joint space, the spatial mode traced over (P (x) 1)."""
    return [np.kron(p, np.eye(2)) for p in projectors(POLARIZATION_KETS, names)]


def test_h_and_v_only_is_partial_missing_diagonal_and_circular() -> None:
    det = determination(pol_only("HV"), BOTH, ("polarization",))
    assert det.kind == "partial"
    assert det.missing == (
        "polarization: no diagonal (D/A) projection",
        "polarization: no circular (R/L) projection",
    )
    assert det.stokes["polarization"] == (True, True, False, False)


def test_h_alone_says_h_without_v() -> None:
    det = determination(pol_only("H"), BOTH, ("polarization",))
    assert det.kind == "partial"
    assert "polarization: H without V" in det.missing
    assert det.missing[0].startswith("polarization: no total power")


def test_four_and_six_polarization_projectors_determine_the_polarization_state() -> None:
    # H, V, D, R: the four-setting qubit set of James, Kwiat, Munro, White, PRA 64, 052312 (2001), from memory.
    for names in ("HVDR", "HVDARL"):
        det = determination(pol_only(list(names)), BOTH, ("polarization",))
        assert (det.kind, det.missing) == ("polarization-state", ())


def test_spatial_set_without_orbital_modes_misses_l_plus_l_minus() -> None:
    ops = [np.kron(np.eye(2), p) for p in projectors(SPATIAL_KETS, ["h", "v", "d", "a"])]
    det = determination(ops, BOTH, ("spatial",))
    assert det.missing == ("spatial: no orbital (l+/l-) projection",)


def test_sixteen_product_projectors_determine_the_joint_state() -> None:
    # The 16 products {H,V,D,R} x {h,v,d,l+} are informationally complete for two qubits:
    # James, Kwiat, Munro, White, PRA 64, 052312 (2001), section II (from memory).
    ops = [np.kron(p, s) for p in projectors(POLARIZATION_KETS, list("HVDR"))
           for s in projectors(SPATIAL_KETS, ["h", "v", "d", "l+"])]
    det = determination(ops, BOTH, BOTH)
    assert (det.kind, det.rank, det.full_rank) == ("joint-state", 16, 16)


def test_the_rank_agrees_with_qutip_operators_built_independently() -> None:
    qutip = pytest.importorskip("qutip")
    # Reference library: qutip's basis kets and tensor products (the H/V and h/v bases as qutip.basis(2, k)).
    h, v = qutip.basis(2, 0), qutip.basis(2, 1)
    d, r = (h + v).unit(), (h + 1j * v).unit()
    singles = [h, v, d, r]
    ops = [qutip.tensor(a * a.dag(), b * b.dag()).full() for a in singles for b in singles]
    assert determination(ops, BOTH, BOTH).kind == "joint-state"
    # Dropping the last projector leaves 15 independent operators: no longer complete.
    reduced = determination(ops[:-1], BOTH, BOTH)
    assert reduced.kind == "partial" and reduced.rank == 15
    assert reduced.rank == np.linalg.matrix_rank(np.array([o.reshape(-1) for o in ops[:-1]]))


def test_both_reduced_states_without_correlations_name_the_missing_correlations() -> None:
    # Each factor analysed on its own (the other traced over): both reduced states, no correlations.
    ops = pol_only("HVDARL") + [np.kron(np.eye(2), p) for p in projectors(SPATIAL_KETS, ["h", "v", "d", "a", "l+", "l-"])]
    det = determination(ops, BOTH, BOTH)
    assert det.kind == "partial"
    assert det.stokes["polarization"] == (True,) * 4 and det.stokes["spatial"] == (True,) * 4
    assert all(m.startswith("joint: no ") and m.endswith(" correlation") for m in det.missing)
    assert "joint: no D/A x l+/l- correlation" in det.missing


def test_a_scan_is_a_scan_whatever_its_operators_determine() -> None:
    det = determination(pol_only("HVDARL"), BOTH, ("polarization",), scan=True)
    assert (det.kind, det.missing) == ("scan", ())
    assert det.stokes["polarization"] == (True,) * 4


def test_imperfect_splitter_and_unequal_gains_still_determine_the_state() -> None:
    # A leaky splitter mixes H and V (E = 0.99 P + 0.01 P_perp) and gains scale operators: the span is unchanged.
    rng = np.random.default_rng(3)
    ops = []
    for a, b in (("H", "V"), ("D", "A"), ("R", "L")):
        pa, pb = density(POLARIZATION_KETS[a]), density(POLARIZATION_KETS[b])
        ops += [rng.uniform(0.5, 2) * (0.99 * pa + 0.01 * pb), rng.uniform(0.5, 2) * (0.99 * pb + 0.01 * pa)]
    det = determination([np.kron(o, np.eye(2)) for o in ops], BOTH, ("polarization",))
    assert det.kind == "polarization-state"


def test_single_factor_space_of_2x2_operators() -> None:
    det = determination(projectors(POLARIZATION_KETS, list("HVD")), ("polarization",), ("polarization",))
    assert det.missing == ("polarization: no circular (R/L) projection",)


def test_analyzes_outside_the_factors_is_refused() -> None:
    with pytest.raises(ValueError):
        determination(pol_only("HV"), ("polarization",), ("spatial",))


def test_readings_tangled_with_the_other_factor_say_so() -> None:
    # One detector behind the polarizing splitter's H output reads h, d and l+ with the polarization
    # still selected: the spatial state is not fixed, and the report says why.
    ops = [np.kron(density(POLARIZATION_KETS["H"]), p) for p in projectors(SPATIAL_KETS, ["h", "d", "l+"])]
    det = determination(ops, BOTH, ("spatial",))
    assert det.kind == "partial" and det.stokes["spatial"] == (False,) * 4
    assert "spatial: h without v" in det.missing and "spatial: l+ without l-" in det.missing
    assert det.missing[-1].startswith("spatial: the readings also depend on the polarization state")


def test_ports_that_sum_to_the_other_factors_identity_are_not_called_tangled() -> None:
    # Four ports (H, V) x (h, v) read at one setting: each depends on both factors, their sums do not.
    ops = [np.kron(density(POLARIZATION_KETS[p]), density(SPATIAL_KETS[s])) for p in "HV" for s in "hv"]
    det = determination(ops, BOTH, ("polarization",))
    assert not any("depend" in m for m in det.missing)
    assert det.stokes["polarization"] == (True, True, False, False)


def _random_projectors(rng: np.random.Generator, count: int, d: int = 4) -> np.ndarray:
    kets = rng.normal(size=(count, d)) + 1j * rng.normal(size=(count, d))
    kets /= np.linalg.norm(kets, axis=1, keepdims=True)
    return np.einsum("ni,nj->nij", kets, kets.conj())


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), count=st.integers(1, 24))
def test_what_is_determined_depends_on_the_span_only(seed: int, count: int) -> None:
    # Law: rescaling operators (port gains), reordering them or repeating them changes nothing, and
    # adding operators never loses a determined component.
    rng = np.random.default_rng(seed)
    ops = _random_projectors(rng, count)
    base = determination(ops, BOTH, BOTH)
    shuffled = ops[rng.permutation(count)] * rng.uniform(0.1, 10.0, size=(count, 1, 1))
    again = determination(np.concatenate([shuffled, shuffled[:2]]), BOTH, BOTH)
    assert (again.kind, again.rank, dict(again.stokes)) == (base.kind, base.rank, dict(base.stokes))
    more = determination(np.concatenate([ops, _random_projectors(rng, 3)]), BOTH, BOTH)
    assert more.rank >= base.rank
    for factor in BOTH:
        assert all(m or not b for m, b in zip(more.stokes[factor], base.stokes[factor]))
    # Generic projectors: 16 or more span the whole space (rank min(count, 16)); they determine the
    # state unless some component needs the readings' noise amplified more than MAX_AMPLIFICATION
    # times (the smallest coefficients, by numpy's pseudo-inverse of the unit Pauli coordinates)
    assert base.rank == min(count, 16)
    paulis = [np.kron(a, b) for a in PAULIS for b in PAULIS]
    coords = np.array([[np.trace(e @ p).real for p in paulis] for e in ops])
    coords /= np.linalg.norm(coords, axis=1, keepdims=True)
    worst = np.linalg.norm(np.linalg.pinv(coords.T), axis=0).max() if count >= 16 else np.inf
    assert (base.kind == "joint-state") == (count >= 16 and worst <= MAX_AMPLIFICATION)


def test_a_joint_state_needs_every_component_within_the_amplification_bound_in_the_readings_themselves() -> None:
    # Sixteen generic projectors (seed 614) span the 4x4 space, but polarization S2 is reached only
    # with a reading's noise amplified 52 times; their sums over the spatial outputs would reach it
    # with less, which is no help to a joint estimate made from the readings themselves.
    ops = _random_projectors(np.random.default_rng(614), 16)
    det = determination(ops, BOTH, BOTH)
    assert det.rank == 16
    assert det.kind == "partial" and det.stokes["polarization"][2] is False
    assert any("D/A reached only weakly" in m for m in det.missing)
