"""The watcher: notices every export the moment it is complete and judges it once.

Folder events are hints, never "file ready". The observer's handler only puts
a path on a queue; one worker thread does everything else. The decisions are
made by :mod:`calwarden.daemon.intake.settling` (pure); this module is their
driver: it looks at files, keeps the candidates and the times they are due,
and does what the decisions say:

* a path becomes a *candidate*, and is judged once its size and modification
  time have not changed for the settle time and it opens for reading (a file
  another program holds locked, as Windows reports while the instrument still
  writes, is tried again with backoff);
* at start-up and every ``rescan_seconds`` each inbox is compared with the
  ledger, which catches files that landed while the daemon was down and
  events the operating system dropped (inotify and ReadDirectoryChangesW drop
  events silently when their buffers overflow);
* the observer is checked every few seconds and restarted, with a rescan, if
  it died;
* delete events are ignored: the raw data belongs to the lab, and a verdict
  stays when its file goes.

The worker is handed the stores it writes (a :class:`~calwarden.daemon.stores.ledger.Ledger`:
files and evaluations, the control log, pictures, new alerts); the alert sender
(:mod:`calwarden.daemon.alerts.sender`, its own thread and connection) writes only
its outbox. A fault the worker cannot recover from (the ledger or the output
folder unwritable, the disk full) stops it with :attr:`Watcher.fault` set, after
an alert saying so; the command line then exits non-zero so that the service
manager restarts the daemon.
"""

from __future__ import annotations

import hashlib
import heapq
import itertools
import json
import os
import queue
import socket
import stat
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path, PurePosixPath

import structlog
from watchdog.events import FileSystemEvent, FileSystemEventHandler
from watchdog.observers import Observer
from watchdog.observers.api import BaseObserver
from watchdog.observers.polling import PollingObserver

from calwarden.daemon.alerts.sender import AlertSender, daemon_trouble, emergency_alert
from calwarden.daemon.intake import settling
from calwarden.daemon.intake.accept import Intake, Outcome, OutputError
from calwarden.daemon.intake.lock import StateLock
from calwarden.daemon.intake.notify import Notifier
from calwarden.daemon.intake.settling import (
    GiveUp,
    Judge,
    Listed,
    Locked,
    Looked,
    Observation,
    Read,
    ReadBack,
    Retry,
    Settling,
    Step,
    Unreadable,
    Vanished,
    Wait,
    wanted,
)
from calwarden.daemon.outputs.files import is_leftover_temporary
from calwarden.daemon.outputs.html_report import rewrite_with_pictures
from calwarden.daemon.outputs.overview import InboxPlace, SourceState, gather, write_overview
from calwarden.daemon.outputs.pictures import (
    CHARTS_FOLDER,
    ChartCriteria,
    draw_calibration,
    draw_series,
)
from calwarden.daemon.outputs.verdict_json import calwarden_version
from calwarden.daemon.outputs.verdict_model import VerdictDocument
from calwarden.daemon.parsing.decode import MAX_FILE_BYTES
from calwarden.daemon.settings.config import Inbox, WatchPlan
from calwarden.daemon.stores.database import LedgerError, StoreUnavailable
from calwarden.daemon.stores.engine import store_target
from calwarden.daemon.stores.ledger import Ledger
from calwarden.daemon.stores.outbox import Outbox
from calwarden.daemon.stores.owners import InboxOwners
from calwarden.daemon.stores.records import SeriesKey, timestamp
from calwarden.rules.criteria import Criteria

log = structlog.get_logger("calwarden")

_HINT_EVENTS = frozenset({"created", "modified", "moved", "closed"})
_MAX_WAIT = 1.0  # seconds the worker sleeps at most, so that a stop is seen promptly
_FAULT_ALERT_SECONDS = 10.0  # how long a faulted daemon waits for its alert to go
_PICTURE_BACKLOG = 50  # runs whose calibration pictures are drawn after a backlog
_DRAW_SLICE = 0.4  # seconds one picture may take; none is started closer to a file's turn


class StartError(Exception):
    """The daemon cannot start: the state folder is locked or cannot be opened."""


@dataclass(slots=True)
class _Candidate:
    inbox: Inbox
    path: Path
    state: Settling  # its state.due is when it is next checked; other heap entries are stale


