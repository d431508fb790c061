"""Alerts sent by e-mail to a real SMTP server (aiosmtpd) on 127.0.0.1.

Each test runs a real watcher on a temporary inbox; the failing run dropped in it
raises an alert, which the watcher's alert sender hands to the test's server. The
server records every envelope and replies as the test scripts it (a 451 to DATA,
a 550 to RCPT...). TLS certificates are made for the test by a throwaway CA.
"""

from __future__ import annotations

import json
import re
import ssl
from collections.abc import Callable, Iterator, MutableMapping
from dataclasses import dataclass
from email.message import EmailMessage
from pathlib import Path
from typing import Any

import pytest
import trustme
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import SMTP, AuthResult, Envelope, LoginPassword, Session
from mail_server import Recorder, free_port
from waiting import wait_for

from calwarden.daemon.alerts.sender import DEAD_LETTER_FOLDER, OUTBOX_FOLDER
from calwarden.daemon.cli.status import status_report
from calwarden.daemon.intake.watcher import Watcher
from calwarden.daemon.settings.config import WatchPlan, build_config, plan_watch
from calwarden.daemon.stores.database import LEDGER_NAME, Database
from calwarden.daemon.stores.outbox import Outbox, OutboxCounts

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
FAILING = (FIXTURES / "bwl-metals-fail.csv").read_bytes()
FAILING_RUN = "BWL-ICPMS-2-20261124-A"
FAILING_SAMPLE = "BW-1124-18"  # over range: a failure and a re-run of its own
SENDER = "calwarden@brindlewick.example"
RECIPIENTS = ("analyst@brindlewick.example", "qc-lead@brindlewick.example")
INJECTED = "x\r\nBcc: someone@example.org"
USERNAME = "qc-daemon"
PASSWORD = "brindle-Owl-4417-correct"
WRONG_PASSWORD = "brindle-Owl-9902-wrong"
PASSWORD_ENV = "BWL_TEST_SMTP_PASSWORD"
SETTLE = 0.1
DEADLINE = 15.0  # generous: the machine is a shared 2-core one


# --------------------------------------------------------------------------- the server


StartServer = Callable[..., Controller]


@pytest.fixture
def smtp_server() -> Iterator[StartServer]:
    """Start aiosmtpd servers on 127.0.0.1; each is stopped when the test ends."""
    started: list[Controller] = []

    def _start(handler: Recorder, port: int, **options: Any) -> Controller:
        controller = Controller(handler, hostname="127.0.0.1", port=port, **options)
        controller.start()
        started.append(controller)
        return controller

    yield _start
    for controller in started:
        controller.stop()


@dataclass(frozen=True)
class Certificates:
    """A throwaway CA, its PEM file, and a server context with a cert for 127.0.0.1."""

    ca_file: Path
    server_context: ssl.SSLContext


@pytest.fixture
def certificates(tmp_path: Path) -> Certificates:
    ca = trustme.CA()
    cert = ca.issue_cert("127.0.0.1")
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    cert.configure_cert(context)
    ca_file = tmp_path / "brindlewick-ca.pem"
    ca.cert_pem.write_to_path(str(ca_file))
    return Certificates(ca_file, context)


def authenticator(
    server: SMTP, session: Session, envelope: Envelope, mechanism: str, auth_data: object
) -> AuthResult:
    """Accept only USERNAME with PASSWORD."""
    accepted = (
        isinstance(auth_data, LoginPassword)
        and auth_data.login == USERNAME.encode()
        and auth_data.password == PASSWORD.encode()
    )
    return AuthResult(success=accepted, handled=False)


# --------------------------------------------------------------------------- the daemon

Events = list[MutableMapping[str, Any]]


StartWatcher = Callable[[WatchPlan], Watcher]


@pytest.fixture
def start(events: Events) -> Iterator[StartWatcher]:
    """Start watchers (and so their alert senders); each is stopped when the test ends."""
    started: list[Watcher] = []

    def _start(plan: WatchPlan) -> Watcher:
        watcher = Watcher(plan)
        watcher.start()
        started.append(watcher)
        assert watcher.sender is not None, "alerts are on: the watcher starts a sender"
        return watcher

    yield _start
    for watcher in started:
        watcher.stop()
    for watcher in started:
        assert watcher.wait(10), "the worker did not end"


