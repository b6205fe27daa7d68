"""The run journal: an append-only file of CRC-framed records, the record of truth of a run.

The header is the journal's first record, so one file holds everything a run has
reported and there is no second file whose loss or mismatch could orphan the readings.
A new journal is written and synced under a temporary name and then hard-linked into
place, so it appears complete with its header or not at all, and an existing journal is
never overwritten. Each later record is one ``os.write`` on an O_APPEND descriptor
followed by a data sync, so it is on disk when the append returns. A writer holds an
exclusive ``flock`` on the journal for as long as it is open; readers take no lock.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from lightloom.sequencer.errors import StorageError

from lightloom.sequencer.storage.atomic import publish, sync_fd, temp_path
from lightloom.sequencer.storage.codec import (
    JOURNAL_FORMAT, TYPE_EVENT, TYPE_HEADER, TYPE_READING, TYPE_STATUS, Damage, ReadingLayout,
    decode_event, decode_header, decode_rows, decode_status, encode_event, encode_header,
    encode_reading, encode_status, frame, scan_frames, table_from_rows,
)
from lightloom.sequencer.storage.errors import JournalDamagedError, RunExistsError, RunInUseError, StorageWriteError
from lightloom.sequencer.model.records import FORMAT_VERSION, Event, Reading, ReadingTable, RunHeader

try:
    import fcntl
except ImportError:  # pragma: no cover - Windows: no advisory locks, one writer is trusted
    fcntl = None  # type: ignore[assignment]

LOCK_WAIT_S = 2.0


@dataclass(frozen=True)
class JournalContents:
    """What a journal holds, read up to its first bad record.

    ``status`` is the last status recorded ("running" if none was), ``valid_bytes``
    the length of the intact records from the start, and ``damage`` where and why
    reading stopped early (None if every byte was read).
    """

    header: RunHeader
    readings: ReadingTable
    events: tuple[Event, ...]
    status: str
    status_message: str
    valid_bytes: int
    damage: Damage | None


@dataclass
class _Parsed:
    header: RunHeader
    layout: ReadingLayout
    rows: np.ndarray
    events: list[Event]
    status: str
    status_message: str
    valid_bytes: int
    damage: Damage | None


def _parse(raw: bytes, path: Path) -> _Parsed:
    scan = scan_frames(raw)
    if not scan.frames or scan.frames[0][0] != TYPE_HEADER:
        why = scan.damage.reason if scan.damage else "no header record"
        raise JournalDamagedError(
            f"{path}: the journal has no intact header ({why}, {len(raw)} bytes); it cannot be "
            "read or resumed. If a run file (.h5) sits beside it, analyze that; otherwise the "
            "run must be started again with a new --out."
        )
    _, start, length = scan.frames[0]
    try:
        fmt, header = decode_header(raw[start:start + length])
    except ValueError as exc:
        raise JournalDamagedError(f"{path}: {exc}; this is not a lightloom journal") from exc
    if fmt > JOURNAL_FORMAT or header.format_version > FORMAT_VERSION:
        raise StorageError(
            f"{path}: written by a newer lightloom (journal format {fmt}, file format "
            f"{header.format_version}); upgrade lightloom to read it"
        )
    layout = ReadingLayout.of(header)
    reading_starts: list[int] = []
    events: list[Event] = []
    status, status_message = "running", ""
    for index, (record_type, start, length) in enumerate(scan.frames[1:], start=1):
        try:
            if record_type == TYPE_READING:
                if length != layout.payload_size:
                    raise ValueError(f"reading of {length} bytes, expected {layout.payload_size}")
                reading_starts.append(start)
            elif record_type == TYPE_EVENT:
                events.append(decode_event(raw[start:start + length]))
            elif record_type == TYPE_STATUS:
                _, status, status_message = decode_status(raw[start:start + length])
            else:
                raise ValueError("a second header record")
        except (ValueError, UnicodeDecodeError) as exc:
            raise JournalDamagedError(
                f"{path}: record {index} has a valid checksum but bad contents ({exc}); the "
                "journal was not written by this version of lightloom"
            ) from exc
    rows = decode_rows(raw, reading_starts, layout)
    return _Parsed(header, layout, rows, events, status, status_message, scan.end, scan.damage)


def _read_bytes(path: Path) -> bytes:
    try:
        with open(path, "rb") as handle:
            return handle.read()
    except FileNotFoundError:
        raise StorageError(f"{path}: no such journal") from None
    except OSError as exc:
        raise StorageError(f"{path}: cannot read the journal: {exc.strerror}") from exc


def _table(parsed: _Parsed) -> ReadingTable:
    try:
        return table_from_rows(parsed.rows, parsed.header.element_names, parsed.header.port_names)
    except ValueError as exc:
        raise JournalDamagedError(f"bad reading in the journal: {exc}") from exc


def read_journal(path: str | os.PathLike[str]) -> JournalContents:
    """Read a journal without locking or changing it; safe while another process appends.

    A record being appended at that moment shows as a torn tail in ``damage`` and is
    not returned. Raises JournalDamagedError if the header is unreadable.
    """
    path = Path(path)
    parsed = _parse(_read_bytes(path), path)
    return JournalContents(
        parsed.header, _table(parsed), tuple(parsed.events), parsed.status,
        parsed.status_message, parsed.valid_bytes, parsed.damage,
    )


def writer_active(path: str | os.PathLike[str]) -> bool:
    """True if some process holds the journal open for appending (its lock is taken)."""
    if fcntl is None:
        return False
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
    except BlockingIOError:
        return True
    finally:
        os.close(fd)
    return False


def _lock(fd: int, path: Path, sleep: Callable[[float], None] = time.sleep) -> None:
    if fcntl is None:
        return
    # Readers checking writer_active() hold a shared lock for microseconds: wait them out.
    attempts = int(LOCK_WAIT_S / 0.01)
    for _ in range(attempts):
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return
        except BlockingIOError:
            sleep(0.01)
    raise RunInUseError(
        f"{path}: another process is writing this run (it holds the journal lock); wait for "
        "it to finish or stop it before resuming"
    )


class Journal:
    """An open journal, locked for appending, with everything it held when opened."""

    def __init__(self, path: Path, fd: int, parsed: _Parsed, bytes_cut: int) -> None:
        self.path = path
        self.header = parsed.header
        self.layout = parsed.layout
        self.bytes_cut = bytes_cut
        """Bytes of a damaged tail cut off when the journal was opened (0 if none)."""
        self.status = parsed.status
        self.status_message = parsed.status_message
        self._fd: int | None = fd
        self._size = parsed.valid_bytes
        self._rows = parsed.rows
        self._n = len(parsed.rows)
        self._events = parsed.events
        self._table: ReadingTable | None = None
        self._broken: str | None = None

    @classmethod
    def create(cls, path: str | os.PathLike[str], header: RunHeader) -> Journal:
        """Create a journal holding only the header; refuses an existing path."""
        path = Path(path)
        if not path.parent.is_dir():
            raise StorageError(
                f"{path}: the directory {path.parent} does not exist; create it or choose "
                "another --out"
            )
        if path.exists():
            raise RunExistsError(_exists_message(path))
        data = frame(TYPE_HEADER, encode_header(header))
        tmp = temp_path(path)
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND, 0o644)
        try:
            _lock(fd, tmp)
            _write_all(fd, data)
            sync_fd(fd)
            publish(tmp, path, overwrite=False)
        except FileExistsError:
            os.close(fd)
            tmp.unlink(missing_ok=True)
            raise RunExistsError(_exists_message(path)) from None
        except OSError as exc:
            os.close(fd)
            tmp.unlink(missing_ok=True)
            raise StorageWriteError(
                f"{path}: cannot create the journal: {exc.strerror}; check that the disk has "
                "space and the directory is writable"
            ) from exc
        layout = ReadingLayout.of(header)
        rows = np.empty(0, dtype=layout.dtype)
        parsed = _Parsed(header, layout, rows, [], "running", "", len(data), None)
        return cls(path, fd, parsed, 0)

    @classmethod
    def open(cls, path: str | os.PathLike[str]) -> Journal:
        """Open a journal for appending; a torn tail (what a kill leaves) is cut off.

        Raises JournalDamagedError, and changes nothing, if intact records follow a bad
        one: cutting there would destroy readings that were reported.
        """
        path = Path(path)
        try:
            fd = os.open(path, os.O_WRONLY | os.O_APPEND)
        except FileNotFoundError:
            raise StorageError(f"{path}: no such journal") from None
        except OSError as exc:
            raise StorageError(f"{path}: cannot open the journal: {exc.strerror}") from exc
        try:
            _lock(fd, path)
            raw = _read_bytes(path)
            parsed = _parse(raw, path)
            bytes_cut = 0
            if parsed.damage is not None:
                if parsed.damage.intact_after:
                    raise JournalDamagedError(
                        f"{path}: damaged at byte {parsed.damage.offset} "
                        f"({parsed.damage.reason}) with {parsed.damage.intact_after} intact "
                        "records after the damage; lightloom will not cut them off. Keep a "
                        "copy of the journal; analyze still reads the records before the damage."
                    )
                bytes_cut = len(raw) - parsed.valid_bytes
                os.ftruncate(fd, parsed.valid_bytes)
                sync_fd(fd)
        except BaseException:
            os.close(fd)
            raise
        return cls(path, fd, parsed, bytes_cut)

    @property
    def closed(self) -> bool:
        """True once :meth:`close` has run."""
        return self._fd is None

    @property
    def readings(self) -> ReadingTable:
        """Every reading in the journal, as columns."""
        if self._table is None or len(self._table) != self._n:
            h = self.header
            self._table = table_from_rows(self._rows[:self._n], h.element_names, h.port_names)
        return self._table

    @property
    def n_readings(self) -> int:
        """Number of readings in the journal."""
        return self._n

    @property
    def events(self) -> tuple[Event, ...]:
        """Every event in the journal."""
        return tuple(self._events)

    def append_reading(self, reading: Reading) -> None:
        """Append one reading; it is on disk when this returns."""
        payload = encode_reading(reading, self.layout)
        index = self._n
        self._append(frame(TYPE_READING, payload), lambda: self._keep_row(index, payload))

    def append_event(self, event: Event) -> None:
        """Append one event; it is on disk when this returns."""
        index = len(self._events)
        self._append(frame(TYPE_EVENT, encode_event(event)), lambda: self._keep_event(index, event))

    def append_status(self, t: float, status: str, message: str = "") -> None:
        """Record the run's status as of UNIX time t; on disk when this returns."""

        def keep() -> None:
            self.status, self.status_message = status, message

        self._append(frame(TYPE_STATUS, encode_status(t, status, message)), keep)

    def close(self) -> None:
        """Release the lock and the descriptor; every record is already on disk."""
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None

    def _keep_row(self, index: int, payload: bytes) -> None:
        # Idempotent (keeps row `index`, whatever was kept after it): see _settle.
        if index == len(self._rows):
            # Grow by doubling: appends stay O(1) on average, refresh reads one array.
            grown = np.empty(max(1024, 2 * len(self._rows)), dtype=self.layout.dtype)
            grown[:index] = self._rows[:index]
            self._rows = grown
        size = len(payload)
        self._rows.view(np.uint8)[index * size:(index + 1) * size] = np.frombuffer(payload, np.uint8)
        self._n = index + 1

    def _keep_event(self, index: int, event: Event) -> None:
        del self._events[index:]
        self._events.append(event)

    def _append(self, data: bytes, keep: Callable[[], None]) -> None:
        """Write a record, keep it in memory, sync it; memory matches the file on any exit."""
        if self._fd is None:
            raise StorageError(f"{self.path}: the journal is closed; this is a bug in the caller")
        if self._broken is not None:
            raise StorageWriteError(self._broken)
        start = self._size
        try:
            _write_all(self._fd, data)
            self._size = start + len(data)
            keep()
            sync_fd(self._fd)
        except OSError as exc:
            if self._size == start:
                self._undo(start)
                raise StorageWriteError(
                    f"{self.path}: cannot append to the journal: {exc.strerror}; free disk "
                    "space or fix the disk, then `lightloom resume` the run"
                ) from exc
            self._broken = (
                f"{self.path}: the disk failed to confirm a write ({exc.strerror}); readings "
                "may not be safe. Stop, check the disk, then `lightloom resume` the run"
            )
            raise StorageWriteError(self._broken) from exc
        except BaseException:
            self._settle(start, len(data), keep)
            raise

    def _settle(self, start: int, length: int, keep: Callable[[], None]) -> None:
        # Interrupted (Ctrl-C, SIGTERM handler) somewhere in _append: the file decides.
        assert self._fd is not None
        size = os.fstat(self._fd).st_size
        if size == start + length:
            self._size = size
            keep()
            try:
                sync_fd(self._fd)
            except OSError as exc:
                self._broken = f"{self.path}: the disk failed to confirm a write ({exc.strerror})"
        elif size != start:
            self._undo(start)

    def _undo(self, start: int) -> None:
        # A partly written record would make every later record unreachable: cut it now.
        assert self._fd is not None
        try:
            os.ftruncate(self._fd, start)
            self._size = start
        except OSError:
            self._broken = (
                f"{self.path}: a failed append could not be undone; stop, free disk space, "
                "then `lightloom resume` the run (the torn record is cut then)"
            )


def _write_all(fd: int, data: bytes) -> None:
    # One write is the rule; a short write (signal, disk nearly full) is finished, not repeated.
    view = memoryview(data)
    while view:
        written = os.write(fd, view)
        view = view[written:]


def _exists_message(path: Path) -> str:
    return (
        f"{path}: a run already exists here; use `lightloom resume` to continue it, or choose "
        "another --out"
    )

