"""The alert outbox as the daemon runs it: real SMTP and HTTP servers, real ledgers, real kills.

An aiosmtpd Controller on 127.0.0.1 stands for the lab's mail server and a
ThreadingHTTPServer for a chat tool's webhook; the watcher runs in-process
(one test runs `calwarden watch` as a process and kills it with SIGKILL).
Every wait is a poll with a deadline, and every server, watcher and process a
test starts is stopped by a fixture.
"""

from __future__ import annotations

import asyncio
import email
import hashlib
import json
import os
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import closing
from dataclasses import dataclass, field
from email.message import EmailMessage, Message
from email.policy import default as default_policy
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import pytest
import yaml
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import SMTP as SMTPServer
from aiosmtpd.smtp import Envelope, Session
from mail_server import free_port
from waiting import wait_for

import calwarden.daemon.intake.watcher as watcher_module
from calwarden.daemon.alerts.sender import AlertSender
from calwarden.daemon.alerts.settings import AlertSettings
from calwarden.daemon.intake.accept import Intake, Outcome
from calwarden.daemon.intake.watcher import Watcher
from calwarden.daemon.settings.config import WatchPlan, build_config, plan_watch
from calwarden.daemon.settings.control import ControlSettings
from calwarden.daemon.stores.database import LEDGER_NAME
from calwarden.daemon.stores.ledger import Ledger
from calwarden.daemon.stores.records import NewEvaluation

PROJECT = Path(__file__).resolve().parent.parent
FIXTURES = PROJECT / "fixtures"
FAILING = FIXTURES / "bwl-metals-fail.csv"
PASSING = FIXTURES / "bwl-metals-pass.csv"
BROKEN = FIXTURES / "bwl-bad-missing-nominal.csv"
FAILING_RUN = "BWL-ICPMS-2-20261124-A"  # the run column of the failing fixture
SETTLE = 0.1
PROCESS_DEADLINE = 20.0  # a `calwarden watch` process starting on a loaded 2-core machine
SENDER = "calwarden@brindlewick.example"
QC_LEAD = "qc-lead@brindlewick.example"
FAST_RETRY = {"first_seconds": 0.05, "max_seconds": 0.2}

posix_only = pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals")


# --------------------------------------------------------------------------- helpers


def failing_run(name: str) -> bytes:
    """The failing fixture with its own run name: the same failures, distinct content."""
    text = FAILING.read_text(encoding="utf-8")
    assert FAILING_RUN in text
    return text.replace(FAILING_RUN, name).encode("utf-8")


def email_settings(port: int, **extra: object) -> dict[str, object]:
    return {
        "host": "127.0.0.1",
        "port": port,
        "security": "none",
        "sender": SENDER,
        "to": [QC_LEAD],
        "timeout_seconds": 10,
        **extra,
    }


def plan_for(
    inbox: Path, out: Path, alerts: dict[str, Any] | None = None, **watch: object
) -> WatchPlan:
    """A plan for one inbox, pictures off; ``alerts`` is the configuration's alerts section."""
    config = build_config(
        {"watch": watch, "control": {"charts": False}, "alerts": alerts or {}}, "test"
    )
    return plan_watch(config, inbox=inbox, out=out, settle_seconds=SETTLE)


def query(ledger: Path, sql: str, parameters: tuple[object, ...] = ()) -> list[tuple[Any, ...]]:
    """Rows from the ledger, read-only beside the daemon writing it; [] while it does not exist."""
    if not ledger.exists():
        return []
    try:
        with closing(sqlite3.connect(f"{ledger.as_uri()}?mode=ro", uri=True, timeout=5)) as db:
            return db.execute(sql, parameters).fetchall()
    except sqlite3.OperationalError:
        return []  # the schema is still being made


def deliveries(ledger: Path) -> list[tuple[Any, ...]]:
    """(alert id, channel, state, attempts) of every delivery."""
    return query(
        ledger, "SELECT alert_id, channel, state, attempts FROM deliveries ORDER BY alert_id"
    )


def outbox_files(plan: WatchPlan) -> list[Path]:
    folder = plan.state_dir / "outbox"
    return sorted(folder.glob("*.eml")) if folder.is_dir() else []


