"""The night of an imaging run out of core: dask graphs over the run file's frames give the same
per-pass Stokes maps and integrated Stokes parameters as the in-memory analysis, follow a drifting
pattern, and run the same on a dask.distributed cluster on 127.0.0.1."""

from __future__ import annotations

import json
from pathlib import Path

import dask.array as da
import h5py
import numpy as np
import pytest

from lightloom.sequencer.analysis import imaging_dask as night
from lightloom.sequencer.analysis.imaging import polarization_povms, stokes_maps
from lightloom.sequencer.cli import main
from lightloom.sequencer.storage.frames import frame_columns, frame_stack

SERIES = Path(__file__).resolve().parents[1] / "protocols" / "imaging-series.yaml"


@pytest.fixture(scope="module")
def series_run(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("series")
    protocol = folder / "short-series.yaml"
    protocol.write_text(SERIES.read_text().replace("sweep: {passes: 720, interval_s: 60}",
                                                   "sweep: {passes: 3, interval_s: 0}"))
    out = folder / "run.h5"
    assert main(["run", str(protocol), "--bench", "sim-camera", "--out", str(out), "--quiet"]) == 0
    return out


def test_per_pass_maps_equal_the_in_memory_analysis_of_each_pass(series_run):
    columns = frame_columns(series_run)
    layout = night.pass_weights(columns.kind, columns.pass_index, columns.operators)
    stack = frame_stack(series_run, 5)
    maps = night.pass_maps(stack, columns.kind, layout).compute(scheduler="threads")
    assert maps.shape == (3, 4, 64, 64) and list(layout.passes) == [0, 1, 2]
    with h5py.File(series_run) as f:
        frames = f["frames/data"][()]
    for p, (a, b) in enumerate(layout.bounds):
        kind = columns.kind[a:b]
        measure = kind == 0
        own = frames[a:b][kind == 1]
        dark = own.mean(axis=0) if len(own) else frames[columns.kind == 1].mean(axis=0)
        expected = stokes_maps(frames[a:b][measure], polarization_povms(columns.operators[a:b][measure]), dark)
        np.testing.assert_allclose(maps[p], expected.stokes, rtol=1e-9, atol=1e-6)


def test_integrated_series_is_the_sum_of_the_pass_maps(series_run):
    columns = frame_columns(series_run)
    layout = night.pass_weights(columns.kind, columns.pass_index, columns.operators)
    stack = frame_stack(series_run, 4)
    keep = ~night.saturated_anywhere(frame_stack(series_run, 4, "frames/saturated"))
    series = night.series_from_moments(night.frame_moments(stack, keep).compute(), columns.kind, layout)
    maps = night.pass_maps(stack, columns.kind, layout).compute()
    np.testing.assert_allclose(series.stokes, maps.sum(axis=(2, 3)), rtol=1e-9)
    windows = [w.compute() for w in night.window_maps(stack, columns.kind, layout, 2)]
    assert len(windows) == 2
    np.testing.assert_allclose(windows[0], maps[:2].mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(windows[1], maps[2], rtol=1e-12)
    assert np.all(np.abs(series.normalised[:, 1:]) < 0.1)  # the sim source is nearly unpolarized overall
    assert np.all(series.nonseparability > 0.99)


def test_centroid_series_follows_a_drifting_pattern():
    # A Gaussian spot that moves 0.5 pixel along x per pass; 4 polarizer settings and a dark per pass.
    rows, cols, shift = 40, 50, 0.5
    y, x = np.mgrid[0:rows, 0:cols]
    povm = {0: np.diag([1.0, 0]), 1: np.diag([0, 1.0]), 2: np.full((2, 2), 0.5),
            3: np.array([[0.5, -0.5j], [0.5j, 0.5]])}
    frames, kind, passes, ops = [], [], [], []
    for p in range(5):
        spot = 1000 * np.exp(-((x - 20 - shift * p) ** 2 + (y - 18) ** 2) / 30.0)
        for k in range(4):
            frames.append(spot * [1.0, 0.0, 0.5, 0.5][k] + 3.0)
            kind.append(0)
            passes.append(p)
            ops.append(np.kron(povm[k], np.eye(2)))
        frames.append(np.full((rows, cols), 3.0))
        kind.append(1)
        passes.append(p)
        ops.append(np.zeros((4, 4)))
    stack = da.from_array(np.array(frames), chunks=(3, rows, cols))
    layout = night.pass_weights(np.array(kind), np.array(passes), np.array(ops))
    keep = da.ones((rows, cols), dtype=bool)
    series = night.series_from_moments(night.frame_moments(stack, keep).compute(), np.array(kind), layout)
    np.testing.assert_allclose(np.diff(series.centroid_px[:, 0]), shift, atol=1e-6)
    np.testing.assert_allclose(series.centroid_px[:, 1], 18.0, atol=1e-4)  # the sensor edge cuts a tail
    np.testing.assert_allclose(series.normalised[:, 1], 1.0, atol=1e-9)  # horizontally polarized


def test_frames_out_of_pass_order_are_refused():
    with pytest.raises(ValueError, match="pass order"):
        night.pass_weights(np.zeros(3), np.array([0, 1, 0]), np.zeros((3, 4, 4)))


def test_series_and_window_maps_on_a_local_cluster_match_the_local_scheduler(series_run, tmp_path, capsys):
    distributed = pytest.importorskip("distributed")
    capsys.readouterr()
    assert main(["analyze", str(series_run), "--json", "--bootstrap", "20", "--series",
                 "--series-maps", str(tmp_path / "local.h5"), "--series-window", "2"]) == 0
    local = json.loads(capsys.readouterr().out)["imaging_series"]
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, host="127.0.0.1",
                                  dashboard_address=None, processes=True) as cluster:
        assert main(["analyze", str(series_run), "--json", "--bootstrap", "20", "--series", "--dask",
                     cluster.scheduler_address, "--series-maps", str(tmp_path / "cluster.h5"),
                     "--series-window", "2"]) == 0
    remote = json.loads(capsys.readouterr().out)["imaging_series"]
    assert remote["scheduler"].startswith("tcp://127.0.0.1")
    for a, b in zip(local["passes"], remote["passes"]):
        np.testing.assert_allclose(a["stokes"], b["stokes"], rtol=1e-12)
        np.testing.assert_allclose(a["centroid_px"], b["centroid_px"], rtol=1e-12)
    with h5py.File(tmp_path / "local.h5") as f, h5py.File(tmp_path / "cluster.h5") as g:
        assert f["stokes"].shape == (2, 4, 64, 64)  # 3 passes in windows of 2
        np.testing.assert_allclose(f["stokes"][()], g["stokes"][()], rtol=1e-12)
