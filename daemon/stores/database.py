"""The ledger's database: one connection, its schema version and the one write path.

The stores built on a :class:`Database` (:mod:`.files`, :mod:`.control`,
:mod:`.pictures`, :mod:`.outbox`) write SQL that SQLite and PostgreSQL both
accept, with ``?`` placeholders, and reach the engine only through
:meth:`Database.write` (one transaction, yielding a :class:`Transaction`),
:meth:`Database.one` and :meth:`Database.rows`. What differs between engines
is behind :class:`~.engine.Engine` (:mod:`.engine_sqlite`, the default, and
:mod:`.engine_postgres`); the schema and its versions are :mod:`.migrations`.
Every engine error becomes a :class:`LedgerError`, and one that says the
server is away a :class:`StoreUnavailable`.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from contextlib import contextmanager, suppress

from calwarden.daemon.stores.engine import (
    LEDGER_NAME,
    Engine,
    LedgerError,
    Row,
    ServerTarget,
    StoreUnavailable,
    Target,
    connect,
)
from calwarden.daemon.stores.migrations import SCHEMA_VERSION, migrate

__all__ = [
    "LEDGER_NAME",
    "SCHEMA_VERSION",
    "Database",
    "LedgerError",
    "Row",
    "ServerTarget",
    "StoreUnavailable",
    "Target",
    "Transaction",
]


class Transaction:
    """The statements of one write transaction; see :meth:`Database.write`."""

    __slots__ = ("_engine",)

    def __init__(self, engine: Engine) -> None:
        self._engine = engine

    def execute(self, sql: str, parameters: tuple[object, ...] = ()) -> int:
        """Run one statement; returns how many rows it changed."""
        return self._engine.execute(sql, parameters)

    def execute_many(self, sql: str, rows: Iterable[tuple[object, ...]]) -> None:
        self._engine.execute_many(sql, rows)

    def insert(self, sql: str, parameters: tuple[object, ...]) -> int:
        """Run one INSERT of one row; returns the new row's id."""
        return self._engine.insert(sql, parameters)

    def one(self, sql: str, parameters: tuple[object, ...] = ()) -> Row | None:
        return self._engine.one(sql, parameters)

    def rows(self, sql: str, parameters: tuple[object, ...] = ()) -> list[Row]:
        return self._engine.rows(sql, parameters)

    def serialise(self, key: str) -> None:
        """Wait until no other daemon's transaction on the same ledger holds ``key``."""
        self._engine.serialise(key)

    @property
    def lock_for_update(self) -> str:
        """`` FOR UPDATE SKIP LOCKED`` where rows can be claimed one by one, else nothing."""
        return self._engine.lock_for_update()


