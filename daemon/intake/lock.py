"""One daemon per state folder: an operating-system lock on ``daemon.lock``.

The lock is held on an open file, so the operating system releases it when
the process ends, however it ends (even ``kill -9``): a stale lock file never
blocks a restart. The file holds the owner's process id, for ``calwarden status``.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path
from typing import IO

LOCK_NAME = "daemon.lock"


class StateLocked(Exception):
    """Another daemon holds the state folder."""


def _try_lock(handle: IO[str]) -> bool:
    if sys.platform == "win32":
        import msvcrt

        try:
            handle.seek(0)
            msvcrt.locking(handle.fileno(), msvcrt.LK_NBLCK, 1)
        except OSError:
            return False
        return True
    import fcntl

    try:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return False
    return True


def _unlock(handle: IO[str]) -> None:
    if sys.platform == "win32":
        import msvcrt

        handle.seek(0)
        msvcrt.locking(handle.fileno(), msvcrt.LK_UNLCK, 1)
    else:
        import fcntl

        fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


class StateLock:
    """The exclusive lock of one state folder, held from :meth:`acquire` to :meth:`release`."""

    def __init__(self, state_dir: Path) -> None:
        self.path = state_dir / LOCK_NAME
        self._handle: IO[str] | None = None

    def acquire(self) -> None:
        """Take the lock, or raise :class:`StateLocked` naming the process that holds it."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        handle = self.path.open("a+", encoding="utf-8")
        # A few tries: `calwarden status` takes the lock for an instant to test it.
        for _ in range(10):
            if _try_lock(handle):
                break
            time.sleep(0.1)
        else:
            handle.close()
            owner = lock_owner(self.path.parent)
            who = f" (process {owner})" if owner else ""
            raise StateLocked(
                f"another calwarden daemon{who} is already using the state folder "
                f"{self.path.parent}; stop it first, or give this one another output folder"
            )
        # On Windows the locked byte cannot be rewritten; the pid goes after it.
        handle.seek(0)
        handle.truncate()
        handle.write(f" {os.getpid()}\n")
        handle.flush()
        self._handle = handle

    def release(self) -> None:
        if self._handle is not None:
            try:
                _unlock(self._handle)
            finally:
                self._handle.close()
                self._handle = None


def is_locked(state_dir: Path) -> bool:
    """Whether a daemon holds this state folder right now."""
    path = state_dir / LOCK_NAME
    if not path.exists():
        return False
    with path.open("a+", encoding="utf-8") as handle:
        if _try_lock(handle):
            _unlock(handle)
            return False
    return True


def lock_owner(state_dir: Path) -> int | None:
    """The process id written by the daemon that last took the lock."""
    try:
        text = (state_dir / LOCK_NAME).read_text(encoding="utf-8").strip()
        return int(text) if text else None
    except (OSError, ValueError):
        return None
