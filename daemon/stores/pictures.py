"""Which judged runs still want their calibration pictures (column ``evaluations.pictures_drawn``).

``pictures_drawn`` is 0 while a run's pictures are to be drawn, 1 once drawn (or
failed, and said so: never retried in a loop), 2 when skipped after a backlog.
"""

from __future__ import annotations

from calwarden.daemon.stores.database import Database


class PictureStore:
    """The drawing queue of the worker, on one :class:`Database`."""

    def __init__(self, database: Database) -> None:
        self._db = database

    def pending(self, limit: int = 1) -> list[tuple[int, str, str]]:
        """(evaluation id, inbox, output stem) of runs not drawn yet, newest first."""
        rows = self._db.rows(
            "SELECT id, inbox, output_stem FROM evaluations WHERE pictures_drawn = 0 "
            "AND outcome IN ('pass', 'fail') ORDER BY id DESC LIMIT ?",
            (limit,),
        )
        return [(int(r[0]), str(r[1]), str(r[2])) for r in rows]

    def skip_old(self, keep: int) -> int:
        """Mark all but the newest ``keep`` runs' pending pictures as not to be drawn."""
        with self._db.write() as transaction:
            return transaction.execute(
                "UPDATE evaluations SET pictures_drawn = 2 WHERE pictures_drawn = 0 "
                "AND outcome IN ('pass', 'fail') AND id NOT IN (SELECT id FROM evaluations "
                "WHERE pictures_drawn = 0 AND outcome IN ('pass', 'fail') "
                "ORDER BY id DESC LIMIT ?)",
                (keep,),
            )

    def mark_drawn(self, evaluation_id: int) -> None:
        with self._db.write() as transaction:
            transaction.execute(
                "UPDATE evaluations SET pictures_drawn = 1 WHERE id = ?", (evaluation_id,)
            )
