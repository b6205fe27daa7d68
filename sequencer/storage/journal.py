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
from collections.abc import Callable, Iterator
from dataclasses import dataclass, fields
from pathlib import Path
from typing import BinaryIO

import numpy as np

from lightloom.sequencer.errors import StorageError

from lightloom.sequencer.storage.atomic import publish, sync_fd, temp_path
from lightloom.sequencer.storage.codec import (
    FRAME_HEAD_BYTES, FRAME_OVERHEAD, JOURNAL_FORMAT, TYPE_EVENT, TYPE_HEADER, TYPE_READING,
    TYPE_STATUS, Damage, ReadingLayout, _count_intact_after, _frame_at, decode_event, decode_header, decode_rows,
    decode_status, encode_event, encode_header, encode_reading, encode_status, frame,
    intact_readings_at, table_from_rows,
)
from lightloom.sequencer.storage.errors import JournalDamagedError, RunExistsError, RunInUseError, StorageWriteError
from lightloom.sequencer.model.records import FORMAT_VERSION, Event, Reading, ReadingTable, RunHeader
from lightloom.sequencer.model.shared_operators import SharedOperators

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
    reading stopped early (None if every byte was read). ``status_recorded`` is False
    when no status record was read (a tail read from an offset may hold none).
    """

    header: RunHeader
    readings: ReadingTable
    events: tuple[Event, ...]
    status: str
    status_message: str
    valid_bytes: int
    damage: Damage | None
    status_recorded: bool = True


@dataclass
class Batch:
    """Records read from one stretch of a journal: readings (structured rows), events, status.

    ``end`` is the offset just past the last intact record of the stretch; ``damage``
    is set on the last batch when reading stopped before the end of the file.
    """

    rows: np.ndarray
    events: list[Event]
    status: tuple[float, str, str] | None
    end: int
    damage: Damage | None = None


CHUNK_BYTES = 8 << 20
"""Bytes read at a time: what a scan holds in memory, whatever the length of the night."""


def _read_head(handle: BinaryIO, path: Path) -> tuple[RunHeader, ReadingLayout, int]:
    """The header record at the start of a journal: (header, layout, offset after it)."""
    raw = handle.read(1 << 16)
    while True:
        found = _frame_at(raw, memoryview(raw), 0)
        if found == "incomplete record":
            more = handle.read(max(len(raw), 1 << 16))
            if more:
                raw += more
                continue
        break
    if isinstance(found, str) or found[0] != TYPE_HEADER:
        why = found if isinstance(found, str) else "no header record"
        raise JournalDamagedError(
            f"{path}: the journal has no intact header ({why}); it cannot be "
            "read or resumed. If a run file (.h5) sits beside it, analyze that; otherwise the "
            "run must be started again with a new --out."
        )
    _, start, length, end = found
    try:
        fmt, header = decode_header(raw[start:start + length])
    except ValueError as exc:
        raise JournalDamagedError(f"{path}: {exc}; this is not a lightloom journal") from exc
    if fmt > JOURNAL_FORMAT or header.format_version > FORMAT_VERSION:
        raise StorageError(
            f"{path}: written by a newer lightloom (journal format {fmt}, file format "
            f"{header.format_version}); upgrade lightloom to read it"
        )
    return header, ReadingLayout.of(header), end


def _batches(
    handle: BinaryIO, path: Path, layout: ReadingLayout, start: int, chunk: int = CHUNK_BYTES,
) -> Iterator[Batch]:
    """Every record from offset ``start`` on, a chunk at a time (memory bounded by ``chunk``)."""
    handle.seek(start)
    stride = layout.payload_size + FRAME_OVERHEAD
    base, buf = start, handle.read(chunk)
    while buf:
        view = memoryview(buf)
        pos, starts, events, status = 0, [], [], None
        found: tuple[int, int, int, int] | str = ""
        while pos < len(buf):
            run = intact_readings_at(buf, view, pos, layout.payload_size)
            if run:
                # The usual case: back-to-back readings, checked a stretch at a time.
                starts.extend(range(pos + FRAME_HEAD_BYTES, pos + run * stride, stride))
                pos += run * stride
                continue
            found = _frame_at(buf, view, pos)
            if isinstance(found, str):
                break
            record_type, rstart, length, nxt = found
            try:
                if record_type == TYPE_READING:
                    if length != layout.payload_size:
                        raise ValueError(f"reading of {length} bytes, expected {layout.payload_size}")
                    starts.append(rstart)
                elif record_type == TYPE_EVENT:
                    events.append(decode_event(buf[rstart:rstart + length]))
                elif record_type == TYPE_STATUS:
                    status = decode_status(buf[rstart:rstart + length])
                else:
                    raise ValueError("a second header record")
            except (ValueError, UnicodeDecodeError) as exc:
                raise JournalDamagedError(
                    f"{path}: the record at byte {base + pos} has a valid checksum but bad "
                    f"contents ({exc}); the journal was not written by this version of lightloom"
                ) from exc
            pos = nxt
        rows = decode_rows(buf, starts, layout)
        del view
        if pos == len(buf):
            yield Batch(rows, events, status, base + pos)
            base, buf = base + pos, handle.read(chunk)
            continue
        more = handle.read(chunk)
        if found == "incomplete record" and more:
            # A record across the chunk boundary: carry its start into the next stretch.
            yield Batch(rows, events, status, base + pos)
            base, buf = base + pos, buf[pos:] + more
            continue
        rest = buf[pos:] + more + handle.read()
        damage = Damage(base + pos, str(found), _count_intact_after(rest, memoryview(rest), 0))
        yield Batch(rows, events, status, base + pos, damage)
        return


def _open_for_reading(path: Path) -> BinaryIO:
    try:
        return open(path, "rb")
    except FileNotFoundError:
        raise StorageError(f"{path}: no such journal") from None
    except OSError as exc:
        raise StorageError(f"{path}: cannot read the journal: {exc.strerror}") from exc


def _table(rows: np.ndarray, header: RunHeader) -> ReadingTable:
    try:
        return table_from_rows(rows, header.element_names, header.port_names)
    except ValueError as exc:
        raise JournalDamagedError(f"bad reading in the journal: {exc}") from exc


def iter_batches(
    path: str | os.PathLike[str], start: int | None, end: int | None = None,
) -> Iterator[Batch]:
    """The records of a journal from offset ``start`` (None: after the header) up to ``end``.

    ``start`` must be a record boundary (a run file's ``journal_bytes``, or a ``Batch.end``);
    at most a chunk of the file is in memory at a time.
    """
    path = Path(path)
    with _open_for_reading(path) as handle:
        header, layout, head_end = _read_head(handle, path)
        source: BinaryIO = handle if end is None else _Bounded(handle, end)
        yield from _batches(source, path, layout, head_end if start is None else start)


class _Bounded:
    """A read-only view of a file that ends at ``end`` (records appended later are not seen)."""

    def __init__(self, handle: BinaryIO, end: int) -> None:
        self._handle, self._end = handle, end

    def seek(self, offset: int) -> int:
        return self._handle.seek(offset)

    def read(self, size: int = -1) -> bytes:
        left = max(0, self._end - self._handle.tell())
        return self._handle.read(left if size < 0 else min(size, left))


def read_journal_head(path: str | os.PathLike[str]) -> RunHeader:
    """The header of a journal alone (reads its first record only)."""
    path = Path(path)
    with _open_for_reading(path) as handle:
        return _read_head(handle, path)[0]


def read_journal(path: str | os.PathLike[str], start: int | None = None) -> JournalContents:
    """Read a journal without locking or changing it; safe while another process appends.

    A record being appended at that moment shows as a torn tail in ``damage`` and is
    not returned. With ``start`` (a record boundary, e.g. a run file's ``journal_bytes``)
    only the records from there on are returned. Raises JournalDamagedError if the
    header is unreadable. The readings are turned into columns a chunk of the file at a
    time, the operators kept once per distinct block (SharedOperators): a whole night's
    records (1.2 kB a reading) or operators column are never held at once.
    """
    path = Path(path)
    with _open_for_reading(path) as handle:
        header, layout, head_end = _read_head(handle, path)
        columns = _Columns(header)
        events: list[Event] = []
        status, message, recorded = "running", "", False
        end, damage = head_end, None
        for batch in _batches(handle, path, layout, head_end if start is None else start):
            columns.add(batch.rows)
            events.extend(batch.events)
            if batch.status is not None:
                _, status, message = batch.status
                recorded = True
            end, damage = batch.end, batch.damage
    return JournalContents(
        header, columns.table(), tuple(events), status, message, end, damage, recorded,
    )


class _Columns:
    """Readings gathered as columns a batch at a time; ``table`` joins them one column at a time."""

    def __init__(self, header: RunHeader) -> None:
        self._header = header
        self._parts: dict[str, list[np.ndarray]] = {}
        self._operators: list[SharedOperators] = []

    def add(self, rows: np.ndarray) -> None:
        if len(rows) == 0:
            return
        table = _table(rows, self._header)
        for f in fields(table)[2:]:
            if f.name != "operators":
                self._parts.setdefault(f.name, []).append(getattr(table, f.name))
        self._operators.append(SharedOperators.of(table.operators))

    def table(self) -> ReadingTable:
        h = self._header
        if not self._operators:
            return _table(np.empty(0, ReadingLayout.of(h).dtype), h)
        columns: dict[str, np.ndarray | SharedOperators] = {}
        for name, parts in self._parts.items():
            columns[name] = parts[0] if len(parts) == 1 else np.concatenate(parts)
            parts.clear()  # each column's pieces go as soon as it is joined
        columns["operators"] = (self._operators[0] if len(self._operators) == 1
                                else SharedOperators.concatenate(self._operators))
        return ReadingTable(h.element_names, h.port_names, **columns)


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
    """An open journal, locked for appending.

    It keeps no readings in memory (the file holds them; :func:`read_journal` reads
    them back), only their count, the run's events and its last status.
    """

    def __init__(
        self, path: Path, fd: int, header: RunHeader, size: int, n_readings: int,
        events: list[Event], status: str, status_message: str, bytes_cut: int,
    ) -> None:
        self.path = path
        self.header = header
        self.layout = ReadingLayout.of(header)
        self.bytes_cut = bytes_cut
        """Bytes of a damaged tail cut off when the journal was opened (0 if none)."""
        self.status = status
        self.status_message = status_message
        self._fd: int | None = fd
        self._size = size
        self._n = n_readings
        self._events = events
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
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND, 0o644)
        except OSError as exc:
            raise StorageWriteError(
                f"{path}: cannot create the journal: {exc.strerror}; check that the folder "
                f"{path.parent} is writable and the disk has space, or choose another --out"
            ) from exc
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
        except BaseException:
            os.close(fd)
            tmp.unlink(missing_ok=True)
            raise
        return cls(path, fd, header, len(data), 0, [], "running", "", 0)

    @classmethod
    def open(
        cls, path: str | os.PathLike[str], observe: Callable[[np.ndarray], None] | None = None,
    ) -> Journal:
        """Open a journal for appending; a torn tail (what a kill leaves) is cut off.

        The file is read a chunk at a time; ``observe`` is called with each chunk's
        readings (structured rows of the layout's dtype), so a caller can summarise them
        without holding them. Raises JournalDamagedError, and changes nothing, if intact
        records follow a bad one: cutting there would destroy readings that were reported.
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
            with _open_for_reading(path) as handle:
                header, layout, end = _read_head(handle, path)
                n, events, status, message, damage = 0, [], "running", "", None
                for batch in _batches(handle, path, layout, end):
                    n += len(batch.rows)
                    if observe is not None and len(batch.rows):
                        observe(batch.rows)
                    events.extend(batch.events)
                    if batch.status is not None:
                        _, status, message = batch.status
                    end, damage = batch.end, batch.damage
                total = os.fstat(handle.fileno()).st_size
            bytes_cut = 0
            if damage is not None:
                if damage.intact_after:
                    raise JournalDamagedError(
                        f"{path}: damaged at byte {damage.offset} ({damage.reason}) with "
                        f"{damage.intact_after} intact records after the damage; lightloom will "
                        "not cut them off. Keep a copy of the journal; analyze still reads the "
                        "records before the damage."
                    )
                bytes_cut = total - end
                os.ftruncate(fd, end)
                sync_fd(fd)
        except BaseException:
            os.close(fd)
            raise
        return cls(path, fd, header, end, n, events, status, message, bytes_cut)

    @property
    def closed(self) -> bool:
        """True once :meth:`close` has run."""
        return self._fd is None

    @property
    def size(self) -> int:
        """Bytes of intact records in the journal (where the next record goes)."""
        return self._size

    @property
    def readings(self) -> ReadingTable:
        """Every reading in the journal, read back from the file (for tests and tools)."""
        return read_journal(self.path).readings

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
        count = self._n + 1
        self._append(frame(TYPE_READING, payload), lambda: self._keep_count(count))

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

    def _keep_count(self, count: int) -> None:
        # Idempotent (sets, never adds): see _settle.
        self._n = count

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

