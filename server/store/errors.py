"""One error type for everything the store refuses or cannot do, with a one-line reason."""

from __future__ import annotations

import errno
import os
import sqlite3
import tempfile
from pathlib import Path


class StoreError(Exception):
    """The database cannot be used or a write did not reach the disk; the message is for users."""


def sqlite_reason(exc: sqlite3.Error) -> str:
    """Short lower-case reason for a SQLite failure (the library's text is already one line)."""
    name = getattr(exc, "sqlite_errorname", "")
    if name.startswith("SQLITE_FULL"):
        return "disk is full"
    if name.startswith("SQLITE_IOERR"):
        return f"disk i/o error ({name.lower()})"
    if name.startswith("SQLITE_READONLY"):
        return "database is read-only"
    if name.startswith("SQLITE_NOTADB"):
        return "not an sqlite database"
    if name.startswith("SQLITE_BUSY") or name.startswith("SQLITE_LOCKED"):
        return "database is locked by another process"
    return str(exc).strip().lower() or name.lower()


def diagnose_path(path: Path, exc: sqlite3.Error) -> str:
    """Say why `path` cannot be opened for writing, by looking at (and trying) the filesystem.

    SQLite reports most of these as "unable to open database file"; the user needs to know
    whether the folder is missing, read-only, or the file itself is the problem.
    """
    folder = path.parent
    if not folder.exists():
        return f"folder {folder} does not exist"
    if not folder.is_dir():
        return f"{folder} is not a folder"
    if path.is_dir():
        return "it is a folder, not a file"
    # WAL mode creates -wal and -shm files beside the database, so the folder must be writable.
    try:
        fd, probe = tempfile.mkstemp(prefix=".vigil-probe-", dir=folder)
    except OSError as err:
        return f"folder {folder} is not writable ({_os_reason(err)})"
    os.close(fd)
    os.unlink(probe)
    if path.exists():
        try:
            with open(path, "r+b"):
                pass
        except OSError as err:
            return f"file is not writable ({_os_reason(err)})"
    return sqlite_reason(exc)


def _os_reason(err: OSError) -> str:
    if err.errno in (errno.EACCES, errno.EPERM):
        return "permission denied"
    if err.errno == errno.EROFS:
        return "read-only file system"
    if err.errno == errno.ENOSPC:
        return "disk is full"
    return (err.strerror or str(err)).lower()