def parse(data: bytes) -> EmailMessage:
    message = email.message_from_bytes(data, policy=default_policy)
    assert isinstance(message, EmailMessage)
    return message


def plain_text(message: EmailMessage) -> str:
    body = message.get_body(preferencelist=("plain",))
    assert body is not None
    text: str = body.get_content()  # type: ignore[attr-defined]
    return text


def named(events: list[dict[str, Any]], name: str) -> list[dict[str, Any]]:
    return [event for event in events if event["event"] == name]


# --------------------------------------------------------------------------- the mail server


class Mailbox:
    """An aiosmtpd handler keeping every message; it can hold the first one back in DATA."""

    def __init__(self, *, hold_first: bool = False) -> None:
        self.hold_first = hold_first
        self.received: list[bytes] = []  # every message that reached DATA, held one included
        self.accepted: list[bytes] = []  # those answered 250
        self.holding = threading.Event()  # the first message is in DATA, unanswered
        self.release = threading.Event()  # let it go (with a 451)

    async def handle_DATA(self, server: SMTPServer, session: Session, envelope: Envelope) -> str:
        content = envelope.original_content or envelope.content
        assert isinstance(content, bytes)
        self.received.append(content)
        if self.hold_first and len(self.received) == 1:
            self.holding.set()
            while not self.release.is_set():  # the server's event loop must go on meanwhile
                await asyncio.sleep(0.02)
            return "451 4.3.0 held back by the test; try again later"
        self.accepted.append(content)
        return "250 2.0.0 OK"

    def messages(self) -> list[EmailMessage]:
        return [parse(data) for data in list(self.accepted)]


@pytest.fixture
def smtp() -> Iterator[Callable[[Mailbox], int]]:
    """Start an SMTP server on 127.0.0.1 for a Mailbox; returns its port. Stopped after."""
    started: list[tuple[Controller, Mailbox]] = []

    def _start(mailbox: Mailbox) -> int:
        port = free_port()
        controller = Controller(mailbox, hostname="127.0.0.1", port=port)
        controller.start()
        started.append((controller, mailbox))
        return port

    try:
        yield _start
    finally:
        for controller, mailbox in started:
            mailbox.release.set()
            controller.stop()


# --------------------------------------------------------------------------- the webhook


@dataclass
class Hook:
    """A webhook answering each POST with the next status of ``replies`` (the last repeats)."""

    replies: tuple[int, ...]
    url: str = ""
    posts: list[dict[str, Any]] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def reply_to(self, body: bytes) -> int:
        with self.lock:
            self.posts.append(json.loads(body))
            return self.replies[min(len(self.posts), len(self.replies)) - 1]


@pytest.fixture
def webhook() -> Iterator[Callable[..., Hook]]:
    """Start an HTTP server on 127.0.0.1 in a thread for a Hook; shut down after the test."""
    servers: list[tuple[ThreadingHTTPServer, threading.Thread]] = []

    def _start(*replies: int) -> Hook:
        hook = Hook(replies)

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                body = self.rfile.read(int(self.headers.get("Content-Length", "0")))
                self.send_response(hook.reply_to(body))
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, format: str, *args: object) -> None:
                pass  # quiet: the test reads the posts, not the access log

        server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        thread = threading.Thread(
            target=server.serve_forever, kwargs={"poll_interval": 0.05}, name="test-webhook"
        )
        thread.start()
        servers.append((server, thread))
        hook.url = f"http://127.0.0.1:{server.server_address[1]}/hook"
        return hook

    try:
        yield _start
    finally:
        for server, thread in servers:
            server.shutdown()
            server.server_close()
            thread.join(5)


# --------------------------------------------------------------------------- the watcher


@dataclass
class Running:
    watcher: Watcher
    outcomes: list[Outcome] = field(default_factory=list)

    @property
    def ledger(self) -> Path:
        return self.watcher.plan.state_dir / LEDGER_NAME

    def wait_outcomes(self, count: int, timeout: float = 15.0) -> list[Outcome]:
        wait_for(lambda: len(self.outcomes) >= count, timeout, f"{count} outcome(s)")
        assert self.watcher.fault is None
        return list(self.outcomes)


