"""The ledger's database: one connection, the schema, its upgrades and the one write path.

This is the only module that knows the database is SQLite (tests/test_architecture.py
keeps ``sqlite3`` out of every other module). The stores built on a
:class:`Database` (:mod:`.files`, :mod:`.control`, :mod:`.pictures`,
:mod:`.outbox`) write SQL that SQLite and PostgreSQL both accept, with ``?``
placeholders, and reach the engine only through :meth:`Database.write` (one
transaction, yielding a :class:`Transaction`), :meth:`Database.one` and
:meth:`Database.rows`. What is SQLite's own is here:

* opening the file (WAL mode, so that ``calwarden status`` reads while the daemon
  writes; read-only through a ``mode=ro`` URI);
* the column types of the schema and its upgrade from earlier versions;
* ``BEGIN IMMEDIATE`` (the writer takes the write lock at the start, so two
  writers queue on the busy timeout instead of failing half-way);
* durability: a durable transaction commits with ``synchronous=FULL``, the
  others with ``NORMAL`` (in WAL mode: safe against a crash of the process, not
  of the machine);
* the id of an inserted row (``lastrowid``), the integrity check, and the
  translation of every engine error into :class:`LedgerError`.

A second engine is a second class with the same methods (see DEVELOPERS.md).
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterable, Iterator
from contextlib import contextmanager, suppress
from pathlib import Path
from typing import Any

SCHEMA_VERSION = 3  # 2: the alert outbox; 3: limits split between and within runs
LEDGER_NAME = "ledger.sqlite3"

#: One result row, its values as the engine returns them (int, float, str, bytes, None).
Row = tuple[Any, ...]

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (
    key TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
-- The last state of every file seen, so that a rescan skips what has not changed
-- without reading it again.
CREATE TABLE IF NOT EXISTS seen (
    inbox TEXT NOT NULL,
    path TEXT NOT NULL,
    size INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    sha256 TEXT NOT NULL,
    PRIMARY KEY (inbox, path)
);
-- One row per judgement (or per duplicate found): the audit trail.
CREATE TABLE IF NOT EXISTS evaluations (
    id INTEGER PRIMARY KEY,
    inbox TEXT NOT NULL,
    path TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    size INTEGER NOT NULL,
    outcome TEXT NOT NULL CHECK (outcome IN ('pass', 'fail', 'error', 'duplicate')),
    duplicate_of INTEGER REFERENCES evaluations (id),
    version INTEGER NOT NULL,
    output_stem TEXT,
    run TEXT,
    instrument TEXT,
    failures INTEGER NOT NULL DEFAULT 0,
    warnings INTEGER NOT NULL DEFAULT 0,
    message TEXT,
    criteria_sha256 TEXT,
    config_sha256 TEXT,
    calwarden_version TEXT NOT NULL,
    evaluated_at TEXT NOT NULL,
    document BLOB,
    flagged BLOB,
    pictures_drawn INTEGER NOT NULL DEFAULT 0
);
CREATE INDEX IF NOT EXISTS evaluations_by_content ON evaluations (inbox, sha256);
-- The control-chart log: every control observation of every judged run, one series
-- per instrument, analyte, kind and level. A file judged again adds nothing (the
-- UNIQUE key), and the points of a file's earlier versions are marked superseded.
CREATE TABLE IF NOT EXISTS control_points (
    id INTEGER PRIMARY KEY,
    evaluation_id INTEGER NOT NULL REFERENCES evaluations (id),
    instrument TEXT NOT NULL,
    analyte TEXT NOT NULL,
    kind TEXT NOT NULL,
    level TEXT NOT NULL,
    run TEXT NOT NULL,
    seq INTEGER,
    sample_id TEXT,
    acquired TEXT,
    value REAL NOT NULL,
    unit TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    accepted INTEGER NOT NULL DEFAULT 1,
    superseded INTEGER NOT NULL DEFAULT 0
);
-- Unique among current points only: a file reverted to an earlier version's content
-- logs its points again once the earlier ones are superseded.
CREATE UNIQUE INDEX IF NOT EXISTS one_current_point
    ON control_points (sha256, instrument, analyte, kind, level, seq) WHERE superseded = 0;
CREATE INDEX IF NOT EXISTS control_by_series
    ON control_points (instrument, analyte, kind, level, superseded, id);
CREATE INDEX IF NOT EXISTS control_by_evaluation ON control_points (evaluation_id);
-- Each series' size, kept with every change so that no run has to count the log.
CREATE TABLE IF NOT EXISTS control_series (
    instrument TEXT NOT NULL,
    analyte TEXT NOT NULL,
    kind TEXT NOT NULL,
    level TEXT NOT NULL,
    points INTEGER NOT NULL,
    in_control INTEGER NOT NULL,
    PRIMARY KEY (instrument, analyte, kind, level)
);
-- Each set of limits a series has had, with when it was set, one active per series.
CREATE TABLE IF NOT EXISTS control_limits (
    id INTEGER PRIMARY KEY,
    instrument TEXT NOT NULL,
    analyte TEXT NOT NULL,
    kind TEXT NOT NULL,
    level TEXT NOT NULL,
    centre REAL NOT NULL,
    sd REAL NOT NULL,
    n INTEGER NOT NULL,
    source TEXT NOT NULL,
    first_point INTEGER,
    last_point INTEGER,
    set_at TEXT NOT NULL,
    active INTEGER NOT NULL DEFAULT 1
);
CREATE INDEX IF NOT EXISTS limits_by_series
    ON control_limits (instrument, analyte, kind, level, active);
-- The alert outbox: every alert, recorded with what raised it (in the evaluation's own
-- transaction), then released (or gathered into a digest by the throttle) and delivered.
-- The dedupe key makes a file judged again after a crash raise no second alert.
CREATE TABLE IF NOT EXISTS alerts (
    id INTEGER PRIMARY KEY,
    dedupe_key TEXT NOT NULL UNIQUE,
    kind TEXT NOT NULL,
    evaluation_id INTEGER REFERENCES evaluations (id),
    inbox TEXT,
    instrument TEXT,
    created_at TEXT NOT NULL,
    summary TEXT NOT NULL,
    state TEXT NOT NULL DEFAULT 'new' CHECK (state IN ('new', 'gathered', 'released')),
    released_at REAL,
    digest_id INTEGER REFERENCES alerts (id),
    message_file TEXT
);
CREATE INDEX IF NOT EXISTS alerts_by_state ON alerts (state, id);
-- One row per alert and way of delivering it (e-mail, webhook), with its retries.
CREATE TABLE IF NOT EXISTS deliveries (
    alert_id INTEGER NOT NULL REFERENCES alerts (id),
    channel TEXT NOT NULL CHECK (channel IN ('email', 'webhook')),
    state TEXT NOT NULL DEFAULT 'waiting' CHECK (state IN ('waiting', 'sent', 'dead')),
    attempts INTEGER NOT NULL DEFAULT 0,
    next_attempt REAL NOT NULL DEFAULT 0,
    first_attempt REAL,
    last_error TEXT,
    finished_at TEXT,
    PRIMARY KEY (alert_id, channel)
);
CREATE INDEX IF NOT EXISTS deliveries_due ON deliveries (state, next_attempt);
CREATE INDEX IF NOT EXISTS evaluations_by_path ON evaluations (inbox, path, version);
CREATE INDEX IF NOT EXISTS evaluations_by_stem ON evaluations (inbox, output_stem);
"""


