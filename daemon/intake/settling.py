"""When a file in an inbox is complete, when to try it again, what a rescan queues.

Pure decisions: no file is looked at, no clock read, nothing logged here. The
watcher (:mod:`calwarden.daemon.intake.watcher`) looks at the file, tells
:func:`step` what it saw (an *observation*) and when (``now``, monotonic
seconds), and does what the returned *action* says. A candidate file's state is
a frozen :class:`Settling`; :func:`step` returns the next one (None once the
file is handed over or dropped).

The rules, each a reason the daemon never judges half a file:

* a file is a candidate from the first hint (a folder event, a rescan) until
  its size and modification time have been unchanged for the settle time;
  every change restarts the settle time from the moment it is seen, so a file
  still being written waits one settle time after its last write, not two;
* a settled file is read once; if its size or modification time changed while
  it was read, or fewer bytes came than it had, it settles again;
* a file that will not open is tried again with exponential backoff (0.5 s,
  1 s, 2 s … at most 30 s): a refusal (``PermissionError``, as Windows gives
  while the instrument's software holds the file) for as long as it takes, any
  other error five times, then it is left unrecorded for the next rescan;
* a file that is gone is forgotten (nothing was recorded, so nothing is lost);
* a rescan queues every wanted file the ledger does not know with its current
  size and modification time, oldest first, so a backlog is judged in the order
  the instrument wrote it (the order its control points join their charts).
"""

from __future__ import annotations

import fnmatch
from collections.abc import Container, Iterable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path

from calwarden.daemon.settings.config import Inbox


@dataclass(frozen=True, slots=True)
class Timing:
    """How long a file must stay unchanged, and how failed opens are retried."""

    settle_seconds: float
    first_retry_seconds: float = 0.5
    retry_cap_seconds: float = 30.0
    unreadable_attempts: int = 5  # then left for the next rescan

    def retry_delay(self, attempts: int) -> float:
        """Seconds to wait after the ``attempts``-th failed open (1, 2, …): doubling, capped."""
        doubled: float = self.first_retry_seconds * 2.0 ** (attempts - 1)
        return min(doubled, self.retry_cap_seconds)


@dataclass(frozen=True, slots=True)
class Settling:
    """A candidate file: the size and mtime last seen, when to look next, failed opens."""

    size: int
    mtime_ns: int
    due: float
    attempts: int = 0


# --------------------------------------------------------------------------- observations


@dataclass(frozen=True, slots=True)
class Hinted:
    """A hint about the file (a folder event): its size and mtime now, and as recorded."""

    size: int
    mtime_ns: int
    recorded: tuple[int, int] | None = None  # (size, mtime_ns) in the ledger, if judged


@dataclass(frozen=True, slots=True)
class Looked:
    """The file's size and mtime at its due time."""

    size: int
    mtime_ns: int


@dataclass(frozen=True, slots=True)
class ReadBack:
    """The file was read: its size and mtime after reading, and how many bytes came.

    ``length`` is None for a file too large to load (hashed as a stream instead).
    """

    size: int
    mtime_ns: int
    length: int | None


@dataclass(frozen=True, slots=True)
class Vanished:
    """The file is not there (deleted, or renamed away)."""


@dataclass(frozen=True, slots=True)
class Locked:
    """Opening the file was refused: another program holds it."""


@dataclass(frozen=True, slots=True)
class Unreadable:
    """Opening or reading the file failed otherwise."""

    error: str


Observation = Hinted | Looked | ReadBack | Vanished | Locked | Unreadable


# --------------------------------------------------------------------------- actions


@dataclass(frozen=True, slots=True)
class Ignore:
    """Nothing to do: the state is as it was."""


@dataclass(frozen=True, slots=True)
class Wait:
    """Look at the file again at ``due`` (it is new, or it changed)."""

    due: float


@dataclass(frozen=True, slots=True)
class Read:
    """The file is unchanged for the settle time: read its bytes now."""


@dataclass(frozen=True, slots=True)
class Judge:
    """The bytes read are the complete file, with this size and mtime: judge them."""

    size: int
    mtime_ns: int


@dataclass(frozen=True, slots=True)
class Forget:
    """The file is gone: drop it."""


@dataclass(frozen=True, slots=True)
class Retry:
    """The file would not open: try again at ``due``; say so (``event``) when ``first``."""

    due: float
    event: str
    first: bool


@dataclass(frozen=True, slots=True)
class GiveUp:
    """The file would not open, too often: drop it (unrecorded: the next rescan tries it)."""

    event: str


