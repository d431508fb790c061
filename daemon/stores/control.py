"""The control-chart log: its points, series sizes and limits.

Tables ``control_points``, ``control_series`` and ``control_limits``.

Every control observation of every judged run is a point of one series (per
instrument, analyte, kind and level). A file judged again adds nothing (the
unique key on current points), and the points of a file's earlier versions are
marked superseded when a new version is recorded. Each series' size is kept in
``control_series`` with every change, so that no run has to count the log.

:class:`ControlHistory` only reads (the control log's judging, the pictures, the
alert sender's inline charts); :class:`ControlLog` also writes: a run's points
and limits inside its evaluation's transaction, and limits set on request
(``calwarden chart baseline``).
"""

from __future__ import annotations

import math
from collections.abc import Iterable

from calwarden.daemon.stores.database import Database, Row, Transaction
from calwarden.daemon.stores.records import (
    NewLimits,
    NewPoint,
    SeriesKey,
    StoredLimits,
    StoredPoint,
)


def _key_values(key: SeriesKey) -> tuple[str, str, str, str]:
    return (key.instrument, key.analyte, key.kind, key.level)


def _point(row: Row) -> StoredPoint:
    point_id, run, seq, sample_id, acquired, value, unit, evaluated_at, accepted = row
    return StoredPoint(
        point_id, run, seq, sample_id, acquired, value, unit, evaluated_at, bool(accepted)
    )


def _limits(row: Row) -> StoredLimits:
    limits_id, centre, sd, n, source, first_point, last_point, set_at, active = row[:9]
    sd_within, sd_between, runs = row[9:12]
    return StoredLimits(
        limits_id,
        centre,
        sd,
        n,
        source,
        first_point,
        last_point,
        set_at,
        bool(active),
        sd_within,
        sd_between,
        int(runs or 0),
    )


def _earlier_versions_points(
    source: Database | Transaction, inbox: str, path: str, keep: int | None = None
) -> list[tuple[SeriesKey, int, int]]:
    """Current points of a file's judgements other than ``keep``, counted per series."""
    rows = source.rows(
        "SELECT instrument, analyte, kind, level, COUNT(*), SUM(accepted) "
        "FROM control_points WHERE superseded = 0 AND evaluation_id IN "
        "(SELECT id FROM evaluations WHERE inbox = ? AND path = ? AND id != ?) "
        "GROUP BY instrument, analyte, kind, level",
        (inbox, path, -1 if keep is None else keep),
    )
    return [(SeriesKey(*row[:4]), int(row[4]), int(row[5])) for row in rows]


class ControlHistory:
    """What the control log holds, read from one :class:`Database`."""

    def __init__(self, database: Database) -> None:
        self._db = database
        self._split: str | None = None

    def _split_columns(self) -> str:
        """The limits' split columns, or NULLs for a schema-2 ledger read without upgrading it
        (``calwarden status`` and ``chart export`` open the ledger read-only)."""
        if self._split is None:
            version = self._db.meta("schema_version")
            self._split = (
                "sd_within, sd_between, runs" if version not in ("1", "2") else "NULL, NULL, 0"
            )
        return self._split

    def series_keys(self) -> list[SeriesKey]:
        """Every series of the control log, sorted."""
        rows = self._db.rows(
            "SELECT DISTINCT instrument, analyte, kind, level FROM control_points "
            "WHERE superseded = 0 ORDER BY instrument, analyte, kind, level"
        )
        return [SeriesKey(*row) for row in rows]

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
            rows = self._db.rows(f"{select} ORDER BY p.id DESC LIMIT ?", (*where, last))
            rows.reverse()
        elif first is not None:
            rows = self._db.rows(f"{select} ORDER BY p.id LIMIT ?", (*where, first))
        else:
            rows = self._db.rows(f"{select} ORDER BY p.id", where)
        return [_point(row) for row in rows]

    def series_size(
        self, key: SeriesKey, *, excluding: tuple[str, str] = ("", "")
    ) -> tuple[int, int]:
        """How many current points the series has, and how many of them are in control.

        Read from the kept counts, less the points of ``excluding``'s earlier versions.
        """
        row = self._db.one(
            "SELECT points, in_control FROM control_series WHERE instrument = ? AND analyte = ? "
            "AND kind = ? AND level = ?",
            _key_values(key),
        )
        points, in_control = (0, 0) if row is None else (int(row[0]), int(row[1]))
        if excluding != ("", ""):
            for other, count, accepted in _earlier_versions_points(self._db, *excluding):
                if other == key:
                    points, in_control = points - count, in_control - accepted
        return points, in_control

    def control_summary(self) -> tuple[int, int, int]:
        """How many series, current points, and series with active limits the log holds."""
        row = self._db.one(
            "SELECT (SELECT COUNT(*) FROM control_series WHERE points > 0), "
            "(SELECT COALESCE(SUM(points), 0) FROM control_series), "
            "(SELECT COUNT(*) FROM control_limits WHERE active = 1)"
        )
        if row is None:
            return (0, 0, 0)
        series, points, limited = row
        return (int(series), int(points), int(limited))

    def next_point_id(self) -> int:
        """The id the next logged point will get (points are ordered by it)."""
        row = self._db.one("SELECT COALESCE(MAX(id), 0) + 1 FROM control_points")
        return 1 if row is None else int(row[0])

    def limits_history(self, key: SeriesKey) -> list[StoredLimits]:
        """Every set of limits the series has had, oldest first."""
        rows = self._db.rows(
            "SELECT id, centre, sd, n, source, first_point, last_point, set_at, active, "
            f"{self._split_columns()} FROM control_limits WHERE instrument = ? "
            "AND analyte = ? AND kind = ? AND level = ? ORDER BY id",
            _key_values(key),
        )
        return [_limits(row) for row in rows]

    def active_limits(self, key: SeriesKey) -> StoredLimits | None:
        history = self.limits_history(key)
        return next((limits for limits in reversed(history) if limits.active), None)


