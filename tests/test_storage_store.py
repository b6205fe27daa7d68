"""RunStore (the runner's storage) and load_run (what analysis reads)."""

from __future__ import annotations

import os
import shutil
from dataclasses import replace
from itertools import count

import numpy as np
import pytest

from lightloom.sequencer.errors import StorageError
from lightloom.sequencer.storage import (
    Event, RunExistsError, RunStore, journal_path_for, load_run, read_journal, read_runfile,
)
from lightloom.sequencer.storage.journal import Journal
from helpers.records import make_header, make_reading


def _clock():
    ticks = count()
    return lambda: 1.8e9 + next(ticks)


def _store(tmp_path, n=5, name="run.h5"):
    store = RunStore.create(tmp_path / name, make_header(), clock=_clock())
    for i in range(n):
        store.record(make_reading(i))
    store.event(Event(1.8e9, "start", "go"))
    return store


def test_create_writes_a_readable_running_file_at_once(tmp_path):
    store = RunStore.create(tmp_path / "run.h5", make_header(), clock=_clock())
    data = read_runfile(tmp_path / "run.h5")
    assert data.status == "running" and len(data.readings) == 0
    assert data.header == make_header()
    store.close("complete")


@pytest.mark.parametrize("existing", ["run.h5", "run.h5.journal"])
def test_create_refuses_an_existing_run_and_says_what_to_do(tmp_path, existing):
    (tmp_path / existing).write_bytes(b"keep me")
    with pytest.raises(RunExistsError, match=r"lightloom resume .*another --out"):
        RunStore.create(tmp_path / "run.h5", make_header())
    assert (tmp_path / existing).read_bytes() == b"keep me"
    assert [p.name for p in tmp_path.iterdir()] == [existing]


def test_recorded_readings_are_in_load_run_before_any_refresh(tmp_path):
    store = _store(tmp_path, 7)
    data = load_run(tmp_path / "run.h5")
    assert data.source == "journal" and data.status == "running"
    assert list(data.readings.rows()) == [make_reading(i) for i in range(7)]
    assert len(read_runfile(tmp_path / "run.h5").readings) == 0
    store.close("complete")


def test_refresh_rebuilds_the_file_only_when_something_changed(tmp_path):
    store = _store(tmp_path, 3)
    assert store.refresh() is True
    assert store.refresh() is False
    store.record(make_reading(3))
    assert store.refresh() is True
    assert len(read_runfile(tmp_path / "run.h5").readings) == 4
    assert store.refresh("running", "waiting for beam") is True
    assert read_runfile(tmp_path / "run.h5").message == "waiting for beam"
    store.close("complete")


def test_close_records_the_final_status_in_both_files(tmp_path):
    store = _store(tmp_path, 2)
    store.close("fault", "power meter stopped answering")
    assert store.closed
    h5 = read_runfile(tmp_path / "run.h5")
    journal = read_journal(journal_path_for(tmp_path / "run.h5"))
    assert (h5.status, h5.message) == ("fault", "power meter stopped answering")
    assert (journal.status, journal.status_message) == ("fault", "power meter stopped answering")
    assert len(h5.readings) == 2 and len(h5.events) == 1


def test_close_refuses_running_as_a_final_status(tmp_path):
    store = _store(tmp_path, 1)
    with pytest.raises(ValueError, match="final status"):
        store.close("running")
    store.close("interrupted", "Ctrl-C")


def test_reopen_returns_the_stored_header_readings_and_events(tmp_path):
    _store(tmp_path, 6).close("interrupted", "Ctrl-C")
    store = RunStore.reopen(tmp_path / "run.h5", clock=_clock())
    assert store.header == make_header()
    assert list(store.readings.rows()) == [make_reading(i) for i in range(6)]
    assert [e.kind for e in store.events] == ["start"]
    assert store.bytes_cut == 0
    store.record(make_reading(6))
    store.close("complete")
    np.testing.assert_array_equal(read_runfile(tmp_path / "run.h5").readings.step_index,
                                  np.arange(7))


def test_reopen_of_a_run_that_never_closed_marks_it_interrupted_until_refresh(tmp_path):
    store = _store(tmp_path, 4)
    store.release()
    resumed = RunStore.reopen(tmp_path / "run.h5", clock=_clock())
    data = read_runfile(tmp_path / "run.h5")
    assert data.status == "interrupted" and "lightloom resume" in data.message
    assert len(data.readings) == 4
    resumed.refresh("running")
    assert read_runfile(tmp_path / "run.h5").status == "running"
    resumed.close("complete")


