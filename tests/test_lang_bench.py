"""The bench language: devices, roles, optics, calibration, simulation, and `extends:` with deep merge."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from lightloom.sequencer.lang import bench as bench_module
from lightloom.sequencer.lang.bench import DetectorPort, load_bench, parse_bench
from lightloom.sequencer.errors import BenchError

MINIMAL = """\
bench: tiny
wavelength_nm: 633
devices:
  shutter: {driver: visa.shutter, address: "TCPIP::127.0.0.1::6000::SOCKET"}
  meter: {driver: serial.power_meter, address: "socket://127.0.0.1:6001"}
roles:
  shutter: shutter
  detectors: [meter]
"""


def write(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


def bench_error(text: str, tmp_path: Path) -> BenchError:
    with pytest.raises(BenchError) as info:
        load_bench(write(tmp_path / "b.yaml", text))
    return info.value


def test_minimal_hardware_bench_has_defaults_and_is_not_simulated(tmp_path: Path) -> None:
    b = load_bench(write(tmp_path / "tiny.yaml", MINIMAL))
    assert not b.is_simulated and b.simulation is None
    assert b.roles.detectors == (DetectorPort("meter", None, None),)
    assert b.optics.polarizing_splitter is None and b.optics.parity_sorter is None
    assert (b.calibration.quarter_wave_plate.retardance_deg, b.calibration.half_wave_plate.retardance_deg) == (90, 180)
    assert dict(b.calibration.port_gain) == {"meter": 1.0}
    assert (b.thresholds.beam_loss_fraction, b.retry.attempts) == (0.3, 4)
    assert b.devices["meter"].address == "socket://127.0.0.1:6001"
    assert b.devices["meter"].family == "serial" and b.devices["meter"].kind == "power_meter"


def test_sim_bench_is_a_complete_joint_table() -> None:
    b = load_bench("sim")
    assert b.is_simulated
    assert b.device_for("quarter_wave_plate").kind == "rotation_stage"
    assert b.device_for("mode_converter").states == ("in", "out")
    assert b.roles.converter_angle is None and b.device_for("converter_angle") is None
    assert [(p.device, p.sorter_port, p.splitter_port) for p in b.roles.detectors] == [
        ("pm_hH", "h", "H"), ("pm_hV", "h", "V"), ("pm_vH", "v", "H"), ("pm_vV", "v", "V"),
    ]
    assert b.roles.reference == "pm_ref" and b.calibration.reference_fraction is not None
    assert 0 < b.optics.polarizing_splitter.extinction < 0.01
    assert 0.9 < b.optics.parity_sorter.visibility < 1
    for stage in ("qwp_stage", "hwp_stage", "rotator_stage"):
        limits = b.devices[stage].limits
        assert limits is not None and limits.min_deg < limits.max_deg and limits.speed_deg_per_s > 0


def test_sim_bench_calibration_equals_the_true_table() -> None:
    b = load_bench("sim")
    table, cal = b.simulation.table, b.calibration
    assert table.quarter_wave_plate == cal.quarter_wave_plate
    assert table.half_wave_plate == cal.half_wave_plate
    assert table.mode_converter == cal.mode_converter
    assert table.image_rotator == cal.image_rotator
    assert dict(table.port_gain) == dict(cal.port_gain)
    assert table.quarter_wave_plate.fast_axis_offset_deg != 0  # a real (imperfect) table


def test_sim_source_is_a_near_radial_density_matrix_of_purity_about_095() -> None:
    rho = load_bench("sim").simulation.source.density()
    assert np.allclose(rho, rho.conj().T) and np.isclose(np.trace(rho).real, 1.0)
    assert np.linalg.eigvalsh(rho).min() > 0
    radial = np.array([1, 0, 0, 1]) / np.sqrt(2)
    assert 0.93 < np.trace(rho @ rho).real < 0.97
    assert 0.95 < (radial.conj() @ rho @ radial).real < 0.99


def test_sim_single_has_one_detector_and_no_reference() -> None:
    b = load_bench("sim-single")
    assert b.roles.detectors == (DetectorPort("pm_hH", "h", "H"),)
    assert b.roles.reference is None and "pm_ref" not in b.devices
    assert dict(b.calibration.port_gain) == {"pm_hH": 1.0}
    assert b.extends and b.extends[0].endswith("sim.yaml")
    assert b.optics == load_bench("sim").optics


@pytest.mark.parametrize("name", ["sim", "sim-single"])
def test_resolved_text_of_a_built_in_bench_parses_to_an_equal_bench(name: str) -> None:
    b = load_bench(name)
    again = parse_bench(b.resolved_text, "resolved.yaml")
    assert again == b and again.sha256 == b.sha256


def test_extended_bench_round_trips_through_resolved_text(tmp_path: Path) -> None:
    derived = write(tmp_path / "mine.yaml", (
        "bench: mine\nextends: sim\n"
        "devices:\n  hwp_stage:\n    limits: {speed_deg_per_s: 5}\n"
        "simulation:\n  seed: 7\n  faults:\n    - {kind: beam_loss, at_s: 3, duration_s: 2}\n"
        "    - {device: pm_hH, kind: timeout, probability: 0.01}\n"
    ))
    b = load_bench(derived)
    assert b.devices["hwp_stage"].limits.speed_deg_per_s == 5
    assert b.devices["hwp_stage"].limits.acceleration_deg_per_s2 == load_bench("sim").devices["hwp_stage"].limits.acceleration_deg_per_s2
    assert [f.kind for f in b.simulation.faults] == ["beam_loss", "timeout"]
    assert parse_bench(b.resolved_text, "elsewhere.yaml") == b
    assert "extends" not in b.resolved_text


def test_lists_are_replaced_not_merged(tmp_path: Path) -> None:
    b = load_bench(write(tmp_path / "two.yaml", (
        "bench: two\nextends: sim\nroles:\n  detectors:\n"
        "    - {device: pm_vV, sorter_port: v, splitter_port: V}\n"
    )))
    assert [p.device for p in b.roles.detectors] == ["pm_vV"]


def test_relative_extends_is_taken_from_the_extending_files_directory(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    sub = tmp_path / "benches"
    sub.mkdir()
    write(sub / "base.yaml", MINIMAL)
    write(sub / "child.yaml", "bench: child\nextends: base.yaml\nwavelength_nm: 800\n")
    monkeypatch.chdir(tmp_path)
    b = load_bench("benches/child.yaml")
    assert (b.name, b.wavelength_nm, b.extends) == ("child", 800, (str(sub / "base.yaml"),))


def test_three_levels_of_extends_record_the_chain(tmp_path: Path) -> None:
    write(tmp_path / "a.yaml", MINIMAL)
    write(tmp_path / "b.yaml", "bench: b\nextends: a.yaml\n")
    write(tmp_path / "c.yaml", "bench: c\nextends: b.yaml\nthresholds: {drift_fraction: 0.1}\n")
    b = load_bench(tmp_path / "c.yaml")
    assert b.extends == (str(tmp_path / "b.yaml"), str(tmp_path / "a.yaml"))
    assert b.thresholds.drift_fraction == 0.1


def test_error_in_a_base_file_points_at_the_base_file(tmp_path: Path) -> None:
    write(tmp_path / "base.yaml", MINIMAL + "retry: {attempts: 0}\n")
    child = write(tmp_path / "child.yaml", "bench: child\nextends: base.yaml\n")
    with pytest.raises(BenchError) as info:
        load_bench(child)
    assert (info.value.file, info.value.line) == (str(tmp_path / "base.yaml"), 9)


def test_a_bench_extending_itself_is_a_cycle(tmp_path: Path) -> None:
    err = bench_error("bench: me\nextends: b.yaml\n", tmp_path)
    assert "cycle" in err.message and err.line == 2


def test_table_defaults_to_the_calibration_when_absent(tmp_path: Path) -> None:
    b = load_bench(write(tmp_path / "t.yaml", MINIMAL.replace("visa.shutter", "sim.shutter").replace(
        ', address: "TCPIP::127.0.0.1::6000::SOCKET"', "") + (
        "calibration:\n  half_wave_plate: {retardance_deg: 177}\n"
        "simulation:\n  source: {power: 1.0e-3, state: {ket: ['1', '0', '0', '1j']}}\n"
        "  table:\n    half_wave_plate: {fast_axis_offset_deg: 0.5}\n"
    )))
    assert b.simulation.table.half_wave_plate.retardance_deg == 177
    assert b.simulation.table.half_wave_plate.fast_axis_offset_deg == 0.5
    assert b.simulation.table.quarter_wave_plate == b.calibration.quarter_wave_plate
    rho = b.simulation.source.density()
    assert np.isclose(rho[0, 3], -0.5j) and b.simulation.source.label == "ket"


def test_options_are_passed_through_read_only(tmp_path: Path) -> None:
    text = MINIMAL.replace('address: "socket://127.0.0.1:6001"}',
                           'address: "socket://127.0.0.1:6001", options: {timeout_s: 2, commands: {read: "MEAS?"}, init: [a, b]}}')
    spec = load_bench(write(tmp_path / "o.yaml", text)).devices["meter"]
    assert spec.options["commands"]["read"] == "MEAS?" and spec.options["init"] == ("a", "b")
    with pytest.raises(TypeError):
        spec.options["timeout_s"] = 3  # type: ignore[index]


def test_bench_is_frozen() -> None:
    b = load_bench("sim")
    with pytest.raises(dataclasses.FrozenInstanceError):
        b.name = "other"  # type: ignore[misc]
    with pytest.raises(TypeError):
        b.devices["x"] = None  # type: ignore[index]


def test_locate_finds_the_file_and_line_of_a_value(tmp_path: Path) -> None:
    child = write(tmp_path / "child.yaml", "bench: c\nextends: sim\ndevices:\n  pm_hH:\n    overhead_s: 0.01\n")
    b = load_bench(child)
    assert b.locate("devices.pm_hH.overhead_s") == (str(child), 5)
    file, _ = b.locate("devices.qwp_stage.limits.min_deg")
    assert file.endswith("sim.yaml")
    assert b.locate("devices.pm_hH.no_such_key") == (str(child), 4)


def test_plugin_driver_is_accepted_when_registered(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(bench_module, "plugin_names", lambda: frozenset({"acme.power_meter"}))
    b = load_bench(write(tmp_path / "p.yaml", MINIMAL.replace("serial.power_meter", "acme.power_meter")))
    assert (b.devices["meter"].family, b.devices["meter"].kind) == ("acme", "power_meter")


def test_unregistered_plugin_driver_is_refused(tmp_path: Path) -> None:
    err = bench_error(MINIMAL.replace("serial.power_meter", "acme.power_meter"), tmp_path)
    assert "unknown driver 'acme.power_meter'" in err.message and err.line == 5


def test_detectors_of_mixed_kinds_are_refused(tmp_path: Path) -> None:
    text = MINIMAL.replace(
        "detectors: [meter]",
        "detectors: [{device: meter, splitter_port: H}, {device: counter, splitter_port: V}]\n"
        "optics: {polarizing_splitter: {extinction: 0.001}}",
    ).replace("roles:", '  counter: {driver: serial.photon_counter, address: "socket://127.0.0.1:6002"}\nroles:')
    assert "mixes photon_counter and power_meter" in bench_error(text, tmp_path).message


def test_two_detectors_cannot_share_the_only_port(tmp_path: Path) -> None:
    text = MINIMAL.replace("detectors: [meter]", "detectors: [meter, counter]").replace(
        "roles:", '  counter: {driver: serial.power_meter, address: "socket://127.0.0.1:6002"}\nroles:')
    err = bench_error(text, tmp_path)
    assert "sits at the same port (-) as 'meter'" in err.message and err.line == 9


def test_one_device_cannot_play_two_roles(tmp_path: Path) -> None:
    text = MINIMAL.replace("detectors: [meter]", "reference: meter\n  detectors: [meter]")
    err = bench_error(text, tmp_path)
    assert "already plays reference" in err.message


def test_reference_role_needs_a_reference_fraction(tmp_path: Path) -> None:
    text = MINIMAL.replace("detectors: [meter]", "reference: ref\n  detectors: [meter]").replace(
        "roles:", '  ref: {driver: serial.power_meter, address: "socket://127.0.0.1:6003"}\nroles:')
    assert "reference_fraction" in bench_error(text, tmp_path).message


def test_converter_angle_stage_needs_a_mode_converter(tmp_path: Path) -> None:
    text = MINIMAL.replace("roles:", (
        '  turn: {driver: serial.rotation_stage, address: "socket://127.0.0.1:6004",'
        " limits: {min_deg: 0, max_deg: 360, speed_deg_per_s: 10, acceleration_deg_per_s2: 20}}\nroles:\n"
        "  converter_angle: turn"))
    assert "needs a mode_converter role too" in bench_error(text, tmp_path).message


def test_rotation_stage_without_limits_is_refused(tmp_path: Path) -> None:
    text = MINIMAL.replace("roles:", '  stage: {driver: serial.rotation_stage, address: "socket://127.0.0.1:6004"}\nroles:')
    err = bench_error(text, tmp_path)
    assert "missing key 'limits' in devices.stage" in err.message and err.line == 6


def test_a_bench_that_extends_another_takes_its_name_unless_it_gives_one(tmp_path: Path) -> None:
    overlay = tmp_path / "brighter.yaml"
    overlay.write_text("extends: sim\nsimulation:\n  source: {power: 2.0e-3}\n")
    bench = load_bench(overlay)
    assert bench.name == "sim" and bench.simulation.source.power_w == 2.0e-3
    assert bench.extends and bench.source_path == str(overlay)
    overlay.write_text("bench: brighter\nextends: sim\nsimulation:\n  source: {power: 2.0e-3}\n")
    assert load_bench(overlay).name == "brighter"


def test_a_bench_without_extends_must_name_itself(tmp_path: Path) -> None:
    err = bench_error("wavelength_nm: 800\n", tmp_path)
    assert err.line == 1 and err.message.startswith("missing key 'bench' in the bench file; expected the bench's name")


def test_a_protocol_given_as_bench_is_recognised(tmp_path: Path) -> None:
    err = bench_error("protocol: p\nanalyzes: [polarization]\n", tmp_path)
    assert "this is a protocol file, not a bench" in err.message and err.line == 1


def test_an_overlay_giving_a_ket_over_a_base_density_matrix_is_told_how_to_replace_it(tmp_path: Path) -> None:
    overlay = tmp_path / "beam.yaml"
    overlay.write_text('extends: sim\nsimulation:\n  source: {state: {ket: ["1", "0", "0", "1"]}}\n')
    with pytest.raises(BenchError) as err:
        load_bench(str(overlay))
    assert "the base bench gives density_matrix: write `density_matrix: null` beside ket" in str(err.value)
    overlay.write_text('extends: sim\nsimulation:\n  source: {state: {ket: ["1", "0", "0", "1"], density_matrix: null}}\n')
    source = load_bench(str(overlay)).simulation.source
    assert source.label == "ket" and np.allclose(source.density(), np.outer([1, 0, 0, 1], [1, 0, 0, 1]) / 2)
