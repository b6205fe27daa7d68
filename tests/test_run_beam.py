"""A lost beam pauses the run and the step is measured again; laser drift beyond the threshold is flagged."""

from __future__ import annotations

import numpy as np
import pytest

from lightloom.sequencer.run.beam import MIN_SIGNAL_TO_NOISE, SETTLE_READINGS, BeamWatch, MonitorLevels
from lightloom.sequencer.run.session import log_path_for
from lightloom.sequencer.storage import read_runfile
from lightloom.sequencer.model.records import FLAG_AFTER_BEAM_WAIT, FLAG_DRIFT
from helpers.runs import assert_complete, run_cli, write_bench


def _clean_and_lossy(tmp_path, base: str, loss: dict, **sections):
    """Runs of polarization-6 on ``base`` without and with a beam loss (same seed): their readings."""
    clean, lossy = tmp_path / "clean.h5", tmp_path / "lossy.h5"
    assert run_cli("run", "polarization-6", "--bench", base, "--out", clean) == 0
    bench = write_bench(tmp_path, f"{base}-beam-loss", base=base, simulation={"faults": [loss]}, **sections)
    status = run_cli("run", "polarization-6", "--bench", bench, "--out", lossy)
    return status, read_runfile(clean), read_runfile(lossy)


def test_a_beam_loss_pauses_the_run_and_no_dark_reading_is_recorded(tmp_path, capsys):
    status, clean, lossy = _clean_and_lossy(tmp_path, "sim", {"kind": "beam_loss", "at_s": 6.0, "duration_s": 5.0})
    assert status == 0
    assert_complete(tmp_path / "lossy.h5")
    kinds = [e.kind for e in lossy.events]
    assert kinds.index("beam_lost") < kinds.index("beam_back") < kinds.index("complete")
    waited = lossy.readings.flags & FLAG_AFTER_BEAM_WAIT
    assert np.count_nonzero(waited) == 1
    light = lossy.readings.kind != "background"
    # Same seed, same table: every recorded light reading matches the run without a loss to noise
    # and drift level; a reading taken in the dark would be ~0 on every port.
    np.testing.assert_allclose(lossy.readings.values[light], clean.readings.values[light], rtol=0.02)
    text = log_path_for(tmp_path / "lossy.h5").read_text()
    assert "beam lost" in text and "measuring the step again" in text


def test_a_beam_that_never_comes_back_stops_with_exit_3_after_beam_wait_s(tmp_path, capsys, shutter_watch):
    status, _, lossy = _clean_and_lossy(
        tmp_path, "sim", {"kind": "beam_loss", "at_s": 6.0}, thresholds={"beam_wait_s": 20.0},
    )
    assert status == 3
    shutter_watch.tables.pop(0)  # the clean run's table
    shutter_watch.assert_closed_at_the_end()
    assert lossy.status == "fault" and "thresholds.beam_wait_s" in lossy.message
    lost = next(e.t for e in lossy.events if e.kind == "beam_lost")
    fault = next(e.t for e in lossy.events if e.kind == "fault")
    assert 20.0 <= fault - lost <= 1.5 * 20.0
    assert "beam_back" not in [e.kind for e in lossy.events]


@pytest.mark.xfail(
    strict=True,
    reason="promise not kept: with one detector port and no reference meter (sim-single) nothing monitors "
    "the beam, so readings taken in the dark are recorded as measurements",
)
def test_a_beam_loss_on_a_bench_without_a_beam_monitor_records_no_dark_reading(tmp_path, capsys):
    status, clean, lossy = _clean_and_lossy(
        tmp_path, "sim-single", {"kind": "beam_loss", "at_s": 6.0, "duration_s": 5.0},
    )
    light = lossy.readings.kind != "background"
    bright = clean.readings.values[light] > 1e-5  # the readings of a clean run that see light
    assert status == 0 and np.all(lossy.readings.values[light][bright] > 0.5 * clean.readings.values[light][bright])


def test_drift_beyond_the_threshold_flags_exactly_the_readings_outside_it(tmp_path, capsys):
    bench = write_bench(
        tmp_path, "sim-drifting", thresholds={"drift_fraction": 0.05},
        simulation={"drift": {"amplitude": 0.2, "period_s": 20.0}},
    )
    out = tmp_path / "run.h5"
    assert run_cli("run", "joint-16", "--bench", bench, "--out", out) == 0
    data = assert_complete(out)
    r = data.readings
    light = np.flatnonzero(r.kind != "background")
    # The watch settles on the first SETTLE_READINGS lit readings: their median is the baseline
    # and those readings are not judged. The monitor is the one the log names (both see the drift).
    settling, judged = light[:SETTLE_READINGS], light[SETTLE_READINGS:]
    text = log_path_for(out).read_text()
    if "beam watch: the reference meter" in text:
        level = np.asarray(r.reference_w, dtype=float)
    else:
        assert "beam watch: the ports' summed power" in text
        level = np.sum(np.asarray(r.values, dtype=float) / np.asarray(data.header.port_gains, dtype=float), axis=1)
    baseline = np.median(level[settling])
    outside = np.zeros(len(r.kind), dtype=bool)
    outside[judged] = np.abs(level[judged] / baseline - 1.0) > 0.05
    assert outside.any() and not outside[judged].all()
    np.testing.assert_array_equal((r.flags & FLAG_DRIFT) != 0, outside)
    starts = np.count_nonzero(np.diff(outside[light].astype(int)) == 1) + int(outside[light][0])
    assert [e.kind for e in data.events].count("drift") == starts
    assert "drift: beam monitor at" in log_path_for(out).read_text()