@pytest.fixture
def start(events: list[dict[str, Any]]) -> Iterator[Callable[[WatchPlan], Running]]:
    """Start in-process watchers (and so their alert senders); all stopped after the test."""
    started: list[Watcher] = []

    def _start(plan: WatchPlan) -> Running:
        outcomes: list[Outcome] = []
        watcher = Watcher(plan, on_outcome=outcomes.append)
        watcher.start()
        started.append(watcher)
        return Running(watcher, outcomes)

    try:
        yield _start
    finally:
        for watcher in started:
            watcher.stop()
        for watcher in started:
            assert watcher.wait(15), "the worker did not end"


# --------------------------------------------------------------------------- the process


def _environment() -> dict[str, str]:
    """The test's environment with this checkout first on the import path."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(
        part for part in (str(PROJECT), env.get("PYTHONPATH")) if part
    )
    return env


@pytest.fixture
def spawn(tmp_path: Path) -> Iterator[Callable[..., subprocess.Popen[bytes]]]:
    """Start `calwarden watch ARGS...`; every process started is killed after the test."""
    started: list[subprocess.Popen[bytes]] = []

    def _spawn(*args: object) -> subprocess.Popen[bytes]:
        number = len(started)
        with (
            (tmp_path / f"watch-{number}.stdout").open("wb") as stdout,
            (tmp_path / f"watch-{number}.stderr").open("wb") as stderr,
        ):
            process = subprocess.Popen(
                [sys.executable, "-m", "calwarden.daemon", "watch", *map(str, args)],
                cwd=tmp_path,
                env=_environment(),
                stdin=subprocess.DEVNULL,
                stdout=stdout,
                stderr=stderr,
            )
        started.append(process)
        return process

    try:
        yield _spawn
    finally:
        for process in started:
            if process.poll() is None:
                process.kill()
            process.wait(timeout=15)


# --------------------------------------------------------------------------- kill -9


@posix_only
def test_kill_9_mid_delivery_then_restart_delivers_the_alert_once_more_at_most(
    spawn: Callable[..., subprocess.Popen[bytes]],
    smtp: Callable[[Mailbox], int],
    tmp_path: Path,
    inbox: Path,
) -> None:
    """A daemon killed while the server holds its alert in DATA delivers it after a restart."""
    mailbox = Mailbox(hold_first=True)
    port = smtp(mailbox)
    out = tmp_path / "out"
    ledger = out / ".calwarden" / LEDGER_NAME
    config = tmp_path / "calwarden.yaml"
    settings = {
        "control": {"charts": False},
        "alerts": {"email": email_settings(port), "retry": FAST_RETRY},
    }
    config.write_text(yaml.safe_dump(settings), encoding="utf-8")
    shutil.copyfile(FAILING, inbox / FAILING.name)  # found by the start-up scan
    arguments = (inbox, "--out", out, "--config", config, "--settle", SETTLE)

    first = spawn(*arguments)
    assert mailbox.holding.wait(PROCESS_DEADLINE), (tmp_path / "watch-0.stderr").read_text()
    first.kill()
    assert first.wait(timeout=15) == -signal.SIGKILL
    mailbox.release.set()  # the held session now answers 451 to a connection that is gone

    second = spawn(*arguments)
    wait_for(lambda: mailbox.accepted, PROCESS_DEADLINE, "the alert delivered after the restart")
    wait_for(
        lambda: [row[2] for row in deliveries(ledger)] == ["sent"],
        PROCESS_DEADLINE,
        "the delivery recorded as sent",
    )
    second.terminate()
    assert second.wait(timeout=15) == 0, (tmp_path / "watch-1.stderr").read_text()
    assert "Traceback" not in (tmp_path / "watch-1.stderr").read_text()

    assert 1 <= len(mailbox.accepted) <= 2  # one identical resend at most
    message_ids = {parse(data)["Message-ID"] for data in mailbox.received}
    assert len(message_ids) == 1  # the held copy and every delivered one
    assert query(ledger, "SELECT kind, state FROM alerts") == [("fail", "released")]
    ((_, channel, state, _),) = deliveries(ledger)
    assert (channel, state) == ("email", "sent")


# --------------------------------------------------------------------------- throttle


def test_fifty_failures_at_once_give_three_messages_and_one_digest_naming_the_rest(
    inbox: Path,
    out: Path,
    start: Callable[[WatchPlan], Running],
    smtp: Callable[[Mailbox], int],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Beyond the throttle's 3 messages the other 47 alerts go as one digest naming each run."""
    offset = [0.0]  # the sender's clock runs ahead by this much: the window passes at once

    class ClockedSender(AlertSender):
        def __init__(
            self,
            state_dir: Path,
            settings: AlertSettings,
            control: ControlSettings | None = None,
            **options: Any,
        ) -> None:
            super().__init__(
                state_dir, settings, control, clock=lambda: time.time() + offset[0], **options
            )

    monkeypatch.setattr(watcher_module, "AlertSender", ClockedSender)
    mailbox = Mailbox()
    throttle = {"max_messages": 3, "window_minutes": 10}
    plan = plan_for(inbox, out, {"email": email_settings(smtp(mailbox)), "throttle": throttle})
    running = start(plan)
    runs = [f"BWL-ICPMS-2-20261124-R{number:02d}" for number in range(50)]
    for number, run in enumerate(runs):
        (inbox / f"run-{number:02d}.csv").write_bytes(failing_run(run))

    assert {o.status for o in running.wait_outcomes(50, timeout=30)} == {"fail"}
    wait_for(
        lambda: (
            query(running.ledger, "SELECT COUNT(*) FROM alerts WHERE state = 'gathered'") == [(47,)]
        ),
        what="47 alerts gathered",
    )
    wait_for(lambda: len(mailbox.accepted) == 3, what="the 3 messages the throttle allows")
    offset[0] = 11 * 60.0
    assert running.watcher.sender is not None
    running.watcher.sender.wake()
    wait_for(lambda: len(mailbox.accepted) == 4, what="the digest")
    assert running.watcher.sender.wait_settled(15)

    messages = mailbox.messages()
    assert [m["X-Calwarden-Alert"] for m in messages] == ["fail", "fail", "fail", "digest"]
    digest = messages[-1]
    assert "47 alerts held back" in digest["Subject"]
    alone = query(
        running.ledger,
        "SELECT run FROM evaluations e JOIN alerts a ON a.evaluation_id = e.id "
        "WHERE a.digest_id IS NULL",
    )
    rest = [run for run in runs if (run,) not in alone]
    assert len(rest) == 47
    text = plain_text(digest)
    assert [run for run in rest if f"FAIL {run}:" not in text] == []
    states = query(running.ledger, "SELECT kind, state, COUNT(*) FROM alerts GROUP BY kind, state")
    assert sorted(states) == [("digest", "released", 1), ("fail", "released", 50)]
    assert len(outbox_files(plan)) == 4  # gathered alerts have no message of their own


