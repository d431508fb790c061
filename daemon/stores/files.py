"""The files the daemon has seen and its judgements of them: tables ``seen``, ``evaluations``.

It is what makes "each file judged exactly once" true across restarts and
crashes. A file is keyed on its inbox, its path in the inbox and the SHA-256 of
its bytes:

* the same content at the same path (a file touched, or seen again by a
  rescan) is nothing new;
* the same content under another name is recorded as a *duplicate* of the
  first, and not judged again;
* new content at a known path is a new *version*: judged again, the earlier
  verdict kept under a suffixed name.

Each evaluation's verdict JSON and flagged copy are kept too (compressed), so
an earlier version's outputs can always be written again from the ledger,
whatever state a crash left the output folder in. An evaluation is recorded
with its control points and alert in one transaction
(:meth:`calwarden.daemon.stores.ledger.Ledger.record_evaluation`); this store
gives that transaction its evaluation row.
"""

from __future__ import annotations

import zlib

from calwarden.daemon.stores.database import Database, LedgerError, Row, Transaction
from calwarden.daemon.stores.records import Evaluation, NewEvaluation, Seen

_COLUMNS = (
    "id, inbox, path, sha256, outcome, version, output_stem, run, instrument, "
    "failures, warnings, message, evaluated_at, duplicate_of"
)


def _evaluation(row: Row | None) -> Evaluation | None:
    return None if row is None else Evaluation(*row)


def compress(data: bytes) -> bytes:
    # Level 1: half the time of the default for a sixth more bytes (a verdict: 8 kB).
    return zlib.compress(data, 1)


def decompress(data: bytes) -> bytes:
    return zlib.decompress(data)


