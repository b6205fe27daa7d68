"""The compiler: fewest settings for the detectors on the table, labels, ordering, extra readings."""

from __future__ import annotations

import math

import numpy as np
import pytest

from lightloom.sequencer.plan.compiler import Request, TableModel, compile_requests
from lightloom.sequencer.plan.kinematics import StageKinematics, approach_path, move_time_s, path_time_s
from lightloom.sequencer.optics.analyzer import (
    AnalyzerModel, ConverterModel, PlateModel, PortModel, RotatorModel, port_operators, probabilities,
)
from lightloom.sequencer.optics.states import POLARIZATION_KETS, SPATIAL_KETS
from lightloom.sequencer.plan.ordering import transition_time_s
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.plan.timing import estimate_steps

K = StageKinematics(20.0, 50.0, 0.2, 0.05, -360.0, 360.0, 0.002)
MODEL = AnalyzerModel(PlateModel(90, 0.3), PlateModel(180, -0.2), ConverterModel(90, 45, 0.1, False),
                      RotatorModel(0.1), 0.0, 1.0)
FOUR = tuple(PortModel(f"pm_{s}{p}", s, p) for s in "hv" for p in "HV")
# A table with both plates, a fixed mode converter and an image rotator (no converter_angle stage).
STAGES = ("quarter_wave_plate", "half_wave_plate", "image_rotator")
PRESENT = frozenset(STAGES + ("mode_converter",))


def _table(ports=FOUR, name="four") -> TableModel:
    return TableModel(name, MODEL, ports, PRESENT, {e: K for e in STAGES}, 0.4, 0.05, 0.002)


def _joint(pols="HVDARL", sps=("h", "v", "d", "a", "l+", "l-")) -> list[Request]:
    return [Request((POLARIZATION_KETS[p], p), (SPATIAL_KETS[s], s)) for p in pols for s in sps]


def _compile(table, reqs, analyzes=("polarization", "spatial"), **kw) -> StepList:
    kw.setdefault("dwell_s", 0.5)
    kw.setdefault("repeats", 1)
    return compile_requests(table, reqs, protocol_name="t", analyzes=analyzes, **kw)


def _measure(plan: StepList):
    return [s for s in plan.steps if s.kind == "measure"]


@pytest.mark.parametrize(
    "ports,reqs,analyzes,n",
    [
        (FOUR, [Request((POLARIZATION_KETS[p], p)) for p in "HVDARL"], ("polarization",), 3),
        (FOUR, _joint(), ("polarization", "spatial"), 9),
        (FOUR, _joint("HVDR", ("h", "v", "d", "l+")), ("polarization", "spatial"), 9),
        (FOUR[:1], _joint(), ("polarization", "spatial"), 36),
        (FOUR[:1], _joint("HVDR", ("h", "v", "d", "l+")), ("polarization", "spatial"), 16),
        # one detector, polarization only: each projector measured once per spatial output and summed
        (FOUR[:1], [Request((POLARIZATION_KETS[p], p)) for p in "HVDARL"], ("polarization",), 12),
    ],
)
def test_fewest_settings_for_the_detectors_on_the_table(ports, reqs, analyzes, n) -> None:
    plan = _compile(_table(ports), reqs, analyzes)
    assert plan.n_settings == n
    assert len(_measure(plan)) == n


def test_every_port_measures_the_projector_its_label_names() -> None:
    plan = _compile(_table(), _joint())
    kets = {f"{p},{s}": np.kron(POLARIZATION_KETS[p], SPATIAL_KETS[s]) for p in "HVDARL" for s in SPATIAL_KETS}
    seen = set()
    for step in _measure(plan):
        ops = port_operators(MODEL, FOUR, step.settings.as_vector()[None])[0]
        for label, op in zip(step.port_labels, ops):
            assert abs(probabilities(kets[label], op) - 1.0) < 1e-9
            seen.add(label)
    assert seen == set(kets)


def test_least_motion_cuts_motion_time_by_at_least_30_percent_on_joint_36() -> None:
    for ports in (FOUR, FOUR[:1]):
        table = _table(ports)
        written = estimate_steps(_compile(table, _joint(), order="as-written"), table).motion_seconds
        least = estimate_steps(_compile(table, _joint(), order="least-motion"), table).motion_seconds
        assert least <= 0.7 * written, (ports, least, written)


def test_shuffled_order_is_reproducible_from_the_seed() -> None:
    a = _compile(_table(FOUR[:1]), _joint(), order="shuffled", seed=4)
    b = _compile(_table(FOUR[:1]), _joint(), order="shuffled", seed=4)
    c = _compile(_table(FOUR[:1]), _joint(), order="shuffled", seed=5)
    assert a.to_json() == b.to_json() != c.to_json()


def test_repeats_background_reference_and_passes() -> None:
    plan = _compile(_table(), _joint(), repeats=3, background_every=3, reference_every=3, passes=2,
                    pass_interval_s=100.0)
    kinds = [s.kind for s in plan.steps]
    assert kinds.count("measure") == 9 * 3 * 2
    assert kinds[0] == "background" and kinds[-1] == "background"
    # per pass: one at the start, after settings 3 and 6, and one at the end
    assert kinds.count("reference") == 2 * 4
    assert {s.pass_index for s in plan.steps} == {0, 1}
    est = estimate_steps(plan, _table())
    assert est.wait_seconds > 0  # the second pass waits for its start time


def test_step_list_json_round_trip_is_exact() -> None:
    plan = _compile(_table(), _joint(), reference_every=2)
    again = StepList.from_json(plan.to_json())
    assert again == plan or again.to_json() == plan.to_json()


def test_move_time_trapezoid_and_triangle() -> None:
    # common practice, no source: t = 2 v/a + (d - v^2/a)/v for long moves, 2 sqrt(d/a) for short ones
    assert math.isclose(move_time_s(100.0, 20.0, 50.0), 2 * 20 / 50 + (100 - 400 / 50) / 20)
    assert math.isclose(move_time_s(2.0, 20.0, 50.0), 2 * math.sqrt(2 / 50))
    assert move_time_s(0.0, 20.0, 50.0) == 0.0


def test_a_move_down_overshoots_by_twice_the_backlash_and_ends_moving_up() -> None:
    assert approach_path(10.0, 20.0, 0.5) == (20.0,)
    assert approach_path(20.0, 10.0, 0.5) == (9.0, 10.0)
    assert path_time_s(20.0, 10.0, K) > path_time_s(10.0, 20.0, K)


def test_limit_violations_are_reported() -> None:
    tight = StageKinematics(20.0, 50.0, 0.2, 0.05, 0.0, 10.0, 0.0)
    table = TableModel("tight", MODEL, FOUR, PRESENT, {e: tight for e in STAGES}, 0.4)
    plan = _compile(table, _joint())
    assert plan.violations and "outside its travel" in plan.violations[0]


def test_transition_time_is_the_slowest_stage() -> None:
    a = np.array([0.0, 0.0, 0.0, np.nan, 0.0])
    b = np.array([90.0, 10.0, 0.0, np.nan, 0.0])
    assert math.isclose(transition_time_s(a, b, _table()), path_time_s(0.0, 90.0, K))
