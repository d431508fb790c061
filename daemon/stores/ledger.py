"""The ledger: a SQLite file recording every file the daemon has judged.

It is what makes "each file judged exactly once" true across restarts and
crashes. A file is keyed on its inbox, its path in the inbox and the SHA-256 of
its bytes:

* the same content at the same path (a file touched, or seen again by a
  rescan) is nothing new;
* the same content under another name is recorded as a *duplicate* of the
  first, and not judged again;
* new content at a known path is a new *version*: judged again, the earlier
  verdict kept under a suffixed name.

Each evaluation's verdict JSON and flagged copy are kept in the ledger too
(compressed), so an earlier version's outputs can always be written again
from the ledger, whatever state a crash left the output folder in.

One connection writes (the daemon's worker thread); WAL mode lets
``calwarden status`` read at the same time. Writes use ``BEGIN IMMEDIATE`` and
the commit that records an evaluation is made with ``synchronous=FULL``.
"""

from __future__ import annotations

import sqlite3
import zlib
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path


def timestamp(moment: datetime | None = None) -> str:
    """A time as the ledger stores it, e.g. ``2026-12-01T22:40:12.123+00:00``.

    Every stored time has this one form (UTC, ISO 8601, milliseconds), so that
    string order is time order: the daily summary selects evaluations by
    comparing these strings.
    """
    return (moment or datetime.now(UTC)).astimezone(UTC).isoformat(timespec="milliseconds")


SCHEMA_VERSION = 3  # 2: the alert outbox; 3: limits split between and within runs
LEDGER_NAME = "ledger.sqlite3"

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


@dataclass(frozen=True, slots=True)
class Seen:
    size: int
    mtime_ns: int
    sha256: str


@dataclass(frozen=True, slots=True)
class Evaluation:
    """One row of the ledger's audit trail."""

    id: int
    inbox: str
    path: str
    sha256: str
    outcome: str
    version: int
    output_stem: str | None
    run: str | None
    instrument: str | None
    failures: int
    warnings: int
    message: str | None
    evaluated_at: str
    duplicate_of: int | None


@dataclass(frozen=True, slots=True)
class NewEvaluation:
    """What the daemon records about one judged file."""

    inbox: str
    path: str
    sha256: str
    size: int
    mtime_ns: int
    outcome: str
    version: int
    output_stem: str
    run: str | None
    instrument: str | None
    failures: int
    warnings: int
    message: str | None
    criteria_sha256: str | None
    config_sha256: str | None
    calwarden_version: str
    evaluated_at: str
    document: bytes
    flagged: bytes | None
    control_points: tuple[NewPoint, ...] = ()
    control_limits: tuple[NewLimits, ...] = ()
    alert: NewAlert | None = None  # recorded in the same transaction as the evaluation


@dataclass(frozen=True, slots=True)
class NewAlert:
    """An alert for the outbox: what it is about, and its stored summary (JSON)."""

    dedupe_key: str
    kind: str
    inbox: str | None
    instrument: str | None
    created_at: str
    summary: str


@dataclass(frozen=True, slots=True)
class SeriesKey:
    """What names one control chart."""

    instrument: str
    analyte: str
    kind: str
    level: str


@dataclass(frozen=True, slots=True)
class StoredPoint:
    """One point of the control-chart log."""

    id: int
    run: str
    seq: int | None
    sample_id: str | None
    acquired: str | None
    value: float
    unit: str
    evaluated_at: str
    accepted: bool = True


@dataclass(frozen=True, slots=True)
class StoredLimits:
    """One set of limits of a series."""

    id: int
    centre: float
    sd: float
    n: int
    source: str
    first_point: int | None
    last_point: int | None
    set_at: str
    active: bool
    sd_within: float | None = None  # schema 3: the split of sd (None: not known)
    sd_between: float | None = None
    runs: int = 0  # baseline runs behind the limits (0: not known)


@dataclass(frozen=True, slots=True)
class NewPoint:
    """A control observation to log with its evaluation."""

    key: SeriesKey
    run: str
    seq: int | None
    sample_id: str | None
    acquired: str | None
    value: float
    unit: str
    accepted: bool = True


@dataclass(frozen=True, slots=True)
class NewLimits:
    """Limits to store (and make active) with an evaluation, or on request."""

    key: SeriesKey
    centre: float
    sd: float
    n: int
    source: str
    first_point: int | None
    last_point: int | None
    set_at: str
    sd_within: float | None = None  # schema 3: the split of sd (None: not known)
    sd_between: float | None = None
    runs: int = 0


