"""The run file grows by appending: refresh cost O(new readings), memory bounded, readers welcome."""

from __future__ import annotations

import os
import queue
import subprocess
import sys
import textwrap
import threading
import tracemalloc
from itertools import count
from pathlib import Path

import h5py
import numpy as np

import lightloom.sequencer.storage.store as store_module
from lightloom.sequencer.storage import Event, RunStore, journal_path_for, load_run, read_runfile
from lightloom.sequencer.storage.journal import CHUNK_BYTES
from helpers.records import make_header, make_reading

REPO = Path(__file__).resolve().parents[1]


def _clock():
    ticks = count()
    return lambda: 1.8e9 + next(ticks)


def test_each_refresh_appends_only_the_readings_recorded_since_the_last(tmp_path, monkeypatch):
    appended = []
    real = store_module.append_runfile

    def spy(path, rows, events, *args, **kwargs):
        appended.append(len(rows))
        return real(path, rows, events, *args, **kwargs)

    monkeypatch.setattr(store_module, "append_runfile", spy)
    store = RunStore.create(tmp_path / "run.h5", make_header(300), clock=_clock())
    for i in range(250):
        store.record(make_reading(i))
        if i % 50 == 49:
            store.refresh()
    store.close("complete")
    assert appended == [50, 50, 50, 50, 50, 0]
    np.testing.assert_array_equal(read_runfile(tmp_path / "run.h5").readings.step_index, np.arange(250))


def test_rows_already_in_the_file_are_not_written_again(tmp_path):
    store = RunStore.create(tmp_path / "run.h5", make_header(), clock=_clock())
    for i in range(40):
        store.record(make_reading(i))
    store.refresh()
    with h5py.File(tmp_path / "run.h5", "r") as f:
        ds = f["readings/values"]
        assert ds.maxshape[0] is None and ds.chunks is not None
        offsets = [ds.id.get_chunk_info(k).byte_offset for k in range(ds.id.get_num_chunks())]
    for i in range(40, 60):
        store.record(make_reading(i))
    store.close("complete")
    with h5py.File(tmp_path / "run.h5", "r") as f:
        ds = f["readings/values"]
        after = [ds.id.get_chunk_info(k).byte_offset for k in range(len(offsets))]
        assert after == offsets, "chunks written before were moved or rewritten elsewhere"
        assert f.attrs["journal_bytes"] == journal_path_for(tmp_path / "run.h5").stat().st_size


def test_the_store_and_journal_hold_no_readings_in_memory(tmp_path):
    store = RunStore.create(tmp_path / "run.h5", make_header(5000), clock=_clock())
    readings = [make_reading(i) for i in range(50)]
    for r in readings[:10]:
        store.record(r)
    store.refresh()
    tracemalloc.start()
    before = tracemalloc.take_snapshot()
    for i in range(1000):
        store.record(readings[i % 50])
        if i % 200 == 199:
            store.refresh()
    after = tracemalloc.take_snapshot()
    tracemalloc.stop()
    grown = sum(stat.size_diff for stat in after.compare_to(before, "filename"))
    store.close("complete")
    # 1000 readings are 1.2 MB in the journal; what the store keeps must not follow them.
    assert grown < 150_000, f"memory grew by {grown} bytes over 1000 readings"


def test_resume_reads_the_journal_a_chunk_at_a_time(tmp_path, monkeypatch):
    monkeypatch.setattr("lightloom.sequencer.storage.journal.CHUNK_BYTES", 4096)
    store = RunStore.create(tmp_path / "run.h5", make_header(400), clock=_clock())
    for i in range(300):
        store.record(make_reading(i))
        if i % 97 == 0:
            store.event(Event(1.8e9 + i, "note", f"at {i}"))
    store.release()
    resumed = RunStore.reopen(tmp_path / "run.h5", clock=_clock())
    assert resumed.summary.n_readings == 300 and resumed.summary.steps_done == 300
    assert resumed.summary.done[:300].all() and not resumed.summary.done[300:].any()
    assert resumed.summary.t_first == make_reading(0).t_start
    assert len(resumed.events) == 4
    resumed.close("complete")
    data = read_runfile(tmp_path / "run.h5")
    assert len(data.readings) == 300 and [e.message for e in data.events] == [f"at {i}" for i in (0, 97, 194, 291)]
    assert CHUNK_BYTES > 4096


def test_resume_appends_to_a_good_run_file_instead_of_rebuilding_it(tmp_path, monkeypatch):
    store = RunStore.create(tmp_path / "run.h5", make_header(), clock=_clock())
    for i in range(30):
        store.record(make_reading(i))
    store.refresh()
    for i in range(30, 35):
        store.record(make_reading(i))
    store.release()
    rebuilt = []
    monkeypatch.setattr(store_module.RunStore, "_rebuild", lambda self, *a, **k: rebuilt.append(1))
    RunStore.reopen(tmp_path / "run.h5", clock=_clock()).close("complete")
    assert rebuilt == []
    np.testing.assert_array_equal(read_runfile(tmp_path / "run.h5").readings.step_index, np.arange(35))