class LedgerError(Exception):
    """The ledger cannot be opened or written: the daemon cannot go on safely."""


class Transaction:
    """The statements of one write transaction; see :meth:`Database.write`."""

    __slots__ = ("_connection",)

    def __init__(self, connection: sqlite3.Connection) -> None:
        self._connection = connection

    def execute(self, sql: str, parameters: tuple[object, ...] = ()) -> int:
        """Run one statement; returns how many rows it changed."""
        return int(self._connection.execute(sql, parameters).rowcount)

    def execute_many(self, sql: str, rows: Iterable[tuple[object, ...]]) -> None:
        self._connection.executemany(sql, rows)

    def insert(self, sql: str, parameters: tuple[object, ...]) -> int:
        """Run one INSERT of one row; returns the new row's id."""
        return int(self._connection.execute(sql, parameters).lastrowid or 0)

    def one(self, sql: str, parameters: tuple[object, ...] = ()) -> Row | None:
        row: Row | None = self._connection.execute(sql, parameters).fetchone()
        return row

    def rows(self, sql: str, parameters: tuple[object, ...] = ()) -> list[Row]:
        return list(self._connection.execute(sql, parameters).fetchall())


class Database:
    """One connection to the ledger file; the stores on it share it and its transactions.

    A writing connection is opened by the thread that starts the daemon and then used
    by one thread only (the worker, or the alert sender on a connection of its own).
    """

    def __init__(self, path: Path, *, read_only: bool = False) -> None:
        self.path = path
        try:
            if read_only:
                self._connection = sqlite3.connect(
                    f"{path.as_uri()}?mode=ro", uri=True, isolation_level=None, timeout=5
                )
                return
            path.parent.mkdir(parents=True, exist_ok=True)
            # Autocommit mode: every transaction is opened explicitly, in write().
            self._connection = sqlite3.connect(
                path, isolation_level=None, timeout=30, check_same_thread=False
            )
            self._connection.execute("PRAGMA journal_mode=WAL")
            self._connection.execute("PRAGMA foreign_keys=ON")
            self._connection.execute("PRAGMA synchronous=NORMAL")
            with self.write() as transaction:
                _create_or_upgrade(transaction)
        except sqlite3.Error as error:
            raise LedgerError(f"{path}: cannot open the ledger: {error}") from None
        found = self.meta("schema_version")
        if found != str(SCHEMA_VERSION):
            self.close()
            raise LedgerError(
                f"{path}: ledger schema {found}, this calwarden knows {SCHEMA_VERSION}"
            )

    def close(self) -> None:
        self._connection.close()

    @contextmanager
    def write(self, *, durable: bool = False) -> Iterator[Transaction]:
        """One write transaction: committed when the block ends, rolled back if it raises.

        ``durable`` commits with ``synchronous=FULL``: once the block has ended, the
        change survives a power cut. Any engine error becomes a :class:`LedgerError`.
        """
        try:
            if durable:
                self._connection.execute("PRAGMA synchronous=FULL")
            self._connection.execute("BEGIN IMMEDIATE")
            try:
                yield Transaction(self._connection)
            except BaseException:
                self._connection.execute("ROLLBACK")
                raise
            self._connection.execute("COMMIT")
        except sqlite3.Error as error:
            raise LedgerError(f"{self.path}: cannot write the ledger: {error}") from None
        finally:
            if durable:
                with suppress(sqlite3.Error):
                    self._connection.execute("PRAGMA synchronous=NORMAL")

    def one(self, sql: str, parameters: tuple[object, ...] = ()) -> Row | None:
        """The first row a query gives, or None."""
        try:
            return Transaction(self._connection).one(sql, parameters)
        except sqlite3.Error as error:
            raise LedgerError(f"{self.path}: cannot read the ledger: {error}") from None

    def rows(self, sql: str, parameters: tuple[object, ...] = ()) -> list[Row]:
        """Every row a query gives."""
        try:
            return Transaction(self._connection).rows(sql, parameters)
        except sqlite3.Error as error:
            raise LedgerError(f"{self.path}: cannot read the ledger: {error}") from None

    def meta(self, key: str) -> str | None:
        row = self.one("SELECT value FROM meta WHERE key = ?", (key,))
        return None if row is None else str(row[0])

    def integrity(self) -> str:
        """``ok``, or what the engine's own check of the file found wrong."""
        row = self.one("PRAGMA integrity_check")
        return "" if row is None else str(row[0])


