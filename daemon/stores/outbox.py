"""The outbox: the ledger's tables ``alerts`` and ``deliveries``.

Two stores share them. :class:`AlertRecorder` is the worker's side: it puts new
alerts in (a file's alert inside its evaluation's transaction, the daemon's own
trouble on its own). :class:`Outbox` is the alert sender's side (its own thread
and connection) and what ``calwarden status`` reads; it moves alerts on and
reads the evaluations they are about, never the worker's other tables.

An alert moves through three states, each change one transaction:

``new``
    recorded with what raised it (an evaluation, or the daemon's own trouble);
``gathered``
    held back by the throttle, waiting to go out in a digest;
``released``
    its message written as an ``.eml`` file and one delivery row made per way
    of sending it (e-mail, webhook), each with its own retries; a digest's
    gathered alerts are released with it.

A delivery is ``waiting`` (with the time of its next attempt), ``sent`` or
``dead`` (refused for good: a copy is in the dead-letter folder).

The sender's writes are not forced to disk one by one (``synchronous=NORMAL``,
which in WAL mode survives a crash of the process, not of the machine): what a
power cut could undo is a release or a "sent" mark, and undoing either leads to
the same message composed or sent once more, never to an alert lost. The alert
itself is recorded durably, with its evaluation.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

from calwarden.daemon.stores.database import Database, Row, Transaction
from calwarden.daemon.stores.files import outputs_of
from calwarden.daemon.stores.records import NewAlert


@dataclass(frozen=True, slots=True)
class StoredAlert:
    id: int
    dedupe_key: str
    kind: str
    evaluation_id: int | None
    inbox: str | None
    instrument: str | None
    created_at: str
    summary: dict[str, Any]
    message_file: str | None = None


@dataclass(frozen=True, slots=True)
class Delivery:
    alert: StoredAlert
    channel: str
    attempts: int
    first_attempt: float | None


@dataclass(frozen=True, slots=True)
class OutboxCounts:
    new: int
    gathered: int
    waiting: int
    sent: int
    dead: int
    files: int  # alerts released, each written as an .eml file


_ALERT_COLUMNS = (
    "a.id, a.dedupe_key, a.kind, a.evaluation_id, a.inbox, a.instrument, a.created_at, "
    "a.summary, a.message_file"
)


def _alert(row: Row) -> StoredAlert:
    values = list(row)
    values[7] = json.loads(str(values[7]))
    return StoredAlert(*values)


def _insert_alert(transaction: Transaction, alert: NewAlert, evaluation_id: int | None) -> bool:
    """Add an alert inside ``transaction``; False when its dedupe key is known already."""
    added = transaction.execute(
        "INSERT INTO alerts (dedupe_key, kind, evaluation_id, inbox, instrument, "
        "created_at, summary) VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING",
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
    return added > 0


class AlertRecorder:
    """Where alerts enter the outbox: the worker's side of it (it never sends)."""

    def __init__(self, database: Database) -> None:
        self._db = database

    def add(self, transaction: Transaction, alert: NewAlert, evaluation_id: int | None) -> None:
        """Record an evaluation's alert inside the evaluation's own transaction."""
        _insert_alert(transaction, alert, evaluation_id)

    def record(self, alert: NewAlert) -> None:
        """Put an alert that no evaluation raised (the daemon's own trouble) in the outbox."""
        with self._db.write(durable=True) as transaction:
            _insert_alert(transaction, alert, None)


