"""Filtered queries over the store: WHERE conditions with every value bound as a parameter,
``order_by`` checked against the column names, and the guards of a caller's raw SQL ``where``
(one boolean expression over the demonstration columns, read-only)."""

from __future__ import annotations

import re
import sqlite3
from collections.abc import Iterator, Mapping, Sequence

from compliant_demo.exceptions import InvalidInputError

__all__ = [
    "parse_order_by",
    "QueryBuilder",
    "read_only_authorizer",
    "check_raw_where",
    "RawWhereAuthorizer",
]


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
