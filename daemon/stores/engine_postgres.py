"""The PostgreSQL engine: one ledger for the whole lab, on a server (psycopg 3, optional).

What is PostgreSQL's own:

* connecting: the URL of ``store.url`` and the password read from
  ``password_env`` / ``password_file``, in autocommit mode (each transaction is
  opened explicitly); a read-only connection makes every transaction read-only;
* placeholders: the stores' ``?`` become ``%s`` (a literal ``%`` is doubled);
* durability: every transaction commits with ``synchronous_commit`` on, the
  others with it off (a crash of the server may undo the last moments of
  those, never corrupt them), as SQLite's ``synchronous=NORMAL``;
* the new row's id through ``RETURNING id``;
* locks: rows claimed with ``FOR UPDATE SKIP LOCKED``, a series' limits set by
  one daemon at a time (a transaction-level advisory lock), an inbox held by a
  session-level advisory lock that ends with the daemon's connection;
* errors: ``OperationalError`` (the server down, restarting, a broken
  connection) means the server is away.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Iterable

import psycopg

from calwarden.daemon.stores.engine import Dialect, Row, ServerTarget

#: The first key of every inbox lock, so calwarden's advisory locks are told from others'.
_INBOX_LOCKS = 0x6377  # "cw"
_CONNECT_TIMEOUT = 5  # seconds: a server away is noticed, not waited for


class PostgresEngine:
    dialect: Dialect = "postgresql"
    errors: tuple[type[Exception], ...] = (psycopg.Error,)

    def __init__(self, target: ServerTarget, *, read_only: bool) -> None:
        options: dict[str, object] = {
            "autocommit": True,
            "connect_timeout": _CONNECT_TIMEOUT,
            "application_name": f"calwarden {socket.gethostname()} {os.getpid()}",
        }
        if target.password is not None:
            options["password"] = target.password
        if read_only:
            options["options"] = "-c default_transaction_read_only=on"
        self._connection = psycopg.connect(target.url, **options)  # type: ignore[arg-type]
        self._sql: dict[str, str] = {}

    def _translate(self, sql: str) -> str:
        translated = self._sql.get(sql)
        if translated is None:
            translated = self._sql[sql] = sql.replace("%", "%%").replace("?", "%s")
        return translated

    def unavailable(self, error: Exception) -> bool:
        return isinstance(error, psycopg.OperationalError) or self._connection.closed

    def begin(self, *, durable: bool) -> None:
        self._connection.execute("BEGIN")
        if not durable:
            self._connection.execute("SET LOCAL synchronous_commit TO off")

    def commit(self) -> None:
        self._connection.execute("COMMIT")

    def rollback(self) -> None:
        if not self._connection.closed:
            self._connection.execute("ROLLBACK")

    def finish(self, *, durable: bool) -> None:
        return None  # SET LOCAL ended with the transaction

    def execute(self, sql: str, parameters: tuple[object, ...]) -> int:
        return self._connection.execute(self._translate(sql), parameters).rowcount

    def execute_many(self, sql: str, rows: Iterable[tuple[object, ...]]) -> None:
        with self._connection.cursor() as cursor:
            cursor.executemany(self._translate(sql), list(rows))

    def insert(self, sql: str, parameters: tuple[object, ...]) -> int:
        row = self._connection.execute(
            self._translate(sql) + " RETURNING id", parameters
        ).fetchone()
        return 0 if row is None else int(row[0])

    def one(self, sql: str, parameters: tuple[object, ...]) -> Row | None:
        return self._connection.execute(self._translate(sql), parameters).fetchone()

    def rows(self, sql: str, parameters: tuple[object, ...]) -> list[Row]:
        return self._connection.execute(self._translate(sql), parameters).fetchall()

    def lock_for_update(self) -> str:
        return " FOR UPDATE SKIP LOCKED"

    def serialise(self, key: str) -> None:
        self._connection.execute("SELECT pg_advisory_xact_lock(hashtextextended(%s, 0))", (key,))

    def claim(self, name: str) -> bool:
        row = self._connection.execute(
            "SELECT pg_try_advisory_lock(%s, hashtext(%s))", (_INBOX_LOCKS, name)
        ).fetchone()
        return bool(row and row[0])

    def holders(self, names: list[str]) -> set[str]:
        # A two-key advisory lock shows in pg_locks as classid, objid (as oid) and objsubid 2,
        # in its database (another lab's database on the same server has locks of its own).
        rows = self._connection.execute(
            "SELECT name FROM unnest(%s::text[]) AS name WHERE EXISTS (SELECT 1 FROM pg_locks l "
            "WHERE l.locktype = 'advisory' AND l.granted AND l.objsubid = 2 "
            "AND l.database = (SELECT oid FROM pg_database WHERE datname = current_database()) "
            "AND l.classid = %s::bigint::oid "
            "AND l.objid = (hashtext(name)::bigint & 4294967295)::oid)",
            (names, _INBOX_LOCKS),
        ).fetchall()
        return {str(row[0]) for row in rows}

    def columns(self, table: str) -> set[str]:
        rows = self._connection.execute(
            "SELECT column_name FROM information_schema.columns "
            "WHERE table_schema = current_schema() AND table_name = %s",
            (table,),
        ).fetchall()
        return {str(row[0]) for row in rows}

    def integrity(self) -> str:
        # The server checks its own pages; what calwarden can check is that it answers.
        self._connection.execute("SELECT 1").fetchone()
        return "ok"

    def close(self) -> None:
        self._connection.close()
