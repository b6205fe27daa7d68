"""The runner's storage interface (RunStore) and the reader every analysis uses (load_run).

A run is two files: ``RUN.h5`` (derived, self-describing, grown by appending) and
``RUN.h5.journal`` (append-only, the record of truth). Every reading and event goes to
the journal first and is on disk when ``record``/``event`` returns; ``refresh`` appends
to the .h5 what the journal gained since the last refresh (the .h5 records how much of
the journal it holds in ``journal_bytes``), so a refresh costs O(new readings) and a
kill at any moment loses nothing reported. ``reopen`` (resume) brings the .h5 up to
the journal, rebuilding it from the journal if it is missing or unusable. Neither the
store nor resume holds the readings in memory: the journal is read a chunk at a time.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from lightloom.sequencer.errors import StorageError

from lightloom.sequencer.storage.atomic import stale_temp_paths
from lightloom.sequencer.storage.errors import RunExistsError, RunFileBusyError, StorageWriteError
from lightloom.sequencer.storage.journal import (
    Batch, Journal, read_journal, read_journal_head, iter_batches, writer_active,
)
from lightloom.sequencer.model.shared_operators import SharedOperators
from lightloom.sequencer.model.records import (
    FORMAT_VERSION, READING_KINDS, Event, Reading, ReadingTable, RunData, RunHeader,
)
from lightloom.sequencer.storage.runfile import (
    RunFileState, _StepsSeen, append_runfile, read_runfile, read_runfile_state,
    read_runfile_with_offset, utc_now_iso, write_runfile,
)

JOURNAL_SUFFIX = ".journal"
FINAL_STATUSES = ("complete", "interrupted", "fault")
STOPPED_WITHOUT_CLOSING = (
    "the run stopped without closing its files (killed or crashed); "
    "`lightloom resume {path}` continues it"
)


def journal_path_for(h5_path: str | os.PathLike[str]) -> Path:
    """The journal beside a run file: ``RUN.h5`` -> ``RUN.h5.journal``."""
    h5_path = Path(h5_path)
    return h5_path.with_name(h5_path.name + JOURNAL_SUFFIX)


def run_paths(path: str | os.PathLike[str]) -> tuple[Path, Path]:
    """(run file, journal) for a path naming either of them."""
    path = Path(path)
    if path.name.endswith(JOURNAL_SUFFIX):
        return path.with_name(path.name[: -len(JOURNAL_SUFFIX)]), path
    return path, journal_path_for(path)


def _exists_message(h5_path: Path, found: Path) -> str:
    return (
        f"{h5_path}: a run already exists here ({found.name}); use `lightloom resume "
        f"{h5_path}` to continue it, or choose another --out"
    )


def _shown_status(status: str, message: str, h5_path: Path, journal_path: Path) -> tuple[str, str]:
    """A "running" run whose journal nobody holds was killed: say so, and how to go on."""
    if status == "running" and journal_path.exists() and not writer_active(journal_path):
        return "interrupted", STOPPED_WITHOUT_CLOSING.format(path=h5_path)
    return status, message


def same_run(a: RunHeader, b: RunHeader) -> bool:
    """True if two headers are of one run: same run identity (or, before identities, same header)."""
    if a.run_id and b.run_id:
        return a.run_id == b.run_id
    return a == b


def _foreign_message(h5_path: Path, journal_path: Path, file_header: RunHeader, journal_header: RunHeader) -> str:
    return (
        f"{h5_path}: the journal {journal_path.name} beside it belongs to another run "
        f"({journal_header.protocol_name}, started {journal_header.created_utc}; the run file is "
        f"{file_header.protocol_name}, started {file_header.created_utc}); nothing was changed. "
        "Put the run's own journal beside it, or resume the other run from its own .h5 name"
    )


_BACKGROUND = READING_KINDS.index("background")
# Shutter-open readings kept for a resumed run's beam watch (run.beam.SETTLE_READINGS of them).
FIRST_BEAM_ROWS = 10


@dataclass
class ResumeSummary:
    """What resume needs to know of the readings so far, gathered a chunk at a time.

    ``done`` marks the steps with a reading (one flag per step of the plan);
    ``first_beam_rows`` are the first ``FIRST_BEAM_ROWS`` readings taken with the shutter open
    (structured rows of the journal layout; a resumed run's beam watch settles on them), ``t_first`` the earliest reading start and ``t_last`` the latest
    reading end (UNIX s). ``last_row`` is the reading of the highest step index and
    ``last_readback`` (one per element, NaN where never set) the read-back of the highest-step
    reading that set each element: where a stopped run left its stages.
    """

    done: np.ndarray
    first_beam_rows: list[np.ndarray] = field(default_factory=list)
    t_first: float | None = None
    t_last: float | None = None
    n_readings: int = 0
    last_row: np.ndarray | None = None
    last_readback: np.ndarray | None = None
    last_readback_step: np.ndarray | None = None

    def observe(self, rows: np.ndarray) -> None:
        self.n_readings += len(rows)
        steps = rows["step_index"]
        inside = steps[(steps >= 0) & (steps < len(self.done))]
        self.done[inside] = True
        if len(self.first_beam_rows) < FIRST_BEAM_ROWS:
            open_ = np.flatnonzero(rows["kind"] != _BACKGROUND)
            for i in open_[:FIRST_BEAM_ROWS - len(self.first_beam_rows)]:
                self.first_beam_rows.append(rows[i].copy())
        t = float(np.min(rows["t_start"]))
        self.t_first = t if self.t_first is None else min(self.t_first, t)
        t = float(np.max(rows["t_end"]))
        self.t_last = t if self.t_last is None else max(self.t_last, t)
        top = int(np.argmax(steps))
        if self.last_row is None or steps[top] > self.last_row["step_index"]:
            self.last_row = rows[top].copy()
        readback = rows["readback"]
        if self.last_readback is None:
            self.last_readback = np.full(readback.shape[1], np.nan)
            self.last_readback_step = np.full(readback.shape[1], -1, dtype=np.int64)
        assert self.last_readback_step is not None
        for e in range(readback.shape[1]):
            set_ = np.flatnonzero(~np.isnan(readback[:, e]))
            if set_.size:
                j = set_[np.argmax(steps[set_])]
                if steps[j] > self.last_readback_step[e]:
                    self.last_readback_step[e], self.last_readback[e] = steps[j], readback[j, e]

    @property
    def steps_done(self) -> int:
        return int(np.count_nonzero(self.done))


class RunStore:
    """Storage of one run for the runner: durable appends, periodic appends to the .h5.

    Build it with :meth:`create` (new run) or :meth:`reopen` (resume); ``clock``
    returns UNIX seconds and stamps status records and ``updated_utc``.
    """

    def __init__(
        self, h5_path: Path, journal: Journal, clock: Callable[[], float],
        summary: ResumeSummary | None = None,
    ) -> None:
        self.h5_path = h5_path
        self.journal_path = journal.path
        self._journal = journal
        self._clock = clock
        self.summary = summary or ResumeSummary(np.zeros(max(0, journal.header.steps_total), bool))
        self._seen = _StepsSeen(journal.header.steps_total)
        self._seen.seen = self.summary.done
        self._seen.count = self.summary.steps_done
        self._file_bytes = 0
        self._file_events = 0
        self._file_status: tuple[str, str] | None = None

    @classmethod
    def create(
        cls, h5_path: str | os.PathLike[str], header: RunHeader,
        *, clock: Callable[[], float] = time.time,
    ) -> RunStore:
        """Start a new run: journal with the header, then an empty run file "running".

        Raises RunExistsError if the run file or its journal exists already.
        """
        if header.format_version != FORMAT_VERSION:
            raise ValueError(
                f"header format_version {header.format_version}; this lightloom writes "
                f"{FORMAT_VERSION} (use sequencer.storage.FORMAT_VERSION)"
            )
        h5_path, journal_path = run_paths(h5_path)
        for found in (h5_path, journal_path):
            if found.exists():
                raise RunExistsError(_exists_message(h5_path, found))
        try:
            journal = Journal.create(journal_path, header)
        except RunExistsError:
            raise RunExistsError(_exists_message(h5_path, journal_path)) from None
        store = cls(h5_path, journal, clock)
        try:
            store._rebuild("running", "", overwrite=False)
        except FileExistsError:
            journal.close()
            journal_path.unlink(missing_ok=True)
            raise RunExistsError(_exists_message(h5_path, h5_path)) from None
        except StorageWriteError as exc:
            # Nothing was measured: leave no half-made run behind on a full or read-only disk.
            journal.close()
            journal_path.unlink(missing_ok=True)
            reason = exc.one_line().split(": ", 1)[-1].split(";")[0]
            raise StorageWriteError(
                f"{h5_path}: cannot start the run: {reason}; nothing was measured or kept: free "
                "disk space or choose another --out"
            ) from exc
        except BaseException:
            journal.close()
            raise
        return store

    @classmethod
    def reopen(
        cls, h5_path: str | os.PathLike[str], *, clock: Callable[[], float] = time.time,
    ) -> RunStore:
        """Open a stopped run to resume it; ``summary`` says which steps are done.

        A torn journal tail is cut (``bytes_cut`` says how much) and the run file is
        brought up to the journal at once (appended to, or rebuilt if it is missing or
        unusable). A run file whose journal is another run's is refused (StorageError)
        and neither file is changed. The status stays as recorded ("interrupted" if the
        run never closed) until the runner calls :meth:`refresh`.
        """
        h5_path, journal_path = run_paths(h5_path)
        if not journal_path.exists():
            if h5_path.exists():
                raise StorageError(
                    f"{h5_path}: its journal {journal_path.name} is not beside it, and only the "
                    "journal (the record of every reading) can be resumed; analyze the .h5 as it "
                    "is, or start a new run with another --out"
                )
            raise StorageError(f"{h5_path}: no such run (neither the .h5 nor its journal exists)")
        state: RunFileState | None = None
        if h5_path.exists():
            try:
                state = read_runfile_state(h5_path)
            except StorageError:
                state = None  # unusable: rebuilt from the journal below
            if state is not None:
                journal_header = read_journal_head(journal_path)
                if not same_run(state.header, journal_header):
                    raise StorageError(_foreign_message(h5_path, journal_path, state.header, journal_header))
        header = read_journal_head(journal_path)
        summary = ResumeSummary(np.zeros(max(0, header.steps_total), dtype=bool))
        journal = Journal.open(journal_path, observe=summary.observe)
        try:
            for stale in stale_temp_paths(h5_path) + stale_temp_paths(journal_path):
                stale.unlink(missing_ok=True)
            store = cls(h5_path, journal, clock, summary)
            status, message = journal.status, journal.status_message
            if status == "running":
                status, message = "interrupted", STOPPED_WITHOUT_CLOSING.format(path=h5_path)
            usable = (
                state is not None and state.journal_bytes is not None
                and state.journal_bytes <= journal.size
            )
            if usable:
                assert state is not None and state.journal_bytes is not None
                store._file_bytes, store._file_events = state.journal_bytes, state.n_events
                try:
                    store._catch_up(status, message)
                except (StorageWriteError, RunFileBusyError):
                    raise
                except StorageError:
                    usable = False
            if not usable:
                store._rebuild(status, message, overwrite=True)
        except BaseException:
            journal.close()
            raise
        return store

    @property
    def header(self) -> RunHeader:
        """The run's header as stored in the journal."""
        return self._journal.header

    @property
    def readings(self) -> ReadingTable:
        """Every reading recorded so far, read back from the journal (tests and tools)."""
        return read_journal(self.journal_path).readings

    @property
    def n_readings(self) -> int:
        """Number of readings recorded so far."""
        return self._journal.n_readings

    @property
    def events(self) -> tuple[Event, ...]:
        """Every event recorded so far."""
        return self._journal.events

    @property
    def bytes_cut(self) -> int:
        """Bytes of a torn journal tail cut off by :meth:`reopen` (0 if none)."""
        return self._journal.bytes_cut

    @property
    def closed(self) -> bool:
        """True once :meth:`close` or :meth:`release` has run."""
        return self._journal.closed

    @property
    def lag_bytes(self) -> int:
        """Journal bytes not yet in the run file (0 right after a refresh)."""
        return self._journal.size - self._file_bytes

    def record(self, reading: Reading) -> None:
        """Append a reading to the journal; it survives a kill once this returns."""
        self._journal.append_reading(reading)

    def event(self, event: Event) -> None:
        """Append an event to the journal; it survives a kill once this returns."""
        self._journal.append_event(event)

    def refresh(self, status: str = "running", message: str = "") -> bool:
        """Append to the run file what the journal gained; True if it wrote.

        A new status or message is first recorded in the journal. Costs O(new readings);
        while a reader holds the run file the refresh is skipped (False) and the next
        one catches up.
        """
        journal = self._journal
        if (status, message) != (journal.status, journal.status_message):
            journal.append_status(self._clock(), status, message)
        try:
            return self._catch_up(status, message)
        except RunFileBusyError:
            return False

    def close(self, status: str, message: str = "") -> None:
        """Record the final status, bring the run file up to date and release the journal.

        If the run file is busy (a reader holds it) the close waits a little for it;
        the journal holds the final status whatever happens.
        """
        if status not in FINAL_STATUSES:
            raise ValueError(f"final status {status!r}; expected one of {FINAL_STATUSES}")
        if self.closed:
            return
        try:
            journal = self._journal
            if (status, message) != (journal.status, journal.status_message):
                journal.append_status(self._clock(), status, message)
            deadline = time.monotonic() + 10.0
            while True:
                try:
                    self._catch_up(status, message)
                    break
                except RunFileBusyError:
                    if time.monotonic() > deadline:
                        break
                    time.sleep(0.05)
        finally:
            self._journal.close()

    def release(self) -> None:
        """Release the journal without recording anything (e.g. after a refused resume)."""
        self._journal.close()

    def _catch_up(self, status: str, message: str) -> bool:
        """Append the journal's records past ``_file_bytes`` to the run file."""
        journal = self._journal
        if self._file_bytes == journal.size and self._file_status == (status, message):
            return False
        wrote = False
        for batch in iter_batches(self.journal_path, self._file_bytes, journal.size):
            self._append(batch, status, message)
            wrote = True
        if not wrote:
            self._append(Batch(np.empty(0, journal.layout.dtype), [], None, self._file_bytes),
                         status, message)
        return True

    def _append(self, batch: Batch, status: str, message: str) -> None:
        # Counting before the write is right even if it fails: a retry adds nothing new.
        self._seen.add(batch.rows["step_index"])
        append_runfile(
            self.h5_path, batch.rows, batch.events, status, message,
            updated_utc=utc_now_iso(self._clock()), steps_done=self._seen.count,
            journal_bytes=batch.end,
        )
        self._file_bytes = batch.end
        self._file_events += len(batch.events)
        self._file_status = (status, message)

    def _rebuild(self, status: str, message: str, *, overwrite: bool) -> None:
        """Write the run file anew from the whole journal, a chunk at a time."""
        journal = self._journal
        batches = iter_batches(self.journal_path, None, journal.size)
        end = [None]

        def pieces() -> Iterator[tuple[np.ndarray, list[Event]]]:
            for batch in batches:
                end[0] = batch.end
                yield batch.rows, batch.events

        write_runfile(
            self.h5_path, journal.header, np.empty(0, journal.layout.dtype), [], status, message,
            updated_utc=utc_now_iso(self._clock()), overwrite=overwrite,
            journal_bytes=journal.size, more=pieces(),
        )
        self._file_bytes = journal.size
        self._file_events = len(journal.events)
        self._file_status = (status, message)


def _joined(a: ReadingTable, b: ReadingTable) -> ReadingTable:
    if len(b) == 0:
        return a
    columns: dict[str, Any] = {
        name: np.concatenate([getattr(a, name), getattr(b, name)])
        for name in ("step_index", "kind", "pass_index", "point_index", "repeat_index",
                     "commanded", "readback", "values", "reference_w", "dwell_s",
                     "t_start", "t_end", "flags")
    }
    columns["operators"] = SharedOperators.concatenate([a.operators, b.operators])
    return ReadingTable(a.element_names, a.port_names, **columns)


def load_run(path: str | os.PathLike[str]) -> RunData:
    """Read a run for analysis: the run file, and the journal records it does not hold yet.

    ``path`` names the .h5 or its journal. When the journal beside the .h5 is the same
    run's, the .h5 is read whole and the journal only from the offset the .h5 records
    (``journal_bytes``), so reading a run still going costs what it holds plus a few
    seconds of journal. A lone .h5, or one whose journal is another run's, is read by
    itself; an unusable .h5 is replaced by the journal's contents. A "running" run
    whose journal no process holds is shown as "interrupted".
    """
    h5_path, journal_path = run_paths(path)
    state: RunFileState | None = None
    file_error: StorageError | None = None
    if h5_path.exists():
        try:
            state = read_runfile_state(h5_path)
        except StorageError as exc:
            file_error = exc
    chosen: RunData | None = None
    journal_header: RunHeader | None = None
    if journal_path.exists():
        try:
            journal_header = read_journal_head(journal_path)
        except StorageError:
            if state is None:
                raise
    if journal_header is not None and (state is None or same_run(state.header, journal_header)):
        if state is not None and state.journal_bytes is not None:
            try:
                data, offset = read_runfile_with_offset(h5_path)
            except StorageError:
                data, offset = None, None
            if data is not None and offset is not None and offset <= journal_path.stat().st_size:
                tail = read_journal(journal_path, start=offset)
                if len(tail.readings) == 0 and not tail.events and not tail.status_recorded:
                    chosen = data
                else:
                    status, message = (
                        (tail.status, tail.status_message) if tail.status_recorded
                        else (data.status, data.message)
                    )
                    chosen = RunData(
                        data.header, _joined(data.readings, tail.readings),
                        data.events + tail.events, status, message, source="journal",
                    )
        if chosen is None:
            contents = read_journal(journal_path)
            if state is None or len(contents.readings) >= state.n_readings:
                chosen = RunData(
                    contents.header, contents.readings, contents.events, contents.status,
                    contents.status_message, source="journal",
                )
    if chosen is None and state is not None:
        chosen = read_runfile(h5_path)
    if chosen is None:
        if file_error is not None:
            raise file_error
        raise StorageError(f"{h5_path}: no such run (neither the .h5 nor its journal exists)")
    status, message = _shown_status(chosen.status, chosen.message, h5_path, journal_path)
    return RunData(chosen.header, chosen.readings, chosen.events, status, message, chosen.source)
