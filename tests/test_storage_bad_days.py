"""Bad days on the storage side: a foreign journal, a full or read-only disk, hostile run files."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import textwrap
from itertools import count
from pathlib import Path

import h5py
import numpy as np
import pytest

from lightloom.sequencer import cli
from lightloom.sequencer.errors import StorageError
from lightloom.sequencer.storage import RunStore, journal_path_for, load_run, read_journal, read_runfile
from helpers.records import make_header, make_reading

REPO = Path(__file__).resolve().parents[1]


def _clock():
    ticks = count()
    return lambda: 1.8e9 + next(ticks)


def _run(path: Path, n: int, run_id: str, name: str = "joint16", close: bool = True) -> None:
    header = make_header(100, name=name)
    header = type(header)(**{**{f: getattr(header, f) for f in header.__dataclass_fields__}, "run_id": run_id})
    store = RunStore.create(path, header, clock=_clock())
    for i in range(n):
        store.record(make_reading(i))
    if close:
        store.close("interrupted", "Ctrl-C")
    else:
        store.release()


def _snapshot(*paths: Path) -> list[tuple[bytes, int]]:
    return [(p.read_bytes(), p.stat().st_mtime_ns) for p in paths]


def test_resume_refuses_a_journal_of_another_run_and_touches_neither_file(tmp_path):
    _run(tmp_path / "a.h5", 4, "run-a")
    _run(tmp_path / "b.h5", 9, "run-b")
    shutil.copy(journal_path_for(tmp_path / "b.h5"), journal_path_for(tmp_path / "a.h5"))
    files = (tmp_path / "a.h5", journal_path_for(tmp_path / "a.h5"))
    before = _snapshot(*files)
    with pytest.raises(StorageError, match="belongs to another run.*nothing was changed"):
        RunStore.reopen(tmp_path / "a.h5")
    assert _snapshot(*files) == before
    assert len(read_runfile(tmp_path / "a.h5").readings) == 4


def test_resume_verb_refuses_a_foreign_journal_with_one_line_and_exit_2(tmp_path, capsys):
    _run(tmp_path / "a.h5", 4, "run-a")
    _run(tmp_path / "b.h5", 9, "run-b")
    shutil.copy(journal_path_for(tmp_path / "b.h5"), journal_path_for(tmp_path / "a.h5"))
    assert cli.main(["resume", str(tmp_path / "a.h5"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "belongs to another run" in err


def test_runs_with_the_same_header_but_other_identities_are_told_apart(tmp_path):
    _run(tmp_path / "a.h5", 4, "run-a")
    _run(tmp_path / "b.h5", 9, "run-b")
    shutil.copy(journal_path_for(tmp_path / "b.h5"), journal_path_for(tmp_path / "a.h5"))
    data = load_run(tmp_path / "a.h5")
    assert data.source == "runfile" and len(data.readings) == 4


def test_the_run_identity_is_in_both_files(tmp_path):
    _run(tmp_path / "a.h5", 1, "3f1c")
    with h5py.File(tmp_path / "a.h5", "r") as f:
        assert f.attrs["run_id"] == "3f1c"
    assert read_journal(journal_path_for(tmp_path / "a.h5")).header.run_id == "3f1c"


def _hostile(path: Path, how: str) -> None:
    with h5py.File(path, "r+") as f:
        a = f.attrs
        if how == "format_version array":
            a["format_version"] = np.array([1, 1])
        elif how.startswith("format_version "):
            value = how.split()[1]
            a["format_version"] = float(value) if "." in value else int(value)
        elif how == "garbage steps":
            del f["steps"]
            f.create_dataset("steps", data="\x13garbage, not steps", dtype=h5py.string_dtype())
        elif how == "steps as other JSON":
            del f["steps"]
            f.create_dataset("steps", data='{"format": "lightloom-steps-columns-1", "columns": 3}',
                             dtype=h5py.string_dtype())
        elif how == "steps as numbers":
            del f["steps"]
            f["steps"] = np.arange(7)
        elif how.startswith("step index "):
            f["readings/step_index"][1] = int(how.split()[2])
        elif how == "status exploded":
            a["status"] = "exploded"
        elif how == "steps_total -3":
            a["steps_total"] = -3
        elif how == "n_readings beyond the data":
            a["n_readings"] = 10**6
        elif how == "kind code 9":
            f["readings/kind"][0] = 9
        else:
            raise AssertionError(how)


HOSTILE = [
    "format_version array", "format_version 0", "format_version -1", "format_version 1.5",
    "garbage steps", "steps as other JSON", "steps as numbers", "step index 1000000000000", "step index -5",
    "status exploded", "steps_total -3", "n_readings beyond the data",
]


@pytest.mark.parametrize("how", HOSTILE)
def test_a_run_file_with_malformed_attributes_is_refused_with_one_line(tmp_path, how):
    _run(tmp_path / "run.h5", 3, "r1")
    journal_path_for(tmp_path / "run.h5").unlink()
    _hostile(tmp_path / "run.h5", how)
    with pytest.raises(StorageError, match=r"run\.h5: ") as info:
        load_run(tmp_path / "run.h5")
    assert "\n" not in info.value.one_line()


@pytest.mark.parametrize("how", ["format_version 1.5", "step index -5", "status exploded"])
def test_analyze_refuses_a_hostile_run_file_with_exit_2_and_no_traceback(tmp_path, capsys, how):
    _run(tmp_path / "run.h5", 3, "r1")
    journal_path_for(tmp_path / "run.h5").unlink()
    _hostile(tmp_path / "run.h5", how)
    assert cli.main(["analyze", str(tmp_path / "run.h5")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "run.h5" in err and "Traceback" not in err


def _small_disk_script(body: str, size_kib: int, *, read_only: bool = False) -> str:
    """A shell script that mounts a tiny tmpfs on $MNT (in a private mount namespace) and runs body."""
    options = f"size={size_kib}k" + (",ro" if read_only else "")
    return f'mount -t tmpfs -o {options} lightloom-test "$MNT" && cd "$MNT" && {body}'


def _in_small_disk(tmp_path: Path, body: str, size_kib: int, *, read_only: bool = False,
                   keep: Path | None = None) -> subprocess.CompletedProcess:
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    script = _small_disk_script(body, size_kib, read_only=read_only)
    if keep is not None:
        # Copy what the run left out of the tiny disk before the namespace (and the mount) go.
        script += f'; status=$?; cp -a "$MNT"/. {keep}/ 2>/dev/null; exit $status'
    probe = subprocess.run(["unshare", "-rm", "sh", "-c", f'mount -t tmpfs -o size=64k t "{mnt}"'],
                           capture_output=True, text=True)
    if probe.returncode != 0:
        pytest.skip(f"cannot mount a small filesystem here (unshare/mount refused: {probe.stderr.strip()})")
    env = {**os.environ, "MNT": str(mnt), "PYTHONPATH": str(REPO)}
    return subprocess.run(["unshare", "-rm", "sh", "-c", script], capture_output=True, text=True,
                          env=env, timeout=300)


RUN = f"{sys.executable} -m lightloom.sequencer.cli"


LONG_PROTOCOL = """\
protocol: joint-36-sweep
analyzes: [polarization, spatial]
measure:
  targets:
    polarization: [H, V, D, A, R, L]
    spatial: [h, v, d, a, l+, l-]
    combine: product
