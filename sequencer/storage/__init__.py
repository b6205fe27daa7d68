"""Run storage: the append-only journal (record of truth) and the HDF5 run file derived from it."""

from __future__ import annotations

from .errors import JournalDamagedError, RunExistsError, RunInUseError, StorageWriteError
from .journal import Journal, JournalContents, read_journal, writer_active
from .records import (
    EVENT_KINDS, FLAG_AFTER_BEAM_WAIT, FLAG_DRIFT, FLAG_RETRIED, FORMAT_VERSION,
    MODE_CONVERTER_IN, MODE_CONVERTER_OUT, READING_KINDS, RUN_STATUSES, Event, Reading,
    ReadingTable, RunData, RunHeader,
)
from .runfile import read_runfile, write_runfile
from .store import RunStore, journal_path_for, load_run, run_paths

__all__ = [
    "EVENT_KINDS", "FLAG_AFTER_BEAM_WAIT", "FLAG_DRIFT", "FLAG_RETRIED", "FORMAT_VERSION",
    "MODE_CONVERTER_IN", "MODE_CONVERTER_OUT", "READING_KINDS", "RUN_STATUSES", "Event",
    "Journal", "JournalContents", "JournalDamagedError", "Reading", "ReadingTable", "RunData",
    "RunExistsError", "RunHeader", "RunInUseError", "RunStore", "StorageWriteError",
    "journal_path_for", "load_run", "read_journal", "read_runfile", "run_paths",
    "write_runfile", "writer_active",
]
