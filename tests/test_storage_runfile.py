"""The HDF5 run file: round trip, self-description, atomic replacement, bad files."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import h5py
import numpy as np
import pytest

import lightloom.sequencer.storage.runfile as runfile_module
from lightloom.sequencer.errors import StorageError
from lightloom.sequencer.storage import Event, ReadingTable, read_runfile, write_runfile
from helpers.legacy_files import make_legacy_runfile
from helpers.records import ELEMENTS, PORTS, make_header, make_reading

REPO = Path(__file__).resolve().parents[1]
EVENTS = [Event(1.7e9, "start", "go"), Event(1.7e9 + 5, "beam_lost", "2 µW"),
          Event(1.7e9 + 9, "complete", "")]


def _write(path: Path, n: int = 12, status: str = "running", message: str = "", **kwargs):
    readings = [make_reading(i, kind=("background" if i == 0 else "measure")) for i in range(n)]
    write_runfile(path, make_header(), readings, EVENTS, status, message, **kwargs)
    return readings


def test_runfile_round_trips_every_column_with_dtype_and_shape(tmp_path):
    path = tmp_path / "run.h5"
    readings = _write(path, status="fault", message="stage X timed out")
    data = read_runfile(path)
    expected = ReadingTable.from_readings(readings, ELEMENTS, PORTS, 4)
    assert data.readings == expected
    assert data.readings.operators.dtype == np.complex128
    assert data.readings.operators.shape == (12, 4, 4, 4)
    assert data.readings.values.shape == (12, 4) and data.readings.commanded.shape == (12, 5)
    assert data.header == make_header() and data.events == tuple(EVENTS)
    assert (data.status, data.message, data.source) == ("fault", "stage X timed out", "runfile")


def test_empty_run_round_trips(tmp_path):
    path = tmp_path / "run.h5"
    write_runfile(path, make_header(target=False), [], [], "running")
    data = read_runfile(path)
    assert len(data.readings) == 0 and data.readings.operators.shape == (0, 4, 4, 4)
    assert data.events == () and data.header.target_state is None


def test_file_describes_itself_in_attributes(tmp_path):
    path = tmp_path / "run.h5"
    _write(path, status="complete", updated_utc="2026-03-04T06:00:00+00:00")
    with h5py.File(path, "r") as f:
        assert f.attrs["status"] == "complete" and f.attrs["format_version"] == 1
        assert f.attrs["steps_done"] == 12 and f.attrs["steps_total"] == 100
        assert f.attrs["updated_utc"] == "2026-03-04T06:00:00+00:00"
        assert list(f.attrs["basis_labels"]) == ["H,h", "H,v", "V,h", "V,v"]
        assert json.loads(f.attrs["setup_json"])["target_label"] == "Φ+ ünïcode"
        r = f["readings"]
        assert list(r["commanded"].attrs["element_names"]) == list(ELEMENTS)
        assert list(r["commanded"].attrs["units"])[1:3] == [
            "deg", "state (1.0 = in the beam, 0.0 = out)"]
        assert r["values"].attrs["units"] == "W"
        assert list(r["values"].attrs["port_names"]) == list(PORTS)
        assert "basis order H,h, H,v, V,h, V,v" in r["operators"].attrs["description"]
        assert h5py.check_enum_dtype(r["kind"].dtype) == {
            "measure": 0, "background": 1, "reference": 2}
        assert r["t_start"].attrs["units"] == "s since UNIX epoch"
        assert f["protocol"].attrs["sha256"] == make_header().protocol_sha256
        assert f["protocol"].asstr()[()] == make_header().protocol_text


def test_file_keeps_the_oldest_format_so_old_readers_open_it(tmp_path):
    path = tmp_path / "run.h5"
    _write(path)
    with h5py.File(path, "r") as f:
        # Superblock version 0 is what HDF5 1.8/1.10 write by default (HDF5 file format spec).
        assert f.id.get_create_plist().get_version()[0] == 0


def test_complex_values_are_stored_as_float_pairs(tmp_path):
    path = tmp_path / "run.h5"
    _write(path)
    with h5py.File(path, "r") as f:
        kind = f["readings/operators"].id.get_type()
        assert kind.get_class() == h5py.h5t.COMPOUND
        assert [kind.get_member_name(i) for i in range(kind.get_nmembers())] == [b"r", b"i"]


def test_target_state_is_written_only_when_given(tmp_path):
    with_target, without = tmp_path / "a.h5", tmp_path / "b.h5"
    write_runfile(with_target, make_header(), [], [], "running")
    write_runfile(without, make_header(target=False), [], [], "running")
    with h5py.File(with_target, "r") as f:
        np.testing.assert_allclose(np.trace(f["target_state"][()]), 1.0)
    with h5py.File(without, "r") as f:
        assert "target_state" not in f


def test_write_refuses_existing_file_when_told_not_to_overwrite(tmp_path):
    path = tmp_path / "run.h5"
    path.write_bytes(b"someone else's")
    with pytest.raises(FileExistsError):
        _write(path, overwrite=False)
    assert path.read_bytes() == b"someone else's"
    assert list(tmp_path.iterdir()) == [path]


def test_write_leaves_no_temporary_file(tmp_path):
    path = tmp_path / "run.h5"
    _write(path)
    _write(path, 20)
    assert list(tmp_path.iterdir()) == [path]


def test_failed_write_removes_its_temporary_file_and_keeps_the_old_one(tmp_path, monkeypatch):
    path = tmp_path / "run.h5"
    _write(path, 3)

    def disk_full(*args):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(runfile_module, "_write_events", disk_full)
    with pytest.raises(StorageError, match="journal still holds every reading"):
        _write(path, 5)
    assert list(tmp_path.iterdir()) == [path] and len(read_runfile(path).readings) == 3


def test_unreadable_file_raises_storage_error_naming_the_journal(tmp_path):
    path = tmp_path / "run.h5"
    _write(path)
    os.truncate(path, 900)
    with pytest.raises(StorageError, match="run.h5.journal"):
        read_runfile(path)


def test_hdf5_file_that_is_not_a_run_is_refused(tmp_path):
    path = tmp_path / "other.h5"
    with h5py.File(path, "w") as f:
        f["x"] = [1, 2, 3]
    with pytest.raises(StorageError, match="not a lightloom run file") as refused:
        read_runfile(path)
    # it names what is missing, not h5py's internal wording
    assert "has no 'format_version'" in str(refused.value) and "synchronously" not in str(refused.value)


def test_missing_file_is_a_storage_error(tmp_path):
    with pytest.raises(StorageError, match="no such run file"):
        read_runfile(tmp_path / "nothing.h5")


def test_reader_never_sees_a_half_written_file_while_it_is_replaced(tmp_path):
    path = tmp_path / "run.h5"
    _write(path, 1)
    writer = subprocess.Popen(
        [sys.executable, "-c", textwrap.dedent(f"""
            import sys
            sys.path.insert(0, {str(REPO / "tests")!r})
            from lightloom.sequencer.storage import write_runfile
            from helpers.records import make_header, make_reading
            header = make_header(400)
            readings = [make_reading(i) for i in range(400)]
            print("ready", flush=True)
            for n in range(2, 60):
                write_runfile({str(path)!r}, header, readings[: n * 3], [], "running")
            print("done", flush=True)
        """)],
        stdout=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": str(REPO)},
    )
    assert writer.stdout.readline().strip() == "ready"
    sizes = []
    while writer.poll() is None:
        data = read_runfile(path)
        n = len(data.readings)
        np.testing.assert_array_equal(data.readings.step_index, np.arange(n))
        assert data.readings.operators.shape == (n, 4, 4, 4)
        sizes.append(n)
    assert writer.stdout.read().strip() == "done" and writer.returncode == 0
    assert len(set(sizes)) > 5, "the reader never saw the file change"
    assert len(read_runfile(path).readings) == 59 * 3


def test_file_written_with_the_old_step_list_name_still_opens(tmp_path):
    # Earlier versions stored the compiled step list as /plan; such files must stay readable.
    path = tmp_path / "run.h5"
    _write(path, status="complete")
    with h5py.File(path, "r+") as f:
        f.move("steps", "plan")
    data = read_runfile(path)
    assert data.header == make_header() and data.status == "complete"


def test_file_written_with_the_old_untyped_header_still_opens(tmp_path):
    path = tmp_path / "run.h5"
    _write(path, status="complete")
    make_legacy_runfile(path, make_header())
    with h5py.File(path, "r") as f:
        assert "extra_json" in f.attrs and "plan" in f and "steps" not in f
    assert read_runfile(path).header == make_header()


def test_old_header_without_its_port_layout_is_refused_not_guessed(tmp_path):
    path = tmp_path / "run.h5"
    _write(path)
    make_legacy_runfile(path, make_header())
    with h5py.File(path, "r+") as f:
        extra = json.loads(f.attrs["extra_json"])
        del extra["port_gain"]
        f.attrs["extra_json"] = json.dumps(extra)
    with pytest.raises(StorageError, match="port_gain"):
        read_runfile(path)