# --------------------------------------------------------------------------- dedupe


def test_the_same_file_version_judged_twice_raises_one_alert(
    inbox: Path, out: Path, tmp_path: Path
) -> None:
    """A file version judged again (as after a crash before the commit) gives one alert row."""
    plan = plan_for(inbox, out)
    path = inbox / FAILING.name
    shutil.copyfile(FAILING, path)
    data = path.read_bytes()
    info = path.stat()
    recorded: list[NewEvaluation] = []

    class RecordingLedger(Ledger):
        def record_evaluation(self, new: NewEvaluation) -> int:
            recorded.append(new)
            return super().record_evaluation(new)

    sha256 = hashlib.sha256(data).hexdigest()
    ledger_path = plan.state_dir / LEDGER_NAME
    ledgers = [
        RecordingLedger.open(ledger_path),
        RecordingLedger.open(tmp_path / "fresh" / LEDGER_NAME),
    ]
    try:
        for ledger in ledgers:  # the second: the ledger as it was before the first commit
            Intake(ledger, plan.inboxes, plan.alerts).process(
                plan.inboxes[0], path, data, sha256, info.st_size, info.st_mtime_ns
            )
        first, again = recorded
        assert first.alert is not None and again.alert is not None
        assert again.alert.dedupe_key == first.alert.dedupe_key
        ledgers[0].record_evaluation(again)  # the second judgement reaches the first ledger
    finally:
        for ledger in ledgers:
            ledger.close()

    assert query(ledger_path, "SELECT COUNT(*) FROM evaluations") == [(2,)]
    assert query(ledger_path, "SELECT dedupe_key, created_at FROM alerts") == [
        (f"fail:{plan.inboxes[0].name}:{FAILING.name}:v1:{sha256}", first.evaluated_at)
    ]