def test_load_run_reads_the_file_and_only_the_journal_tail(tmp_path):
    store = RunStore.create(tmp_path / "run.h5", make_header(), clock=_clock())
    for i in range(20):
        store.record(make_reading(i))
    store.refresh()
    for i in range(20, 26):
        store.record(make_reading(i))
    store.event(Event(1.9e9, "note", "late"))
    data = load_run(tmp_path / "run.h5")
    assert data.source == "journal" and list(data.readings.rows()) == [make_reading(i) for i in range(26)]
    assert [e.message for e in data.events] == ["late"]
    store.close("complete", "done")
    data = load_run(tmp_path / "run.h5")
    assert data.source == "runfile" and (data.status, data.message) == ("complete", "done")


def test_a_reader_opening_the_file_during_refreshes_always_sees_a_whole_run(tmp_path):
    # The reader reads as fast as it can while the writer records and refreshes. Four times the
    # writer also waits until the reader has read once more, so that even on a loaded machine,
    # where the writer could otherwise finish between two reads, the reader sees the file part-way.
    path = tmp_path / "run.h5"
    writer = subprocess.Popen(
        [sys.executable, "-c", textwrap.dedent(f"""
            import sys
            sys.path.insert(0, {str(REPO / "tests")!r})
            from lightloom.sequencer.storage import RunStore
            from helpers.records import make_header, make_reading
            store = RunStore.create({str(path)!r}, make_header(3000))
            print("ready", flush=True)
            for i in range(600):
                store.record(make_reading(i))
                if i % 7 == 6:
                    store.refresh()
                if i % 140 == 139:
                    print("read now", flush=True)
                    sys.stdin.readline()
            store.close("complete")
            print("done", flush=True)
        """)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": str(REPO)},
    )
    assert writer.stdout.readline().strip() == "ready"
    said: queue.Queue[str] = queue.Queue()
    threading.Thread(target=lambda: [said.put(line.strip()) for line in writer.stdout], daemon=True).start()
    sizes = []

    def read_once() -> None:
        data = read_runfile(path)
        n = len(data.readings)
        np.testing.assert_array_equal(data.readings.step_index, np.arange(n))
        assert data.readings.operators.shape == (n, 4, 4, 4)
        sizes.append(n)

    last = ""
    while last != "done" and writer.poll() is None:
        read_once()
        try:
            last = said.get_nowait()
        except queue.Empty:
            continue
        if last == "read now":
            read_once()
            writer.stdin.write("\n")
            writer.stdin.flush()
    writer.wait(timeout=60)
    assert writer.returncode == 0
    assert len(set(sizes)) >= 3, "the reader never saw the file part-way through"
    assert len(read_runfile(path).readings) == 600


def test_a_refresh_while_a_reader_holds_the_file_is_skipped_and_caught_up(tmp_path):
    store = RunStore.create(tmp_path / "run.h5", make_header(), clock=_clock())
    for i in range(5):
        store.record(make_reading(i))
    holder = subprocess.Popen(
        [sys.executable, "-c", f"import h5py, sys\nf = h5py.File({str(tmp_path / 'run.h5')!r}, 'r')\n"
                               "print('open', flush=True)\nsys.stdin.readline()"],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
    )
    assert holder.stdout.readline().strip() == "open"
    assert store.refresh() is False
    holder.stdin.write("\n")
    holder.stdin.flush()
    holder.wait(timeout=30)
    assert store.refresh() is True
    assert len(read_runfile(tmp_path / "run.h5").readings) == 5
    store.close("complete")


def test_a_run_file_from_before_journal_offsets_is_read_and_rebuilt_on_resume(tmp_path):
    store = RunStore.create(tmp_path / "run.h5", make_header(), clock=_clock())
    for i in range(12):
        store.record(make_reading(i))
    store.refresh()
    for i in range(12, 15):
        store.record(make_reading(i))
    store.release()
    with h5py.File(tmp_path / "run.h5", "r+") as f:  # what earlier versions wrote: no offset
        del f.attrs["journal_bytes"]
        del f.attrs["writing"]
    assert len(read_runfile(tmp_path / "run.h5").readings) == 12
    assert len(load_run(tmp_path / "run.h5").readings) == 15  # the journal holds more: it is read
    RunStore.reopen(tmp_path / "run.h5", clock=_clock()).close("complete")
    with h5py.File(tmp_path / "run.h5", "r") as f:
        assert f.attrs["journal_bytes"] == journal_path_for(tmp_path / "run.h5").stat().st_size
    np.testing.assert_array_equal(read_runfile(tmp_path / "run.h5").readings.step_index, np.arange(15))
