"""The protocol language: YAML to frozen Protocol objects with points, labels, kets and target states."""

from __future__ import annotations

import dataclasses
import hashlib

import numpy as np
import pytest
import sympy
from sympy.physics.optics.polarization import jones_2_stokes

from lightloom.sequencer.errors import ProtocolError
from lightloom.sequencer.lang.protocol import load_protocol, parse_protocol
from lightloom.sequencer.model.vocabulary import ANALYZERS as FACTORS

HEAD = "protocol: t\ndwell_s: 0.5\n"


def parse(body: str, head: str = HEAD) -> object:
    return parse_protocol(head + body, "t.yaml")


def error(body: str) -> ProtocolError:
    with pytest.raises(ProtocolError) as info:
        parse(body)
    return info.value


def sympy_stokes(ket: tuple[complex, complex]) -> np.ndarray:
    """[S0, S1, S2, S3] of a Jones vector by sympy.physics.optics.polarization.jones_2_stokes."""
    e = sympy.Matrix([sympy.nsimplify(complex(c).real) + sympy.I * sympy.nsimplify(complex(c).imag) for c in ket])
    return np.array([float(sympy.N(x)) for x in jones_2_stokes(e)])


def test_product_of_targets_loops_polarization_outer_spatial_inner() -> None:
    p = parse("analyzes: [polarization, spatial]\nmeasure:\n  targets:\n"
              "    polarization: [H, V]\n    spatial: [h, d, l+]\n")
    assert [pt.label for pt in p.points] == ["H,h", "H,d", "H,l+", "V,h", "V,d", "V,l+"]
    assert p.analyzes == FACTORS and p.dimension == 4 and p.measure == "targets"


def test_zip_pairs_targets_in_order() -> None:
    p = parse("analyzes: [spatial, polarization]\nmeasure:\n  targets:\n"
              "    polarization: [H, D]\n    spatial: [v, a]\n    combine: zip\n")
    assert [pt.label for pt in p.points] == ["H,v", "D,a"]
    assert p.analyzes == ("polarization", "spatial")


def test_single_factor_points_carry_one_target_and_their_line() -> None:
    p = parse("analyzes: polarization\nmeasure:\n  targets:\n    polarization:\n      - H\n      - R\n")
    assert [(pt.label, pt.line, tuple(pt.targets)) for pt in p.points] == [
        ("H", 7, ("polarization",)),
        ("R", 8, ("polarization",)),
    ]
    assert p.dimension == 2 and not p.points[0].is_explicit


@pytest.mark.parametrize("name, stokes", [("H", [1, 1, 0, 0]), ("V", [1, -1, 0, 0]), ("D", [1, 0, 1, 0]),
                                          ("A", [1, 0, -1, 0]), ("R", [1, 0, 0, 1]), ("L", [1, 0, 0, -1])])
def test_named_polarization_targets_have_the_stokes_vectors_of_sympy(name: str, stokes: list[int]) -> None:
    # Outside reference: sympy.physics.optics.polarization.jones_2_stokes (its handedness: (1, i)/sqrt2 has S3 = +1).
    p = parse(f"analyzes: [polarization]\nmeasure: {{targets: {{polarization: [{name}]}}}}\n")
    assert np.allclose(sympy_stokes(p.points[0].targets["polarization"].ket), stokes)


@pytest.mark.parametrize("s", [(0.0, 0.6, 0.8), (0.6, 0.0, -0.8), (-1.0, 0.0, 0.0), (0.36, 0.48, 0.8)])
def test_stokes_target_gives_the_ket_whose_sympy_stokes_vector_is_the_one_written(s: tuple[float, ...]) -> None:
    # Outside reference: sympy.physics.optics.polarization.jones_2_stokes.
    p = parse(f"analyzes: [polarization]\nmeasure: {{targets: {{polarization: [{{stokes: {list(s)}}}]}}}}\n")
    target = p.points[0].targets["polarization"]
    assert np.allclose(sympy_stokes(target.ket), [1.0, *s], atol=1e-9)
    assert target.label.startswith("s(") and "," not in target.label


def test_nearly_unit_stokes_vector_is_normalised() -> None:
    p = parse("analyzes: [spatial]\nmeasure: {targets: {spatial: [{stokes: [0, 0, 1.0005]}]}}\n")
    ket = p.points[0].targets["spatial"].ket_array()
    assert np.isclose(np.linalg.norm(ket), 1.0)