class ControlLog(ControlHistory):
    """The control log with its writes, for the one thread that records evaluations."""

    def set_limits(self, limits: tuple[NewLimits, ...]) -> None:
        """Store new limits (``calwarden chart baseline``); earlier sets are kept, inactive."""
        with self._db.write(durable=True) as transaction:
            for entry in limits:
                self.add_limits(transaction, entry)

    def add_points(
        self,
        transaction: Transaction,
        evaluation_id: int,
        sha256: str,
        points: Iterable[NewPoint],
    ) -> None:
        """Log an evaluation's points inside its transaction, and count them per series.

        A point already current for the same content is not logged twice. A value
        that is not a number is not logged (SQLite would store it as NULL).
        """
        added: dict[SeriesKey, list[int]] = {}
        for point in points:
            if math.isnan(point.value):
                continue
            inserted = transaction.execute(
                "INSERT INTO control_points (evaluation_id, instrument, analyte, "
                "kind, level, run, seq, sample_id, acquired, value, unit, sha256, accepted) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING",
                (
                    evaluation_id,
                    *_key_values(point.key),
                    point.run,
                    point.seq,
                    point.sample_id,
                    point.acquired,
                    point.value,
                    point.unit,
                    sha256,
                    int(point.accepted),
                ),
            )
            if inserted:
                tally = added.setdefault(point.key, [0, 0])
                tally[0] += 1
                tally[1] += int(point.accepted)
        for key, (count, in_control) in added.items():
            _count(transaction, key, count, in_control)

    def supersede(
        self, transaction: Transaction, inbox: str, path: str, evaluation_id: int
    ) -> None:
        """Mark the points of a file's earlier versions superseded by ``evaluation_id``."""
        for key, count, in_control in _earlier_versions_points(
            transaction, inbox, path, evaluation_id
        ):
            _count(transaction, key, -count, -in_control)
        transaction.execute(
            "UPDATE control_points SET superseded = 1 WHERE superseded = 0 AND evaluation_id IN "
            "(SELECT id FROM evaluations WHERE inbox = ? AND path = ? AND id != ?)",
            (inbox, path, evaluation_id),
        )

    def add_limits(self, transaction: Transaction, limits: NewLimits) -> None:
        """Make a set of limits its series' active one, inside ``transaction``.

        On a shared server two daemons may set a series' limits at once: the series'
        lock makes the second wait and then retire the first's, so one set stays active.
        """
        transaction.serialise("calwarden:limits:" + "\x1f".join(_key_values(limits.key)))
        transaction.execute(
            "UPDATE control_limits SET active = 0 WHERE instrument = ? AND analyte = ? "
            "AND kind = ? AND level = ?",
            _key_values(limits.key),
        )
        transaction.insert(
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


def _count(transaction: Transaction, key: SeriesKey, points: int, in_control: int) -> None:
    transaction.execute(
        "INSERT INTO control_series (instrument, analyte, kind, level, points, in_control) "
        "VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (instrument, analyte, kind, level) DO UPDATE "
        "SET points = control_series.points + excluded.points, "
        "in_control = control_series.in_control + excluded.in_control",
        (*_key_values(key), points, in_control),
    )
