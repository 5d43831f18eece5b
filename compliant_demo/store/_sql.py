"""Connection handling for the store: opening files safely, translating SQLite errors into our
named exceptions, and building filtered queries with every value bound as a parameter."""

from __future__ import annotations

import json
import os
import re
import sqlite3
import time
from collections.abc import Iterator, Mapping, Sequence
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
    "PAGE_SIZE",
    "connect",
    "folder_writable",
    "translated",
    "damaged_text",
    "QueryBuilder",
    "parse_order_by",
    "read_only_authorizer",
    "check_raw_where",
    "RawWhereAuthorizer",
]

FILE_MODE = 0o640
# Large pages shorten the overflow-page chains that sample blobs are stored in (about 4x faster
# loads than the 4 KiB default); metadata rows are small either way.
PAGE_SIZE = 65536
_SQLITE_MAGIC = b"SQLite format 3\x00"


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
    wal = Path(f"{path}-wal")
    if size == 0 or (wal.exists() and wal.stat().st_size > 0):
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
) -> tuple[sqlite3.Connection, Path | None]:
    """Open (or create, mode 0o640) a store file; returns the connection and the resolved path."""
    if not busy_timeout_s >= 0:
        raise InvalidInputError(f"busy_timeout_s must be >= 0, got {busy_timeout_s!r}")
    if str(path) == ":memory:":
        if read_only:
            raise InvalidInputError("an in-memory store cannot be read-only")
        conn = sqlite3.connect(":memory:", isolation_level=None, check_same_thread=False)
        resolved = None
    else:
        resolved = Path(path)
        if not resolved.exists():
            if read_only or not create:
                raise NotFoundError(f"store file {str(resolved)!r} does not exist")
            _create_file(resolved)
        _check_file(resolved)
        mode = "ro" if read_only else "rw"
        if not read_only and not os.access(resolved, os.W_OK):
            raise StoreReadOnlyError(
                f"store {str(resolved)!r} is read-only (file or file system): open it read-only"
            )
        if not read_only and not folder_writable(resolved):
            raise StoreReadOnlyError(
                f"store {str(resolved)!r}: its folder is not writable and SQLite keeps the "
                "store's -wal and -shm files beside it: open it read-only"
            )
        if read_only and _needs_immutable(resolved):
            mode = "ro&immutable=1"
        with translated(str(resolved)):
            conn = sqlite3.connect(
                f"file:{quote(str(resolved.absolute()))}?mode={mode}",
                uri=True,
                isolation_level=None,
                timeout=busy_timeout_s,
                check_same_thread=False,
            )
    try:
        with translated(str(path)):
            _configure(conn, writable=not read_only, durable=durable, busy_timeout_s=busy_timeout_s)
    except BaseException:
        conn.close()
        raise
    return conn, resolved


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


def parse_order_by(order_by: str | None, allowed: Sequence[str], default: str) -> str:
    """Validate ``"col [asc|desc], -col2"`` against ``allowed`` column names; return SQL."""
    if order_by is None:
        return default
    if not isinstance(order_by, str) or not order_by.strip():
        raise InvalidInputError(f"order_by must be a non-empty string, got {order_by!r}")
    terms = []
    for raw in order_by.split(","):
        words = raw.split()
        direction = "ASC"
        if len(words) == 2 and words[1].lower() in ("asc", "desc"):
            direction = words[1].upper()
            words = words[:1]
        if len(words) != 1:
            raise InvalidInputError(f"order_by term {raw.strip()!r} is not 'column [asc|desc]'")
        column = words[0]
        if column.startswith("-"):
            column, direction = column[1:], "DESC"
        if column not in allowed:
            raise InvalidInputError(
                f"order_by column {column!r} is unknown; choose from {', '.join(allowed)}"
            )
        terms.append(f"{column} {direction}")
    return ", ".join(terms)


class QueryBuilder:
    """Collects WHERE conditions with bound values, positional or named as ``where_args`` needs.

    Parameters
    ----------
    named : bool
        Use ``:name`` placeholders (when the caller's raw ``where`` uses named parameters).
    """

    def __init__(self, named: bool) -> None:
        self.conditions: list[str] = []
        self.named = named
        self.positional: list[object] = []
        self.by_name: dict[str, object] = {}

    def value(self, value: object) -> str:
        """Bind ``value``; return its placeholder."""
        if self.named:
            key = f"_cd_{len(self.by_name)}"
            self.by_name[key] = value
            return f":{key}"
        self.positional.append(value)
        return "?"

    def add(self, condition: str, *values: object) -> None:
        """Add a condition whose ``{}`` slots receive the placeholders of ``values``."""
        self.conditions.append(condition.format(*(self.value(v) for v in values)))

    def add_raw(self, where: str, where_args: Sequence[object] | Mapping[str, object]) -> None:
        """Add the caller's own SQL condition (see :func:`check_raw_where`) with its
        parameters."""
        self.conditions.append(check_raw_where(where))
        if isinstance(where_args, Mapping):
            clash = [k for k in where_args if k.startswith("_cd_")]
            if clash:
                raise InvalidInputError(
                    f"where_args key {clash[0]!r} uses the reserved prefix _cd_"
                )
            self.by_name.update(where_args)
        else:
            self.positional.extend(where_args)

    def sql(self) -> str:
        """The WHERE clause (empty when there are no conditions)."""
        return f" WHERE {' AND '.join(self.conditions)}" if self.conditions else ""

    def params(self) -> Sequence[object] | Mapping[str, object]:
        """The bound values, in the form sqlite3 expects."""
        return self.by_name if self.named else self.positional


