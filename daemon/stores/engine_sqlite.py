"""The SQLite engine: a ledger file in the daemon's state folder (the default).

* opening the file in WAL mode, so that ``calwarden status`` reads while the
  daemon writes (read-only through a ``mode=ro`` URI);
* ``BEGIN IMMEDIATE``: the writer takes the write lock at the start, so two
  writers (the worker and the alert sender) queue on the busy timeout instead
  of failing half-way; for the same reason :meth:`serialise` needs no lock;
* durability: a durable transaction commits with ``synchronous=FULL``, the
  others with ``NORMAL`` (in WAL mode: safe against a crash of the process,
  not of the machine);
* the new row's id is ``lastrowid``; the integrity check is SQLite's own.

One daemon owns a file (the state folder's lock), so :meth:`claim` always
succeeds and nothing is ever "away".
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable
from contextlib import suppress
from pathlib import Path

from calwarden.daemon.stores.engine import Dialect, Row


class SQLiteEngine:
    dialect: Dialect = "sqlite"
    errors: tuple[type[Exception], ...] = (sqlite3.Error,)

    def __init__(self, path: Path, *, read_only: bool) -> None:
        if read_only:
            self._connection = sqlite3.connect(
                f"{path.as_uri()}?mode=ro", uri=True, isolation_level=None, timeout=5
            )
            return
        path.parent.mkdir(parents=True, exist_ok=True)
        # Autocommit mode: every transaction is opened explicitly, in begin().
        self._connection = sqlite3.connect(
            path, isolation_level=None, timeout=30, check_same_thread=False
        )
        self._connection.execute("PRAGMA journal_mode=WAL")
        self._connection.execute("PRAGMA foreign_keys=ON")
        self._connection.execute("PRAGMA synchronous=NORMAL")

    def unavailable(self, error: Exception) -> bool:
        return False  # a file is never "away": its errors are the ledger's own

    def begin(self, *, durable: bool) -> None:
        if durable:
            self._connection.execute("PRAGMA synchronous=FULL")
        self._connection.execute("BEGIN IMMEDIATE")

    def commit(self) -> None:
        self._connection.execute("COMMIT")

    def rollback(self) -> None:
        self._connection.execute("ROLLBACK")

    def finish(self, *, durable: bool) -> None:
        if durable:
            with suppress(sqlite3.Error):
                self._connection.execute("PRAGMA synchronous=NORMAL")

    def execute(self, sql: str, parameters: tuple[object, ...]) -> int:
        return int(self._connection.execute(sql, parameters).rowcount)

    def execute_many(self, sql: str, rows: Iterable[tuple[object, ...]]) -> None:
        self._connection.executemany(sql, rows)

    def insert(self, sql: str, parameters: tuple[object, ...]) -> int:
        return int(self._connection.execute(sql, parameters).lastrowid or 0)

    def one(self, sql: str, parameters: tuple[object, ...]) -> Row | None:
        row: Row | None = self._connection.execute(sql, parameters).fetchone()
        return row

    def rows(self, sql: str, parameters: tuple[object, ...]) -> list[Row]:
        return list(self._connection.execute(sql, parameters).fetchall())

    def lock_for_update(self) -> str:
        return ""  # BEGIN IMMEDIATE has locked the whole file already

    def serialise(self, key: str) -> None:
        return None  # the same: one writer at a time

    def claim(self, name: str) -> bool:
        return True  # the state folder's lock makes this daemon the file's only writer

    def holders(self, names: list[str]) -> set[str]:
        return set()  # not known here: status reads the state folder's lock instead

    def columns(self, table: str) -> set[str]:
        return {str(row[1]) for row in self.rows(f"PRAGMA table_info({table})", ())}

    def integrity(self) -> str:
        row = self.one("PRAGMA integrity_check", ())
        return "" if row is None else str(row[0])

    def close(self) -> None:
        self._connection.close()
