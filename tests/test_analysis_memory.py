"""The analysis holds a night's readings once: what it adds per reading is a few integers, the
corrections and the sums are made a chunk of rows (or a block of passes) at a time.

Memory is measured with tracemalloc (numpy reports its buffers to it) as the growth of the peak
between a night and the same night twice as long, so that the fixed cost of a chunk cancels.
"""

from __future__ import annotations

import tracemalloc
from pathlib import Path

import numpy as np
import pytest
from scipy import sparse

from lightloom.sequencer.analysis import pipeline
from lightloom.sequencer.analysis.drift import fit_drift, no_drift
from lightloom.sequencer.analysis.pipeline import by_pass, iter_prepared, prepare
from lightloom.sequencer.analysis.propagation import CorrectionNoise
from lightloom.sequencer.cli import main
from lightloom.sequencer.model.records import ReadingTable, RunData
from lightloom.sequencer.model.shared_operators import SharedOperators
from lightloom.sequencer.storage.store import load_run

TWO_PASSES = """\
protocol: two-passes
analyzes: [polarization, spatial]
measure:
  targets:
    polarization: [H, V, D, A, R, L]
    spatial: [h, v, d, a, l+, l-]
dwell_s: 0.5
repeats: 2
background: {every_points: 36, at_start: true, at_end: true}
reference: {every_points: 9, dwell_s: 0.2}
order: least-motion
sweep: {passes: 2, interval_s: 0}
"""


@pytest.fixture(scope="module")
def short_run(tmp_path_factory) -> RunData:
    d = tmp_path_factory.mktemp("memory")
    (d / "two.yaml").write_text(TWO_PASSES, encoding="utf-8")
    out = d / "two.h5"
    assert main(["run", str(d / "two.yaml"), "--bench", "sim", "--out", str(out), "--quiet"]) == 0
    return load_run(out)


def _night(run: RunData, copies: int) -> RunData:
    """``copies`` copies of a run one after another in time, each with passes of its own."""
    r = run.readings
    n = len(r)
    idx = np.tile(np.arange(n), copies)
    shift = np.repeat(np.arange(copies), n)
    span = float(np.max(r.t_end) - np.min(r.t_start)) + 1.0
    columns = {name: np.asarray(getattr(r, name))[idx] for name in (
        "step_index", "kind", "point_index", "repeat_index", "commanded", "readback", "values",
        "reference_w", "dwell_s", "flags")}
    columns["t_start"] = np.asarray(r.t_start)[idx] + shift * span
    columns["t_end"] = np.asarray(r.t_end)[idx] + shift * span
    columns["pass_index"] = np.asarray(r.pass_index)[idx] + shift * (int(np.max(r.pass_index)) + 1)
    ops = SharedOperators.of(r.operators)
    columns["operators"] = SharedOperators(ops.blocks, ops.index[idx])
    table = ReadingTable(r.element_names, r.port_names, **columns)
    return RunData(run.header, table, run.events, run.status, run.message)


def _peak_bytes(work) -> int:
    """Peak of traced memory above what was held before ``work()`` ran."""
    tracemalloc.start()
    try:
        before = tracemalloc.get_traced_memory()[0]
        work()
        return tracemalloc.get_traced_memory()[1] - before
    finally:
        tracemalloc.stop()


def _per_reading_growth(short_run: RunData, work) -> float:
    """Bytes of peak memory that ``work(night)`` adds per reading of a longer night."""
    small, large = _night(short_run, 300), _night(short_run, 600)
    return (_peak_bytes(lambda: work(large)) - _peak_bytes(lambda: work(small))) / (len(large.readings) - len(small.readings))


def test_the_whole_run_fit_rows_add_a_few_numbers_per_reading(short_run: RunData) -> None:
    # Whole-night columns of background, drift and divisors (8 numbers a reading) and the sums of
    # each pass with their operators, as the analysis once held, come to about 240 bytes.
    growth = _per_reading_growth(short_run, prepare)
    assert growth < 160, f"{growth:.0f} bytes a reading"


def test_per_pass_sums_are_held_a_block_of_passes_at_a_time(short_run: RunData, monkeypatch) -> None:
    # blocks smaller than both nights, so that both hold the same block's worth of sums
    monkeypatch.setattr(pipeline, "BLOCK_READINGS", 1024)
    counted = []

    def per_pass(night: RunData) -> None:
        parts = iter_prepared(night, by_pass(np.asarray(night.readings.pass_index)))
        counted.append(sum(1 for _ in parts))

    growth = _per_reading_growth(short_run, per_pass)
    # 600 and 1200 passes, each fitted; all passes' sums and rows at once took 1.6 kB a reading
    assert sorted(counted) == [600, 1200]
    assert growth < 400, f"{growth:.0f} bytes a reading"


def test_drift_fit_holds_no_design_matrix_of_the_night() -> None:
    rng = np.random.default_rng(5)
    t = 1.8e9 + np.linspace(0.0, 43200.0, 200_000)
    reference = 1e-3 * (1.0 + 0.01 * (t - t[0]) / 43200.0) * (1.0 + 1e-3 * rng.standard_normal(t.size))
    model = None

    def fit() -> None:
        nonlocal model
        model = fit_drift(t, reference, source="pick-off")

    peak = _peak_bytes(fit)
    assert model is not None and model.applied and model.info["degree"] >= 1
    # (200,000 x 9) Legendre design matrices, as the fit once built for each degree: 14 MB each
    assert peak < 20e6, f"{peak / 1e6:.1f} MB"


def test_background_error_draws_are_the_same_numbers_made_a_block_at_a_time() -> None:
    rows, n_bg, n_ports, replicates = 144, 5000, 4, 200
    rng = np.random.default_rng(2)
    bmap = sparse.random(rows, n_bg * n_ports, density=4.0 / (n_bg * n_ports), format="csr", random_state=3)
    sigma = rng.uniform(1e-9, 2e-9, n_bg * n_ports)
    noise = CorrectionNoise(bmap, sigma, no_drift(None, "none"), np.zeros(rows))
    replicas = rng.normal(1e-6, 1e-8, (replicates, rows))
    out = None

    def draw() -> None:
        nonlocal out
        out = noise.perturb(replicas, np.random.default_rng(9))

    peak = _peak_bytes(draw)
    e = np.random.default_rng(9).standard_normal((replicates, n_bg * n_ports)) * sigma[None, :]
    assert out is not None and np.allclose(out, replicas + (bmap @ e.T).T, rtol=0, atol=1e-21)
    # all replicates' draws at once: 200 x 20,000 doubles (32 MB), twice
    assert peak < 12e6, f"{peak / 1e6:.1f} MB"
