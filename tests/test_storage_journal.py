"""The journal: durable appends, refusal to overwrite, torn tails, damage, locking, readers."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

import lightloom.sequencer.storage.journal as journal_module
from lightloom.sequencer.errors import StorageError
from lightloom.sequencer.storage import (
    Event, Journal, JournalDamagedError, RunExistsError, RunInUseError, StorageWriteError,
    read_journal, writer_active,
)
from lightloom.sequencer.storage.codec import TYPE_READING, scan_frames
from helpers.records import make_header, make_reading

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture
def quick_lock(monkeypatch):
    monkeypatch.setattr(journal_module, "LOCK_WAIT_S", 0.05)


def _filled(path: Path, n: int, events: bool = True) -> Journal:
    journal = Journal.create(path, make_header())
    for i in range(n):
        journal.append_reading(make_reading(i))
        if events and i % 3 == 0:
            journal.append_event(Event(1.7e9 + i, "note", f"after reading {i}"))
    return journal


def test_journal_round_trips_readings_and_events(tmp_path):
    path = tmp_path / "run.h5.journal"
    _filled(path, 8).close()
    contents = read_journal(path)
    assert contents.header == make_header()
    assert list(contents.readings.rows()) == [make_reading(i) for i in range(8)]
    assert [e.message for e in contents.events] == [f"after reading {i}" for i in (0, 3, 6)]
    assert contents.damage is None and contents.valid_bytes == path.stat().st_size


def test_open_returns_what_was_appended_and_keeps_appending(tmp_path):
    path = tmp_path / "run.h5.journal"
    _filled(path, 4).close()
    journal = Journal.open(path)
    assert journal.n_readings == 4 and journal.bytes_cut == 0 and len(journal.events) == 2
    journal.append_reading(make_reading(4))
    journal.close()
    np.testing.assert_array_equal(read_journal(path).readings.step_index, np.arange(5))


def test_create_refuses_an_existing_path(tmp_path):
    path = tmp_path / "run.h5.journal"
    path.write_bytes(b"precious")
    with pytest.raises(RunExistsError, match="resume"):
        Journal.create(path, make_header())
    assert path.read_bytes() == b"precious"
    assert list(tmp_path.iterdir()) == [path]


def test_create_refuses_a_missing_directory(tmp_path):
    with pytest.raises(StorageError, match="does not exist"):
        Journal.create(tmp_path / "nowhere" / "run.h5.journal", make_header())


@pytest.mark.parametrize("cut", [1, 5, 13, 200, 1221])
def test_torn_tail_is_cut_and_appending_continues(tmp_path, cut):
    path = tmp_path / "run.h5.journal"
    _filled(path, 5, events=False).close()
    size = path.stat().st_size
    os.truncate(path, size - cut)
    journal = Journal.open(path)
    assert journal.n_readings == 4
    assert journal.bytes_cut == 1222 - cut
    journal.append_reading(make_reading(4))
    journal.append_reading(make_reading(5))
    journal.close()
    contents = read_journal(path)
    assert contents.damage is None
    np.testing.assert_array_equal(contents.readings.step_index, np.arange(6))


def test_garbage_tail_is_cut(tmp_path):
    path = tmp_path / "run.h5.journal"
    _filled(path, 3).close()
    good = path.stat().st_size
    with open(path, "ab") as handle:
        handle.write(b"\xabLLJ" + bytes(range(200)))
    journal = Journal.open(path)
    assert journal.bytes_cut == 204 and path.stat().st_size == good
    journal.close()


def test_crc_damage_in_the_middle_stops_reading_at_the_first_bad_record(tmp_path):
    path = tmp_path / "run.h5.journal"
    _filled(path, 6, events=False).close()
    raw = bytearray(path.read_bytes())
    header_len = len(raw) - 6 * 1222
    raw[header_len + 2 * 1222 + 100] ^= 0x10
    path.write_bytes(bytes(raw))
    contents = read_journal(path)
    np.testing.assert_array_equal(contents.readings.step_index, [0, 1])
    assert contents.damage.offset == header_len + 2 * 1222
    assert contents.damage.reason == "CRC mismatch" and contents.damage.intact_after == 3


def test_open_refuses_to_cut_intact_records_after_damage(tmp_path):
    path = tmp_path / "run.h5.journal"
    _filled(path, 6, events=False).close()
    raw = bytearray(path.read_bytes())
    raw[-3 * 1222] ^= 0xFF
    path.write_bytes(bytes(raw))
    with pytest.raises(JournalDamagedError, match="2 intact records after"):
        Journal.open(path)
    assert path.read_bytes() == bytes(raw)


def test_journal_with_damaged_header_cannot_be_read(tmp_path):
    path = tmp_path / "run.h5.journal"
    _filled(path, 2).close()
    raw = bytearray(path.read_bytes())
    raw[20] ^= 0x01
    path.write_bytes(bytes(raw))
    with pytest.raises(JournalDamagedError, match="no intact header"):
        read_journal(path)


def test_file_that_is_not_a_journal_is_refused(tmp_path):
    path = tmp_path / "notes.journal"
    path.write_text("dear diary\n")
    with pytest.raises(JournalDamagedError, match="no intact header"):
        Journal.open(path)


def test_second_writer_is_refused_while_the_first_holds_the_journal(tmp_path, quick_lock):
    path = tmp_path / "run.h5.journal"
    first = _filled(path, 1)
    with pytest.raises(RunInUseError, match="another process"):
        Journal.open(path)
    first.close()
    Journal.open(path).close()


def test_writer_active_follows_the_lock(tmp_path):
    path = tmp_path / "run.h5.journal"
    journal = _filled(path, 1)
    assert writer_active(path)
    journal.close()
    assert not writer_active(path)


def test_last_status_record_wins(tmp_path):
    path = tmp_path / "run.h5.journal"
    journal = _filled(path, 1)
    assert read_journal(path).status == "running"
    journal.append_status(1.0, "fault", "stage timed out")
    journal.append_status(2.0, "running", "")
    journal.append_status(3.0, "interrupted", "Ctrl-C")
    journal.close()
    contents = read_journal(path)
    assert (contents.status, contents.status_message) == ("interrupted", "Ctrl-C")


def test_failed_write_is_undone_and_the_journal_stays_valid(tmp_path, monkeypatch):
    path = tmp_path / "run.h5.journal"
    journal = _filled(path, 2, events=False)
    real_write = os.write

    def half_then_full(fd, data):
        real_write(fd, bytes(data[: len(data) // 2]))
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(journal_module.os, "write", half_then_full)
    with pytest.raises(StorageWriteError, match="free disk space"):
        journal.append_reading(make_reading(2))
    monkeypatch.setattr(journal_module.os, "write", real_write)
    journal.append_reading(make_reading(2))
    journal.close()
    contents = read_journal(path)
    assert contents.damage is None
    np.testing.assert_array_equal(contents.readings.step_index, [0, 1, 2])


def test_ctrl_c_during_the_sync_keeps_the_written_reading_in_memory_too(tmp_path, monkeypatch):
    path = tmp_path / "run.h5.journal"
    journal = _filled(path, 2, events=False)

    def interrupted_sync(fd):
        raise KeyboardInterrupt

    monkeypatch.setattr(journal_module, "sync_fd", interrupted_sync)
    with pytest.raises(KeyboardInterrupt):
        journal.append_reading(make_reading(2))
    monkeypatch.undo()
    assert journal.n_readings == 3
    journal.append_reading(make_reading(3))
    journal.close()
    np.testing.assert_array_equal(read_journal(path).readings.step_index, [0, 1, 2, 3])


def test_ctrl_c_during_a_partial_write_cuts_the_torn_record(tmp_path, monkeypatch):
    path = tmp_path / "run.h5.journal"
    journal = _filled(path, 2, events=False)
    size = path.stat().st_size
    real_write = os.write

    def half_then_interrupt(fd, data):
        real_write(fd, bytes(data[: len(data) // 2]))
        raise KeyboardInterrupt

    monkeypatch.setattr(journal_module.os, "write", half_then_interrupt)
    with pytest.raises(KeyboardInterrupt):
        journal.append_event(Event(1.0, "interrupted", "Ctrl-C"))
    monkeypatch.undo()
    assert path.stat().st_size == size and journal.events == ()
    journal.append_event(Event(2.0, "note", "after"))
    journal.close()
    assert [e.message for e in read_journal(path).events] == ["after"]


def test_failed_sync_stops_every_later_append(tmp_path, monkeypatch):
    path = tmp_path / "run.h5.journal"
    journal = _filled(path, 1, events=False)

    def failing_sync(fd):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(journal_module, "sync_fd", failing_sync)
    with pytest.raises(StorageWriteError, match="failed to confirm"):
        journal.append_reading(make_reading(1))
    monkeypatch.undo()
    with pytest.raises(StorageWriteError, match="check the disk"):
        journal.append_reading(make_reading(2))
    journal.close()


def test_another_process_reads_the_journal_while_this_one_appends(tmp_path):
    path = tmp_path / "run.h5.journal"
    journal = _filled(path, 1, events=False)
    total = 400
    reader = subprocess.Popen(
        [sys.executable, "-c", textwrap.dedent(f"""
            import numpy as np
            from lightloom.sequencer.storage import read_journal
            print("ready", flush=True)
            counts = []
            while not counts or counts[-1] < {total}:
                steps = read_journal({str(path)!r}).readings.step_index
                assert np.array_equal(steps, np.arange(len(steps))), steps
                counts.append(len(steps))
            print(len(set(counts)), int(np.all(np.diff(counts) >= 0)), counts[-1], flush=True)
        """)],
        stdout=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": str(REPO)},
    )
    assert reader.stdout.readline().strip() == "ready"
    for i in range(1, total):
        journal.append_reading(make_reading(i))
    journal.close()
    out, _ = reader.communicate(timeout=60)
    distinct, monotone, last = map(int, out.split())
    assert reader.returncode == 0
    assert monotone == 1 and last == total
    assert distinct > 2, "the reader never saw the journal part-way through"


def test_stretch_reading_finds_damage_exactly_where_a_frame_by_frame_scan_does(tmp_path):
    # Back-to-back readings are checked a stretch at a time; the frame-by-frame scan of
    # the same bytes is the reference for what was read and where and why it stopped.
    path = tmp_path / "run.h5.journal"
    journal = Journal.create(path, make_header())
    for i in range(6):
        journal.append_reading(make_reading(i))
        if i in (2, 3):
            journal.append_event(Event(1.7e9 + i, "note", f"after reading {i}"))
    journal.close()
    clean = path.read_bytes()
    _, head_start, head_length = scan_frames(clean).frames[0]
    header_end = head_start + head_length + 4
    for flip in range(header_end, len(clean), 29):
        raw = bytearray(clean)
        raw[flip] ^= 0x41
        path.write_bytes(bytes(raw))
        reference = scan_frames(bytes(raw))
        contents = read_journal(path)
        readings = sum(1 for kind, _, _ in reference.frames if kind == TYPE_READING)
        assert len(contents.readings.step_index) == readings, flip
        assert contents.valid_bytes == reference.end, flip
        assert contents.damage == reference.damage, flip
