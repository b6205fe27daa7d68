"""The runner's storage interface (RunStore) and the reader every analysis uses (load_run).

A run is two files: ``RUN.h5`` (derived, self-describing, replaced atomically) and
``RUN.h5.journal`` (append-only, the record of truth). Every reading and event goes to
the journal first and is on disk when ``record``/``event`` returns; ``refresh`` rebuilds
the .h5 from what the journal holds, so a kill at any moment loses nothing reported,
and ``reopen`` (resume) rebuilds a missing or unusable .h5 from the journal.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from pathlib import Path

from lightloom.sequencer.errors import StorageError

from lightloom.sequencer.storage.atomic import stale_temp_paths
from lightloom.sequencer.storage.errors import RunExistsError
from lightloom.sequencer.storage.journal import Journal, read_journal, writer_active
from lightloom.sequencer.model.records import FORMAT_VERSION, Event, Reading, ReadingTable, RunData, RunHeader
from lightloom.sequencer.storage.runfile import read_runfile, read_runfile_header, utc_now_iso, write_runfile

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


class RunStore:
    """Storage of one run for the runner: durable appends, periodic atomic .h5 rebuilds.

    Build it with :meth:`create` (new run) or :meth:`reopen` (resume); ``clock``
    returns UNIX seconds and stamps status records and ``updated_utc``.
    """

    def __init__(self, h5_path: Path, journal: Journal, clock: Callable[[], float]) -> None:
        self.h5_path = h5_path
        self.journal_path = journal.path
        self._journal = journal
        self._clock = clock
        self._written: tuple[int, int, str, str] | None = None

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
            store._write("running", "", overwrite=False)
        except FileExistsError:
            journal.close()
            journal_path.unlink(missing_ok=True)
            raise RunExistsError(_exists_message(h5_path, h5_path)) from None
        except BaseException:
            journal.close()
            raise
        return store

    @classmethod
    def reopen(
        cls, h5_path: str | os.PathLike[str], *, clock: Callable[[], float] = time.time,
    ) -> RunStore:
        """Open a stopped run to resume it; its header, readings and events are attributes.

        A torn journal tail is cut (``bytes_cut`` says how much) and the run file is
        rebuilt from the journal at once, so it is whole even if it was missing or
        unusable. The status stays as recorded ("interrupted" if the run never closed)
        until the runner calls :meth:`refresh`.
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
        journal = Journal.open(journal_path)
        try:
            for stale in stale_temp_paths(h5_path) + stale_temp_paths(journal_path):
                stale.unlink(missing_ok=True)
            store = cls(h5_path, journal, clock)
            status, message = journal.status, journal.status_message
            if status == "running":
                status, message = "interrupted", STOPPED_WITHOUT_CLOSING.format(path=h5_path)
            store._write(status, message, overwrite=True)
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
        """Every reading recorded so far, as columns."""
        return self._journal.readings

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

    def record(self, reading: Reading) -> None:
        """Append a reading to the journal; it survives a kill once this returns."""
        self._journal.append_reading(reading)

    def event(self, event: Event) -> None:
        """Append an event to the journal; it survives a kill once this returns."""
        self._journal.append_event(event)

    def refresh(self, status: str = "running", message: str = "") -> bool:
        """Rebuild the run file from the journal if anything changed; True if it wrote.

        A new status or message is first recorded in the journal. Cost grows with the
        number of readings (about 1.2 kB each for 4 ports): see the storage benchmark.
        """
        journal = self._journal
        if (status, message) != (journal.status, journal.status_message):
            journal.append_status(self._clock(), status, message)
        if self._written == (journal.n_readings, len(journal.events), status, message):
            return False
        self._write(status, message, overwrite=True)
        return True

    def close(self, status: str, message: str = "") -> None:
        """Record the final status, rebuild the run file and release the journal."""
        if status not in FINAL_STATUSES:
            raise ValueError(f"final status {status!r}; expected one of {FINAL_STATUSES}")
        if self.closed:
            return
        try:
            self.refresh(status, message)
        finally:
            self._journal.close()

    def release(self) -> None:
        """Release the journal without recording anything (e.g. after a refused resume)."""
        self._journal.close()

    def _write(self, status: str, message: str, *, overwrite: bool) -> None:
        journal = self._journal
        key = (journal.n_readings, len(journal.events), status, message)
        write_runfile(
            self.h5_path, journal.header, journal.readings, journal.events, status, message,
            updated_utc=utc_now_iso(self._clock()), overwrite=overwrite,
        )
        self._written = key


def load_run(path: str | os.PathLike[str]) -> RunData:
    """Read a run for analysis, from whichever of its files is the most complete.

    ``path`` names the .h5 or its journal. The journal is preferred when it belongs to
    the same run and holds at least as many readings (a run still going, or killed
    before its last refresh); a lone .h5, or one whose journal is another run's, is read
    by itself; an unusable .h5 is replaced by the journal's contents. A "running" run
    whose journal no process holds is shown as "interrupted".
    """
    h5_path, journal_path = run_paths(path)
    file_header: RunHeader | None = None
    file_count = 0
    file_error: StorageError | None = None
    if h5_path.exists():
        try:
            file_header, file_count = read_runfile_header(h5_path)
        except StorageError as exc:
            file_error = exc
    chosen: RunData | None = None
    if journal_path.exists():
        try:
            contents = read_journal(journal_path)
        except StorageError:
            if file_header is None:
                raise
        else:
            if file_header is None or (
                contents.header == file_header and len(contents.readings) >= file_count
            ):
                chosen = RunData(
                    contents.header, contents.readings, contents.events, contents.status,
                    contents.status_message, source="journal",
                )
    if chosen is None and file_header is not None:
        chosen = read_runfile(h5_path)
    if chosen is None:
        if file_error is not None:
            raise file_error
        raise StorageError(f"{h5_path}: no such run (neither the .h5 nor its journal exists)")
    status, message = _shown_status(chosen.status, chosen.message, h5_path, journal_path)
    return RunData(chosen.header, chosen.readings, chosen.events, status, message, chosen.source)
