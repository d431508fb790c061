"""Versioned schema migrations, the same steps for both engines.

The ledger's ``meta`` table holds ``schema_version``; opening a ledger for
writing (the daemon, or ``calwarden store migrate``) applies every step above
it, in one transaction, so an interrupted upgrade leaves the ledger as it was.
Each step's DDL is written once, in SQLite's words; :func:`ddl` turns it into
PostgreSQL's (identity columns, ``BIGINT``, ``DOUBLE PRECISION``, ``BYTEA``).
A ledger already current runs no DDL at all, so a daemon's role on a server
needs only the rights to read and write rows (README, "Roles and rights").

Adding a step: append a :class:`Migration` with the next version, written so
that running it over a ledger that has part of it already does no harm
(``IF NOT EXISTS``; columns looked up first).
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

from calwarden.daemon.stores.engine import Dialect, Engine

if TYPE_CHECKING:
    from calwarden.daemon.stores.database import Transaction


_VERSION_1 = """
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
CREATE INDEX IF NOT EXISTS evaluations_by_path ON evaluations (inbox, path, version);
CREATE INDEX IF NOT EXISTS evaluations_by_stem ON evaluations (inbox, output_stem);
"""

_VERSION_2 = """
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
"""

_VERSION_4 = """
-- Which daemon last took each inbox (a lab-wide ledger: one owner at a time, held by a
-- lock on the server for as long as the daemon's connection lives).
CREATE TABLE IF NOT EXISTS inbox_owners (
    inbox TEXT PRIMARY KEY,
    host TEXT NOT NULL,
    pid INTEGER NOT NULL,
    claimed_at TEXT NOT NULL
);
-- Rows brought in by `calwarden store copy`, by the ledger they came from and their id
-- there, so that a copy interrupted and run again adds each row exactly once.
CREATE TABLE IF NOT EXISTS copied (
    source TEXT NOT NULL,
    source_table TEXT NOT NULL,
    source_id INTEGER NOT NULL,
    new_id INTEGER NOT NULL,
    PRIMARY KEY (source, source_table, source_id)
);
"""

#: Columns version 3 adds to control_limits: the SD split within and between runs
#: and the number of baseline runs (rules/control.py, run_baseline). Limits stored
#: before have NULL (split unknown) and runs 0 (not widened), and are judged as before.
_LIMITS_SPLIT_COLUMNS = (
    ("sd_within", "REAL"),
    ("sd_between", "REAL"),
    ("runs", "INTEGER NOT NULL DEFAULT 0"),
)

_PG_WORDS = (
    (r"\bINTEGER PRIMARY KEY\b", "BIGINT GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY"),
    (r"\bINTEGER\b", "BIGINT"),
    (r"\bREAL\b", "DOUBLE PRECISION"),
    (r"\bBLOB\b", "BYTEA"),
)


def ddl(sql: str, dialect: Dialect) -> str:
    """DDL written in SQLite's words, in the words of ``dialect``."""
    if dialect == "sqlite":
        return sql
    for pattern, replacement in _PG_WORDS:
        sql = re.sub(pattern, replacement, sql)
    return sql


def _run_script(transaction: Transaction, engine: Engine, script: str) -> None:
    for statement in ddl(script, engine.dialect).split(";"):
        if statement.strip():
            transaction.execute(statement)


def _limits_split(transaction: Transaction, engine: Engine) -> None:
    present = engine.columns("control_limits")
    for name, declaration in _LIMITS_SPLIT_COLUMNS:
        if name not in present:
            transaction.execute(
                f"ALTER TABLE control_limits ADD COLUMN {name} {ddl(declaration, engine.dialect)}"
            )


@dataclass(frozen=True, slots=True)
class Migration:
    version: int
    summary: str
    apply: Callable[[Transaction, Engine], None]


MIGRATIONS: tuple[Migration, ...] = (
    Migration(
        1,
        "files seen, evaluations, the control-chart log",
        lambda t, e: _run_script(t, e, _VERSION_1),
    ),
    Migration(2, "the alert outbox", lambda t, e: _run_script(t, e, _VERSION_2)),
    Migration(3, "control limits split between and within runs", _limits_split),
    Migration(
        4,
        "inbox owners, rows copied from other ledgers",
        lambda t, e: _run_script(t, e, _VERSION_4),
    ),
)

SCHEMA_VERSION = MIGRATIONS[-1].version


def current_version(engine: Engine) -> int:
    """The ledger's schema version; 0 for an empty database."""
    if "key" not in engine.columns("meta"):
        return 0
    row = engine.one("SELECT value FROM meta WHERE key = 'schema_version'", ())
    return 0 if row is None else int(str(row[0]))


def migrate(transaction: Transaction, engine: Engine) -> list[Migration]:
    """Bring the ledger to :data:`SCHEMA_VERSION` inside ``transaction``; the steps applied.

    Every step runs when the ledger is behind (the DDL tolerates a step done
    already). Two daemons starting together on one server queue on a lock, so the
    second finds the work done.
    """
    transaction.serialise("calwarden:migrate")
    found = current_version(engine)
    if found >= SCHEMA_VERSION:
        return []
    for step in MIGRATIONS:  # each tolerates being done already (older ledgers made some early)
        step.apply(transaction, engine)
    applied = [step for step in MIGRATIONS if step.version > found]
    transaction.execute(
        "INSERT INTO meta (key, value) VALUES ('schema_version', ?) "
        "ON CONFLICT (key) DO UPDATE SET value = excluded.value",
        (str(SCHEMA_VERSION),),
    )
    return applied