def plan_for(inbox: Path, out: Path, port: int, **email: object) -> WatchPlan:
    """A plan whose alerts go to 127.0.0.1:port, retried fast; ``email`` overrides keys."""
    settings = {
        "host": "127.0.0.1",
        "port": port,
        "security": "none",
        "sender": SENDER,
        "to": list(RECIPIENTS),
        "timeout_seconds": 5,
        **email,
    }
    config = build_config(
        {
            "control": {"charts": False},
            "alerts": {"email": settings, "retry": {"first_seconds": 0.05, "max_seconds": 0.2}},
        },
        "test",
    )
    return plan_watch(config, inbox=inbox, out=out, settle_seconds=SETTLE)


def named(events: Events, name: str) -> Events:
    return [event for event in list(events) if event["event"] == name]


def wait_event(events: Events, name: str, count: int = 1) -> Events:
    wait_for(lambda: len(named(events, name)) >= count, DEADLINE, f"{count} {name} event(s)")
    return named(events, name)


def outbox_state(plan: WatchPlan) -> tuple[OutboxCounts, list[tuple[str, str, str, str, int]]]:
    """The outbox's counts and its problem deliveries, read from the ledger file."""
    database = Database(plan.state_dir / LEDGER_NAME, read_only=True)
    try:
        outbox = Outbox(database)
        return outbox.outbox_counts(), outbox.problems()
    finally:
        database.close()


def drop_failing_run(inbox: Path, data: bytes = FAILING, name: str = "run.csv") -> None:
    (inbox / name).write_bytes(data)


def verdict_attachment(message: EmailMessage) -> dict[str, Any]:
    (part,) = [
        p for p in message.iter_attachments() if (p.get_filename() or "").endswith(".verdict.json")
    ]
    assert part.get_content_type() == "application/json"
    document: dict[str, Any] = json.loads(part.get_content())
    return document


def text_part(message: EmailMessage) -> str:
    body = message.get_body(preferencelist=("plain",))
    assert body is not None
    content: str = body.get_content()
    return content


# --------------------------------------------------------------------------- the tests


def test_failing_run_alert_is_delivered_as_a_complete_message(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
) -> None:
    """A failing run's alert reaches the server once, whole, addressed only as configured."""
    handler = Recorder()
    port = free_port()
    smtp_server(handler, port)
    start(plan_for(inbox, out, port))
    drop_failing_run(inbox)
    wait_event(events, "alert_sent")
    (received,) = handler.received
    assert received.mail_from == SENDER
    assert sorted(received.rcpt_tos) == sorted(RECIPIENTS)
    message = received.message()
    assert str(message["Subject"]).startswith("[calwarden] FAIL")
    assert FAILING_RUN in str(message["Subject"])
    assert re.fullmatch(r"<calwarden\.[0-9a-f]{32}@brindlewick\.example>", message["Message-ID"])
    html = message.get_body(preferencelist=("html",))
    assert html is not None and html.get_content_type() == "text/html"
    verdict = verdict_attachment(message)
    assert verdict["status"] == "fail" and verdict["run"] == FAILING_RUN
    text = text_part(message)
    failures = [f for f in verdict["findings"] if f["severity"] == "fail"]
    assert len(failures) == 5
    for finding in failures:
        assert finding["message"] in text
    assert verdict["reruns"]
    assert f"Samples to re-run ({len(verdict['reruns'])})" in text
    for rerun in verdict["reruns"]:
        assert rerun["sample_id"] in text


def test_starttls_with_the_lab_ca_file_delivers(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
    certificates: Certificates,
) -> None:
    """STARTTLS to a server whose certificate the configured email.ca_file vouches for."""
    handler = Recorder()
    port = free_port()
    smtp_server(handler, port, tls_context=certificates.server_context, require_starttls=True)
    plan = plan_for(inbox, out, port, security="starttls", ca_file=str(certificates.ca_file))
    start(plan)
    drop_failing_run(inbox)
    wait_event(events, "alert_sent")
    (received,) = handler.received
    assert sorted(received.rcpt_tos) == sorted(RECIPIENTS)
    assert outbox_state(plan)[0].sent == 1