# --------------------------------------------------------------------------- what raises one


def test_a_file_that_cannot_be_judged_raises_an_error_alert(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """An error verdict raises an `error` alert whose subject says ERROR and names the file."""
    plan = plan_for(inbox, out)
    running = start(plan)
    shutil.copyfile(BROKEN, inbox / BROKEN.name)

    (outcome,) = running.wait_outcomes(1)
    assert outcome.status == "error"
    wait_for(lambda: outbox_files(plan), what="the alert's message")
    (message,) = [parse(path.read_bytes()) for path in outbox_files(plan)]
    assert message["X-Calwarden-Alert"] == "error"
    assert "ERROR" in message["Subject"]
    assert BROKEN.name in message["Subject"]


def test_a_passing_run_raises_no_alert(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """A run that passes leaves the outbox empty."""
    plan = plan_for(inbox, out)
    running = start(plan)
    shutil.copyfile(PASSING, inbox / PASSING.name)

    (outcome,) = running.wait_outcomes(1)
    assert outcome.status == "pass"
    assert running.watcher.sender is not None
    running.watcher.sender.wake()
    assert running.watcher.sender.wait_settled(15)
    assert query(running.ledger, "SELECT COUNT(*) FROM alerts") == [(0,)]
    assert outbox_files(plan) == []


# --------------------------------------------------------------------------- .eml files


def test_without_smtp_every_alert_is_an_eml_file_and_nothing_is_sent(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """With no email.host each alert is an RFC 5322 .eml in <out>/.calwarden/outbox, unsent."""
    plan = plan_for(inbox, out)
    assert plan.state_dir == out / ".calwarden"
    running = start(plan)
    shutil.copyfile(FAILING, inbox / FAILING.name)
    shutil.copyfile(BROKEN, inbox / BROKEN.name)

    running.wait_outcomes(2)
    wait_for(lambda: len(outbox_files(plan)) == 2, what="two .eml files")
    kinds = []
    for path in outbox_files(plan):
        message: Message = email.message_from_bytes(path.read_bytes())
        for header in ("From", "Date", "Message-ID", "Subject"):
            assert message[header], f"{path.name} has no {header}"
        assert message["From"] == "calwarden@localhost"
        assert message["Subject"].startswith("[calwarden] ")
        kinds.append(message["X-Calwarden-Alert"])
    assert sorted(kinds) == ["error", "fail"]
    assert deliveries(running.ledger) == []


# --------------------------------------------------------------------------- webhook


def test_a_webhook_answering_500_once_gets_the_alert_on_the_retry(
    inbox: Path,
    out: Path,
    start: Callable[[WatchPlan], Running],
    webhook: Callable[..., Hook],
    events: list[dict[str, Any]],
) -> None:
    """A hook replying 500 then 200 gets the alert JSON twice and the delivery is sent."""
    hook = webhook(500, 200)
    plan = plan_for(inbox, out, {"webhook": {"url": hook.url}, "retry": FAST_RETRY})
    running = start(plan)
    shutil.copyfile(FAILING, inbox / FAILING.name)

    running.wait_outcomes(1)
    wait_for(
        lambda: [row[2:] for row in deliveries(running.ledger)] == [("sent", 2)],
        what="the webhook delivery sent on its second attempt",
    )
    first, second = hook.posts
    assert first == second  # the retry posts the same alert
    assert first["text"].startswith("[calwarden]")
    assert first["alert"]["kind"] == "fail"
    assert [e["channel"] for e in named(events, "alert_retry")] == ["webhook"]
    assert [(e["channel"], e["attempts"]) for e in named(events, "alert_sent")] == [("webhook", 2)]


def test_a_webhook_answering_404_sends_the_alert_to_the_dead_letter_folder(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], webhook: Callable[..., Hook]
) -> None:
    """A hook replying 404 is a permanent refusal: the delivery is dead, a copy in dead-letter."""
    hook = webhook(404)
    plan = plan_for(inbox, out, {"webhook": {"url": hook.url}, "retry": FAST_RETRY})
    running = start(plan)
    shutil.copyfile(FAILING, inbox / FAILING.name)

    running.wait_outcomes(1)
    wait_for(
        lambda: [row[1:3] for row in deliveries(running.ledger)] == [("webhook", "dead")],
        what="the webhook delivery dead",
    )
    assert len(hook.posts) == 1  # never tried again
    (message,) = outbox_files(plan)
    dead_letter = plan.state_dir / "dead-letter"
    assert (dead_letter / message.name).read_bytes() == message.read_bytes()
    note = (dead_letter / f"{message.name}.webhook.txt").read_text(encoding="utf-8")
    assert "404" in note


# --------------------------------------------------------------------------- daemon trouble


def test_a_stopped_observer_raises_a_daemon_alert(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """When the folder observer dies behind the watcher's back a `daemon` alert is written."""
    plan = plan_for(inbox, out, observer_check_seconds=0.2)
    running = start(plan)
    assert running.watcher.wait_idle(15)
    (dead,) = running.watcher.observers
    dead.stop()
    dead.join(15)

    wait_for(lambda: outbox_files(plan), what="the daemon alert's message")
    (path,) = outbox_files(plan)
    assert path.name.endswith("-daemon.eml")
    message = parse(path.read_bytes())
    assert message["X-Calwarden-Alert"] == "daemon"
    assert "observer" in message["Subject"]
    assert "observer" in plain_text(message)
    ((summary,),) = query(running.ledger, "SELECT summary FROM alerts WHERE kind = 'daemon'")
    assert json.loads(summary)["event"] == "observer_restarted"


# --------------------------------------------------------------------------- a dead mail server


def test_a_closed_mail_port_does_not_delay_the_verdict(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """With email.host on a closed port a failure's verdict appears as usual; its mail waits."""
    plan = plan_for(inbox, out, {"email": email_settings(free_port()), "retry": FAST_RETRY})
    running = start(plan)
    shutil.copyfile(FAILING, inbox / FAILING.name)

    wait_for(lambda: (out / f"{FAILING.stem}.verdict.json").is_file(), what="the verdict")
    wait_for(
        lambda: any(row[3] >= 1 for row in deliveries(running.ledger)),
        what="an attempt at the closed port",
    )
    ((_, channel, state, _),) = deliveries(running.ledger)
    assert (channel, state) == ("email", "waiting")


def test_a_silent_mail_server_does_not_delay_the_next_verdict(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """While the sender waits on a server that never greets, the next file is judged as usual."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as listener:
        listener.bind(("127.0.0.1", 0))
        listener.listen(4)
        listener.settimeout(15)
        settings = email_settings(listener.getsockname()[1], timeout_seconds=60)
        plan = plan_for(inbox, out, {"email": settings, "retry": FAST_RETRY})
        running = start(plan)
        (inbox / "first.csv").write_bytes(failing_run("BWL-ICPMS-2-20261124-S1"))
        connection, _ = listener.accept()  # the sender is now waiting for a greeting
        with connection:
            (inbox / "second.csv").write_bytes(failing_run("BWL-ICPMS-2-20261124-S2"))
            wait_for(lambda: (out / "second.verdict.json").is_file(), what="the next verdict")
            ((_, channel, state, attempts),) = deliveries(running.ledger)
            assert (channel, state, attempts) == ("email", "waiting", 0)
            listener.close()  # before the connection: a retry meets a refusal, not a silence