def _create_or_upgrade(transaction: Transaction) -> None:
    """Make the tables a new ledger lacks, and bring an older one to this version."""
    for statement in _SCHEMA.split(";"):
        if statement.strip():
            transaction.execute(statement)
    transaction.execute(
        "INSERT OR IGNORE INTO meta (key, value) VALUES ('schema_version', ?)",
        (str(SCHEMA_VERSION),),
    )
    # Version 1 lacked only the outbox tables, just created above.
    transaction.execute("UPDATE meta SET value = '2' WHERE key = 'schema_version' AND value = '1'")
    _migrate_limits_split(transaction)


#: Columns version 3 adds to control_limits: the SD split within and between runs
#: and the number of baseline runs (rules/control.py, run_baseline). Limits stored
#: before have NULL (split unknown) and runs 0 (not widened), and are judged as before.
_LIMITS_SPLIT_COLUMNS = (
    ("sd_within", "REAL"),
    ("sd_between", "REAL"),
    ("runs", "INTEGER NOT NULL DEFAULT 0"),
)


def _migrate_limits_split(transaction: Transaction) -> None:
    """Version 2 → 3, in the opening transaction: add the limits' split columns."""
    present = {str(row[1]) for row in transaction.rows("PRAGMA table_info(control_limits)")}
    for name, declaration in _LIMITS_SPLIT_COLUMNS:
        if name not in present:
            transaction.execute(f"ALTER TABLE control_limits ADD COLUMN {name} {declaration}")
    transaction.execute("UPDATE meta SET value = '3' WHERE key = 'schema_version' AND value = '2'")