def test_stokes_vector_off_unit_by_more_than_a_thousandth_is_refused() -> None:
    assert "unit Stokes vector" in error("analyzes: [spatial]\nmeasure: {targets: {spatial: [{stokes: [0, 0, 1.002]}]}}\n").message


def test_spatial_l_plus_is_h_plus_i_v_over_root_two() -> None:
    # Convention of DESIGN.md: l+- = (h +- i v)/sqrt(2).
    p = parse("analyzes: [spatial]\nmeasure: {targets: {spatial: [l+, l-]}}\n")
    assert np.allclose(p.points[0].targets["spatial"].ket, np.array([1, 1j]) / np.sqrt(2))
    assert np.allclose(p.points[1].targets["spatial"].ket, np.array([1, -1j]) / np.sqrt(2))


def test_ket_target_from_strings_is_normalised_and_labelled_as_written() -> None:
    p = parse("analyzes: [polarization]\nmeasure: {targets: {polarization: [{ket: ['3', '4j']}]}}\n")
    target = p.points[0].targets["polarization"]
    assert np.allclose(target.ket, [0.6, 0.8j])
    assert target.label == "ket(3 4j)"


def test_target_may_carry_its_own_label() -> None:
    p = parse("analyzes: [polarization]\nmeasure: {targets: {polarization: [{ket: [1, 1], label: diag}]}}\n")
    assert p.points[0].label == "diag"


def test_explicit_element_settings_are_kept_by_element_name() -> None:
    p = parse("analyzes: [polarization]\nmeasure:\n  settings:\n"
              "    - {elements: {half_wave_plate_deg: 22.5, quarter_wave_plate_deg: 0, mode_converter: out}}\n")
    point = p.points[0]
    assert point.is_explicit and dict(point.targets) == {}
    assert dict(point.elements) == {"quarter_wave_plate": 0.0, "half_wave_plate": 22.5, "mode_converter": "out"}
    assert point.label == "qwp=0,hwp=22.5,conv=out"


def test_settings_mix_targets_and_elements_with_labels() -> None:
    p = parse("analyzes: [polarization, spatial]\nmeasure:\n  settings:\n"
              "    - {polarization: {stokes: [0.0, 0.6, 0.8]}, spatial: {ket: ['1', '1j']}}\n"
              "    - {elements: {image_rotator_deg: 11.25, converter_angle_deg: 45, mode_converter: in}}\n"
              "    - {polarization: A, spatial: a, label: anti}\n")
    assert [pt.label for pt in p.points] == ["s(0.0 0.6 0.8),ket(1 1j)", "conv=in,conv_deg=45,rot=11.25", "anti"]


def test_settings_item_cannot_give_both_targets_and_elements() -> None:
    err = error("analyzes: [polarization]\nmeasure:\n  settings:\n"
                "    - {polarization: H, elements: {half_wave_plate_deg: 0}}\n")
    assert "not both" in err.message and err.line == 6


def test_scan_steps_the_element_with_the_others_fixed() -> None:
    p = parse("analyzes: [polarization]\nmeasure:\n  scan: {element: quarter_wave_plate, from_deg: 0, to_deg: 20,"
              " step_deg: 7.5, fixed: {half_wave_plate_deg: 10}}\n")
    assert [pt.label for pt in p.points] == ["qwp=0", "qwp=7.5", "qwp=15"]
    assert dict(p.points[2].elements) == {"quarter_wave_plate": 15.0, "half_wave_plate": 10.0}
    assert p.scan is not None and (p.scan.element, p.scan.step_deg) == ("quarter_wave_plate", 7.5)


def test_scan_runs_downwards_when_to_is_below_from() -> None:
    p = parse("analyzes: [spatial]\nmeasure:\n  scan: {element: image_rotator, from_deg: 90, to_deg: 0, step_deg: 45}\n")
    assert [pt.elements["image_rotator"] for pt in p.points] == [90.0, 45.0, 0.0]


def test_scan_of_an_element_of_a_factor_not_analysed_is_refused() -> None:
    err = error("analyzes: [polarization]\nmeasure:\n  scan: {element: image_rotator, from_deg: 0, to_deg: 90, step_deg: 5}\n")
    assert "add spatial to analyzes" in err.message


