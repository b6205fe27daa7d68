"""Typed storage errors: an existing run, a damaged journal, a run in use, a failed write."""

from __future__ import annotations

from lightloom.sequencer.errors import EXIT_FAULT, StorageError


class RunExistsError(StorageError):
    """A new run was asked to write over an existing run file or journal (exit status 2)."""


class JournalDamagedError(StorageError):
    """A journal whose header or middle is damaged, so that it cannot be read or appended to."""


class RunInUseError(StorageError):
    """Another process already writes this run (it holds the journal lock)."""


class StorageWriteError(StorageError):
    """Writing or syncing to disk failed during a run (disk full, I/O error): exit status 3."""

    exit_status = EXIT_FAULT


class RunFileBusyError(StorageError):
    """Another process (a reader) holds the run file open at this moment; try again later."""
