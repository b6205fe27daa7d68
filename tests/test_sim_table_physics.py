"""The simulated table's readings agree with the optics model: mean power at each port is the port
probability times the source power, for settings compiled from the protocol library."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.optics.analyzer import port_operators, probabilities
from lightloom.sequencer.lang.protocol import load_protocol
from lightloom.sequencer.plan.tablemodel import analyzer_model, compile_protocol, port_models
from lightloom.simulators.table import SimulatedTable


def _quiet_bench(tmp_path: Path) -> Path:
    path = tmp_path / "quiet.yaml"
    path.write_text(
        "bench: quiet\nextends: sim\nsimulation:\n  drift: {amplitude: 0.0, period_s: 1800}\n"
        "  noise: {meter_offset_w: 0.0, meter_noise_w: 1.0e-8, relative_noise: 0.01}\n",
        encoding="utf-8",
    )
    return path


def test_mean_readings_match_port_probabilities_times_power(tmp_path: Path) -> None:
    bench = load_bench(_quiet_bench(tmp_path))
    table = SimulatedTable(bench)
    for device in table.devices.values():
        device.connect()
    table.shutter.open()
    plan = compile_protocol(load_protocol("joint-36"), bench)
    truth = analyzer_model(bench, truth=True)
    ports = port_models(bench, truth=True)
    rho = bench.simulation.source.density()
    power = bench.simulation.source.power_w * (1 - bench.simulation.table.reference_fraction)
    for step in [s for s in plan.steps if s.kind == "measure"][::4]:
        for i, stage in table.stage_of.items():
            target = step.settings.as_vector()[i]
            for angle in (target - 1.0, target):  # approach from below (backlash)
                stage.move_to_deg(angle)
                stage.wait_settled(60)
        table.converter.set_state(step.settings.mode_converter)
        table.converter.wait_settled(60)
        # independent computation: the optics model at the commanded settings with the true table
        expected = power * probabilities(rho, port_operators(truth, ports, step.settings.as_vector()[None])[0])
        readings = np.array([[table.devices[p.name].read_power_w(0.2) for p in ports] for _ in range(60)])
        mean, sem = readings.mean(axis=0), readings.std(axis=0, ddof=1) / np.sqrt(len(readings))
        assert np.all(np.abs(mean - expected) < 5 * sem + 1e-12), (step.label, mean, expected)


def test_counting_noise_is_poisson_at_the_ports(tmp_path: Path) -> None:
    path = tmp_path / "counting.yaml"
    path.write_text(
        "bench: counting\nextends: sim\nsimulation:\n  drift: {amplitude: 0.0, period_s: 1800}\n"
        "  noise: {counts_per_w: 1.0e8, dark_counts_per_s: 0}\n"
        "devices:\n  pm_hH: {driver: sim.photon_counter}\n  pm_hV: {driver: sim.photon_counter}\n"
        "  pm_vH: {driver: sim.photon_counter}\n  pm_vV: {driver: sim.photon_counter}\nroles:\n  reference: null\n",
        encoding="utf-8",
    )
    bench = load_bench(path)
    table = SimulatedTable(bench)
    for device in table.devices.values():
        device.connect()
    table.shutter.open()
    counts = np.array([table.devices["pm_hH"].read_counts(0.1) for _ in range(400)], dtype=float)
    # common practice, no source: Poisson counts have variance equal to their mean
    ratio = counts.var(ddof=1) / counts.mean()
    assert 0.8 < ratio < 1.2, ratio
    expected = 1.0e8 * 0.1 * bench.simulation.source.power_w * float(table.port_probabilities()[0])
    assert abs(counts.mean() - expected) < 5 * np.sqrt(expected / 400)
