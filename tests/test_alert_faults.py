"""Alerts about the daemon's own faults, including when the ledger itself is the fault."""

from __future__ import annotations

import email
import email.policy
import shutil
from email.message import EmailMessage
from pathlib import Path

from mail_server import Recorder
from structlog.testing import capture_logs
from waiting import wait_for

from calwarden.daemon.alerts.sender import (
    OUTBOX_FOLDER,
    AlertSender,
    daemon_trouble,
    emergency_alert,
)
from calwarden.daemon.alerts.settings import AlertSettings
from calwarden.daemon.intake.watcher import Watcher
from calwarden.daemon.settings.config import build_config, plan_watch
from calwarden.daemon.stores.database import LEDGER_NAME
from calwarden.daemon.stores.ledger import Ledger

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
ANALYST = "analyst@brindlewick.example"


def _parse(path: Path) -> EmailMessage:
    parsed = email.message_from_bytes(path.read_bytes(), policy=email.policy.default)
    assert isinstance(parsed, EmailMessage)
    return parsed


def test_an_output_fault_sends_a_daemon_alert_before_the_daemon_stops(
    tmp_path: Path, loopback_smtp: tuple[Recorder, int]
) -> None:
    """The output folder replaced by a file: the fault's alert reaches the server."""
    handler, port = loopback_smtp
    inbox, out, state = tmp_path / "inbox", tmp_path / "out", tmp_path / "state"
    inbox.mkdir()
    config = build_config(
        {
            "watch": {"state_dir": str(state)},
            "alerts": {
                "email": {"host": "127.0.0.1", "port": port, "security": "none", "to": [ANALYST]}
            },
        },
        "test.yaml",
    )
    plan = plan_watch(config, config_dir=tmp_path, inbox=inbox, out=out, settle_seconds=0.1)
    watcher = Watcher(plan)
    watcher.start()
    try:
        assert watcher.wait_idle(15)
        shutil.rmtree(out, ignore_errors=True)
        out.write_text("not a folder", encoding="utf-8")
        shutil.copy(FIXTURES / "bwl-metals-pass.csv", inbox / "run.csv")
        assert watcher.wait(15), "the daemon did not stop on the fault"
    finally:
        watcher.stop()
    assert watcher.fault is not None
    subjects = [r.message()["Subject"] for r in handler.received]
    assert any(s.startswith("[calwarden] DAEMON") and "fault" in s for s in subjects), subjects


def test_with_the_ledger_unusable_the_alert_is_written_and_sent_directly(
    tmp_path: Path, loopback_smtp: tuple[Recorder, int]
) -> None:
    """emergency_alert needs no ledger: an .eml in the outbox folder and a message sent."""
    handler, port = loopback_smtp
    settings = AlertSettings.model_validate(
        {"email": {"host": "127.0.0.1", "port": port, "security": "none", "to": [ANALYST]}}
    )
    alert = daemon_trouble("daemon_fault", "calwarden stopped after a fault", reason="disk full")
    emergency_alert(tmp_path, settings, alert)
    (written,) = (tmp_path / OUTBOX_FOLDER).glob("*-daemon.eml")
    assert "disk full" in _parse(written).get_body(("plain",)).get_content()  # type: ignore[union-attr]
    wait_for(lambda: handler.received, what="the emergency message")
    assert handler.received[0].rcpt_tos == (ANALYST,)


def test_an_outbox_folder_that_cannot_be_written_holds_the_alert_until_it_can(
    tmp_path: Path,
) -> None:
    """A release that fails is logged and done later; the alert is not lost."""
    state = tmp_path / "state"
    ledger = Ledger.open(state / LEDGER_NAME)
    ledger.alerts.record(daemon_trouble("observer_restarted", "the folder observer restarted"))
    ledger.close()
    (state / OUTBOX_FOLDER).write_text("in the way", encoding="utf-8")
    sender = AlertSender(state, AlertSettings())
    with capture_logs() as events:
        sender.start()
        try:
            wait_for(
                lambda: any(e["event"] == "alert_not_written" for e in events),
                what="the failed release logged",
            )
            (state / OUTBOX_FOLDER).unlink()
            sender.wake()
            wait_for(lambda: list((state / OUTBOX_FOLDER).glob("*-daemon.eml")), what="the .eml")
        finally:
            sender.stop()
