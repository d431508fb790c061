"""The engine seam: what the stores need from a database, and where a ledger lives.

The stores (:mod:`.files`, :mod:`.control`, :mod:`.pictures`, :mod:`.outbox`)
write SQL that SQLite and PostgreSQL both accept, with ``?`` placeholders, and
reach the engine only through :class:`~.database.Database`. What differs
between engines is an :class:`Engine`: connecting, placeholders, starting and
ending a transaction, durability, the id of a new row, locks, the integrity
check and which errors mean "the server is away". Two engines exist:
:mod:`.engine_sqlite` (a file per PC, the default) and :mod:`.engine_postgres`
(a lab's server, through psycopg 3, an optional extra). They are the only
modules that import a database driver (tests/test_architecture.py).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, Protocol

from calwarden.daemon.settings.store import StoreSettings

LEDGER_NAME = "ledger.sqlite3"

#: One result row, its values as the engine returns them (int, float, str, bytes, None).
Row = tuple[Any, ...]

Dialect = Literal["sqlite", "postgresql"]


class LedgerError(Exception):
    """The ledger cannot be opened or written: the daemon cannot go on safely."""


class StoreUnavailable(LedgerError):
    """The ledger's server cannot be reached now (down, restarting, network): try again later."""


@dataclass(frozen=True, slots=True)
class ServerTarget:
    """A ledger on a PostgreSQL server; the password is kept out of every message."""

    url: str
    password: str | None = field(default=None, repr=False)

    def __str__(self) -> str:
        return self.url


#: Where a ledger lives: a SQLite file, or a server.
Target = Path | ServerTarget


def store_target(state_dir: Path, store: StoreSettings) -> Target:
    """The ledger of a daemon: its state folder's file, or the configured server.

    A password that cannot be read is a :class:`LedgerError` naming where it was looked for.
    """
    if store.url is None:
        return state_dir / LEDGER_NAME
    try:
        password = store.password()
    except KeyError:
        raise LedgerError(
            f"{store.url}: the environment variable {store.password_env} "
            "(store.password_env) is not set"
        ) from None
    except OSError as error:
        raise LedgerError(
            f"{store.url}: cannot read store.password_file: {error.strerror or error}"
        ) from None
    return ServerTarget(store.url, password)


class Engine(Protocol):
    """One connection to one ledger, as :class:`~.database.Database` drives it."""

    dialect: Dialect
    #: The driver's error classes: each becomes a LedgerError (or StoreUnavailable).
    errors: tuple[type[Exception], ...]

    def unavailable(self, error: Exception) -> bool:
        """Whether an error means the server is away (reconnect later), not a broken ledger."""

    def begin(self, *, durable: bool) -> None:
        """Start a write transaction (taking the write lock at once where the engine has one)."""

    def commit(self) -> None: ...

    def rollback(self) -> None: ...

    def finish(self, *, durable: bool) -> None:
        """After a transaction, whatever happened to it (undo per-transaction settings)."""

    def execute(self, sql: str, parameters: tuple[object, ...]) -> int:
        """Run one statement (``?`` placeholders); returns how many rows it changed."""

    def execute_many(self, sql: str, rows: Iterable[tuple[object, ...]]) -> None: ...

    def insert(self, sql: str, parameters: tuple[object, ...]) -> int:
        """Run one INSERT of one row into a table with an ``id``; returns the new id."""

    def one(self, sql: str, parameters: tuple[object, ...]) -> Row | None: ...

    def rows(self, sql: str, parameters: tuple[object, ...]) -> list[Row]: ...

    def lock_for_update(self) -> str:
        """The clause that locks selected rows and skips those another daemon holds."""

    def serialise(self, key: str) -> None:
        """Inside a transaction: wait until no other connection's transaction holds ``key``."""

    def claim(self, name: str) -> bool:
        """Hold ``name`` for as long as this connection lives; False if another holds it."""

    def holders(self, names: list[str]) -> set[str]:
        """Which of ``names`` some connection holds now (by :meth:`claim`)."""

    def columns(self, table: str) -> set[str]:
        """The names of a table's columns (for migrations)."""

    def integrity(self) -> str:
        """``ok``, or what the engine's own check found wrong."""

    def close(self) -> None: ...


def connect(target: Target, *, read_only: bool) -> Engine:
    """A connection to the ledger at ``target`` (the driver's errors are not caught here)."""
    if isinstance(target, Path):
        from calwarden.daemon.stores.engine_sqlite import SQLiteEngine

        return SQLiteEngine(target, read_only=read_only)
    try:
        from calwarden.daemon.stores.engine_postgres import PostgresEngine
    except ImportError:
        raise LedgerError(
            f"{target}: the PostgreSQL store needs psycopg: pip install 'calwarden[postgresql]'"
        ) from None
    return PostgresEngine(target, read_only=read_only)
