"""Port operators of the analyzer chain and the inverse settings: laws that hold for all inputs."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import example, given, settings, strategies as st

from lightloom.sequencer.optics.analyzer import (
    CONVERTER, CONVERTER_ANGLE, HWP, QWP, ROTATOR,
    AnalyzerModel, ConverterModel, PlateModel, PortModel, RotatorModel,
    park_settings, port_operators, probabilities,
)
from lightloom.sequencer.optics.settings import polarization_setting, spatial_setting
from lightloom.sequencer.optics.states import POLARIZATION_KETS, SPATIAL_KETS, normalize_ket

FOUR_PORTS = tuple(PortModel(f"pm_{s}{p}", s, p) for s in "hv" for p in "HV")

angles = st.floats(-360, 360, allow_nan=False)
offsets = st.floats(-5, 5, allow_nan=False)
complex_pairs = st.tuples(*[st.floats(-1, 1, allow_nan=False)] * 4).filter(
    lambda x: np.hypot(np.hypot(x[0], x[1]), np.hypot(x[2], x[3])) > 1e-3
)


def _model(q_off=0.0, h_off=0.0, c_off=0.0, r_off=0.0, q_ret=90.0, h_ret=180.0, c_ret=90.0,
           ext=0.0, vis=1.0, rotatable=True) -> AnalyzerModel:
    return AnalyzerModel(
        PlateModel(q_ret, q_off), PlateModel(h_ret, h_off),
        ConverterModel(c_ret, 45.0, c_off, rotatable), RotatorModel(r_off), ext, vis,
    )


def _settings(q, h, conv_in, c, r) -> np.ndarray:
    s = park_settings(1)
    s[0, QWP], s[0, HWP], s[0, CONVERTER], s[0, CONVERTER_ANGLE], s[0, ROTATOR] = q, h, float(conv_in), c, r
    return s


def _ket(x) -> np.ndarray:
    return normalize_ket([x[0] + 1j * x[1], x[2] + 1j * x[3]])


@settings(max_examples=60, deadline=None)
@given(angles, angles, st.booleans(), angles, angles, st.floats(0, 0.4), st.floats(0.5, 1.0),
       st.floats(60, 120), st.floats(150, 210))
def test_complementary_ports_sum_to_the_identity_for_lossless_elements(q, h, conv_in, c, r, ext, vis, qr, hr):
    # common practice, no source: a lossless analyzer conserves power over all its outputs
    model = _model(q_ret=qr, h_ret=hr, ext=ext, vis=vis)
    e = port_operators(model, FOUR_PORTS, _settings(q, h, conv_in, c, r))[0]
    assert np.allclose(e.sum(axis=0), np.eye(4), atol=1e-12)


@settings(max_examples=60, deadline=None)
@given(angles, angles, st.booleans(), angles, angles, st.floats(0, 0.4), st.floats(0.5, 1.0))
def test_every_port_operator_is_positive_semidefinite(q, h, conv_in, c, r, ext, vis):
    e = port_operators(_model(ext=ext, vis=vis), FOUR_PORTS, _settings(q, h, conv_in, c, r))[0]
    for op in e:
        assert np.allclose(op, op.conj().T, atol=1e-14)
        assert np.linalg.eigvalsh(op).min() > -1e-12


@settings(max_examples=80, deadline=None)
@given(complex_pairs, complex_pairs, st.sampled_from(["H", "V"]), st.sampled_from(["h", "v"]),
       offsets, offsets, offsets, offsets)
@example((0.0, 0.0, 0.0, 1.0), (0.0, 1.0, 1.0, 0.0), "H", "h", 0.0, 0.0, 0.001, 0.0)  # angle just below 0
def test_inverse_settings_send_random_targets_to_their_port(pol, sp, pport, sport, qo, ho, co, ro):
    model = _model(qo, ho, co, ro)
    a, b = _ket(pol), _ket(sp)
    ps = polarization_setting(a, pport, model)
    ss = spatial_setting(b, sport, model)
    s = _settings(ps.quarter_wave_plate_deg, ps.half_wave_plate_deg, ss.converter_in,
                  ss.converter_angle_deg if ss.converter_angle_deg is not None else 0.0, ss.image_rotator_deg)
    j = [p.name for p in FOUR_PORTS].index(f"pm_{sport}{pport}")
    e = port_operators(model, FOUR_PORTS, s)[0]
    assert abs(probabilities(np.kron(a, b), e[j]) - 1.0) < 1e-12


@settings(max_examples=40, deadline=None)
@given(st.sampled_from(list(POLARIZATION_KETS)), st.sampled_from(list(SPATIAL_KETS)), offsets, offsets, offsets, offsets)
def test_named_targets_reach_their_port_with_the_converter_at_a_fixed_angle(pn, sn, qo, ho, co, ro):
    # the sim bench: converter on a flip mount at 45 deg, no converter stage
    model = _model(qo, ho, co, ro, rotatable=False)
    ps = polarization_setting(POLARIZATION_KETS[pn], "H", model)
    ss = spatial_setting(SPATIAL_KETS[sn], "h", model)
    s = _settings(ps.quarter_wave_plate_deg, ps.half_wave_plate_deg, ss.converter_in, np.nan, ss.image_rotator_deg)
    e = port_operators(model, FOUR_PORTS, s)[0, 0]
    assert abs(probabilities(np.kron(POLARIZATION_KETS[pn], SPATIAL_KETS[sn]), e) - 1.0) < 1e-12


@settings(max_examples=40, deadline=None)
@given(complex_pairs, offsets.filter(lambda x: abs(x) > 0.5), offsets.filter(lambda x: abs(x) > 0.5))
def test_calibration_offsets_cancel_the_tables_offsets(pol, qo, ho):
    # The table has fast-axis offsets; settings compiled with the same calibration project exactly,
    # settings compiled as if the plates were ideal do not.
    table = _model(qo, ho)
    a = _ket(pol)
    calibrated = polarization_setting(a, "H", table)
    naive = polarization_setting(a, "H", _model())
    e_cal = port_operators(table, FOUR_PORTS, _settings(calibrated.quarter_wave_plate_deg, calibrated.half_wave_plate_deg, 0, 0, 0))[0]
    e_naive = port_operators(table, FOUR_PORTS, _settings(naive.quarter_wave_plate_deg, naive.half_wave_plate_deg, 0, 0, 0))[0]
    p_cal = probabilities(np.kron(a, [1, 0]), e_cal[0])
    p_naive = probabilities(np.kron(a, [1, 0]), e_naive[0])
    assert abs(p_cal - 1.0) < 1e-12
    if abs(a[1]) > 0.05:  # H itself is insensitive to a QWP offset alone... but not to both; keep a margin
        assert p_naive < 1.0 - 1e-7


def test_retardance_errors_are_polished_close_to_unity() -> None:
    model = _model(q_ret=92.0, h_ret=177.0)
    for name, ket in POLARIZATION_KETS.items():
        ps = polarization_setting(ket, "H", model)
        e = port_operators(model, FOUR_PORTS, _settings(ps.quarter_wave_plate_deg, ps.half_wave_plate_deg, 0, 0, 0))[0]
        p = probabilities(np.kron(ket, [1, 0]), e[0])
        assert p > 0.999, name
        assert np.isclose(p, ps.probability, atol=1e-9)


def test_vectorised_port_operators_equal_one_at_a_time() -> None:
    rng = np.random.default_rng(3)
    s = rng.uniform(0, 180, size=(7, 5))
    s[:, CONVERTER] = rng.integers(0, 2, 7)
    model = _model(0.2, -0.1, 0.3, 0.05, ext=1e-3, vis=0.97)
    stack = port_operators(model, FOUR_PORTS, s)
    for k in range(7):
        assert np.allclose(stack[k], port_operators(model, FOUR_PORTS, s[k : k + 1])[0])


# The table of docs/protocol-language.md ("What element settings measure"): (quarter-wave, half-wave)
# in degrees -> what the splitter's H and V outputs measure.
PLATE_TABLE = [((0, 0), ("H", "V")), ((45, 22.5), ("D", "A")), ((45, 0), ("R", "L")), ((0, 22.5), ("L", "R"))]
# the converter (in/out) and the image rotator (deg) -> the sorter's h and v outputs
MODE_TABLE = [(("out", 0), ("h", "v")), (("out", 22.5), ("d", "a")), (("in", 0), ("l+", "l-"))]


@pytest.mark.parametrize("angles, names", PLATE_TABLE)
def test_the_documented_plate_settings_measure_what_the_docs_say(angles, names) -> None:
    # Outside reference: sympy.physics.optics.polarization's retarders; the beam meets the quarter-wave
    # plate first, so the H output measures the input (HWP QWP)^dagger |H>.
    from sympy import N, pi
    from sympy.physics.optics.polarization import half_wave_retarder, quarter_wave_retarder

    from lightloom.sequencer.optics.analyzer import ELEMENT_NAMES, PortModel, port_operators
    from lightloom.sequencer.optics.states import POLARIZATION_KETS, partial_trace
    from lightloom.sequencer.plan.purpose import _IDEAL

    q, h = angles
    m = np.array(N(half_wave_retarder(h * pi / 180) * quarter_wave_retarder(q * pi / 180)), dtype=complex)
    s = np.zeros(len(ELEMENT_NAMES))
    s[ELEMENT_NAMES.index("quarter_wave_plate")], s[ELEMENT_NAMES.index("half_wave_plate")] = q, h
    ports = (PortModel("H", sorter_port="h", splitter_port="H"), PortModel("V", sorter_port="h", splitter_port="V"))
    ops = port_operators(_IDEAL, ports, s[None, :])[0]
    for op, name, out in zip(ops, names, ([1, 0], [0, 1])):
        ket = m.conj().T @ np.array(out, dtype=complex)
        assert np.allclose(partial_trace(op, "polarization"), np.outer(ket, ket.conj()), atol=1e-9)
        ref = POLARIZATION_KETS[name]
        assert abs(np.vdot(ref, ket)) ** 2 == pytest.approx(1.0, abs=1e-9), (angles, name)


@pytest.mark.parametrize("setting, names", MODE_TABLE)
def test_the_documented_mode_settings_measure_what_the_docs_say(setting, names) -> None:
    # the mode converter at its default 45 deg mount, the image rotator turning a mode by twice its
    # angle (common practice, no source)
    from lightloom.sequencer.optics.analyzer import CONVERTER, CONVERTER_IN, CONVERTER_OUT, ELEMENT_NAMES, PortModel, port_operators
    from lightloom.sequencer.optics.states import SPATIAL_KETS, partial_trace
    from lightloom.sequencer.plan.purpose import _IDEAL

    conv, rot = setting
    s = np.zeros(len(ELEMENT_NAMES))
    s[CONVERTER] = CONVERTER_IN if conv == "in" else CONVERTER_OUT
    s[ELEMENT_NAMES.index("image_rotator")] = rot
    ports = (PortModel("h", sorter_port="h", splitter_port="H"), PortModel("v", sorter_port="v", splitter_port="H"))
    for op, name in zip(port_operators(_IDEAL, ports, s[None, :])[0], names):
        ket = SPATIAL_KETS[name]
        assert np.real(np.vdot(ket, partial_trace(op, "spatial") @ ket)) == pytest.approx(1.0, abs=1e-9), (setting, name)
