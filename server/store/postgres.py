"""A PostgreSQL connection that the store's SQL runs on unchanged (psycopg 3, optional).

`PgConnection.execute(sql, params)` takes the store's `?` placeholders and returns a
psycopg cursor whose rows read by position and by column name, like `sqlite3.Row`. It runs
in autocommit mode, so the store's own `BEGIN` / `COMMIT` decide every transaction, as on
SQLite with `isolation_level=None`.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Sequence
from typing import Any

from server.store.dialect import pg_sql
from server.store.errors import StoreError

CONNECT_TIMEOUT_S = 5


def redact(url: str) -> str:
    """The URL without its password, for messages and the page."""
    return re.sub(r"(://[^:/@]*):[^@/]*@", r"\1:***@", url)


class PgRow:
    """One row: by index, by column name, unpacked, and `.keys()` (as sqlite3.Row)."""

    __slots__ = ("_names", "_values")

    def __init__(self, names: tuple[str, ...], values: Sequence[Any]):
        self._names = names
        self._values = tuple(values)

    def __getitem__(self, key: int | str) -> Any:
        if isinstance(key, str):
            return self._values[self._names.index(key)]
        return self._values[key]

    def __iter__(self) -> Iterator[Any]:
        return iter(self._values)

    def __len__(self) -> int:
        return len(self._values)

    def keys(self) -> list[str]:
        return list(self._names)


def _row_factory(cursor: Any) -> Any:
    names = tuple(column.name for column in cursor.description or ())

    def make(values: Sequence[Any]) -> PgRow:
        return PgRow(names, values)

    return make


class PgConnection:
    """The store's view of one PostgreSQL connection."""

    def __init__(self, raw: Any, location: str):
        self.raw = raw
        self.location = location  # redacted URL
        self.row_factory: object = None  # accepted and ignored: rows always read both ways

    def execute(self, sql: str, params: Sequence[Any] = ()) -> Any:
        return self.raw.execute(pg_sql(sql), tuple(params), prepare=False)

    def executemany(self, sql: str, params_seq: Sequence[Sequence[Any]]) -> None:
        """One statement over many parameter rows, pipelined (no round trip per row)."""
        with self.raw.cursor() as cursor:
            cursor.executemany(pg_sql(sql), [tuple(params) for params in params_seq])

    @property
    def in_transaction(self) -> bool:
        import psycopg.pq

        return self.raw.info.transaction_status != psycopg.pq.TransactionStatus.IDLE

    @property
    def broken(self) -> bool:
        return bool(self.raw.closed or self.raw.broken)

    def close(self) -> None:
        self.raw.close()


def connect(url: str, *, readonly: bool = False, application: str = "vigil") -> PgConnection:
    """Connect (autocommit) or raise a one-line `StoreError`."""
    try:
        import psycopg
    except ImportError:
        raise StoreError("a PostgreSQL store needs the psycopg package: pip install -e '.[lab]'") from None
    try:
        raw = psycopg.connect(
            url,
            autocommit=True,
            connect_timeout=CONNECT_TIMEOUT_S,
            application_name=application,
            row_factory=_row_factory,
        )
    except psycopg.Error as err:
        raise StoreError(f"cannot reach database {redact(url)}: {pg_reason(err)}") from None
    conn = PgConnection(raw, redact(url))
    if readonly:
        conn.execute("SET default_transaction_read_only = on")
    return conn


# Constraint refusals in SQLite's words, so a message reads the same on either backend.
_CONSTRAINTS = {
    "23503": "foreign key constraint failed",
    "23505": "unique constraint failed",
    "23502": "not null constraint failed",
    "23514": "check constraint failed",
}


def pg_reason(exc: BaseException) -> str:
    """The first line of the server's or libpq's message, lower case."""
    state = getattr(exc, "sqlstate", None)
    if state in _CONSTRAINTS:
        return _CONSTRAINTS[state]
    text = str(exc).strip().splitlines()
    line = text[0] if text else type(exc).__name__
    line = re.sub(r"^connection to server (at|on) .*? failed: ", "", line)
    return line.strip().lower() or type(exc).__name__.lower()
