"""Connection handling for the store: opening files safely and translating SQLite errors into our
named exceptions."""

from __future__ import annotations

import json
import os
import sqlite3
import threading
import time
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from urllib.parse import quote

from compliant_demo.exceptions import (
    InvalidInputError,
    NotFoundError,
    StoreBusyError,
    StoreCorruptError,
    StoreError,
    StoreFullError,
    StoreReadOnlyError,
)

__all__ = [
    "FILE_MODE",
    "FileKey",
    "PAGE_SIZE",
    "connect",
    "disconnect",
    "folder_writable",
    "translated",
    "damaged_text",
]

FILE_MODE = 0o640
# Large pages shorten the overflow-page chains that sample blobs are stored in (about 4x faster
# loads than the 4 KiB default); metadata rows are small either way.
PAGE_SIZE = 65536
_SQLITE_MAGIC = b"SQLite format 3\x00"

# Store files this process holds SQLite connections to, by (device, inode), and the connections.
# SQLite's locks are POSIX advisory locks, which belong to the process: closing *any* descriptor of
# the file drops every lock the process holds on it (SQLite, "How To Corrupt An SQLite Database
# File", section 2.2, from memory). Our own header check opens and closes the file, so it runs
# only while no connection of this process holds the file. Otherwise a writer loses the shared
# lock that marks it as a user of the WAL, another process closing its connection believes it
# is the last, checkpoints and deletes the WAL, and the writer goes on committing into the
# deleted file: new readers miss every later commit and the next checkpoint corrupts the store.
#: A store file as the kernel knows it: (device, inode).
FileKey = tuple[int, int]
_OPEN_FILES: dict[FileKey, int] = {}
_OPEN_FILES_LOCK = threading.Lock()


def _forget_open_files() -> None:
    """In a forked child: it holds none of its parent's locks, and the lock may have been taken
    by a parent thread that does not exist here."""
    global _OPEN_FILES_LOCK
    _OPEN_FILES.clear()
    _OPEN_FILES_LOCK = threading.Lock()


os.register_at_fork(after_in_child=_forget_open_files)


@contextmanager
def translated(label: str) -> Iterator[None]:
    """Turn sqlite3 errors raised inside the block into our named store errors."""
    try:
        yield
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        # damaged text in the schema or in a JSON column; sqlite3 decodes text as UTF-8
        raise StoreCorruptError(f"{label}: damaged text in the store: {exc}") from exc
    except sqlite3.Error as exc:
        name = getattr(exc, "sqlite_errorname", "") or ""
        text = str(exc)
        if damaged_text(exc):
            raise StoreCorruptError(f"{label}: damaged text in the store: {text}") from exc
        if name.startswith(("SQLITE_BUSY", "SQLITE_LOCKED")) or "locked" in text:
            raise StoreBusyError(f"{label}: store busy (another writer holds it): {text}") from exc
        if name.startswith("SQLITE_FULL") or "full" in text:
            raise StoreFullError(
                f"{label}: store full, nothing of this write kept: {text}"
            ) from exc
        if name.startswith("SQLITE_READONLY") or "readonly" in text:
            raise StoreReadOnlyError(f"{label}: store is read-only: {text}") from exc
        if name.startswith(("SQLITE_NOTADB", "SQLITE_CORRUPT")) or "not a database" in text:
            raise StoreCorruptError(f"{label}: not a usable SQLite store: {text}") from exc
        raise StoreError(f"{label}: {text}") from exc


def damaged_text(exc: BaseException) -> bool:
    """Whether sqlite3 raised ``exc`` because stored text is not valid UTF-8."""
    return isinstance(exc, sqlite3.OperationalError) and "decode to UTF-8" in str(exc)


def _check_file(path: Path) -> None:
    if path.is_dir():
        raise InvalidInputError(f"store path {str(path)!r} is a directory, not a file")
    try:
        with path.open("rb") as handle:
            header = handle.read(len(_SQLITE_MAGIC))
    except OSError as exc:
        raise StoreError(f"store {str(path)!r}: cannot read: {exc.strerror}") from None
    if header and header != _SQLITE_MAGIC:
        raise StoreCorruptError(
            f"store {str(path)!r} is not an SQLite file (starts with {header[:8]!r})"
        )
    _check_length(path)


def _check_length(path: Path) -> None:
    """Refuse a file shorter than its header says (a cut copy); SQLite would read zeros."""
    size = path.stat().st_size
    if size == 0 or _log_size(path) > 0:
        return  # pages still in the write-ahead log may lie beyond the end of the main file
    with path.open("rb") as handle:
        header = handle.read(100)
    if len(header) < 100:
        raise StoreCorruptError(f"store {str(path)!r} is truncated: {size} bytes, no full header")
    page_size = int.from_bytes(header[16:18], "big")
    page_size = 65536 if page_size == 1 else page_size
    page_count = int.from_bytes(header[28:32], "big")
    # the page count is valid when "version-valid-for" equals the change counter (SQLite format)
    if header[92:96] == header[24:28] and page_count * page_size > size:
        raise StoreCorruptError(
            f"store {str(path)!r} is truncated: {size} bytes, the header says "
            f"{page_count} pages of {page_size} bytes"
        )


