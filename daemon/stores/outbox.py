"""The outbox tables of the ledger, as the alert sender and ``calwarden status`` see them.

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

from calwarden.daemon.stores.ledger import Ledger, NewAlert


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


def _alert(row: tuple[object, ...]) -> StoredAlert:
    values = list(row)
    values[7] = json.loads(str(values[7]))
    return StoredAlert(*values)  # type: ignore[arg-type]


class Outbox(Ledger):
    """A connection to the ledger for the alert sender (its own thread) and status."""

    def alerts_in(self, state: str, *, limit: int = 1000) -> list[StoredAlert]:
        rows = self._rows(
            f"SELECT {_ALERT_COLUMNS} FROM alerts a WHERE a.state = ? ORDER BY a.id LIMIT ?",
            (state, limit),
        )
        return [_alert(row) for row in rows]

    def any_in(self, state: str) -> bool:
        """Whether any alert is in this state (without reading their summaries)."""
        return self._one("SELECT 1 FROM alerts WHERE state = ? LIMIT 1", (state,)) is not None

    def released_since(self, since: float) -> tuple[int, float | None]:
        """How many messages were released one by one since a time, and the oldest's time.

        Those inside a digest, the daily summary and test messages do not count.
        """
        row = self._one(
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
    ) -> None:
        """Mark an alert released with its .eml file, and make its deliveries."""
        with self._write():
            self._db.execute(
                "UPDATE alerts SET state = 'released', released_at = ?, message_file = ? "
                "WHERE id = ?",
                (now, message_file, alert_id),
            )
            for channel in channels:
                self._db.execute(
                    "INSERT OR IGNORE INTO deliveries (alert_id, channel, next_attempt) "
                    "VALUES (?, ?, ?)",
                    (alert_id, channel, now),
                )

    def gather(self, alert_ids: list[int]) -> None:
        """Hold alerts back for the next digest (one transaction for a whole burst)."""
        with self._write():
            self._db.executemany(
                "UPDATE alerts SET state = 'gathered' WHERE id = ?", [(i,) for i in alert_ids]
            )

    def make_digest(self, digest: NewAlert, gathered: list[int], now: float) -> int:
        """Record one digest for the gathered alerts, which are released inside it."""
        with self._write():
            self._insert_alert(digest, None)
            row = self._db.execute(
                "SELECT id FROM alerts WHERE dedupe_key = ?", (digest.dedupe_key,)
            ).fetchone()
            digest_id = int(row[0])
            self._db.executemany(
                "UPDATE alerts SET state = 'released', released_at = ?, digest_id = ? "
                "WHERE id = ? AND state = 'gathered'",
                [(now, digest_id, alert_id) for alert_id in gathered],
            )
        return digest_id

    def add_alert(self, alert: NewAlert) -> bool:
        """Record an alert the sender raises itself (the daily summary); False if known."""
        with self._write():
            before = self._db.total_changes
            self._insert_alert(alert, None)
            return self._db.total_changes > before

    def has_alert(self, dedupe_key: str) -> bool:
        return self._one("SELECT 1 FROM alerts WHERE dedupe_key = ?", (dedupe_key,)) is not None

    def due(self, now: float, *, limit: int = 20) -> list[Delivery]:
        rows = self._rows(
            f"SELECT {_ALERT_COLUMNS}, d.channel, d.attempts, d.first_attempt FROM deliveries d "
            "JOIN alerts a ON a.id = d.alert_id WHERE d.state = 'waiting' AND d.next_attempt <= ? "
            "ORDER BY d.next_attempt, a.id LIMIT ?",
            (now, limit),
        )
        return [
            Delivery(_alert(row[:9]), str(row[9]), int(row[10]), row[11])  # type: ignore[call-overload, arg-type]
            for row in rows
        ]

    def next_attempt(self) -> float | None:
        row = self._one("SELECT MIN(next_attempt) FROM deliveries WHERE state = 'waiting'", ())
        return None if row is None or row[0] is None else float(row[0])  # type: ignore[arg-type]

    def finish(self, delivery: Delivery, state: str, when: str, error: str | None = None) -> None:
        """Mark a delivery sent or dead."""
        with self._write():
            self._db.execute(
                "UPDATE deliveries SET state = ?, finished_at = ?, last_error = ?, "
                "attempts = attempts + 1 WHERE alert_id = ? AND channel = ?",
                (state, when, error, delivery.alert.id, delivery.channel),
            )

    def postpone(self, delivery: Delivery, next_attempt: float, first: float, error: str) -> None:
        """Count a failed attempt and set the next one."""
        with self._write():
            self._db.execute(
                "UPDATE deliveries SET attempts = attempts + 1, next_attempt = ?, "
                "first_attempt = COALESCE(first_attempt, ?), last_error = ? "
                "WHERE alert_id = ? AND channel = ?",
                (next_attempt, first, error, delivery.alert.id, delivery.channel),
            )

    def verdict_of(self, evaluation_id: int | None) -> bytes | None:
        if evaluation_id is None:
            return None
        return self.outputs_of(evaluation_id)[0]

    def judged_between(self, start: str, end: str) -> list[tuple[str, str, str, str | None]]:
        """(outcome, inbox, path, run) of every judgement in a time span (ISO, UTC)."""
        rows = self._rows(
            "SELECT outcome, inbox, path, run FROM evaluations WHERE evaluated_at >= ? "
            "AND evaluated_at < ? AND outcome != 'duplicate' ORDER BY id",
            (start, end),
        )
        return [(str(a), str(b), str(c), None if d is None else str(d)) for a, b, c, d in rows]

    # ------------------------------------------------------------------ for status

    def outbox_counts(self) -> OutboxCounts:
        def tally(sql: str) -> dict[str, int]:
            return {str(state): int(str(n)) for state, n in self._rows(sql, ())}

        alerts = tally("SELECT state, COUNT(*) FROM alerts GROUP BY state")
        deliveries = tally("SELECT state, COUNT(*) FROM deliveries GROUP BY state")
        files = self._one("SELECT COUNT(*) FROM alerts WHERE message_file IS NOT NULL", ())
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
        rows = self._rows(
            "SELECT d.state, COALESCE(a.message_file, ''), d.channel, COALESCE(d.last_error, ''), "
            "d.attempts FROM deliveries d JOIN alerts a ON a.id = d.alert_id "
            "WHERE d.state = 'dead' OR (d.state = 'waiting' AND d.attempts > 0) "
            "ORDER BY d.state, a.id DESC LIMIT ?",
            (limit,),
        )
        return [(str(a), str(b), str(c), str(d), int(e)) for a, b, c, d, e in rows]  # type: ignore[call-overload]

    def recent_files(self, *, limit: int = 5) -> list[tuple[str, str, str]]:
        """(created at, kind, message file) of the newest alerts written, newest first."""
        rows = self._rows(
            "SELECT created_at, kind, message_file FROM alerts WHERE message_file IS NOT NULL "
            "ORDER BY id DESC LIMIT ?",
            (limit,),
        )
        return [(str(a), str(b), str(c)) for a, b, c in rows]
