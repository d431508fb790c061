"""Alerts about the daemon's own faults, including when the ledger itself is the fault."""

from __future__ import annotations

import email
import email.policy
import os
import shutil
import sqlite3
import sys
from contextlib import closing
from email.message import EmailMessage
from pathlib import Path

import pytest
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


def _watcher_mailing_to(tmp_path: Path, port: int) -> tuple[Watcher, Path, Path, Path]:
    """A watcher (not started) on a new inbox, its alerts to the loopback server on ``port``."""
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
    return Watcher(plan), inbox, out, state


def test_an_output_fault_sends_a_daemon_alert_before_the_daemon_stops(
    tmp_path: Path, loopback_smtp: tuple[Recorder, int]
) -> None:
    """The output folder replaced by a file: the fault's alert reaches the server."""
    handler, port = loopback_smtp
    watcher, inbox, out, _state = _watcher_mailing_to(tmp_path, port)
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


def fill_the_disk_under(ledger: Path) -> None:
    """Make every write to the ledger fail with ENOSPC ("No space left"), as on a full disk.

    The write-ahead log is first emptied into the database file (so reads still find
    everything there), then every handle this process holds on the log is pointed at
    /dev/full, where each write fails with ENOSPC: SQLite's own "database or disk is full".
    """
    with closing(sqlite3.connect(ledger)) as db:
        (busy, _, _) = db.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()
    assert busy == 0, "the write-ahead log could not be emptied"
    wal = os.path.realpath(f"{ledger}-wal")
    full = os.open("/dev/full", os.O_RDWR)
    try:
        handles = 0
        for name in os.listdir("/proc/self/fd"):
            try:
                target = os.readlink(f"/proc/self/fd/{name}")
            except OSError:
                continue  # closed meanwhile
            if target == wal:
                os.dup2(full, int(name))
                handles += 1
    finally:
        os.close(full)
    assert handles >= 1, "no open handle on the write-ahead log"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="/proc and /dev/full")
def test_a_full_disk_under_the_ledger_still_gives_one_daemon_alert(
    tmp_path: Path, loopback_smtp: tuple[Recorder, int]
) -> None:
    """Ledger writes failing (disk full): the daemon stops with exactly one alert, by e-mail."""
    handler, port = loopback_smtp
    watcher, inbox, _out, state = _watcher_mailing_to(tmp_path, port)
    with capture_logs() as events:
        watcher.start()
        try:
            assert watcher.wait_idle(15)
            fill_the_disk_under(state / LEDGER_NAME)
            shutil.copy(FIXTURES / "bwl-metals-fail.csv", inbox / "run.csv")
            assert watcher.wait(15), "the daemon did not stop on the full disk"
        finally:
            watcher.stop()
    assert watcher.fault is not None and "full" in watcher.fault
    (not_recorded,) = [e for e in events if e["event"] == "alert_not_recorded"]
    assert not_recorded["alert_event"] == "daemon_fault"
    (message,) = [received.message() for received in handler.received]
    assert message["Subject"].startswith("[calwarden] DAEMON")
    assert "full" in message.get_body(("plain",)).get_content()  # type: ignore[union-attr]
    assert len(list((state / OUTBOX_FOLDER).glob("*-daemon.eml"))) == 1


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