class Database:
    """One connection to the ledger; the stores on it share it and its transactions.

    A writing connection is opened by the thread that starts the daemon and then used
    by one thread only (the worker, or the alert sender on a connection of its own).
    ``target`` is a SQLite file (a :class:`~pathlib.Path`) or a
    :class:`~.engine.ServerTarget`. Opening for writing brings the schema up to date
    (:mod:`.migrations`) unless ``migrate`` is False.
    """

    def __init__(self, target: Target, *, read_only: bool = False, migrate: bool = True) -> None:
        self.path = target  # named in every message (a server's URL never holds its password)
        self.read_only = read_only
        self._migrate = migrate
        self._engine = self._open()

    @property
    def dialect(self) -> str:
        return self._engine.dialect

    @property
    def shared(self) -> bool:
        """Whether other daemons may use this ledger too (a server, not a PC's file)."""
        return isinstance(self.path, ServerTarget)

    @property
    def engine(self) -> Engine:
        return self._engine

    def _error(self, doing: str, error: Exception) -> LedgerError:
        kind = StoreUnavailable if self._engine_unavailable(error) else LedgerError
        return kind(f"{self.path}: cannot {doing} the ledger: {_first_line(error)}")

    def _engine_unavailable(self, error: Exception) -> bool:
        engine = getattr(self, "_engine", None)
        if engine is not None:
            return bool(engine.unavailable(error))
        return isinstance(self.path, ServerTarget) and _looks_unreachable(error)

    def _open(self) -> Engine:
        try:
            engine = connect(self.path, read_only=self.read_only)
        except LedgerError:
            raise
        except Exception as error:  # the driver's own errors: said in plain words
            kind = StoreUnavailable if isinstance(self.path, ServerTarget) else LedgerError
            if not _is_driver_error(error):
                raise
            raise kind(f"{self.path}: cannot open the ledger: {_first_line(error)}") from None
        if self.read_only:
            return engine
        self._engine = engine
        try:
            if self._migrate:
                try:
                    with self.write() as transaction:
                        migrate(transaction, engine)
                except StoreUnavailable:
                    raise
                except LedgerError as error:
                    if not self.shared:
                        raise
                    # Most likely a daemon's role without DDL rights meeting an older schema.
                    raise LedgerError(
                        f"{error} (bring the schema up to date with `calwarden store migrate` "
                        "as the tables' owner)"
                    ) from None
            found = self.meta("schema_version")
        except LedgerError:
            engine.close()
            raise
        if found != str(SCHEMA_VERSION):
            engine.close()
            hint = " (run `calwarden store migrate`)" if found is None or found.isdigit() else ""
            raise LedgerError(
                f"{self.path}: ledger schema {found}, this calwarden knows {SCHEMA_VERSION}{hint}"
            )
        return engine

    def reconnect(self) -> None:
        """Drop the connection and open a new one (after the server was away)."""
        try:
            self._engine.close()
        except Exception as error:
            if not _is_driver_error(error):
                raise
        self._engine = self._open()

    def close(self) -> None:
        try:
            self._engine.close()
        except Exception as error:  # closing a connection the server already dropped
            if not _is_driver_error(error):
                raise

    @contextmanager
    def write(self, *, durable: bool = False) -> Iterator[Transaction]:
        """One write transaction: committed when the block ends, rolled back if it raises.

        ``durable`` commits so that once the block has ended, the change survives a
        power cut. Any engine error becomes a :class:`LedgerError`.
        """
        engine = self._engine
        try:
            engine.begin(durable=durable)
            try:
                yield Transaction(engine)
            except BaseException:
                engine.rollback()
                raise
            engine.commit()
        except engine.errors as error:
            raise self._error("write", error) from None
        finally:
            with suppress(*engine.errors):  # the transaction's outcome is what counts
                engine.finish(durable=durable)

    def one(self, sql: str, parameters: tuple[object, ...] = ()) -> Row | None:
        """The first row a query gives, or None."""
        try:
            return self._engine.one(sql, parameters)
        except self._engine.errors as error:
            raise self._error("read", error) from None

    def rows(self, sql: str, parameters: tuple[object, ...] = ()) -> list[Row]:
        """Every row a query gives."""
        try:
            return self._engine.rows(sql, parameters)
        except self._engine.errors as error:
            raise self._error("read", error) from None

    def meta(self, key: str) -> str | None:
        row = self.one("SELECT value FROM meta WHERE key = ?", (key,))
        return None if row is None else str(row[0])

    def integrity(self) -> str:
        """``ok``, or what the engine's own check of the ledger found wrong."""
        try:
            return self._engine.integrity()
        except self._engine.errors as error:
            raise self._error("check", error) from None

    def claim(self, name: str) -> bool:
        """Hold ``name`` (an inbox) while this connection lives; False if another daemon does."""
        try:
            return self._engine.claim(name)
        except self._engine.errors as error:
            raise self._error("claim in", error) from None

    def holders(self, names: list[str]) -> set[str]:
        """Which of ``names`` a daemon holds now (empty where the engine cannot tell)."""
        try:
            return self._engine.holders(names)
        except self._engine.errors as error:
            raise self._error("read", error) from None


def _first_line(error: Exception) -> str:
    text = str(error).strip()
    return text.splitlines()[0] if text else type(error).__name__


def _is_driver_error(error: Exception) -> bool:
    module = type(error).__module__
    return module.startswith(("sqlite3", "psycopg"))


def _looks_unreachable(error: Exception) -> bool:
    return type(error).__name__ in ("OperationalError", "ConnectionTimeout")
