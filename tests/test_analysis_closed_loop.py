"""The closed loop: a known source in the simulated bench, a run, the analysis, agreement within the
reported uncertainties, with the table's imperfections on and the bench's calibration in use."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import qutip

from lightloom.sequencer.analysis.pipeline import estimate, prepare, result_json, target_of
from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.cli import main
from lightloom.sequencer.optics.states import JOINT_KETS, partial_trace
from lightloom.sequencer.optics.stokes import stokes_from_density
from lightloom.sequencer.storage.store import load_run
from helpers.legacy_files import make_legacy_runfile


def _run(tmp_path: Path, protocol: str, bench: str, name: str = "run.h5") -> Path:
    out = tmp_path / name
    assert main(["run", protocol, "--bench", bench, "--out", str(out), "--quiet"]) == 0
    return out


def _analyse(path: Path):
    data = load_run(path)
    est = estimate(prepare(data), target=target_of(data), rng=np.random.default_rng(1), n_bootstrap=150)
    return data, est, result_json(data, est)


def _bench_with_source(tmp_path: Path, rho: np.ndarray, base: str = "sim", extra: str = "") -> Path:
    rows = "\n".join(
        "        - [" + ", ".join(f'"{z.real:.10f}{z.imag:+.10f}j"' for z in row) + "]" for row in rho
    )
    text = (
        f"bench: custom-source\nextends: {base}\nsimulation:\n  source:\n    state:\n      density_matrix:\n{rows}\n"
        + extra
    )
    path = tmp_path / "custom.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def _within(value: float, truth: float, std: float, k: float = 5.0, floor: float = 2e-4) -> bool:
    return abs(value - truth) <= k * std + floor


def test_builtin_vector_beam_is_recovered_within_its_error_bars(tmp_path: Path) -> None:
    data, est, doc = _analyse(_run(tmp_path, "joint-36", "sim"))
    truth = load_bench("sim").simulation.source.density()
    q = qutip.Qobj(truth, dims=[[2, 2], [2, 2]])
    radial = qutip.Qobj(JOINT_KETS["radial"].reshape(4, 1), dims=[[2, 2], [1, 1]])
    # qutip.concurrence (Wootters 1998) and qutip.fidelity (root fidelity: squared here) as the
    # independent computation of the true figures
    true_c = qutip.concurrence(q)
    true_f = qutip.fidelity(q, radial * radial.dag()) ** 2
    true_p = float((q * q).tr().real)
    assert _within(doc["concurrence"]["value"], true_c, doc["concurrence"]["std"])
    assert _within(doc["fidelity"]["value"], true_f, doc["fidelity"]["std"])
    assert _within(doc["purity"]["value"], true_p, doc["purity"]["std"])
    assert doc["closest_vector_mode"]["name"] == "radial"
    for factor in ("polarization", "spatial"):
        s_true = stokes_from_density(partial_trace(truth, factor))
        for k in range(1, 4):
            got = doc["stokes"][factor][k]
            assert _within(got["value"], s_true[k], got["std"]), (factor, k)
    assert doc["run"] == {**doc["run"], "status": "complete", "steps_done": doc["run"]["steps_total"]}


RNG = np.random.default_rng(20261201)


def _random_state(rank: int) -> np.ndarray:
    g = RNG.normal(size=(4, rank)) + 1j * RNG.normal(size=(4, rank))
    rho = g @ g.conj().T
    return rho / np.trace(rho).real


@pytest.mark.parametrize("rank", [1, 2, 4])
def test_random_source_states_through_the_joint_protocol(tmp_path: Path, rank: int) -> None:
    rho = _random_state(rank)
    bench = _bench_with_source(tmp_path, rho)
    data, est, doc = _analyse(_run(tmp_path, "joint-36", str(bench)))
    f = qutip.fidelity(qutip.Qobj(est.rho), qutip.Qobj(rho)) ** 2  # qutip root fidelity, squared
    assert f > 0.999
    assert np.all(np.abs(est.rho - rho) <= 6 * np.abs(est.rho_std.real) + 6 * np.abs(est.rho_std.imag) + 2e-3)
    true_c = qutip.concurrence(qutip.Qobj(rho, dims=[[2, 2], [2, 2]]))
    assert _within(doc["concurrence"]["value"], true_c, doc["concurrence"]["std"], floor=3e-3)


def test_polarization_protocol_on_one_detector_gives_the_reduced_state(tmp_path: Path) -> None:
    rho = _random_state(2)
    bench = _bench_with_source(tmp_path, rho, base="sim-single")
    data, est, doc = _analyse(_run(tmp_path, "polarization-6", str(bench)))
    assert doc["basis"] == ["H", "V"]
    s_true = stokes_from_density(partial_trace(rho, "polarization"))
    for k in range(1, 4):
        got = doc["stokes"]["polarization"][k]
        assert _within(got["value"], s_true[k], got["std"], floor=2e-3), k


def test_spatial_protocol_on_four_ports_gives_the_reduced_state(tmp_path: Path) -> None:
    rho = _random_state(3)
    bench = _bench_with_source(tmp_path, rho)
    data, est, doc = _analyse(_run(tmp_path, "spatial-6", str(bench)))
    assert doc["basis"] == ["h", "v"]
    s_true = stokes_from_density(partial_trace(rho, "spatial"))
    for k in range(1, 4):
        got = doc["stokes"]["spatial"][k]
        assert _within(got["value"], s_true[k], got["std"], floor=2e-3), k


def test_analyze_json_has_the_fixed_keys(tmp_path: Path, capsys) -> None:
    path = _run(tmp_path, "joint-16", "sim")
    capsys.readouterr()
    assert main(["analyze", str(path), "--json", "--bootstrap", "20"]) == 0
    doc = json.loads(capsys.readouterr().out)
    for key in ("basis", "density_matrix", "purity", "concurrence", "stokes", "run"):
        assert key in doc
    assert set(doc["density_matrix"]) == {"real", "imag"}
    assert set(doc["stokes"]) == {"polarization", "spatial"}
    assert all(set(x) == {"value", "std", "interval"} for x in doc["stokes"]["polarization"])
    assert doc["stokes"]["polarization"][0]["value"] == 1.0
    assert set(doc["run"]) >= {"status", "steps_done", "steps_total"}
    rho = np.array(doc["density_matrix"]["real"]) + 1j * np.array(doc["density_matrix"]["imag"])
    assert np.allclose(rho, rho.conj().T) and np.linalg.eigvalsh(rho).min() > -1e-9
    assert np.isclose(np.trace(rho).real, 1.0)


def test_counting_detectors_use_the_poisson_model(tmp_path: Path) -> None:
    rho = _random_state(1)
    devices = "\n".join(f"  {n}: {{driver: sim.photon_counter, overhead_s: 0.002}}" for n in ("pm_hH", "pm_hV", "pm_vH", "pm_vV"))
    extra = "  noise: {counts_per_w: 2.0e7, dark_counts_per_s: 10}\ndevices:\n" + devices + "\nroles:\n  reference: null\n"
    bench = _bench_with_source(tmp_path, rho, extra=extra)
    data, est, doc = _analyse(_run(tmp_path, "joint-36", str(bench)))
    assert doc["estimator"]["model"] == "poisson"
    f = qutip.fidelity(qutip.Qobj(est.rho), qutip.Qobj(rho)) ** 2  # qutip root fidelity, squared
    assert f > 0.98


def test_a_run_stopped_part_way_is_analysed_from_what_it_recorded(tmp_path: Path, capsys) -> None:
    # A stage sticks for good between the first and second passes of the overnight series: exit 3, then the
    # night's data so far are analysed as they are (the journal is read, status and counts shown).
    bench = tmp_path / "sticky.yaml"
    bench.write_text(
        "bench: sticky\nextends: sim\nsimulation:\n  faults:\n    - {device: hwp_stage, kind: stuck, at_s: 1500}\n",
        encoding="utf-8",
    )
    out = tmp_path / "night.h5"
    assert main(["run", "overnight-joint-36", "--bench", str(bench), "--out", str(out), "--quiet"]) == 3
    capsys.readouterr()
    assert main(["analyze", str(out), "--json", "--bootstrap", "30"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["run"]["status"] == "fault"
    assert 0 < doc["run"]["steps_done"] < doc["run"]["steps_total"]
    truth = load_bench("sim").simulation.source.density()
    rho = np.array(doc["density_matrix"]["real"]) + 1j * np.array(doc["density_matrix"]["imag"])
    assert qutip.fidelity(qutip.Qobj(rho), qutip.Qobj(truth)) ** 2 > 0.999  # qutip root fidelity, squared


def test_a_run_file_in_the_earlier_layout_analyses_the_same(tmp_path: Path, capsys) -> None:
    # Earlier versions kept the port layout and gains in an untyped `extra_json` and the steps in
    # /plan: such a file alone (no journal) must give the same analysis.
    path = _run(tmp_path, "joint-16", "sim")
    capsys.readouterr()
    assert main(["analyze", str(path), "--json", "--bootstrap", "20"]) == 0
    now = json.loads(capsys.readouterr().out)
    header = load_run(path).header
    assert len(set(header.port_gains)) > 1  # the sim bench calibrates unequal gains: they matter here
    path.with_name(path.name + ".journal").unlink()
    make_legacy_runfile(path, header)
    assert main(["analyze", str(path), "--json", "--bootstrap", "20"]) == 0
    assert json.loads(capsys.readouterr().out) == now