def test_starttls_certificate_not_trusted_is_a_config_problem(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
    certificates: Certificates,
) -> None:
    """A certificate the system does not trust (no ca_file): nothing sent, the alert waits."""
    handler = Recorder()
    port = free_port()
    smtp_server(handler, port, tls_context=certificates.server_context, require_starttls=True)
    plan = plan_for(inbox, out, port, security="starttls")
    start(plan)
    drop_failing_run(inbox)
    (problem, *_) = wait_event(events, "alert_config_problem")
    assert "certificate" in problem["reason"] and "ca_file" in problem["reason"]
    assert not named(events, "alert_sent")
    assert handler.received == []
    counts, problems = outbox_state(plan)
    assert (counts.waiting, counts.sent, counts.dead) == (1, 0, 0)
    ((state, _, channel, error, attempts),) = problems
    assert (state, channel) == ("waiting", "email") and attempts >= 1
    assert "certificate" in error


def watch_with_login(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    certificates: Certificates,
) -> tuple[Recorder, WatchPlan]:
    """A server requiring STARTTLS and AUTH, and a watcher logging in with PASSWORD_ENV."""
    handler = Recorder()
    port = free_port()
    smtp_server(
        handler,
        port,
        tls_context=certificates.server_context,
        require_starttls=True,
        authenticator=authenticator,
        auth_required=True,
    )
    plan = plan_for(
        inbox,
        out,
        port,
        security="starttls",
        ca_file=str(certificates.ca_file),
        username=USERNAME,
        password_env=PASSWORD_ENV,
    )
    start(plan)
    return handler, plan


