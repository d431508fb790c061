"""The ledger as the daemon's worker writes it: one database and the stores on it.

The ledger is one database (:mod:`.database`: connection, schema version, the one
write path; a SQLite file per PC or a lab's PostgreSQL server, :mod:`.engine`).
Small stores share its connection, each with its own tables:

* :class:`~.files.FileStore`: the files seen and their evaluations;
* :class:`~.control.ControlLog`: the control-chart points and limits;
* :class:`~.pictures.PictureStore`: which runs' pictures are still to draw;
* :class:`~.outbox.AlertRecorder`: alerts put into the outbox.

Each thread is handed only the stores it writes: the worker a :class:`Ledger`;
the alert sender opens its own :class:`~.database.Database` and writes only its
:class:`~.outbox.Outbox`. The one write that spans stores, an evaluation with
its points, limits and alert, is :meth:`Ledger.record_evaluation`: one durable
transaction, so a crash leaves all of it or none.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Self

from calwarden.daemon.stores.control import ControlLog
from calwarden.daemon.stores.database import Database, Target
from calwarden.daemon.stores.files import FileStore
from calwarden.daemon.stores.outbox import AlertRecorder
from calwarden.daemon.stores.pictures import PictureStore
from calwarden.daemon.stores.records import NewEvaluation


@dataclass(frozen=True)
class Ledger:
    """The worker's stores on one database connection."""

    database: Database
    files: FileStore
    control: ControlLog
    pictures: PictureStore
    alerts: AlertRecorder

    @classmethod
    def open(cls, target: Target, *, read_only: bool = False) -> Self:
        """Open (creating or upgrading unless ``read_only``) the ledger at ``target``: a
        SQLite file, or a lab's server."""
        database = Database(target, read_only=read_only)
        return cls(
            database,
            FileStore(database),
            ControlLog(database),
            PictureStore(database),
            AlertRecorder(database),
        )

    def close(self) -> None:
        self.database.close()

    def record_evaluation(self, new: NewEvaluation) -> int:
        """Record a judgement, durably, with its file's state, control points, limits and alert."""
        with self.database.write(durable=True) as transaction:
            evaluation_id = self.files.add_evaluation(transaction, new)
            if new.version > 1:
                self.control.supersede(transaction, new.inbox, new.path, evaluation_id)
            self.control.add_points(transaction, evaluation_id, new.sha256, new.control_points)
            for limits in new.control_limits:
                self.control.add_limits(transaction, limits)
            if new.alert is not None:
                self.alerts.add(transaction, new.alert, evaluation_id)
        return evaluation_id