# --------------------------------------------------------------------------- which monitor watches

def _settle(watch, levels):
    verdicts = [watch.judge(MonitorLevels(*pair)) for pair in levels]
    return verdicts


def test_a_reference_meter_below_its_noise_hands_the_watch_to_the_ports_sum():
    rng = np.random.default_rng(1)
    watch = BeamWatch(0.3, 0.05)
    # a 1 % pick-off of 1 uW read by a meter with 10 nW of noise, and ports that sum to 1 uW +- 2 %
    pairs = [(1e-8 + 1e-8 * rng.standard_normal(), 1e-6 * (1 + 0.02 * rng.standard_normal())) for _ in range(SETTLE_READINGS)]
    verdicts = _settle(watch, pairs)
    assert watch.source == "ports" and abs(watch.baseline - 1e-6) < 1e-7
    assert "ports' summed power" in verdicts[-1].announce and not verdicts[-1].unwatched
    # the meter's noise goes negative: no pause, since the ports see the beam
    assert not watch.judge(MonitorLevels(-2e-8, 1.01e-6)).lost
    assert watch.judge(MonitorLevels(1e-8, 1e-9)).lost


def test_a_noisy_pickoff_whose_first_readings_happen_to_agree_does_not_take_the_watch():
    # Seen on sim at 1 uW (seed 126 of the coverage benchmark): the 1 % pick-off (15 nW under 11 nW
    # of noise) read five nearly equal values, looked 10x above its noise, was chosen, and then
    # paused the run on its noise until the step gave up. Ten settling readings show its noise,
    # and the ports' sum, far further above its own, watches.
    rng = np.random.default_rng(3)
    ref = list(1.48e-8 + 1e-11 * rng.standard_normal(5)) + list(1.48e-8 + 1.1e-8 * rng.standard_normal(SETTLE_READINGS - 5))
    pairs = [(x, 1e-6 * (1 + 0.01 * rng.standard_normal())) for x in ref]
    watch = BeamWatch(0.3, 0.05)
    _settle(watch, pairs)
    assert watch.source == "ports"
    # the premise: over the five agreeing readings alone the pick-off stood far above the bar
    first = np.asarray(ref[:5])
    assert np.median(first) / np.sqrt(np.mean(np.diff(first, 2) ** 2) / 6.0) > 10 * MIN_SIGNAL_TO_NOISE


def test_of_two_monitors_above_the_bar_the_one_further_above_its_noise_watches():
    rng = np.random.default_rng(4)
    watch = BeamWatch(0.3, 0.05)
    # a pick-off 20x above its noise, ports 500x above theirs
    _settle(watch, [(1e-7 * (1 + 0.05 * rng.standard_normal()), 1e-5 * (1 + 0.002 * rng.standard_normal()))
                    for _ in range(SETTLE_READINGS)])
    assert watch.source == "ports"


def test_a_bright_reference_meter_is_preferred():
    watch = BeamWatch(0.3, 0.05)
    _settle(watch, [(1e-5 * (1 + 1e-3 * k), 1e-3 * (1 - 1e-3 * k)) for k in range(SETTLE_READINGS)])
    assert watch.source == "reference" and watch.judge(MonitorLevels(1e-7, 1e-3)).lost


def test_when_no_monitor_stands_above_its_noise_nothing_pauses_the_run_and_the_run_is_told():
    rng = np.random.default_rng(2)
    watch = BeamWatch(0.3, 0.05)
    # (judged as the reading after a pause is: a single noisy monitor cannot be told from a loss
    # while settling, and pauses at most once a step)
    verdicts = [watch.judge(MonitorLevels(1e-8 * rng.standard_normal(), None), provisional=False)
                for _ in range(SETTLE_READINGS)]
    assert watch.decided and watch.source is None
    assert verdicts[-1].unwatched and "nothing watches the beam" in verdicts[-1].announce
    assert not any(watch.judge(MonitorLevels(x, None)).lost for x in 1e-8 * rng.standard_normal(200))


def test_while_settling_a_loss_needs_every_monitor_to_drop():
    watch = BeamWatch(0.3, 0.05)
    watch.judge(MonitorLevels(2e-9, 1e-6))  # a noisy meter's first reading happens to be small
    assert not watch.judge(MonitorLevels(-1e-9, 1e-6)).lost  # the meter alone dropped: noise
    lost = watch.judge(MonitorLevels(-1e-9, 1e-9))
    assert lost.lost and not watch.decided


def test_a_run_at_1_uW_with_a_pickoff_below_its_meter_noise_completes_without_pausing(tmp_path, capsys):
    # At 1 uW the sim bench's 1 % pick-off (10 nW) sits at its meter's noise: before the watch
    # chose its monitor by signal to noise, this seed paused on noise and re-measured forever.
    bench = write_bench(tmp_path, "sim-1uW", simulation={"seed": 2, "time_scale": 0, "source": {"power": 1e-6}})
    out = tmp_path / "run.h5"
    assert run_cli("run", "joint-36", "--bench", bench, "--out", out, "--quiet") == 0
    data = assert_complete(out)
    assert "beam_lost" not in [e.kind for e in data.events]
    assert not np.any(data.readings.flags & FLAG_AFTER_BEAM_WAIT)
    assert "beam watch: the ports' summed power" in log_path_for(out).read_text()


def test_a_resumed_run_keeps_as_many_lit_readings_as_the_watch_settles_on():
    from lightloom.sequencer.storage.store import FIRST_BEAM_ROWS

    assert FIRST_BEAM_ROWS == SETTLE_READINGS