def connect(
    path: str | os.PathLike[str],
    *,
    read_only: bool,
    busy_timeout_s: float,
    create: bool,
    durable: bool = True,
) -> tuple[sqlite3.Connection, Path | None, FileKey | None]:
    """Open (or create, mode 0o640) a store file; returns the connection, the resolved path and
    the file's key for :func:`disconnect` (None in memory)."""
    if not busy_timeout_s >= 0:
        raise InvalidInputError(f"busy_timeout_s must be >= 0, got {busy_timeout_s!r}")
    if str(path) == ":memory:":
        if read_only:
            raise InvalidInputError("an in-memory store cannot be read-only")
        conn = sqlite3.connect(":memory:", isolation_level=None, check_same_thread=False)
        resolved, key = None, None
    else:
        resolved = Path(path)
        if not resolved.exists():
            if read_only or not create:
                raise NotFoundError(f"store file {str(resolved)!r} does not exist")
            _create_file(resolved)
        conn, key = _connect_file(resolved, read_only, busy_timeout_s)
    try:
        with translated(str(path)):
            _configure(conn, writable=not read_only, durable=durable, busy_timeout_s=busy_timeout_s)
    except BaseException:
        disconnect(conn, key)
        raise
    return conn, resolved, key


def _connect_file(
    path: Path, read_only: bool, busy_timeout_s: float
) -> tuple[sqlite3.Connection, FileKey]:
    """Check the file (unless this process has it open already) and connect to it."""
    stat = path.stat()
    key = (stat.st_dev, stat.st_ino)
    with _OPEN_FILES_LOCK:
        if not _OPEN_FILES.get(key):
            _check_file(path)
        mode = "ro" if read_only else "rw"
        if not read_only and not os.access(path, os.W_OK):
            raise StoreReadOnlyError(
                f"store {str(path)!r} is read-only (file or file system): open it read-only"
            )
        if not read_only and not folder_writable(path):
            raise StoreReadOnlyError(
                f"store {str(path)!r}: its folder is not writable and SQLite keeps the "
                "store's -wal and -shm files beside it: open it read-only"
            )
        if read_only and _needs_immutable(path):
            mode = "ro&immutable=1"
            _warn_unread_log(path)
        with translated(str(path)):
            conn = sqlite3.connect(
                f"file:{quote(str(path.absolute()))}?mode={mode}",
                uri=True,
                isolation_level=None,
                timeout=busy_timeout_s,
                check_same_thread=False,
            )
        _OPEN_FILES[key] = _OPEN_FILES.get(key, 0) + 1
    return conn, key


def disconnect(conn: sqlite3.Connection, key: FileKey | None) -> None:
    """Close a connection :func:`connect` made (once), with the file key it returned."""
    conn.close()  # first: a file counts as held by this process until its last lock is gone
    if key is None:
        return
    with _OPEN_FILES_LOCK:
        remaining = _OPEN_FILES.get(key, 0) - 1
        if remaining > 0:
            _OPEN_FILES[key] = remaining
        else:
            _OPEN_FILES.pop(key, None)


def folder_writable(path: Path) -> bool:
    """Whether a writable connection to the store ``path`` can work: its folder is writable, or
    the -wal and -shm files it needs already exist there."""
    return os.access(path.parent, os.W_OK) or (
        Path(f"{path}-wal").exists() and Path(f"{path}-shm").exists()
    )


def _needs_immutable(path: Path) -> bool:
    """A WAL store in a folder nobody may write to (a read-only file system): SQLite cannot make
    its shared-memory file there, so the file is opened as immutable (no locks, no WAL)."""
    return not os.access(path.parent, os.W_OK) and not Path(f"{path}-shm").exists()


def _log_size(path: Path) -> int:
    """Bytes in the store's -wal file, 0 without one (the last connection to close deletes it,
    at any moment, so it is looked at once)."""
    try:
        return Path(f"{path}-wal").stat().st_size
    except FileNotFoundError:
        return 0


def _warn_unread_log(path: Path) -> None:
    """An immutable open reads the main file alone (SQLite's ``immutable`` URI parameter): commits
    still in a -wal file are not seen, and no reader could see them without a -shm file."""
    size = _log_size(path)
    if size:
        warnings.warn(
            f"store {str(path)!r} opened without its write-ahead log: its folder is read-only "
            f"and holds no -shm file, so the {size} bytes of {path.name}-wal are not read and the "
            "newest writes may be missing; copy the store with its -wal to a writable folder to "
            "read them",
            stacklevel=6,
        )


def _create_file(path: Path) -> None:
    if not path.parent.is_dir():
        raise NotFoundError(f"directory {str(path.parent)!r} for the new store does not exist")
    try:
        fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, FILE_MODE)
    except FileExistsError:
        return  # another process created it since our exists() check: open theirs
    try:
        os.fchmod(fd, FILE_MODE)  # the umask may have removed bits; never add "other" access
    finally:
        os.close(fd)


def _configure(
    conn: sqlite3.Connection, *, writable: bool, durable: bool, busy_timeout_s: float
) -> None:
    (page_count,) = conn.execute("PRAGMA page_count").fetchone()
    if writable and page_count == 0:
        conn.execute(f"PRAGMA page_size = {PAGE_SIZE}")
    conn.execute("PRAGMA foreign_keys = ON")
    if writable:
        _execute_waiting(conn, "PRAGMA journal_mode = WAL", busy_timeout_s)
        # FULL: a committed chunk survives power loss too; NORMAL only a crash of the writer.
        conn.execute(f"PRAGMA synchronous = {'FULL' if durable else 'NORMAL'}")


def _execute_waiting(conn: sqlite3.Connection, sql: str, timeout_s: float) -> None:
    """Run ``sql``, retrying for up to ``timeout_s`` while the file is locked. Switching a new
    file to WAL needs an exclusive lock and does not wait on SQLite's busy handler, so openers
    that create one store at once would otherwise fail at once."""
    deadline = time.monotonic() + timeout_s
    pause_s = 0.001
    while True:
        try:
            conn.execute(sql).fetchall()
            return
        except sqlite3.OperationalError as exc:
            if "locked" not in str(exc) or time.monotonic() >= deadline:
                raise
        time.sleep(pause_s)
        pause_s = min(2.0 * pause_s, 0.05)
