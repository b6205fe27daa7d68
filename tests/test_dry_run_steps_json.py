"""`dry-run --json` lists every step, written from the step columns, exactly as one object a step would."""

from __future__ import annotations

import json

import pytest

from lightloom.sequencer.lang.bench import load_bench
from lightloom.sequencer.lang.protocol import load_protocol
from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model
from lightloom.sequencer.plan.timing import estimate_steps
from helpers.runs import REPO, run_cli

SWEPT = (REPO / "protocols" / "joint-36.yaml").read_text() + "sweep: {passes: 3, interval_s: 0}\n"


def steps_one_object_each(plan, seconds) -> list[dict]:
    """The step list built the plain way: one Python object per step."""
    return [
        {"index": s.index, "kind": s.kind, "pass": s.pass_index, "point": s.point_index,
         "repeat": s.repeat_index, "label": s.label, "port_labels": list(s.port_labels),
         "settings": dict(zip(plan.element_names, s.settings.as_list())),
         "dwell_s": s.dwell_s, "seconds": round(float(t), 4)}
        for s, t in zip(plan.steps, seconds)
    ]


@pytest.mark.parametrize("protocol,bench", [("swept", "sim"), ("joint-36", "sim-single"),
                                            ("imaging-4", "sim-camera"), ("polarization-4", "sim")])
def test_every_step_matches_the_plain_per_step_form(tmp_path, capsys, protocol, bench) -> None:
    if protocol == "swept":
        protocol = str(tmp_path / "swept.yaml")
        (tmp_path / "swept.yaml").write_text(SWEPT)
    assert run_cli("dry-run", protocol, "--bench", bench, "--json") == 0
    doc = json.loads(capsys.readouterr().out)
    plan = compile_protocol(load_protocol(protocol), load_bench(bench))
    est = estimate_steps(plan, table_model(load_bench(bench)))
    assert doc["steps"] == steps_one_object_each(plan, est.step_seconds)
    assert doc["points"] == len(plan.steps) and {"estimated_seconds", "determines"} <= set(doc)
    assert list(doc)[-1] == "steps"
    if protocol.endswith("swept.yaml"):
        assert {s["pass"] for s in doc["steps"]} == {0, 1, 2}