@pytest.mark.parametrize("damage", ["truncated", "garbage", "missing", "empty"])
def test_reopen_rebuilds_an_unusable_run_file_from_the_journal(tmp_path, damage):
    store = _store(tmp_path, 5)
    store.release()
    h5 = tmp_path / "run.h5"
    if damage == "truncated":
        os.truncate(h5, 800)
    elif damage == "garbage":
        h5.write_bytes(b"\x89HDF\r\n\x1a\n" + bytes(3000))
    elif damage == "missing":
        h5.unlink()
    else:
        h5.write_bytes(b"")
    with pytest.raises(StorageError):
        read_runfile(h5)
    RunStore.reopen(h5, clock=_clock()).close("complete")
    assert len(read_runfile(h5).readings) == 5


def test_reopen_removes_temporary_files_a_killed_refresh_left(tmp_path):
    _store(tmp_path, 1).release()
    stale = tmp_path / ".run.h5.4242.deadbeef.tmp"
    stale.write_bytes(b"half a file")
    RunStore.reopen(tmp_path / "run.h5").close("complete")
    assert not stale.exists()


def test_reopen_without_journal_refuses_and_explains(tmp_path):
    _store(tmp_path, 1).close("interrupted")
    journal_path_for(tmp_path / "run.h5").unlink()
    with pytest.raises(StorageError, match="only the journal"):
        RunStore.reopen(tmp_path / "run.h5")


def test_reopen_of_nothing_says_so(tmp_path):
    with pytest.raises(StorageError, match="no such run"):
        RunStore.reopen(tmp_path / "ghost.h5")


def test_reopen_cuts_a_torn_journal_tail_and_reports_it(tmp_path):
    _store(tmp_path, 3).release()
    journal = journal_path_for(tmp_path / "run.h5")
    with open(journal, "ab") as handle:
        handle.write(b"\xabLLJ\x02torn")
    store = RunStore.reopen(tmp_path / "run.h5")
    assert store.bytes_cut == 9 and len(store.readings) == 3
    store.close("complete")


def test_load_run_reads_a_lone_copied_run_file(tmp_path):
    _store(tmp_path, 4).close("complete", "all steps done")
    elsewhere = tmp_path / "copy"
    elsewhere.mkdir()
    shutil.copy(tmp_path / "run.h5", elsewhere / "run.h5")
    data = load_run(elsewhere / "run.h5")
    assert data.source == "runfile" and data.status == "complete" and len(data.readings) == 4


def test_load_run_uses_the_journal_when_the_run_file_is_unusable(tmp_path):
    _store(tmp_path, 4).release()
    os.truncate(tmp_path / "run.h5", 500)
    data = load_run(tmp_path / "run.h5")
    assert data.source == "journal" and len(data.readings) == 4


def test_load_run_shows_a_killed_run_as_interrupted(tmp_path):
    _store(tmp_path, 2).release()
    data = load_run(tmp_path / "run.h5")
    assert data.status == "interrupted" and "killed or crashed" in data.message


def test_load_run_accepts_the_journal_path(tmp_path):
    _store(tmp_path, 2).close("complete")
    assert len(load_run(journal_path_for(tmp_path / "run.h5")).readings) == 2


def test_load_run_ignores_a_journal_of_another_run(tmp_path):
    _store(tmp_path, 3).close("complete")
    journal = journal_path_for(tmp_path / "run.h5")
    journal.unlink()
    other = Journal.create(journal, make_header(name="another"))
    for i in range(9):
        other.append_reading(make_reading(i))
    other.close()
    data = load_run(tmp_path / "run.h5")
    assert data.source == "runfile" and len(data.readings) == 3


@pytest.mark.parametrize("status", ["complete", "interrupted", "fault"])
def test_load_run_reads_a_run_of_every_final_status(tmp_path, status):
    _store(tmp_path, 3).close(status, f"ended {status}")
    data = load_run(tmp_path / "run.h5")
    assert (data.status, data.message, data.steps_done) == (status, f"ended {status}", 3)


def test_load_run_of_nothing_is_a_storage_error(tmp_path):
    with pytest.raises(StorageError, match="no such run"):
        load_run(tmp_path / "ghost.h5")


def test_create_refuses_a_header_of_another_format_version(tmp_path):
    with pytest.raises(ValueError, match="format_version"):
        RunStore.create(tmp_path / "run.h5", replace(make_header(), format_version=2))
    assert list(tmp_path.iterdir()) == []