dwell_s: 0.5
repeats: 2
reference: {every_points: 9, dwell_s: 0.2}
order: least-motion
sweep: {passes: 48, interval_s: 0}
"""


@pytest.mark.parametrize("size_kib", [150, 900, 1500])
def test_a_full_disk_stops_the_run_with_exit_3_one_line_and_a_resumable_journal(tmp_path, size_kib):
    kept = tmp_path / "kept"
    kept.mkdir()
    protocol = tmp_path / "long.yaml"
    protocol.write_text(LONG_PROTOCOL)
    done = _in_small_disk(
        tmp_path, f"{RUN} run {protocol} --bench sim --out run.h5 --quiet", size_kib, keep=kept,
    )
    assert done.returncode == 3, (done.returncode, done.stdout[-500:], done.stderr[-2000:])
    lines = [line for line in done.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "lightloom:" in lines[0], done.stderr
    assert "Traceback" not in done.stderr and "disk" in lines[0]
    journal = kept / "run.h5.journal"
    assert journal.exists() == (size_kib >= 1500), "the disk filled at another moment than planned"
    if journal.exists():
        contents = read_journal(journal)
        assert contents.damage is None or contents.damage.intact_after == 0
        data = load_run(kept / "run.h5")
        np.testing.assert_array_equal(data.readings.step_index, np.arange(len(data.readings)))
        assert 0 < len(data.readings) < data.header.steps_total
        assert cli.main(["resume", str(kept / "run.h5"), "--quiet"]) == 0
        final = load_run(kept / "run.h5")
        assert final.status == "complete" and final.steps_done == final.header.steps_total
    else:
        assert not (kept / "run.h5").exists(), "a run file without its journal was left behind"


def test_a_read_only_output_folder_is_refused_with_exit_3_and_one_line(tmp_path):
    done = _in_small_disk(tmp_path, f"{RUN} run joint-36 --bench sim --out run.h5 --quiet", 512,
                          read_only=True)
    assert done.returncode == 3, (done.stdout[-500:], done.stderr[-2000:])
    lines = [line for line in done.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "writable" in lines[0] and "Traceback" not in done.stderr