def test_login_with_the_password_from_the_environment_delivers(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
    certificates: Certificates,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """A server requiring AUTH (after STARTTLS) takes the login; the password is in password_env."""
    monkeypatch.setenv(PASSWORD_ENV, PASSWORD)
    handler, _ = watch_with_login(inbox, out, smtp_server, start, certificates)
    drop_failing_run(inbox)
    wait_event(events, "alert_sent")
    (received,) = handler.received
    assert sorted(received.rcpt_tos) == sorted(RECIPIENTS)
    assert not named(events, "alert_config_problem")


def test_wrong_password_is_a_config_problem_and_never_written(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
    certificates: Certificates,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """A refused login keeps the alert waiting, logs a config problem, and leaks no password."""
    monkeypatch.setenv(PASSWORD_ENV, WRONG_PASSWORD)
    handler, plan = watch_with_login(inbox, out, smtp_server, start, certificates)
    drop_failing_run(inbox)
    (problem, *_) = wait_event(events, "alert_config_problem", 2)
    assert "refused the login" in problem["reason"] and USERNAME in problem["reason"]
    assert handler.received == []
    counts, problems = outbox_state(plan)
    assert (counts.waiting, counts.sent, counts.dead) == (1, 0, 0)
    (eml,) = (plan.state_dir / OUTBOX_FOLDER).glob("*.eml")
    for secret in (WRONG_PASSWORD, PASSWORD):
        assert all(secret not in repr(event) for event in list(events))
        assert secret.encode() not in eml.read_bytes()
        assert all(secret not in repr(row) for row in problems)


def test_server_down_then_up_delivers_exactly_once(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
) -> None:
    """An alert waits while nothing listens, and goes once when the server starts on the port."""
    port = free_port()
    plan = plan_for(inbox, out, port)
    watcher = start(plan)
    drop_failing_run(inbox)
    wait_event(events, "alert_retry", 2)
    counts, problems = outbox_state(plan)
    assert (counts.waiting, counts.sent) == (1, 0)
    ((state, _, _, _, attempts),) = problems
    assert state == "waiting" and attempts > 0
    handler = Recorder()
    smtp_server(handler, port)
    wait_event(events, "alert_sent")
    watcher.stop()
    assert watcher.wait(10)
    assert len(handler.received) == 1
    assert len(named(events, "alert_sent")) == 1
    counts, _ = outbox_state(plan)
    assert (counts.waiting, counts.sent, counts.dead) == (0, 1, 0)


def test_temporary_451_on_data_is_retried_and_delivered_once(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
) -> None:
    """A 451 to the first DATA: retried, delivered on the second attempt, once."""
    handler = Recorder(data_replies=["451 4.3.0 mailbox busy, try again later"])
    port = free_port()
    smtp_server(handler, port)
    plan = plan_for(inbox, out, port)
    start(plan)
    drop_failing_run(inbox)
    (sent,) = wait_event(events, "alert_sent")
    (retry,) = named(events, "alert_retry")
    assert "451" in retry["reason"]
    assert sent["attempts"] == 2
    assert handler.data_commands == 2
    assert len(handler.received) == 1
    counts, _ = outbox_state(plan)
    assert (counts.waiting, counts.sent, counts.dead) == (0, 1, 0)


REFUSED = "550 5.1.1 mailbox unavailable"


def watch_refused(
    inbox: Path, out: Path, smtp_server: StartServer, start: StartWatcher
) -> tuple[Recorder, WatchPlan]:
    """A server refusing every recipient with 550, and a watcher given a failing run."""
    handler = Recorder(rcpt_replies=[REFUSED] * len(RECIPIENTS))
    port = free_port()
    smtp_server(handler, port)
    plan = plan_for(inbox, out, port)
    start(plan)
    drop_failing_run(inbox)
    return handler, plan


def test_550_on_every_recipient_makes_a_dead_letter(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
) -> None:
    """Every recipient refused with 550: dead at once, a copy and a note in dead-letter/."""
    handler, plan = watch_refused(inbox, out, smtp_server, start)
    (dead,) = wait_event(events, "alert_dead_letter")
    assert "550" in dead["reason"]
    assert not named(events, "alert_retry") and not named(events, "alert_sent")
    counts, _ = outbox_state(plan)
    assert (counts.waiting, counts.sent, counts.dead) == (0, 0, 1)
    (eml,) = (plan.state_dir / OUTBOX_FOLDER).glob("*.eml")
    folder = plan.state_dir / DEAD_LETTER_FOLDER
    assert (folder / eml.name).read_bytes() == eml.read_bytes()
    note = (folder / f"{eml.name}.email.txt").read_text(encoding="utf-8")
    assert "550" in note and "mailbox unavailable" in note
    assert handler.received == []


def test_status_reports_the_dead_letter(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
) -> None:
    """`calwarden status` names the dead letter, where it is and why it was refused."""
    _, plan = watch_refused(inbox, out, smtp_server, start)
    wait_event(events, "alert_dead_letter")
    (eml,) = (plan.state_dir / OUTBOX_FOLDER).glob("*.eml")
    report, found = status_report(plan.state_dir)
    assert found
    assert "dead letters 1" in report
    assert str(plan.state_dir / DEAD_LETTER_FOLDER) in report
    (refused,) = [line for line in report.splitlines() if eml.name in line and "refused" in line]
    assert "550" in refused


def test_header_injection_from_file_text_is_neutralised(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
) -> None:
    """A run name and sample id holding CRLF + Bcc add no header and no recipient."""
    quoted = '"' + INJECTED + '"'  # a quoted CSV field may hold a line break
    text = FAILING.decode("utf-8").replace(FAILING_RUN, quoted).replace(FAILING_SAMPLE, quoted)
    handler = Recorder()
    port = free_port()
    smtp_server(handler, port)
    start(plan_for(inbox, out, port))
    drop_failing_run(inbox, text.encode("utf-8"), "injected.csv")
    wait_event(events, "alert_sent")
    (received,) = handler.received
    assert sorted(received.rcpt_tos) == sorted(RECIPIENTS)
    message = received.message()
    assert verdict_attachment(message)["run"] == INJECTED  # the file's text did reach the alert
    assert all(part["Bcc"] is None for part in message.walk())
    assert len(message.get_all("Subject") or []) == 1
    head = received.content.split(b"\r\n\r\n", 1)[0]
    lines = head.split(b"\r\n")
    assert sum(1 for line in lines if line.lower().startswith(b"subject:")) == 1
    assert not any(line.lower().startswith(b"bcc:") for line in lines)
    assert str(message["Subject"]).startswith("[calwarden] FAIL")


def test_implicit_tls_delivers(
    inbox: Path,
    out: Path,
    smtp_server: StartServer,
    start: StartWatcher,
    events: Events,
    certificates: Certificates,
) -> None:
    """security: ssl (TLS from the first byte) to a server the ca_file vouches for."""
    handler = Recorder()
    port = free_port()
    smtp_server(handler, port, ssl_context=certificates.server_context)
    plan = plan_for(inbox, out, port, security="ssl", ca_file=str(certificates.ca_file))
    start(plan)
    drop_failing_run(inbox)
    wait_event(events, "alert_sent")
    (received,) = handler.received
    assert sorted(received.rcpt_tos) == sorted(RECIPIENTS)
    assert outbox_state(plan)[0].sent == 1