class Outbox:
    """The outbox as the alert sender (its own thread and connection) and status see it."""

    def __init__(self, database: Database) -> None:
        self._db = database

    def alerts_in(self, state: str, *, limit: int = 1000) -> list[StoredAlert]:
        rows = self._db.rows(
            f"SELECT {_ALERT_COLUMNS} FROM alerts a WHERE a.state = ? ORDER BY a.id LIMIT ?",
            (state, limit),
        )
        return [_alert(row) for row in rows]

    def any_in(self, state: str) -> bool:
        """Whether any alert is in this state (without reading their summaries)."""
        return self._db.one("SELECT 1 FROM alerts WHERE state = ? LIMIT 1", (state,)) is not None

    def released_since(self, since: float) -> tuple[int, float | None]:
        """How many messages were released one by one since a time, and the oldest's time.

        Those inside a digest, the daily summary and test messages do not count.
        """
        row = self._db.one(
            "SELECT COUNT(*), MIN(released_at) FROM alerts WHERE state = 'released' "
            "AND digest_id IS NULL AND released_at >= ? AND kind NOT IN ('summary', 'test')",
            (since,),
        )
        if row is None:
            return 0, None
        count, oldest = row
        return int(str(count)), (None if oldest is None else float(str(oldest)))

    def release(
        self, alert_id: int, channels: tuple[str, ...], now: float, message_file: str
    ) -> bool:
        """Mark a new alert released with its .eml file, and make its deliveries.

        False when it is not new any more: on a shared server another daemon released
        it first (the row lock makes the second wait, then find it released).
        """
        with self._db.write() as transaction:
            changed = transaction.execute(
                "UPDATE alerts SET state = 'released', released_at = ?, message_file = ? "
                "WHERE id = ? AND state = 'new'",
                (now, message_file, alert_id),
            )
            if not changed:
                return False
            for channel in channels:
                transaction.execute(
                    "INSERT INTO deliveries (alert_id, channel, next_attempt) "
                    "VALUES (?, ?, ?) ON CONFLICT DO NOTHING",
                    (alert_id, channel, now),
                )
        return True

    def gather(self, alert_ids: list[int]) -> None:
        """Hold alerts back for the next digest (one transaction for a whole burst)."""
        with self._db.write() as transaction:
            transaction.execute_many(
                "UPDATE alerts SET state = 'gathered' WHERE id = ? AND state = 'new'",
                [(i,) for i in alert_ids],
            )

    def make_digest(self, digest: NewAlert, gathered: list[int], now: float) -> int:
        """Record one digest for the gathered alerts, which are released inside it."""
        with self._db.write() as transaction:
            _insert_alert(transaction, digest, None)
            row = transaction.one(
                "SELECT id FROM alerts WHERE dedupe_key = ?", (digest.dedupe_key,)
            )
            assert row is not None
            digest_id = int(row[0])
            transaction.execute_many(
                "UPDATE alerts SET state = 'released', released_at = ?, digest_id = ? "
                "WHERE id = ? AND state = 'gathered'",
                [(now, digest_id, alert_id) for alert_id in gathered],
            )
        return digest_id

    def add_alert(self, alert: NewAlert) -> bool:
        """Record an alert the sender raises itself (the daily summary); False if known."""
        with self._db.write() as transaction:
            return _insert_alert(transaction, alert, None)

    def has_alert(self, dedupe_key: str) -> bool:
        return self._db.one("SELECT 1 FROM alerts WHERE dedupe_key = ?", (dedupe_key,)) is not None

    def due(self, now: float, *, limit: int = 20, lease_seconds: float = 0.0) -> list[Delivery]:
        """The deliveries whose attempt is due, claimed for this sender.

        On a shared server several senders look at once: each claims rows with
        ``FOR UPDATE SKIP LOCKED`` and moves their next attempt ``lease_seconds``
        on, so that no other sender tries them meanwhile; the attempt's outcome
        (sent, dead, postponed) then sets it for good. A sender that dies holding a
        claim leaves the delivery to another once the lease has run out.
        """
        if not self._db.shared:  # one sender on a PC's file: nothing to claim from
            rows = self._db.rows(
                f"SELECT {_ALERT_COLUMNS}, d.channel, d.attempts, d.first_attempt "
                "FROM deliveries d JOIN alerts a ON a.id = d.alert_id WHERE d.state = 'waiting' "
                "AND d.next_attempt <= ? ORDER BY d.next_attempt, a.id LIMIT ?",
                (now, limit),
            )
            return [Delivery(_alert(row[:9]), str(row[9]), int(row[10]), row[11]) for row in rows]
        with self._db.write() as transaction:
            claimed = transaction.rows(
                "SELECT alert_id, channel FROM deliveries WHERE state = 'waiting' "
                "AND next_attempt <= ? ORDER BY next_attempt, alert_id LIMIT ?"
                + transaction.lock_for_update,
                (now, limit),
            )
            if not claimed:
                return []
            if lease_seconds > 0:
                transaction.execute_many(
                    "UPDATE deliveries SET next_attempt = ? WHERE alert_id = ? AND channel = ?",
                    [(now + lease_seconds, alert_id, channel) for alert_id, channel in claimed],
                )
            rows = [
                row
                for alert_id, channel in claimed
                if (
                    row := transaction.one(
                        f"SELECT {_ALERT_COLUMNS}, d.channel, d.attempts, d.first_attempt "
                        "FROM deliveries d JOIN alerts a ON a.id = d.alert_id "
                        "WHERE d.alert_id = ? AND d.channel = ?",
                        (alert_id, channel),
                    )
                )
                is not None
            ]
        return [Delivery(_alert(row[:9]), str(row[9]), int(row[10]), row[11]) for row in rows]

    def next_attempt(self) -> float | None:
        row = self._db.one("SELECT MIN(next_attempt) FROM deliveries WHERE state = 'waiting'")
        return None if row is None or row[0] is None else float(row[0])

    def finish(self, delivery: Delivery, state: str, when: str, error: str | None = None) -> None:
        """Mark a delivery sent or dead."""
        with self._db.write() as transaction:
            transaction.execute(
                "UPDATE deliveries SET state = ?, finished_at = ?, last_error = ?, "
                "attempts = attempts + 1 WHERE alert_id = ? AND channel = ?",
                (state, when, error, delivery.alert.id, delivery.channel),
            )

    def postpone(self, delivery: Delivery, next_attempt: float, first: float, error: str) -> None:
        """Count a failed attempt and set the next one."""
        with self._db.write() as transaction:
            transaction.execute(
                "UPDATE deliveries SET attempts = attempts + 1, next_attempt = ?, "
                "first_attempt = COALESCE(first_attempt, ?), last_error = ? "
                "WHERE alert_id = ? AND channel = ?",
                (next_attempt, first, error, delivery.alert.id, delivery.channel),
            )

    # ------------------------------------------------------------------ what alerts are about

    def verdict_of(self, evaluation_id: int | None) -> bytes | None:
        if evaluation_id is None:
            return None
        return outputs_of(self._db, evaluation_id)[0]

    def judged_between(self, start: str, end: str) -> list[tuple[str, str, str, str | None]]:
        """(outcome, inbox, path, run) of every judgement in a time span (ISO, UTC)."""
        rows = self._db.rows(
            "SELECT outcome, inbox, path, run FROM evaluations WHERE evaluated_at >= ? "
            "AND evaluated_at < ? AND outcome != 'duplicate' ORDER BY id",
            (start, end),
        )
        return [(str(a), str(b), str(c), None if d is None else str(d)) for a, b, c, d in rows]

    # ------------------------------------------------------------------ for status

    def outbox_counts(self) -> OutboxCounts:
        def tally(sql: str) -> dict[str, int]:
            return {str(state): int(str(n)) for state, n in self._db.rows(sql)}

        alerts = tally("SELECT state, COUNT(*) FROM alerts GROUP BY state")
        deliveries = tally("SELECT state, COUNT(*) FROM deliveries GROUP BY state")
        files = self._db.one("SELECT COUNT(*) FROM alerts WHERE message_file IS NOT NULL")
        return OutboxCounts(
            new=alerts.get("new", 0),
            gathered=alerts.get("gathered", 0),
            waiting=deliveries.get("waiting", 0),
            sent=deliveries.get("sent", 0),
            dead=deliveries.get("dead", 0),
            files=int(str(files[0])) if files else 0,
        )

    def problems(self, *, limit: int = 5) -> list[tuple[str, str, str, str, int]]:
        """(state, message file, channel, last error, attempts) of dead and retried deliveries."""
        rows = self._db.rows(
            "SELECT d.state, COALESCE(a.message_file, ''), d.channel, COALESCE(d.last_error, ''), "
            "d.attempts FROM deliveries d JOIN alerts a ON a.id = d.alert_id "
            "WHERE d.state = 'dead' OR (d.state = 'waiting' AND d.attempts > 0) "
            "ORDER BY d.state, a.id DESC LIMIT ?",
            (limit,),
        )
        return [(str(a), str(b), str(c), str(d), int(e)) for a, b, c, d, e in rows]

    def recent_files(self, *, limit: int = 5) -> list[tuple[str, str, str]]:
        """(created at, kind, message file) of the newest alerts written, newest first."""
        rows = self._db.rows(
            "SELECT created_at, kind, message_file FROM alerts WHERE message_file IS NOT NULL "
            "ORDER BY id DESC LIMIT ?",
            (limit,),
        )
        return [(str(a), str(b), str(c)) for a, b, c in rows]