class FileStore:
    """Seen files and evaluations, on one :class:`Database`."""

    def __init__(self, database: Database) -> None:
        self._db = database

    # ------------------------------------------------------------------ queries

    def seen_in(self, inbox: str) -> dict[str, tuple[int, int]]:
        """Size and mtime of every file recorded in an inbox (one query for a whole rescan)."""
        rows = self._db.rows("SELECT path, size, mtime_ns FROM seen WHERE inbox = ?", (inbox,))
        return {str(path): (int(size), int(mtime)) for path, size, mtime in rows}

    def seen(self, inbox: str, path: str) -> Seen | None:
        """The last recorded size, mtime and hash of a file, or None if never judged."""
        row = self._db.one(
            "SELECT size, mtime_ns, sha256 FROM seen WHERE inbox = ? AND path = ?", (inbox, path)
        )
        return None if row is None else Seen(*row)

    def judged_content(self, inbox: str, sha256: str, *, elsewhere_than: str) -> Evaluation | None:
        """The first judgement of this content in this inbox under another name, if any.

        A file whose content returns to an earlier version's is not a duplicate of
        itself: it is judged again, as its newest version.
        """
        return _evaluation(
            self._db.one(
                f"SELECT {_COLUMNS} FROM evaluations WHERE inbox = ? AND sha256 = ? "
                "AND outcome != 'duplicate' AND path != ? ORDER BY id LIMIT 1",
                (inbox, sha256, elsewhere_than),
            )
        )

    def current(self, inbox: str, path: str) -> Evaluation | None:
        """The latest judgement of the file at this path (duplicates are not judgements)."""
        return _evaluation(
            self._db.one(
                f"SELECT {_COLUMNS} FROM evaluations WHERE inbox = ? AND path = ? "
                "AND outcome != 'duplicate' ORDER BY version DESC LIMIT 1",
                (inbox, path),
            )
        )

    def stem_owner(self, inbox: str, output_stem: str) -> str | None:
        """The path whose outputs are written under this stem, if any."""
        row = self._db.one(
            "SELECT path FROM evaluations WHERE inbox = ? AND output_stem = ? LIMIT 1",
            (inbox, output_stem),
        )
        return None if row is None else str(row[0])

    def outputs_of(self, evaluation_id: int) -> tuple[bytes, bytes | None]:
        """The verdict JSON and flagged copy an evaluation wrote, as bytes."""
        return outputs_of(self._db, evaluation_id)

    def counts(self) -> dict[str, int]:
        """How many judgements of each outcome, and how many duplicates."""
        rows = self._db.rows("SELECT outcome, COUNT(*) FROM evaluations GROUP BY outcome")
        counts = {"pass": 0, "fail": 0, "error": 0, "duplicate": 0}
        counts.update({str(outcome): int(number) for outcome, number in rows})
        return counts

    def latest(self, *, outcome: str | None = None, limit: int = 1) -> list[Evaluation]:
        """The most recent evaluations, newest first; ``outcome`` filters them."""
        where, parameters = ("WHERE outcome = ?", (outcome,)) if outcome else ("", ())
        rows = self._db.rows(
            f"SELECT {_COLUMNS} FROM evaluations {where} ORDER BY id DESC LIMIT ?",
            (*parameters, limit),
        )
        return [Evaluation(*row) for row in rows]

    def last_by_source(self) -> list[Evaluation]:
        """The newest evaluation of each inbox and instrument (for the overview page)."""
        rows = self._db.rows(
            f"SELECT {_COLUMNS} FROM evaluations WHERE id IN (SELECT MAX(id) FROM evaluations "
            "GROUP BY inbox, COALESCE(instrument, '')) ORDER BY inbox, instrument"
        )
        return [Evaluation(*row) for row in rows]

    def since(self, evaluated_at: str, *, limit: int) -> list[Evaluation]:
        """Evaluations at or after a :func:`~records.timestamp`, newest first."""
        rows = self._db.rows(
            f"SELECT {_COLUMNS} FROM evaluations WHERE evaluated_at >= ? ORDER BY id DESC LIMIT ?",
            (evaluated_at, limit),
        )
        return [Evaluation(*row) for row in rows]

    def provenance(self, evaluation_id: int) -> tuple[str | None, str]:
        """The configuration SHA-256 and the time of one evaluation (for its HTML report)."""
        row = self._db.one(
            "SELECT config_sha256, evaluated_at FROM evaluations WHERE id = ?", (evaluation_id,)
        )
        if row is None:
            raise LedgerError(f"{self._db.path}: no evaluation {evaluation_id}")
        return (None if row[0] is None else str(row[0])), str(row[1])

    # ------------------------------------------------------------------ writes

    def touch(self, inbox: str, path: str, seen: Seen) -> None:
        """Record a file's new size and mtime when its content has not changed."""
        with self._db.write() as transaction:
            _upsert_seen(transaction, inbox, path, seen)

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
        with self._db.write(durable=True) as transaction:
            duplicate_id = transaction.insert(
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
            _upsert_seen(transaction, inbox, path, seen)
        return duplicate_id

    def add_evaluation(self, transaction: Transaction, new: NewEvaluation) -> int:
        """The evaluation's row and its file's state, inside ``transaction``; returns its id."""
        evaluation_id = transaction.insert(
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
        _upsert_seen(transaction, new.inbox, new.path, Seen(new.size, new.mtime_ns, new.sha256))
        return evaluation_id


def outputs_of(database: Database, evaluation_id: int) -> tuple[bytes, bytes | None]:
    """The verdict JSON and flagged copy an evaluation wrote (also read by the outbox)."""
    row = database.one("SELECT document, flagged FROM evaluations WHERE id = ?", (evaluation_id,))
    if row is None or row[0] is None:
        raise LedgerError(f"{database.path}: evaluation {evaluation_id} has no stored verdict")
    document, flagged = row
    assert isinstance(document, bytes)
    return decompress(document), (decompress(flagged) if isinstance(flagged, bytes) else None)


def _upsert_seen(transaction: Transaction, inbox: str, path: str, seen: Seen) -> None:
    transaction.execute(
        "INSERT INTO seen (inbox, path, size, mtime_ns, sha256) VALUES (?, ?, ?, ?, ?) "
        "ON CONFLICT (inbox, path) DO UPDATE SET size = excluded.size, "
        "mtime_ns = excluded.mtime_ns, sha256 = excluded.sha256",
        (inbox, path, seen.size, seen.mtime_ns, seen.sha256),
    )