Action = Ignore | Wait | Read | Judge | Forget | Retry | GiveUp


@dataclass(frozen=True, slots=True)
class Step:
    """The next state of a candidate (None: no longer a candidate) and what to do."""

    state: Settling | None
    action: Action


def _settle(size: int, mtime_ns: int, now: float, timing: Timing, attempts: int = 0) -> Step:
    due = now + timing.settle_seconds
    return Step(Settling(size, mtime_ns, due, attempts), Wait(due))


def _failed_open(state: Settling, event: str, now: float, timing: Timing, *, limit: bool) -> Step:
    attempts = state.attempts + 1
    if limit and attempts >= timing.unreadable_attempts:
        return Step(None, GiveUp(event))
    due = now + timing.retry_delay(attempts)
    return Step(replace(state, due=due, attempts=attempts), Retry(due, event, attempts == 1))


def step(state: Settling | None, seen: Observation, now: float, timing: Timing) -> Step:
    """What a candidate (or, with ``state`` None, a path not yet one) does next."""
    if isinstance(seen, Vanished):
        return Step(None, Forget())
    if state is None:
        if not isinstance(seen, Hinted) or seen.recorded == (seen.size, seen.mtime_ns):
            return Step(None, Ignore())  # a late event about a file judged as it is
        return _settle(seen.size, seen.mtime_ns, now, timing)
    if isinstance(seen, Hinted):
        if (seen.size, seen.mtime_ns) == (state.size, state.mtime_ns):
            return Step(state, Ignore())  # keeps its due time, and any backoff
        return _settle(seen.size, seen.mtime_ns, now, timing)  # still written: from now
    if isinstance(seen, Looked):
        if (seen.size, seen.mtime_ns) != (state.size, state.mtime_ns):
            return _settle(seen.size, seen.mtime_ns, now, timing, state.attempts)
        return Step(state, Read())
    if isinstance(seen, ReadBack):
        changed = (seen.size, seen.mtime_ns) != (state.size, state.mtime_ns)
        if changed or (seen.length is not None and seen.length != state.size):
            return _settle(seen.size, seen.mtime_ns, now, timing, state.attempts)
        return Step(None, Judge(state.size, state.mtime_ns))
    if isinstance(seen, Locked):
        return _failed_open(state, "file_locked", now, timing, limit=False)
    return _failed_open(state, "file_unreadable", now, timing, limit=True)


# --------------------------------------------------------------------------- rescans


def _matches(name: str, patterns: tuple[str, ...]) -> bool:
    folded = name.casefold()
    return any(fnmatch.fnmatchcase(folded, pattern.casefold()) for pattern in patterns)


def wanted(inbox: Inbox, path: Path) -> bool:
    """Whether a path is one the inbox judges: its patterns, not ignored, not in a hidden folder."""
    name = path.name
    if not _matches(name, inbox.patterns) or _matches(name, inbox.ignore):
        return False
    try:
        relative = path.relative_to(inbox.path)
    except ValueError:
        return False
    if len(relative.parts) > 1 and not inbox.recursive:
        return False
    return not any(part.startswith(".") for part in relative.parts[:-1])


def may_follow(inbox: Inbox, target: Path) -> bool:
    """Whether a file whose real path is ``target`` may be read for ``inbox``.

    A symbolic link out of the inbox (``passwd.csv`` → a system file) would have
    calwarden read, and quote in its outputs, whatever it may read; it is left
    unread unless the inbox allows it (``follow_links_outside``).
    """
    return inbox.follow_links_outside or target.is_relative_to(inbox.path)


@dataclass(frozen=True, slots=True)
class Listed:
    """A wanted file a rescan found: its path, its path in the inbox, its size and mtime."""

    path: Path
    relative: str
    size: int
    mtime_ns: int


def to_rescan(
    listed: Iterable[Listed], known: Mapping[str, tuple[int, int]], settling: Container[Path]
) -> list[Listed]:
    """The files a rescan makes candidates, oldest first.

    ``known`` is the ledger's (size, mtime) by path in the inbox; a file recorded
    exactly as it is now is skipped, as is one already settling.
    """
    new = [
        item
        for item in listed
        if item.path not in settling and known.get(item.relative) != (item.size, item.mtime_ns)
    ]
    return sorted(new, key=lambda item: item.mtime_ns)


def start(item: Listed, now: float, timing: Timing) -> Step:
    """A file a rescan found, as a new candidate."""
    return _settle(item.size, item.mtime_ns, now, timing)
