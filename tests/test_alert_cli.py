"""``calwarden alert test``, the daily summary, and a version-1 ledger gaining its outbox."""

from __future__ import annotations

import json
import sqlite3
from datetime import datetime
from pathlib import Path

import pytest
from mail_server import Recorder, free_port

from calwarden.daemon.alerts.sender import OUTBOX_FOLDER, AlertSender
from calwarden.daemon.alerts.settings import AlertSettings
from calwarden.daemon.cli.main import main
from calwarden.daemon.stores.database import LEDGER_NAME, SCHEMA_VERSION, Database
from calwarden.daemon.stores.ledger import Ledger
from calwarden.daemon.stores.outbox import Outbox

ANALYST = "analyst@brindlewick.example"


def _config(tmp_path: Path, email: dict[str, object]) -> Path:
    path = tmp_path / "calwarden.yaml"
    path.write_text(json.dumps({"alerts": {"email": email}}), encoding="utf-8")
    return path


def test_alert_test_without_smtp_writes_an_eml_and_says_so(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """With no SMTP server configured, alert test writes the message to the outbox, exit 0."""
    assert main(["alert", "test", "--out", str(tmp_path)]) == 0
    said = capsys.readouterr().out
    assert "no SMTP server is configured" in said
    written = list((tmp_path / ".calwarden" / OUTBOX_FOLDER).glob("*-test.eml"))
    assert len(written) == 1 and str(written[0]) in said


def test_alert_test_delivers_through_the_configured_server(
    tmp_path: Path, loopback_smtp: tuple[Recorder, int], capsys: pytest.CaptureFixture[str]
) -> None:
    """alert test hands one TEST message to the server and names who got it."""
    handler, port = loopback_smtp
    config = _config(
        tmp_path, {"host": "127.0.0.1", "port": port, "security": "none", "to": [ANALYST]}
    )
    assert main(["alert", "test", "--config", str(config), "--out", str(tmp_path)]) == 0
    assert len(handler.received) == 1
    assert handler.received[0].message()["Subject"].startswith("[calwarden] TEST")
    assert ANALYST in capsys.readouterr().out


def test_alert_test_with_the_server_unreachable_exits_2_saying_why(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A server nobody listens on: exit 2 and one line naming host, port and the refusal."""
    port = free_port()
    config = _config(
        tmp_path, {"host": "127.0.0.1", "port": port, "security": "none", "to": [ANALYST]}
    )
    assert main(["alert", "test", "--config", str(config), "--out", str(tmp_path)]) == 2
    said = capsys.readouterr().err
    assert f"cannot reach 127.0.0.1:{port}" in said
    assert "Traceback" not in said


def test_alert_test_with_a_missing_password_variable_exits_2_naming_it(
    tmp_path: Path,
    loopback_smtp: tuple[Recorder, int],
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """A login whose password variable is unset: exit 2, naming the variable, nothing sent."""
    handler, port = loopback_smtp
    monkeypatch.delenv("BWL_UNSET_PASSWORD", raising=False)
    config = _config(
        tmp_path,
        {
            "host": "127.0.0.1",
            "port": port,
            "security": "none",
            "to": [ANALYST],
            "username": "calwarden",
            "password_env": "BWL_UNSET_PASSWORD",
        },
    )
    assert main(["alert", "test", "--config", str(config), "--out", str(tmp_path)]) == 2
    assert "BWL_UNSET_PASSWORD" in capsys.readouterr().err
    assert handler.received == []


def test_a_version_1_ledger_gains_the_outbox_and_keeps_its_records(tmp_path: Path) -> None:
    """Opening a ledger made before the outbox adds its tables and sets schema 2."""
    path = tmp_path / LEDGER_NAME
    Ledger.open(path).close()
    with sqlite3.connect(path) as db:
        db.execute("DROP TABLE deliveries")
        db.execute("DROP TABLE alerts")
        db.execute("UPDATE meta SET value = '1' WHERE key = 'schema_version'")
    upgraded = Database(path)
    try:
        assert upgraded.meta("schema_version") == str(SCHEMA_VERSION)
        assert Outbox(upgraded).outbox_counts().files == 0
    finally:
        upgraded.close()


def test_the_daily_summary_counts_the_day_once(tmp_path: Path) -> None:
    """Past its time of day, the sender writes one summary; a second pass adds none."""
    state = tmp_path / "state"
    Ledger.open(state / LEDGER_NAME).close()
    noon = datetime.now().astimezone().replace(hour=12, minute=0, second=0, microsecond=0)
    settings = AlertSettings.model_validate({"daily_summary": {"enabled": True, "at": "07:00"}})
    sender = AlertSender(state, settings, clock=noon.timestamp)
    sender.start()
    try:
        assert sender.wait_settled(10)
        sender.wake()
        assert sender.wait_settled(10)
    finally:
        sender.stop()
    written = sorted((state / OUTBOX_FOLDER).glob("*-summary.eml"))
    assert len(written) == 1
    assert b"DAILY" in written[0].read_bytes()


def test_config_check_says_where_alerts_go(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """config check names the SMTP server alerts go through, or says they stay files."""
    config = _config(tmp_path, {"host": "mail.brindlewick.example", "to": [ANALYST]})
    assert main(["config", "check", str(config)]) == 0
    assert "alerts: e-mail via mail.brindlewick.example:587 (starttls)" in capsys.readouterr().out
    config.write_text("{}", encoding="utf-8")
    assert main(["config", "check", str(config)]) == 0
    assert "written as .eml files" in capsys.readouterr().out
