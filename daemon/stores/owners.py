"""Which daemon watches which inbox: table ``inbox_owners`` and the engine's inbox locks.

On a lab's server an inbox is owned by one daemon at a time: the daemon takes a
lock named after the inbox, held for as long as its connection lives (so it ends
when the daemon dies, however it dies), and notes its host and process here for
``calwarden status``. On a PC's SQLite file the state folder's lock does this.
"""

from __future__ import annotations

from dataclasses import dataclass

from calwarden.daemon.stores.database import Database


@dataclass(frozen=True, slots=True)
class InboxOwner:
    inbox: str
    host: str
    pid: int
    claimed_at: str
    watching: bool  # the lock is held now (known on a server only)


class InboxOwners:
    def __init__(self, database: Database) -> None:
        self._db = database

    def claim(self, inboxes: list[str], host: str, pid: int, now: str) -> dict[str, InboxOwner]:
        """Take every inbox; those another daemon holds are returned with their owner.

        Either all are taken (and noted) or none is noted: a daemon that cannot have
        one of its inboxes does not start.
        """
        refused = {name: self._owner(name) for name in inboxes if not self._db.claim(name)}
        if refused:
            return refused
        with self._db.write() as transaction:
            for name in inboxes:
                transaction.execute(
                    "INSERT INTO inbox_owners (inbox, host, pid, claimed_at) VALUES (?, ?, ?, ?) "
                    "ON CONFLICT (inbox) DO UPDATE SET host = excluded.host, "
                    "pid = excluded.pid, claimed_at = excluded.claimed_at",
                    (name, host, pid, now),
                )
        return {}

    def _owner(self, name: str) -> InboxOwner:
        row = self._db.one(
            "SELECT inbox, host, pid, claimed_at FROM inbox_owners WHERE inbox = ?", (name,)
        )
        if row is None:
            return InboxOwner(name, "?", 0, "", True)
        return InboxOwner(str(row[0]), str(row[1]), int(row[2]), str(row[3]), True)

    def listing(self) -> list[InboxOwner]:
        """Every inbox a daemon has taken, with whether one holds it now."""
        rows = self._db.rows("SELECT inbox, host, pid, claimed_at FROM inbox_owners ORDER BY inbox")
        held = self._db.holders([str(row[0]) for row in rows]) if rows else set()
        return [InboxOwner(str(a), str(b), int(c), str(d), str(a) in held) for a, b, c, d in rows]
