"""Run storage: the append-only journal (record of truth) and the HDF5 run file; encodes and decodes model records, nothing else.

Records and the journal need only numpy; the names that need h5py (the run file,
RunStore, load_run) are imported on first use, so that the pure core may use the
record types without pulling in HDF5.
"""

from __future__ import annotations

import importlib
from typing import Any

from lightloom.sequencer.storage.codec import Damage
from lightloom.sequencer.storage.errors import JournalDamagedError, RunExistsError, RunInUseError, StorageWriteError
from lightloom.sequencer.storage.journal import Journal, JournalContents, read_journal, writer_active
from lightloom.sequencer.model.records import (
    EVENT_KINDS, FLAG_AFTER_BEAM_WAIT, FLAG_DRIFT, FLAG_RETRIED, FORMAT_VERSION,
    READING_KINDS, RUN_STATUSES, Event, Reading,
    ReadingTable, RunData, RunHeader,
)

_NEED_HDF5 = {
    "read_runfile": "runfile", "read_runfile_header": "runfile", "write_runfile": "runfile",
    "RunStore": "store", "journal_path_for": "store", "load_run": "store", "run_paths": "store",
}

__all__ = [
    "EVENT_KINDS", "FLAG_AFTER_BEAM_WAIT", "FLAG_DRIFT", "FLAG_RETRIED", "FORMAT_VERSION",
    "READING_KINDS", "RUN_STATUSES", "Damage",
    "Event", "Journal", "JournalContents", "JournalDamagedError", "Reading", "ReadingTable",
    "RunData", "RunExistsError", "RunHeader", "RunInUseError", "StorageWriteError",
    "read_journal", "writer_active", *_NEED_HDF5,
]


def __getattr__(name: str) -> Any:
    if name in _NEED_HDF5:
        return getattr(importlib.import_module(f".{_NEED_HDF5[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