@dataclass(order=True, slots=True)
class _Due:
    when: float
    order: int
    path: Path = field(compare=False)


@dataclass(slots=True)
class _RunPictures:
    """The calibration pictures of one judged run still to draw."""

    evaluation_id: int
    document: VerdictDocument
    folder: Path
    stem: str
    analytes: list[str]


class _Hints(FileSystemEventHandler):
    """Turns folder events into paths on the worker's queue; never does more."""

    def __init__(self, inbox: int, hints: queue.Queue[tuple[int, str] | None]) -> None:
        self._inbox = inbox
        self._hints = hints

    def on_any_event(self, event: FileSystemEvent) -> None:
        try:
            if event.event_type not in _HINT_EVENTS:
                return  # deletes are never acted on; our own reads raise "opened"/"closed_no_write"
            path = event.dest_path if event.event_type == "moved" else event.src_path
            self._hints.put((self._inbox, os.fsdecode(path)))
        except Exception as error:  # a handler that raises would kill the observer thread
            log.error("event_handler_failed", error=repr(error))


def _file_sha256(path: Path) -> str:
    with path.open("rb") as stream:
        return hashlib.file_digest(stream, "sha256").hexdigest()


class Watcher:
    """Watches the inboxes of a :class:`WatchPlan` until :meth:`stop`."""

    def __init__(
        self, plan: WatchPlan, *, on_outcome: Callable[[Outcome], None] | None = None
    ) -> None:
        self.plan = plan
        self.settings = plan.settings
        self.timing = settling.Timing(plan.settings.settle_seconds)
        self.fault: str | None = None
        self.outcomes = 0  # files settled and recorded (judged, duplicate or unchanged)
        self._on_outcome = on_outcome
        self._hints: queue.Queue[tuple[int, str] | None] = queue.Queue()
        self._stop = threading.Event()
        self._finished = threading.Event()
        self._idle = threading.Event()
        self._candidates: dict[Path, _Candidate] = {}
        self._due: list[_Due] = []
        self._order = itertools.count()
        self._observers: list[BaseObserver] = []
        self._lock = StateLock(plan.state_dir)
        self._ledger: Ledger | None = None
        self._thread: threading.Thread | None = None
        self._unreachable: set[str] = set()
        self._links_refused: set[Path] = set()  # logged once each, not at every rescan
        self._observer_failing = False
        self._stale_charts: dict[SeriesKey, None] = {}  # ordered: drawn oldest first
        self._pictures_pending = True  # checked in the ledger at start
        self._drawing: _RunPictures | None = None
        self._reports_due: dict[int, _RunPictures] = {}  # HTML reports to write with pictures
        self._overview_stale = True  # written when nothing is due, and every overview_seconds
        self._overview_next = 0.0
        self._silent_alerted: set[tuple[str, str | None]] = set()  # one alert per silence
        self.sender: AlertSender | None = None
        self.notifier = Notifier()  # systemd's Type=notify; does nothing without one
        # The charts' acceptance windows: the criteria of the inbox bound to an instrument.
        self._chart_criteria = ChartCriteria.of(
            plan.inboxes[0].config.criteria if plan.inboxes else Criteria(),
            [(inbox.instrument, inbox.config.criteria) for inbox in plan.inboxes],
        )

    # ------------------------------------------------------------------ life cycle

    def start(self) -> None:
        """Take the state folder's lock, open the ledger and start watching."""
        from calwarden.daemon.intake.lock import StateLocked

        try:
            self._lock.acquire()
        except StateLocked as error:
            raise StartError(str(error)) from None
        except OSError as error:
            raise StartError(
                f"cannot use the state folder {self.plan.state_dir}: {error}"
            ) from None
        try:
            target = store_target(self.plan.state_dir, self.plan.store)
            ledger = Ledger.open(target)
        except LedgerError as error:
            self._lock.release()
            # Exit 2, not 3: no restart repairs a ledger that does not open (README, exit codes).
            if isinstance(error, StoreUnavailable):
                hint = " (the ledger's server cannot be reached; check store.url and that it runs)"
            elif self.plan.store.url is not None:
                hint = ""  # the server said why
            else:
                hint = (
                    " (a damaged ledger: restore it from a backup, or move it aside "
                    "to start a new, empty one)"
                )
            raise StartError(f"{error}{hint}") from None
        try:
            self._claim_inboxes(ledger)
        except (LedgerError, StartError):
            ledger.close()
            self._lock.release()
            raise
        self._ledger = ledger
        self._intake = Intake(ledger, self.plan.inboxes, self.plan.alerts)
        if self.plan.alerts.enabled:
            self.sender = AlertSender(
                self.plan.state_dir,
                self.plan.alerts,
                self.plan.control,
                ledger=target,
                retry_seconds=self.plan.store.retry_seconds,
            )
            self.sender.criteria = self._chart_criteria  # its charts' acceptance windows
            self.sender.start()
        log.info(
            "daemon_started",
            pid=os.getpid(),
            calwarden_version=calwarden_version(),
            out=str(self.plan.out),
            state_dir=str(self.plan.state_dir),
            inboxes=[str(inbox.path) for inbox in self.plan.inboxes],
            settle_seconds=self.settings.settle_seconds,
            polling=[inbox.polling for inbox in self.plan.inboxes],
        )
        self._thread = threading.Thread(target=self._run, name="calwarden-worker", daemon=True)
        self._thread.start()
        self.notifier.ready()

    def _claim_inboxes(self, ledger: Ledger) -> None:
        """Own every inbox on a shared ledger (one daemon per inbox at a time), or refuse."""
        if not ledger.database.shared:
            return  # a PC's file: the state folder's lock is enough
        refused = InboxOwners(ledger.database).claim(
            [inbox.name for inbox in self.plan.inboxes],
            socket.gethostname(),
            os.getpid(),
            timestamp(),
        )
        if refused:
            owners = ", ".join(
                f"{owner.inbox} (by {owner.host}, process {owner.pid}, since {owner.claimed_at})"
                for owner in refused.values()
            )
            raise StartError(f"another daemon watches the inbox(es) {owners} on this ledger")

    def stop(self, timeout: float = 10.0) -> None:
        """Finish (or safely abandon) the file in hand, close the ledger, stop every thread."""
        self.notifier.stopping()
        self._stop.set()
        self._hints.put(None)  # wake the worker
        if self._thread is not None:
            self._thread.join(timeout)

    def wait(self, timeout: float | None = None) -> bool:
        """Block until the worker has ended (stopped or faulted); True if it has."""
        return self._finished.wait(timeout)

    def wait_idle(self, timeout: float) -> bool:
        """Block until nothing is queued or settling (for tests and the demo)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self._idle.wait(0.05) and self._hints.empty() and not self._candidates:
                return True
            if self._finished.is_set():
                return False
        return False

    def wait_pictures(self, timeout: float) -> bool:
        """Block until every pending picture is drawn (for the demo and tests)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline and not self._finished.is_set():
            if not self._due and not self._pictures_to_draw() and not self._overview_stale:
                return True
            time.sleep(0.05)
        return False

    @property
    def observers(self) -> list[BaseObserver]:
        return list(self._observers)

    # ------------------------------------------------------------------ the worker

    def _run(self) -> None:
        try:
            self._sweep_temporary_files()
            self._start_observers()
            self._scan_all("start")
            now = time.monotonic()
            next_rescan = now + self.settings.rescan_seconds
            next_check = now + self.settings.observer_check_seconds
            while not self._stop.is_set():
                self.notifier.watchdog()  # the loop turns at least once a second (_MAX_WAIT)
                try:
                    next_rescan, next_check = self._turn(next_rescan, next_check)
                except StoreUnavailable as error:
                    self._await_store(error)
        except (LedgerError, OutputError) as error:
            self._fail(str(error))
        except Exception as error:  # a bug of ours: stop loudly rather than run half-broken
            self._fail(f"internal error: {type(error).__name__}: {error}")
            log.exception("daemon_bug")
        finally:
            self._stop_observers()
            if self.sender is not None:
                if self.fault is not None:
                    # The fault's own alert: give the sender a moment to hand it over.
                    self.sender.wake()
                    self.sender.wait_settled(_FAULT_ALERT_SECONDS)
                self.sender.stop(self.plan.alerts.email.timeout_seconds + 5)
            if self._ledger is not None:
                self._ledger.close()
            self._lock.release()
            log.info("daemon_stopped", fault=self.fault, files=self.outcomes)
            self._finished.set()

    def _turn(self, next_rescan: float, next_check: float) -> tuple[float, float]:
        """One turn of the worker: take hints, check, rescan, judge what is due, draw."""
        now = time.monotonic()
        wake = min(next_rescan, next_check, self._due[0].when if self._due else now + 60)
        if not self._due and self._hints.empty():
            self._idle.set()
        else:
            self._idle.clear()
        # With a picture to draw and no file due soon, only look for hints; a file
        # due soon is waited for as usual (no spinning until its turn).
        drawing_next = self._pictures_to_draw() and self._quiet()
        wait = 0.0 if drawing_next else min(wake - now, _MAX_WAIT)
        self._take_hints(max(0.0, wait))
        now = time.monotonic()
        if now >= next_check:
            self._check_observers()
            next_check = now + self.settings.observer_check_seconds
        if now >= next_rescan:
            self._scan_all("periodic")
            next_rescan = time.monotonic() + self.settings.rescan_seconds
        self._settle_due()
        if self._quiet():
            self._draw_one()
        if time.monotonic() >= self._overview_next or (self._overview_stale and self._quiet()):
            self._refresh_overview()
        return next_rescan, next_check

    def _await_store(self, error: StoreUnavailable) -> None:
        """The ledger's server is away: pause judging until it is back, then rescan.

        Nothing is lost: the file in hand was not recorded (its record is one
        transaction), so the rescan after reconnecting finds it and every file that
        arrived meanwhile, and judges each once, writing the same outputs again for
        the file in hand. The alert goes by the emergency path (the outbox is on the
        server). A daemon that finds another owning its inboxes when the server is
        back stops with a fault rather than judge beside it.
        """
        assert self._ledger is not None
        log.error(
            "store_unavailable", reason=str(error), retry_seconds=self.plan.store.retry_seconds
        )
        self._daemon_alert(
            "store_unavailable",
            "the ledger's server cannot be reached; files wait in the inboxes and are judged "
            "when it is back",
            reason=str(error),
        )
        started = time.monotonic()
        while not self._stop.wait(self.plan.store.retry_seconds):
            try:
                self._ledger.database.reconnect()
                self._claim_inboxes(self._ledger)
                self._candidates.clear()
                self._due.clear()
                self._drawing = None
                self._pictures_pending = True
                self._scan_all("store_back")
            except StoreUnavailable:
                continue
            except StartError as refused:
                raise LedgerError(str(refused)) from None
            away = round(time.monotonic() - started, 1)
            log.info("store_back", away_seconds=away)
            self._daemon_alert(
                "store_back", f"the ledger's server is back after {away} s; judging goes on"
            )
            return

    def _fail(self, message: str) -> None:
        self.fault = message
        log.critical("daemon_fault", reason=message)
        self._daemon_alert(
            "daemon_fault",
            "calwarden stopped after a fault; files are not being judged until it runs again",
            reason=message,
        )

    def _daemon_alert(self, event: str, message: str, **details: object) -> None:
        """Put the daemon's own trouble in the outbox; if the ledger itself is the trouble,
        write the message straight to the outbox folder."""
        if not self.plan.alerts.enabled or "daemon" not in self.plan.alerts.kinds:
            return
        alert = daemon_trouble(event, message, **details)
        try:
            if self._ledger is None:
                raise LedgerError("the ledger is not open")
            self._ledger.alerts.record(alert)
        except LedgerError as error:
            # Not "event=": that is the log call's own first argument.
            log.error("alert_not_recorded", alert_event=event, error=str(error))
            emergency_alert(self.plan.state_dir, self.plan.alerts, alert)
            return
        if self.sender is not None:
            self.sender.wake()

    def _take_hints(self, timeout: float) -> None:
        try:
            hint = self._hints.get(timeout=timeout)
        except queue.Empty:
            return
        for _ in range(10_000):  # a burst is drained at once, but never forever
            if hint is not None:
                index, raw = hint
                self._note(self.plan.inboxes[index], Path(raw))
            try:
                hint = self._hints.get_nowait()
            except queue.Empty:
                return

    def _note(self, inbox: Inbox, path: Path) -> None:
        """A hint about a path: start watching it settle, or restart its settle time."""
        try:
            info = path.stat()
        except OSError:
            return  # gone again (a temporary file renamed away): nothing to judge
        waiting = self._candidates.get(path)
        if waiting is not None:
            seen = settling.Hinted(info.st_size, info.st_mtime_ns)
            self._follow(waiting, settling.step(waiting.state, seen, time.monotonic(), self.timing))
            return
        if stat.S_ISDIR(info.st_mode):
            if inbox.recursive:
                self._scan(inbox, path)  # a folder moved in brings files no event announces
            return
        if not stat.S_ISREG(info.st_mode) or not wanted(inbox, path):
            return
        if self._link_outside(inbox, path):
            return
        assert self._ledger is not None
        recorded = self._ledger.files.seen(inbox.name, path.relative_to(inbox.path).as_posix())
        seen = settling.Hinted(
            info.st_size,
            info.st_mtime_ns,
            None if recorded is None else (recorded.size, recorded.mtime_ns),
        )
        step = settling.step(None, seen, time.monotonic(), self.timing)
        if step.state is not None:
            self._follow(_Candidate(inbox, path, step.state), step)

    def _follow(
        self,
        candidate: _Candidate,
        step: Step,
        read: tuple[Observation, bytes | None, str] | None = None,
    ) -> None:
        """Do what a settling step says; ``read`` is what reading the file gave, if it was."""
        path = candidate.path
        action = step.action
        if step.state is None:
            self._candidates.pop(path, None)
        else:
            candidate.state = step.state
            self._candidates[path] = candidate
        if isinstance(action, Wait | Retry):
            heapq.heappush(self._due, _Due(action.due, next(self._order), path))
        if isinstance(action, Retry | GiveUp):
            relative = path.relative_to(candidate.inbox.path).as_posix()
            observed = read[0] if read is not None else None
            details: dict[str, object] = (
                {"error": observed.error} if isinstance(observed, Unreadable) else {"locked": True}
            )
            if isinstance(action, GiveUp):
                # Not lost: unrecorded, so the next rescan tries it again.
                log.error(
                    action.event, inbox=candidate.inbox.name, path=relative, gave_up=True, **details
                )
            elif action.first:
                log.warning(action.event, inbox=candidate.inbox.name, path=relative, **details)
        if isinstance(action, Judge):
            assert read is not None
            _, data, sha256 = read
            self._process(candidate, data, sha256, action.size, action.mtime_ns)

    def _settle_due(self) -> None:
        while self._due and self._due[0].when <= time.monotonic() and not self._stop.is_set():
            entry = heapq.heappop(self._due)
            candidate = self._candidates.get(entry.path)
            if candidate is not None and candidate.state.due == entry.when:
                self._check_candidate(candidate)

    def _check_candidate(self, candidate: _Candidate) -> None:
        try:
            info = candidate.path.stat()
        except OSError:
            looked: Observation = Vanished()
        else:
            looked = Looked(info.st_size, info.st_mtime_ns)
        step = settling.step(candidate.state, looked, time.monotonic(), self.timing)
        if not isinstance(step.action, Read):
            self._follow(candidate, step)
            return
        assert step.state is not None
        if self._link_outside(candidate.inbox, candidate.path):
            self._candidates.pop(candidate.path, None)  # made a link while settling
            return
        read = self._read(candidate.path, step.state.size)
        self._follow(
            candidate, settling.step(step.state, read[0], time.monotonic(), self.timing), read
        )

    def _link_outside(self, inbox: Inbox, path: Path) -> bool:
        """Whether ``path`` leads out of its inbox and stays unread (``settling.may_follow``).

        Such a link is skipped without being opened, and logged once.
        """
        if inbox.follow_links_outside:
            return False
        try:
            target = path.resolve(strict=True)
        except (OSError, RuntimeError):
            return False  # gone, or a loop: the stat or read that follows says so
        if settling.may_follow(inbox, target):
            self._links_refused.discard(path)
            return False
        if path not in self._links_refused:
            self._links_refused.add(path)
            log.warning(
                "link_outside_inbox",
                inbox=inbox.name,
                path=path.relative_to(inbox.path).as_posix(),
                target=str(target),
            )
        return True

    @staticmethod
    def _read(path: Path, size: int) -> tuple[Observation, bytes | None, str]:
        """Read a settled file once: what reading it showed, its bytes, their SHA-256."""
        data: bytes | None = None
        try:
            if size > MAX_FILE_BYTES:
                sha256 = _file_sha256(path)  # judged as too large without being loaded
            else:
                with path.open("rb") as stream:
                    data = stream.read(MAX_FILE_BYTES + 1)
                sha256 = hashlib.sha256(data).hexdigest()
            after = path.stat()
        except FileNotFoundError:
            return Vanished(), None, ""
        except PermissionError:
            # Windows: the instrument's software still holds the file open.
            return Locked(), None, ""
        except OSError as error:
            return Unreadable(repr(error)), None, ""
        length = None if data is None else len(data)
        return ReadBack(after.st_size, after.st_mtime_ns, length), data, sha256

    def _process(
        self, candidate: _Candidate, data: bytes | None, sha256: str, size: int, mtime_ns: int
    ) -> None:
        outcome = self._intake.process(
            candidate.inbox, candidate.path, data, sha256, size, mtime_ns
        )
        self.outcomes += 1
        if self.sender is not None and outcome.status in ("fail", "error", "pass"):
            self.sender.wake()  # a control alert can come with a pass
        self._stale_charts.update(dict.fromkeys(outcome.series))
        self._overview_stale = True
        if outcome.verdict_path is not None:
            self._pictures_pending = True
        if self._on_outcome is not None and outcome.status != "unchanged":
            try:
                self._on_outcome(outcome)
            except Exception as error:  # a listener's bug must not stop the watching
                log.error("outcome_listener_failed", error=repr(error))

    # ------------------------------------------------------------------ pictures

    def _pictures_to_draw(self) -> bool:
        charts_on = self.plan.inboxes[0].config.control.charts
        busy = self._pictures_pending or self._drawing is not None or bool(self._stale_charts)
        return charts_on and (busy or bool(self._reports_due))

    def _quiet(self) -> bool:
        """Nothing to judge soon: time for a picture (a file arriving waits for one at most)."""
        if not self._hints.empty():
            return False
        return not self._due or self._due[0].when > time.monotonic() + _DRAW_SLICE

    def _draw_one(self) -> None:
        """Draw one picture: one calibration of a judged run, or one stale control chart.

        One at a time (about 0.2 s each), so that a file arriving meanwhile waits for one
        picture at most. Pictures are derived from the ledger: a failure to draw is
        logged and the daemon goes on. A run is marked drawn once its last picture is
        done (or failed), so a restart draws what a stop left undrawn.
        """
        control = self.plan.inboxes[0].config.control
        if not control.charts:
            return
        assert self._ledger is not None
        try:
            if self._drawing is None and self._pictures_pending:
                self._next_run_to_draw()
            if self._drawing is not None:
                self._draw_next_calibration()
                return
            if self._stale_charts:
                key = next(iter(self._stale_charts))
                try:
                    draw_series(
                        self._ledger.control,
                        control,
                        self.plan.out / CHARTS_FOLDER,
                        (key,),
                        self._chart_criteria,
                    )
                finally:
                    self._stale_charts.pop(key, None)  # after drawing: wait_pictures sees it
                    self._overview_stale = True  # it links the charts drawn
            elif self._reports_due:
                self._rewrite_report(self._reports_due.pop(next(iter(self._reports_due))))
        except LedgerError:
            raise
        except Exception as error:  # a picture is never worth stopping the daemon for
            log.error("picture_failed", error=repr(error))

    def _next_run_to_draw(self) -> None:
        assert self._ledger is not None
        pending = self._ledger.pictures.pending(limit=_PICTURE_BACKLOG + 1)
        if len(pending) > _PICTURE_BACKLOG:
            # A backlog of old files (a first start on a full export folder) would keep
            # the daemon drawing for hours: only the newest runs get pictures.
            skipped = self._ledger.pictures.skip_old(_PICTURE_BACKLOG)
            log.info("pictures_skipped", runs=skipped, kept=_PICTURE_BACKLOG)
            pending = pending[:_PICTURE_BACKLOG]
        if not pending:
            self._pictures_pending = False
            return
        evaluation_id, inbox_name, stem = pending[0]
        inbox = next((i for i in self.plan.inboxes if i.name == inbox_name), None)
        document = json.loads(self._ledger.files.outputs_of(evaluation_id)[0])
        analytes = list(document.get("calibrations") or {}) if inbox is not None else []
        pure = PurePosixPath(stem)
        folder = (inbox.out_dir if inbox is not None else self.plan.out) / pure.parent
        self._drawing = _RunPictures(evaluation_id, document, folder, pure.name, analytes)

    def _draw_next_calibration(self) -> None:
        assert self._ledger is not None and self._drawing is not None
        drawing = self._drawing
        try:
            if drawing.analytes:
                analyte = drawing.analytes.pop(0)
                draw_calibration(drawing.document, drawing.folder, drawing.stem, analyte)
        finally:
            if not drawing.analytes:
                # Marked even when drawing failed (and said so): never retried in a loop.
                self._drawing = None
                self._ledger.pictures.mark_drawn(drawing.evaluation_id)
                self._reports_due[drawing.evaluation_id] = drawing  # once its charts are drawn

    def _rewrite_report(self, drawing: _RunPictures) -> None:
        """The run's HTML report again, with its pictures, unless a newer version replaced it."""
        assert self._ledger is not None
        document_bytes, _ = self._ledger.files.outputs_of(drawing.evaluation_id)
        try:
            on_disk = (drawing.folder / f"{drawing.stem}.verdict.json").read_bytes()
        except OSError:
            return
        if on_disk != document_bytes:
            return  # judged again since: the newer version's report stands
        config_sha256, evaluated_at = self._ledger.files.provenance(drawing.evaluation_id)
        rewrite_with_pictures(
            drawing.document,
            drawing.folder,
            drawing.stem,
            self.plan.out / CHARTS_FOLDER,
            config_sha256=config_sha256,
            evaluated_at=evaluated_at,
        )

    # ------------------------------------------------------------------ overview

    def _refresh_overview(self) -> None:
        """Write ``<out>/index.html`` and alert once for each instrument gone silent."""
        assert self._ledger is not None
        settings = self.settings
        self._overview_stale = False
        self._overview_next = time.monotonic() + settings.overview_seconds
        places = [InboxPlace(i.name, i.instrument, i.out_dir) for i in self.plan.inboxes]
        try:
            overview = gather(
                self._ledger.files,
                Outbox(self._ledger.database) if self.plan.alerts.enabled else None,
                self._ledger.control,
                places,
                self.plan.out,
                days=settings.overview_days,
                silent_after_hours=settings.silent_after_hours,
                now=datetime.now(UTC),
            )
            write_overview(self.plan.out, overview, settings.overview_seconds)
        except LedgerError:
            raise
        except Exception as error:  # the page is never worth stopping the daemon for
            log.error("overview_failed", error=repr(error))
            return
        self._alert_silence(overview.sources)

    def _alert_silence(self, sources: tuple[SourceState, ...]) -> None:
        for source in sources:
            key = (source.inbox, source.instrument)
            if not source.silent:
                self._silent_alerted.discard(key)  # heard again: a new silence alerts again
            elif key not in self._silent_alerted and source.last is not None:
                self._silent_alerted.add(key)
                log.warning(
                    "instrument_silent",
                    inbox=source.inbox,
                    instrument=source.instrument,
                    last_file=source.last.path,
                    last_at=source.last.evaluated_at,
                )
                self._daemon_alert(
                    "instrument_silent",
                    f"no file from {source.instrument or source.inbox} for more than "
                    f"{self.settings.silent_after_hours:g} hours",
                    inbox=source.inbox,
                    instrument=source.instrument,
                    last_file=source.last.path,
                    last_at=source.last.evaluated_at,
                )

    # ------------------------------------------------------------------ scans

    def _scan_all(self, reason: str) -> None:
        found = sum(self._scan(inbox, inbox.path) for inbox in self.plan.inboxes)
        if found:
            log.info("rescan_found", reason=reason, files=found)

    def _walk(self, inbox: Inbox, folder: Path) -> Iterator[os.DirEntry[str]]:
        with os.scandir(folder) as entries:
            for entry in entries:
                if entry.is_dir(follow_symlinks=False):
                    if inbox.recursive and not entry.name.startswith("."):
                        yield from self._walk(inbox, Path(entry.path))
                elif entry.is_file():
                    yield entry

    def _scan(self, inbox: Inbox, folder: Path) -> int:
        """Queue every wanted file of ``folder`` that the ledger does not know as it is now."""
        assert self._ledger is not None
        found = 0
        try:
            entries = list(self._walk(inbox, folder))
        except OSError as error:
            if inbox.name not in self._unreachable:
                log.error(
                    "inbox_unreachable", inbox=inbox.name, path=str(folder), error=repr(error)
                )
                self._unreachable.add(inbox.name)
                self._daemon_alert(
                    "inbox_unreachable",
                    f"the inbox {inbox.name} cannot be read; files written there are not "
                    "being judged",
                    path=str(folder),
                    error=repr(error),
                )
            return 0
        if inbox.name in self._unreachable and folder == inbox.path:
            log.info("inbox_reachable", inbox=inbox.name, path=str(folder))
            self._unreachable.discard(inbox.name)
        known = self._ledger.files.seen_in(inbox.name)
        listed: list[Listed] = []
        for entry in entries:
            path = Path(entry.path)
            if path in self._candidates or not wanted(inbox, path):
                continue
            if entry.is_symlink() and self._link_outside(inbox, path):
                continue
            try:
                info = entry.stat()
            except OSError:
                continue
            relative = path.relative_to(inbox.path).as_posix()
            listed.append(Listed(path, relative, info.st_size, info.st_mtime_ns))
        for item in settling.to_rescan(listed, known, self._candidates):
            step = settling.start(item, time.monotonic(), self.timing)
            assert step.state is not None
            self._follow(_Candidate(inbox, item.path, step.state), step)
            found += 1
        return found

    def _sweep_temporary_files(self) -> None:
        """Remove half-written outputs and pictures a killed daemon left (nothing else)."""
        folders = {self.plan.out, *(inbox.out_dir for inbox in self.plan.inboxes)}
        for top in folders:
            if not top.is_dir():
                continue
            for folder, _, names in os.walk(top):
                for name in names:
                    if is_leftover_temporary(name):
                        path = Path(folder) / name
                        path.unlink(missing_ok=True)
                        log.info("temporary_file_removed", path=str(path))

    # ------------------------------------------------------------------ observers

    def _start_observers(self) -> None:
        self._observers = []
        native = [i for i, inbox in enumerate(self.plan.inboxes) if not inbox.polling]
        polling = [i for i, inbox in enumerate(self.plan.inboxes) if inbox.polling]
        if native:
            try:
                self._observers.append(self._observer(Observer(), native))
            except OSError as error:
                # e.g. the inotify watch limit: listing the folder still works.
                log.warning("native_events_unavailable", error=repr(error), fallback="polling")
                polling = polling + native
        if polling:
            interval = self.settings.polling_interval_seconds
            self._observers.append(self._observer(PollingObserver(timeout=interval), polling))

    def _observer(self, observer: BaseObserver, inboxes: list[int]) -> BaseObserver:
        for index in inboxes:
            inbox = self.plan.inboxes[index]
            observer.schedule(
                _Hints(index, self._hints), str(inbox.path), recursive=inbox.recursive
            )
        observer.daemon = True
        try:
            observer.start()
        except BaseException:
            observer.stop()
            raise
        return observer

    def _observers_alive(self) -> bool:
        if not self._observers:
            return False  # a restart that failed: try again at the next check
        return all(
            observer.is_alive() and all(emitter.is_alive() for emitter in observer.emitters)
            for observer in self._observers
        )

    def _check_observers(self) -> None:
        if self._observers_alive():
            if self._observer_failing:
                log.info("observer_recovered")
                self._observer_failing = False
            return
        if not self._observer_failing:
            log.warning("observer_restarted", reason="the folder observer had stopped")
            self._daemon_alert(
                "observer_restarted",
                "the folder observer had stopped and was restarted; a rescan follows, so no "
                "file is missed",
            )
        self._stop_observers()
        try:
            self._start_observers()
        except OSError as error:  # e.g. the inbox is gone for now; tried again next check
            if not self._observer_failing:  # said once, not at every check
                log.error("observer_start_failed", error=repr(error))
            self._observer_failing = True
            self._stop_observers()
            return
        self._scan_all("observer restarted")

    def _stop_observers(self) -> None:
        for observer in self._observers:
            try:
                observer.stop()
                if observer.is_alive():
                    observer.join(timeout=5)
            except Exception as error:
                log.warning("observer_stop_failed", error=repr(error))
        self._observers = []