_READ_ONLY_ACTIONS = {
    sqlite3.SQLITE_SELECT,
    sqlite3.SQLITE_READ,
    sqlite3.SQLITE_FUNCTION,
    getattr(sqlite3, "SQLITE_RECURSIVE", 33),
}


def read_only_authorizer(action: int, *_args: object) -> int:
    """sqlite3 authorizer that lets a statement read but never write, attach or set pragmas."""
    return sqlite3.SQLITE_OK if action in _READ_ONLY_ACTIONS else sqlite3.SQLITE_DENY


# Outside string literals and quoted names, a raw condition may hold none of these: each could
# end the condition early ("1) OR (1=1"), switch the rest of the statement off ("--", "/*") or
# start another statement (";").
_QUOTES = {"'": "'", '"': '"', "`": "`", "[": "]"}
# Keywords that start a query inside the condition.
_QUERY_WORD = re.compile(r"\b(SELECT|VALUES|WITH)\b", re.IGNORECASE)


def _outside_quotes(where: str) -> Iterator[tuple[int, str]]:
    """``(index, character)`` of every character of ``where`` outside quotes; raises on an
    unterminated quote."""
    index = 0
    while index < len(where):
        char = where[index]
        close = _QUOTES.get(char)
        if close is None:
            yield index, char
            index += 1
            continue
        end = where.find(close, index + 1)
        # a doubled quote inside a literal ('it''s') is one quote character
        while end != -1 and close != "]" and where[end + 1 : end + 2] == close:
            end = where.find(close, end + 2)
        if end == -1:
            raise InvalidInputError(f"where = {where!r} has an unterminated {char} quote")
        index = end + 1


def check_raw_where(where: str) -> str:
    """Check that ``where`` can only be one boolean expression; return it in parentheses.

    Raises
    ------
    InvalidInputError
        It holds a comment (``--``, ``/*``), a ``;``, an unterminated quote or parentheses that
        do not balance (outside string literals and quoted names), or is empty.
    """
    if not where.strip():
        raise InvalidInputError(f"where = {where!r} is empty")
    depth = 0
    previous = ""
    bare = [" "] * len(where)  # the condition with its quoted parts blanked out
    for index, char in _outside_quotes(where):
        bare[index] = char
        pair = previous + char
        if pair in ("--", "/*"):
            raise InvalidInputError(f"where = {where!r} holds a comment ({pair!r} at {index - 1})")
        if char == ";":
            raise InvalidInputError(f"where = {where!r} holds ';' at {index}: one condition only")
        depth += {"(": 1, ")": -1}.get(char, 0)
        if depth < 0:
            raise InvalidInputError(f"where = {where!r} closes a parenthesis it never opened")
        previous = char
    if depth:
        raise InvalidInputError(f"where = {where!r} leaves {depth} parenthesis(es) open")
    query = _QUERY_WORD.search("".join(bare))
    if query:
        raise InvalidInputError(
            f"where = {where!r} holds a subquery ({query.group(0)}): a raw filter may only read "
            "the columns of demonstrations"
        )
    return f"({where})"


# Names of the authorizer's action codes (error codes share the same numbers, so not by prefix).
_ACTION_NAMES = {
    getattr(sqlite3, f"SQLITE_{name}"): f"SQLITE_{name}"
    for name in (
        "CREATE_INDEX CREATE_TABLE CREATE_TEMP_INDEX CREATE_TEMP_TABLE CREATE_TEMP_TRIGGER "
        "CREATE_TEMP_VIEW CREATE_TRIGGER CREATE_VIEW DELETE DROP_INDEX DROP_TABLE "
        "DROP_TEMP_INDEX DROP_TEMP_TABLE DROP_TEMP_TRIGGER DROP_TEMP_VIEW DROP_TRIGGER DROP_VIEW "
        "INSERT PRAGMA TRANSACTION UPDATE ATTACH DETACH ALTER_TABLE REINDEX ANALYZE "
        "CREATE_VTABLE DROP_VTABLE SAVEPOINT RECURSIVE"
    ).split()
    if hasattr(sqlite3, f"SQLITE_{name}")
}
# Functions a raw condition may not call: they load code or allocate memory at the caller's word.
_REFUSED_FUNCTIONS = frozenset(("load_extension", "randomblob", "zeroblob", "fts3_tokenizer"))


class RawWhereAuthorizer:
    """sqlite3 authorizer for a probe ``SELECT 1 FROM <table> WHERE (<raw condition>)``: the
    condition may read the columns of ``table`` and call plain functions, nothing else (no other
    table, table-valued function, recursion, write or pragma).

    Parameters
    ----------
    table : str
    columns : sequence of str
        The columns it may read.
    """

    def __init__(self, table: str, columns: Sequence[str]) -> None:
        self.table = table
        self.columns = frozenset(columns) | {""}  # "" is the table itself (count(*), rowid)
        self.refused: str | None = None

    def __call__(self, action: int, arg1: str | None, arg2: str | None, *_: object) -> int:
        allowed = False
        what = _ACTION_NAMES.get(action, f"SQLite action {action}")
        if action == sqlite3.SQLITE_SELECT:
            # the probe itself (SQLite may prepare it twice, when a LIKE pattern is bound);
            # a subquery needs a keyword that check_raw_where refuses
            allowed = True
        elif action == sqlite3.SQLITE_READ:
            allowed = arg1 == self.table and arg2 in self.columns
            what = f"reading {arg1}.{arg2}"
        elif action == sqlite3.SQLITE_FUNCTION:
            allowed = str(arg2).lower() not in _REFUSED_FUNCTIONS
            what = f"the function {arg2}()"
        if allowed:
            return sqlite3.SQLITE_OK
        self.refused = self.refused or what
        return sqlite3.SQLITE_DENY
