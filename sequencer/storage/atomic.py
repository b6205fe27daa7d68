"""Durable file operations: syncing data and directories, temporary names, atomic publication."""

from __future__ import annotations

import errno
import glob
import os
import secrets
import sys
from pathlib import Path

if sys.platform == "darwin":
    import fcntl

    def sync_fd(fd: int) -> None:
        """Push a file's data to the disk itself (macOS fsync stops at the drive cache)."""
        fcntl.fcntl(fd, fcntl.F_FULLFSYNC)

elif hasattr(os, "fdatasync"):

    def sync_fd(fd: int) -> None:
        """Push a file's data and size to disk (fdatasync: the mtime alone is not waited for)."""
        os.fdatasync(fd)

else:

    def sync_fd(fd: int) -> None:
        """Push a file's data and metadata to disk."""
        os.fsync(fd)


def sync_path(path: Path) -> None:
    """Sync a closed file's contents to disk."""
    fd = os.open(path, os.O_RDONLY)
    try:
        sync_fd(fd)
    finally:
        os.close(fd)


def sync_directory(directory: Path) -> None:
    """Sync a directory, so that a rename or a new name in it survives a power cut."""
    if not hasattr(os, "O_DIRECTORY"):
        return
    fd = os.open(directory, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    except OSError as exc:
        # Some filesystems (network, FUSE) refuse fsync on directories; the rename still stands.
        if exc.errno not in (errno.EINVAL, errno.ENOTSUP, errno.EBADF):
            raise
    finally:
        os.close(fd)


def temp_path(dest: Path) -> Path:
    """A fresh hidden name beside dest, matched by :func:`stale_temp_paths`."""
    return dest.with_name(f".{dest.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")


def stale_temp_paths(dest: Path) -> list[Path]:
    """Temporary files left beside dest by a killed writer."""
    return sorted(dest.parent.glob(f".{glob.escape(dest.name)}.*.tmp"))


def publish(tmp: Path, dest: Path, *, overwrite: bool) -> None:
    """Make a synced temporary file appear as dest in one step, then sync the directory.

    With ``overwrite=False`` an existing dest raises FileExistsError and tmp is left.
    """
    if overwrite:
        os.replace(tmp, dest)
    else:
        try:
            os.link(tmp, dest)
        except FileExistsError:
            raise
        except OSError:
            # No hard links here (some network or FAT filesystems): check, then rename.
            if dest.exists():
                raise FileExistsError(errno.EEXIST, "exists", str(dest)) from None
            os.rename(tmp, dest)
        else:
            os.unlink(tmp)
    sync_directory(dest.parent)