_COLUMNS = (
    "id, inbox, path, sha256, outcome, version, output_stem, run, instrument, "
    "failures, warnings, message, evaluated_at, duplicate_of"
)


def _evaluation(row: tuple[object, ...] | None) -> Evaluation | None:
    return None if row is None else Evaluation(*row)  # type: ignore[arg-type]


def compress(data: bytes) -> bytes:
    # Level 1: half the time of the default for a sixth more bytes (a verdict: 8 kB).
    return zlib.compress(data, 1)


def decompress(data: bytes) -> bytes:
    return zlib.decompress(data)


class Ledger:
    """The daemon's single writing connection to the ledger."""

    def __init__(self, path: Path, *, read_only: bool = False) -> None:
        self.path = path
        try:
            if read_only:
                self._db = sqlite3.connect(
                    f"{path.as_uri()}?mode=ro",
                    uri=True,
                    isolation_level=None,
                    timeout=5,
                )
            else:
                path.parent.mkdir(parents=True, exist_ok=True)
                # Autocommit mode: every transaction is opened explicitly below.
                # Opened by the starting thread, then used by the worker thread only.
                self._db = sqlite3.connect(
                    path, isolation_level=None, timeout=30, check_same_thread=False
                )
                self._db.execute("PRAGMA journal_mode=WAL")
                self._db.execute("PRAGMA foreign_keys=ON")
                self._db.execute("PRAGMA synchronous=NORMAL")
                with self._write():
                    for statement in _SCHEMA.split(";"):
                        if statement.strip():
                            self._db.execute(statement)
                    self._db.execute(
                        "INSERT OR IGNORE INTO meta (key, value) VALUES ('schema_version', ?)",
                        (str(SCHEMA_VERSION),),
                    )
                    # Version 1 lacked only the outbox tables, just created above.
                    self._db.execute(
                        "UPDATE meta SET value = '2' WHERE key = 'schema_version' AND value = '1'"
                    )
                    _migrate_limits_split(self._db)
                found = self.meta("schema_version")
                if found != str(SCHEMA_VERSION):
                    raise LedgerError(
                        f"{path}: ledger schema {found}, this calwarden knows {SCHEMA_VERSION}"
                    )
        except sqlite3.Error as error:
            raise LedgerError(f"{path}: cannot open the ledger: {error}") from None

    def close(self) -> None:
        self._db.close()

    @contextmanager
    def _write(self, *, durable: bool = False) -> Iterator[None]:
        """One write transaction; ``durable`` commits with ``synchronous=FULL``."""
        try:
            if durable:
                self._db.execute("PRAGMA synchronous=FULL")
            self._db.execute("BEGIN IMMEDIATE")
            try:
                yield
            except BaseException:
                self._db.execute("ROLLBACK")
                raise
            self._db.execute("COMMIT")
        except sqlite3.Error as error:
            raise LedgerError(f"{self.path}: cannot write the ledger: {error}") from None
        finally:
            if durable:
                with suppress(sqlite3.Error):
                    self._db.execute("PRAGMA synchronous=NORMAL")

    def _one(self, sql: str, parameters: tuple[object, ...]) -> tuple[object, ...] | None:
        try:
            row: tuple[object, ...] | None = self._db.execute(sql, parameters).fetchone()
        except sqlite3.Error as error:
            raise LedgerError(f"{self.path}: cannot read the ledger: {error}") from None
        return row

    def meta(self, key: str) -> str | None:
        row = self._one("SELECT value FROM meta WHERE key = ?", (key,))
        return None if row is None else str(row[0])

    # ------------------------------------------------------------------ queries

    def unchanged(self, inbox: str, path: str, size: int, mtime_ns: int) -> bool:
        """Whether the file was recorded with exactly this size and modification time."""
        seen = self.seen(inbox, path)
        return seen is not None and (seen.size, seen.mtime_ns) == (size, mtime_ns)

    def seen_in(self, inbox: str) -> dict[str, tuple[int, int]]:
        """Size and mtime of every file recorded in an inbox (one query for a whole rescan)."""
        rows = self._rows("SELECT path, size, mtime_ns FROM seen WHERE inbox = ?", (inbox,))
        return {str(path): (int(size), int(mtime)) for path, size, mtime in rows}  # type: ignore[call-overload]

    def seen(self, inbox: str, path: str) -> Seen | None:
        """The last recorded size, mtime and hash of a file, or None if never judged."""
        row = self._one(
            "SELECT size, mtime_ns, sha256 FROM seen WHERE inbox = ? AND path = ?", (inbox, path)
        )
        return None if row is None else Seen(*row)  # type: ignore[arg-type]

    def judged_content(self, inbox: str, sha256: str, *, elsewhere_than: str) -> Evaluation | None:
        """The first judgement of this content in this inbox under another name, if any.

        A file whose content returns to an earlier version's is not a duplicate of
        itself: it is judged again, as its newest version.
        """
        return _evaluation(
            self._one(
                f"SELECT {_COLUMNS} FROM evaluations WHERE inbox = ? AND sha256 = ? "
                "AND outcome != 'duplicate' AND path != ? ORDER BY id LIMIT 1",
                (inbox, sha256, elsewhere_than),
            )
        )

    def current(self, inbox: str, path: str) -> Evaluation | None:
        """The latest judgement of the file at this path (duplicates are not judgements)."""
        return _evaluation(
            self._one(
                f"SELECT {_COLUMNS} FROM evaluations WHERE inbox = ? AND path = ? "
                "AND outcome != 'duplicate' ORDER BY version DESC LIMIT 1",
                (inbox, path),
            )
        )

    def stem_owner(self, inbox: str, output_stem: str) -> str | None:
        """The path whose outputs are written under this stem, if any."""
        row = self._one(
            "SELECT path FROM evaluations WHERE inbox = ? AND output_stem = ? LIMIT 1",
            (inbox, output_stem),
        )
        return None if row is None else str(row[0])

    def outputs_of(self, evaluation_id: int) -> tuple[bytes, bytes | None]:
        """The verdict JSON and flagged copy an evaluation wrote, as bytes."""
        row = self._one("SELECT document, flagged FROM evaluations WHERE id = ?", (evaluation_id,))
        if row is None or row[0] is None:
            raise LedgerError(f"{self.path}: evaluation {evaluation_id} has no stored verdict")
        document, flagged = row
        assert isinstance(document, bytes)
        return decompress(document), (decompress(flagged) if isinstance(flagged, bytes) else None)

    def counts(self) -> dict[str, int]:
        """How many judgements of each outcome, and how many duplicates."""
        rows = self._rows("SELECT outcome, COUNT(*) FROM evaluations GROUP BY outcome", ())
        counts = {"pass": 0, "fail": 0, "error": 0, "duplicate": 0}
        counts.update({str(outcome): int(number) for outcome, number in rows})  # type: ignore[call-overload]
        return counts

    def latest(self, *, outcome: str | None = None, limit: int = 1) -> list[Evaluation]:
        """The most recent evaluations, newest first; ``outcome`` filters them."""
        where, parameters = ("WHERE outcome = ?", (outcome,)) if outcome else ("", ())
        rows = self._rows(
            f"SELECT {_COLUMNS} FROM evaluations {where} ORDER BY id DESC LIMIT ?",
            (*parameters, limit),
        )
        return [Evaluation(*row) for row in rows]  # type: ignore[arg-type]

    def integrity(self) -> str:
        row = self._one("PRAGMA integrity_check", ())
        return "" if row is None else str(row[0])

    # ------------------------------------------------------------------ writes

    def touch(self, inbox: str, path: str, seen: Seen) -> None:
        """Record a file's new size and mtime when its content has not changed."""
        with self._write():
            self._upsert_seen(inbox, path, seen)

    def _upsert_seen(self, inbox: str, path: str, seen: Seen) -> None:
        self._db.execute(
            "INSERT INTO seen (inbox, path, size, mtime_ns, sha256) VALUES (?, ?, ?, ?, ?) "
            "ON CONFLICT (inbox, path) DO UPDATE SET size = excluded.size, "
            "mtime_ns = excluded.mtime_ns, sha256 = excluded.sha256",
            (inbox, path, seen.size, seen.mtime_ns, seen.sha256),
        )

    def record_duplicate(
        self,
        inbox: str,
        path: str,
        seen: Seen,
        original: Evaluation,
        *,
        calwarden_version: str,
        evaluated_at: str,
    ) -> int:
        """Record a file whose content was already judged under another name."""
        with self._write(durable=True):
            cursor = self._db.execute(
                "INSERT INTO evaluations (inbox, path, sha256, size, outcome, duplicate_of, "
                "version, run, instrument, message, calwarden_version, evaluated_at) "
                "VALUES (?, ?, ?, ?, 'duplicate', ?, 0, ?, ?, ?, ?, ?)",
                (
                    inbox,
                    path,
                    seen.sha256,
                    seen.size,
                    original.id,
                    original.run,
                    original.instrument,
                    f"same content as {original.path}",
                    calwarden_version,
                    evaluated_at,
                ),
            )
            self._upsert_seen(inbox, path, seen)
        return int(cursor.lastrowid or 0)

    def record_evaluation(self, new: NewEvaluation) -> int:
        """Record a judgement, durably, with the state of the file it judged."""
        with self._write(durable=True):
            cursor = self._db.execute(
                "INSERT INTO evaluations (inbox, path, sha256, size, outcome, version, "
                "output_stem, run, instrument, failures, warnings, message, criteria_sha256, "
                "config_sha256, calwarden_version, evaluated_at, document, flagged) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    new.inbox,
                    new.path,
                    new.sha256,
                    new.size,
                    new.outcome,
                    new.version,
                    new.output_stem,
                    new.run,
                    new.instrument,
                    new.failures,
                    new.warnings,
                    new.message,
                    new.criteria_sha256,
                    new.config_sha256,
                    new.calwarden_version,
                    new.evaluated_at,
                    compress(new.document),
                    None if new.flagged is None else compress(new.flagged),
                ),
            )
            evaluation_id = int(cursor.lastrowid or 0)
            self._upsert_seen(new.inbox, new.path, Seen(new.size, new.mtime_ns, new.sha256))
            if new.version > 1:
                self._supersede(new.inbox, new.path, evaluation_id)
            added: dict[SeriesKey, list[int]] = {}
            for point in new.control_points:
                inserted = self._db.execute(
                    "INSERT OR IGNORE INTO control_points (evaluation_id, instrument, analyte, "
                    "kind, level, run, seq, sample_id, acquired, value, unit, sha256, accepted) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (
                        evaluation_id,
                        *_key_values(point.key),
                        point.run,
                        point.seq,
                        point.sample_id,
                        point.acquired,
                        point.value,
                        point.unit,
                        new.sha256,
                        int(point.accepted),
                    ),
                ).rowcount
                if inserted:
                    tally = added.setdefault(point.key, [0, 0])
                    tally[0] += 1
                    tally[1] += int(point.accepted)
            for key, (points, in_control) in added.items():
                self._count(key, points, in_control)
            for limits in new.control_limits:
                self._store_limits(limits)
            if new.alert is not None:
                self._insert_alert(new.alert, evaluation_id)
        return evaluation_id

    def _insert_alert(self, alert: NewAlert, evaluation_id: int | None) -> None:
        self._db.execute(
            "INSERT OR IGNORE INTO alerts (dedupe_key, kind, evaluation_id, inbox, instrument, "
            "created_at, summary) VALUES (?, ?, ?, ?, ?, ?, ?)",
            (
                alert.dedupe_key,
                alert.kind,
                evaluation_id,
                alert.inbox,
                alert.instrument,
                alert.created_at,
                alert.summary,
            ),
        )

    def record_alert(self, alert: NewAlert) -> None:
        """Put an alert that no evaluation raised (the daemon's own trouble) in the outbox."""
        with self._write(durable=True):
            self._insert_alert(alert, None)

    def pictures_pending(self, limit: int = 1) -> list[tuple[int, str, str]]:
        """Judged runs whose calibration pictures are not drawn yet, newest first."""
        rows = self._rows(
            "SELECT id, inbox, output_stem FROM evaluations WHERE pictures_drawn = 0 "
            "AND outcome IN ('pass', 'fail') ORDER BY id DESC LIMIT ?",
            (limit,),
        )
        return [(int(r[0]), str(r[1]), str(r[2])) for r in rows]  # type: ignore[call-overload]

    def skip_old_pictures(self, keep: int) -> int:
        """Mark all but the newest ``keep`` runs' pending pictures as not to be drawn."""
        with self._write():
            cursor = self._db.execute(
                "UPDATE evaluations SET pictures_drawn = 2 WHERE pictures_drawn = 0 "
                "AND outcome IN ('pass', 'fail') AND id NOT IN (SELECT id FROM evaluations "
                "WHERE pictures_drawn = 0 AND outcome IN ('pass', 'fail') "
                "ORDER BY id DESC LIMIT ?)",
                (keep,),
            )
        return int(cursor.rowcount)

    def mark_pictures_drawn(self, evaluation_id: int) -> None:
        with self._write():
            self._db.execute(
                "UPDATE evaluations SET pictures_drawn = 1 WHERE id = ?", (evaluation_id,)
            )

    # ------------------------------------------------------------------ the control log

    def _count(self, key: SeriesKey, points: int, in_control: int) -> None:
        self._db.execute(
            "INSERT INTO control_series (instrument, analyte, kind, level, points, in_control) "
            "VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (instrument, analyte, kind, level) DO UPDATE "
            "SET points = points + excluded.points, in_control = in_control + excluded.in_control",
            (*_key_values(key), points, in_control),
        )

    def _earlier_versions_points(
        self, inbox: str, path: str, keep: int | None = None
    ) -> list[tuple[SeriesKey, int, int]]:
        """Current points of a file's judgements other than ``keep``, counted per series."""
        rows = self._db.execute(
            "SELECT instrument, analyte, kind, level, COUNT(*), SUM(accepted) "
            "FROM control_points WHERE superseded = 0 AND evaluation_id IN "
            "(SELECT id FROM evaluations WHERE inbox = ? AND path = ? AND id != ?) "
            "GROUP BY instrument, analyte, kind, level",
            (inbox, path, -1 if keep is None else keep),
        ).fetchall()
        return [(SeriesKey(*row[:4]), int(row[4]), int(row[5])) for row in rows]

    def _supersede(self, inbox: str, path: str, evaluation_id: int) -> None:
        for key, points, in_control in self._earlier_versions_points(inbox, path, evaluation_id):
            self._count(key, -points, -in_control)
        self._db.execute(
            "UPDATE control_points SET superseded = 1 WHERE superseded = 0 AND evaluation_id IN "
            "(SELECT id FROM evaluations WHERE inbox = ? AND path = ? AND id != ?)",
            (inbox, path, evaluation_id),
        )

    def _store_limits(self, limits: NewLimits) -> None:
        self._db.execute(
            "UPDATE control_limits SET active = 0 WHERE instrument = ? AND analyte = ? "
            "AND kind = ? AND level = ?",
            _key_values(limits.key),
        )
        self._db.execute(
            "INSERT INTO control_limits (instrument, analyte, kind, level, centre, sd, n, "
            "source, first_point, last_point, set_at, sd_within, sd_between, runs) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (
                *_key_values(limits.key),
                limits.centre,
                limits.sd,
                limits.n,
                limits.source,
                limits.first_point,
                limits.last_point,
                limits.set_at,
                limits.sd_within,
                limits.sd_between,
                limits.runs,
            ),
        )

    def set_limits(self, limits: tuple[NewLimits, ...]) -> None:
        """Store new limits (``calwarden chart baseline``); earlier sets are kept, inactive."""
        with self._write(durable=True):
            for entry in limits:
                self._store_limits(entry)

    def _rows(self, sql: str, parameters: tuple[object, ...]) -> list[tuple[object, ...]]:
        try:
            return list(self._db.execute(sql, parameters).fetchall())
        except sqlite3.Error as error:
            raise LedgerError(f"{self.path}: cannot read the ledger: {error}") from None

    def series_keys(self) -> list[SeriesKey]:
        """Every series of the control log, sorted."""
        rows = self._rows(
            "SELECT DISTINCT instrument, analyte, kind, level FROM control_points "
            "WHERE superseded = 0 ORDER BY instrument, analyte, kind, level",
            (),
        )
        return [SeriesKey(*row) for row in rows]  # type: ignore[arg-type]

    def series_points(
        self,
        key: SeriesKey,
        *,
        first: int | None = None,
        last: int | None = None,
        excluding: tuple[str, str] = ("", ""),
        accepted_only: bool = False,
    ) -> list[StoredPoint]:
        """A series' current points in log order: all, the ``first`` N or the ``last`` N.

        ``excluding`` (inbox, path) leaves out the points of that file's earlier
        versions, which the version being judged will supersede. ``accepted_only``
        keeps the points that met their run's own criteria (for a baseline).
        """
        select = (
            "SELECT p.id, p.run, p.seq, p.sample_id, p.acquired, p.value, p.unit, "
            "e.evaluated_at, p.accepted FROM control_points p "
            "JOIN evaluations e ON e.id = p.evaluation_id "
            "WHERE p.instrument = ? AND p.analyte = ? AND p.kind = ? AND p.level = ? "
            "AND p.superseded = 0 AND NOT (e.inbox = ? AND e.path = ?)"
            + (" AND p.accepted = 1" if accepted_only else "")
        )
        where = (*_key_values(key), *excluding)
        if last is not None:
            rows = self._rows(f"{select} ORDER BY p.id DESC LIMIT ?", (*where, last))
            rows.reverse()
        elif first is not None:
            rows = self._rows(f"{select} ORDER BY p.id LIMIT ?", (*where, first))
        else:
            rows = self._rows(f"{select} ORDER BY p.id", where)
        return [
            StoredPoint(*row[:8], accepted=bool(row[8]))  # type: ignore[arg-type, misc]
            for row in rows
        ]

    def series_size(
        self, key: SeriesKey, *, excluding: tuple[str, str] = ("", "")
    ) -> tuple[int, int]:
        """How many current points the series has, and how many of them are in control.

        Read from the kept counts, less the points of ``excluding``'s earlier versions.
        """
        row = self._one(
            "SELECT points, in_control FROM control_series WHERE instrument = ? AND analyte = ? "
            "AND kind = ? AND level = ?",
            _key_values(key),
        )
        points, in_control = (0, 0) if row is None else (int(row[0]), int(row[1]))  # type: ignore[call-overload]
        if excluding != ("", ""):
            try:
                earlier = self._earlier_versions_points(*excluding)
            except sqlite3.Error as error:
                raise LedgerError(f"{self.path}: cannot read the ledger: {error}") from None
            for other, count, accepted in earlier:
                if other == key:
                    points, in_control = points - count, in_control - accepted
        return points, in_control

    def control_summary(self) -> tuple[int, int, int]:
        """How many series, current points, and series with active limits the log holds."""
        row = self._one(
            "SELECT (SELECT COUNT(*) FROM control_series WHERE points > 0), "
            "(SELECT COALESCE(SUM(points), 0) FROM control_series), "
            "(SELECT COUNT(*) FROM control_limits WHERE active = 1)",
            (),
        )
        if row is None:
            return (0, 0, 0)
        series, points, limited = row
        return (int(series), int(points), int(limited))  # type: ignore[call-overload]

    def next_point_id(self) -> int:
        """The id the next logged point will get (points are ordered by it)."""
        row = self._one("SELECT COALESCE(MAX(id), 0) + 1 FROM control_points", ())
        return 1 if row is None else int(row[0])  # type: ignore[call-overload]

    def limits_history(self, key: SeriesKey) -> list[StoredLimits]:
        """Every set of limits the series has had, oldest first."""
        rows = self._rows(
            "SELECT id, centre, sd, n, source, first_point, last_point, set_at, active, "
            "sd_within, sd_between, runs FROM control_limits WHERE instrument = ? "
            "AND analyte = ? AND kind = ? AND level = ? ORDER BY id",
            _key_values(key),
        )
        return [
            StoredLimits(*row[:8], bool(row[8]), *row[9:])  # type: ignore[arg-type, call-arg]
            for row in rows
        ]

    def active_limits(self, key: SeriesKey) -> StoredLimits | None:
        history = self.limits_history(key)
        return next((limits for limits in reversed(history) if limits.active), None)


# --------------------------------------------------------------- migration 2 → 3
#: Columns version 3 adds to control_limits: the SD split within and between runs
#: and the number of baseline runs (rules/control.py, run_baseline). Limits stored
#: before have NULL (split unknown) and runs 0 (not widened), as they were judged.
_LIMITS_SPLIT_COLUMNS = (
    ("sd_within", "REAL"),
    ("sd_between", "REAL"),
    ("runs", "INTEGER NOT NULL DEFAULT 0"),
)


def _migrate_limits_split(db: sqlite3.Connection) -> None:
    """Version 2 → 3, in the opening transaction: add the limits' split columns."""
    present = {str(row[1]) for row in db.execute("PRAGMA table_info(control_limits)")}
    for name, declaration in _LIMITS_SPLIT_COLUMNS:
        if name not in present:
            db.execute(f"ALTER TABLE control_limits ADD COLUMN {name} {declaration}")
    db.execute("UPDATE meta SET value = '3' WHERE key = 'schema_version' AND value = '2'")


def _key_values(key: SeriesKey) -> tuple[str, str, str, str]:
    return (key.instrument, key.analyte, key.kind, key.level)