def test_defaults_background_at_start_and_end_no_reference_written_order_one_pass() -> None:
    p = parse("analyzes: [polarization]\nmeasure: {targets: {polarization: [H]}}\n")
    assert (p.background.at_start, p.background.at_end, p.background.every_points) == (True, True, 0)
    assert p.background.dwell_s == p.dwell_s == 0.5
    assert (p.reference.every_points, p.reference.dwell_s) == (0, 0.5)
    assert (p.order, p.repeats, p.seed, p.sweep.passes, p.sweep.interval_s) == ("as-written", 1, 0, 1, 0.0)
    assert p.target_state is None and p.target_density() is None


def test_target_state_by_name_is_the_radial_density_matrix() -> None:
    p = parse("analyzes: [polarization, spatial]\nmeasure: {targets: {polarization: [H], spatial: [h]}}\n"
              "target_state: {name: radial}\n")
    expected = np.zeros((4, 4))
    expected[np.ix_([0, 3], [0, 3])] = 0.5  # (|H,h> + |V,v>)/sqrt2 in basis |H,h>, |H,v>, |V,h>, |V,v>
    assert np.allclose(p.target_density(), expected)
    assert p.target_label == "radial"


def test_target_state_density_matrix_is_scaled_to_unit_trace() -> None:
    p = parse("analyzes: [polarization]\nmeasure: {targets: {polarization: [H]}}\n"
              "target_state: {density_matrix: [[3, 0], [0, 1]]}\n")
    assert np.allclose(p.target_density(), np.diag([0.75, 0.25]))


def test_target_state_stokes_may_be_mixed_for_one_factor() -> None:
    p = parse("analyzes: [polarization]\nmeasure: {targets: {polarization: [H]}}\ntarget_state: {stokes: [0, 0, 0.5]}\n")
    rho = p.target_density()
    assert np.isclose(np.trace(rho @ rho).real, 0.5 * (1 + 0.25))


def test_target_ket_of_the_wrong_dimension_is_refused() -> None:
    err = error("analyzes: [polarization, spatial]\nmeasure: {targets: {polarization: [H], spatial: [h]}}\n"
                "target_state: {ket: ['1', '0']}\n")
    assert "needs 4 amplitudes" in err.message


def test_protocol_is_frozen_and_its_mappings_read_only() -> None:
    p = parse("analyzes: [polarization]\nmeasure: {targets: {polarization: [H]}}\n")
    with pytest.raises(dataclasses.FrozenInstanceError):
        p.dwell_s = 1.0  # type: ignore[misc]
    with pytest.raises(TypeError):
        p.points[0].targets["polarization"] = None  # type: ignore[index]
    assert isinstance(p.points, tuple)


def test_source_text_and_its_sha256_are_kept() -> None:
    text = HEAD + "analyzes: [polarization]\nmeasure: {targets: {polarization: [H]}}\n"
    p = parse_protocol(text, "t.yaml")
    assert p.source_text == text and p.source_path == "t.yaml"
    assert p.sha256 == hashlib.sha256(text.encode()).hexdigest()


def test_load_protocol_from_a_path_equals_parse_of_its_text(tmp_path) -> None:
    text = HEAD + "analyzes: [spatial]\nmeasure: {targets: {spatial: [h, v, d, l+]}}\n"
    path = tmp_path / "mine.yaml"
    path.write_text(text)
    assert load_protocol(path) == parse_protocol(text, str(path))


def test_load_protocol_errors_are_protocol_errors_at_the_file(tmp_path) -> None:
    path = tmp_path / "bad.yaml"
    path.write_text(HEAD + "analyzes: [polarization]\nmeasure: {targets: {polarization: [X]}}\n")
    with pytest.raises(ProtocolError) as info:
        load_protocol(path)
    assert (info.value.file, info.value.line) == (str(path), 4)
    assert "unknown polarization target 'X'" in info.value.message


def test_a_bench_given_as_protocol_is_recognised() -> None:
    with pytest.raises(ProtocolError) as info:
        parse_protocol("# a bench\nbench: sim\ndevices: {}\n", "b.yaml")
    assert "this is a bench file, not a protocol" in info.value.message and info.value.line == 2
