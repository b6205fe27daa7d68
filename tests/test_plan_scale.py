"""A night-sized step list: columns, a compact JSON form that round-trips, old verbose form still read."""

from __future__ import annotations

import json
import math

import h5py
import numpy as np

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.lang.protocol import parse_protocol
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model
from lightloom.sequencer.plan.timing import estimate_steps

NIGHT = """\
protocol: long-night
analyzes: [polarization, spatial]
measure:
  targets:
    polarization: [H, V, D, A, R, L]
    spatial: [h, v, d, a, l+, l-]
    combine: product
dwell_s: 0.5
repeats: 2
background: {every_points: 36}
reference: {every_points: 9, dwell_s: 0.2}
order: least-motion
sweep: {passes: 3000, interval_s: 60}
"""


def _night() -> StepList:
    return compile_protocol(parse_protocol(NIGHT, "long-night.yaml"), load_bench("sim"))


def test_a_night_of_63000_steps_keeps_a_few_bytes_a_step_and_a_small_json():
    plan = _night()
    n = len(plan.steps)
    assert n == 3000 * 21 + 1  # 18 readings, 2 references, 1 background a pass, and the first
    nbytes = sum(getattr(plan.columns, f).nbytes for f in
                 ("kind", "pass_index", "point_index", "repeat_index", "settings", "dwell_s", "label", "port_labels"))
    assert nbytes / n < 80
    text = plan.to_json()
    assert len(text) < 100_000  # zlib-compressed columns: passes repeat
    again = StepList.from_json(text)
    assert again.to_json() == text and again.steps == plan.steps
    middle, iterated = plan.steps[n // 2], list(plan.steps)[n // 2]
    assert plan.steps[-1].kind == "background" and middle.label == iterated.label
    np.testing.assert_array_equal(middle.settings, iterated.settings)


def test_the_verbose_step_list_of_earlier_versions_is_still_read():
    plan = compile_protocol(parse_protocol(NIGHT.replace("3000", "2"), "short.yaml"), load_bench("sim"))
    verbose = {
        "protocol_name": plan.protocol_name, "bench_name": plan.bench_name,
        "element_names": list(plan.element_names), "port_names": list(plan.port_names),
        "n_settings": plan.n_settings, "passes": plan.passes, "pass_interval_s": plan.pass_interval_s,
        "order": plan.order, "violations": [],
        "steps": [{"index": s.index, "kind": s.kind, "pass_index": s.pass_index,
                   "point_index": s.point_index, "repeat_index": s.repeat_index,
                   "settings": s.settings.as_list(),
                   "dwell_s": s.dwell_s, "label": s.label, "port_labels": list(s.port_labels)}
                  for s in plan.steps],
    }
    assert StepList.from_json(json.dumps(verbose)).to_json() == plan.to_json()


def test_the_estimate_of_a_night_counts_every_wait_and_move():
    plan = _night()
    est = estimate_steps(plan, table_model(load_bench("sim")))
    # Passes start at least 60 s apart and each takes less: the night lasts about 3000 minutes.
    assert 2999 * 60 < est.total_seconds < 2999 * 60 + 120
    assert math.isclose(est.total_seconds, est.motion_seconds + est.dwell_seconds + est.wait_seconds
                        + est.overhead_seconds, rel_tol=1e-9)
    assert np.count_nonzero(est.step_wait_seconds) == 2999


def test_the_run_file_holds_the_steps_as_typed_columns(tmp_path):
    from lightloom.sequencer import cli

    protocol = tmp_path / "short.yaml"
    protocol.write_text(NIGHT.replace("passes: 3000, interval_s: 60", "passes: 2, interval_s: 0"))
    out = tmp_path / "run.h5"
    assert cli.main(["run", str(protocol), "--bench", "sim", "--out", str(out), "--quiet"]) == 0
    with h5py.File(out, "r") as f:
        g = f["step_columns"]
        steps = StepList.from_json(f["steps"].asstr()[()])
        np.testing.assert_array_equal(g["pass_index"][()], steps.columns.pass_index)
        np.testing.assert_array_equal(g["settings"][()], steps.columns.settings)
        labels = [str(x, "utf-8") if isinstance(x, bytes) else str(x) for x in g.attrs["labels"]]
        assert [labels[i] for i in g["label"][()]] == [s.label for s in steps.steps]
        assert len(f["steps"].asstr()[()]) < 20_000
