"""One open store file: its connection, the lock that serialises calls on it, and the read and
write transactions every other part of the store works inside.

``StoreSession`` is the store's internal API between its modules (recording, queries, curation,
results, merge); ``DemoStore`` owns one and delegates to those modules.
"""

from __future__ import annotations

import os
import sqlite3
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from compliant_demo.exceptions import StoreError, StoreReadOnlyError
from compliant_demo.store import _schema, _sql

__all__ = ["StoreSession"]


class StoreSession:
    """An open store file (see :class:`compliant_demo.store.DemoStore` for the parameters).

    Attributes
    ----------
    conn : sqlite3.Connection
        Autocommit connection; use :meth:`transaction` or :meth:`snapshot` around statements.
    path : Path or None
        The file, None in memory.
    label : str
        ``"store '<path>'"``, the prefix of every error message.
    lock : threading.RLock
        Held by every call on this session (one object may be shared between threads).
    read_only : bool
    schema_version : int
    lease_token : str or None
        This object's writer lease, once it began a recording.
    layouts : dict of str to (int, bool)
        Cached ``(n_joints, has_stiffness)`` per demonstration (both never change).
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        read_only: bool,
        busy_timeout_s: float,
        create: bool,
        durable: bool,
    ) -> None:
        self.read_only = bool(read_only)
        self.label = f"store {str(path)!r}"
        self.lock = threading.RLock()
        self.lease_token: str | None = None
        self.layouts: dict[str, tuple[int, bool]] = {}
        self.conn: sqlite3.Connection | None
        self.conn, self.path, self._file_key = _sql.connect(
            path, read_only=self.read_only, busy_timeout_s=busy_timeout_s, create=create,
            durable=durable,
        )  # fmt: skip
        try:
            with _sql.translated(self.label):
                self.schema_version = _schema.ensure_schema(
                    self.conn, writable=not self.read_only, label=self.label
                )
        except BaseException:
            _sql.disconnect(self.conn, self._file_key)
            raise

    @property
    def closed(self) -> bool:
        """Whether :meth:`close` was called."""
        return self.conn is None

    def open_connection(self) -> sqlite3.Connection:
        """The connection, or StoreError when the session is closed."""
        if self.conn is None:
            raise StoreError(f"{self.label} is closed")
        return self.conn

    def close(self) -> None:
        """Close the connection (idempotent)."""
        with self.lock:
            if self.conn is not None:
                _sql.disconnect(self.conn, self._file_key)
                self.conn = None

    @contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """A write transaction (``BEGIN IMMEDIATE``), committed when the block ends normally."""
        if self.read_only:
            raise StoreReadOnlyError(f"{self.label} is open read-only")
        with self.lock, _sql.translated(self.label):
            conn = self.open_connection()
            conn.execute("BEGIN IMMEDIATE")
            try:
                yield conn
                conn.execute("COMMIT")
            except BaseException:
                # SQLITE_FULL, IOERR, NOMEM and BUSY may already have rolled the transaction back;
                # a second ROLLBACK would replace the real error with "no transaction is active"
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                raise

    @contextmanager
    def snapshot(self) -> Iterator[sqlite3.Connection]:
        """A read transaction: every statement inside sees the same state of the file."""
        with self.lock, _sql.translated(self.label):
            conn = self.open_connection()
            conn.execute("BEGIN")
            try:
                yield conn
            finally:
                conn.execute("COMMIT")

    def same_file(self, other: str | os.PathLike[str]) -> bool:
        """Whether ``other`` names this session's file."""
        return self.path is not None and Path(other).resolve() == self.path.resolve()
