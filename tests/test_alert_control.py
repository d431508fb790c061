"""Control-chart alerts: a rule that fires on a passing run, the chart shown in the message.

The limits are fixed in the configuration (``control.fixed``) so that one run is
enough: the passing metals fixture's Cd CCVs recover about 96–102 %, far above a
series held to 90 ± 1 %, so the Westgard 1-3s rule fires on them.
"""

from __future__ import annotations

import email
import email.policy
import json
import shutil
from collections.abc import Iterator
from email.message import EmailMessage
from pathlib import Path
from typing import Any

import pytest
from waiting import wait_for

from calwarden.daemon.alerts.sender import OUTBOX_FOLDER
from calwarden.daemon.intake.watcher import Watcher
from calwarden.daemon.settings.config import build_config, plan_watch

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
PASSING = FIXTURES / "bwl-metals-pass.csv"


def _watch(tmp_path: Path, control: dict[str, Any], alerts: dict[str, Any]) -> Iterator[Watcher]:
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    config = build_config({"control": control, "alerts": alerts}, "test.yaml")
    plan = plan_watch(config, inbox=inbox, out=tmp_path / "out", settle_seconds=0.1)
    watcher = Watcher(plan)
    watcher.start()
    try:
        shutil.copy(PASSING, inbox / PASSING.name)
        yield watcher
    finally:
        watcher.stop()


def _messages(watcher: Watcher) -> list[EmailMessage]:
    folder = watcher.plan.state_dir / OUTBOX_FOLDER
    found = []
    for path in sorted(folder.glob("*.eml")) if folder.is_dir() else []:
        parsed = email.message_from_bytes(path.read_bytes(), policy=email.policy.default)
        assert isinstance(parsed, EmailMessage)
        found.append(parsed)
    return found


FIXED_CD = {"fixed": [{"analyte": "Cd", "kind": "CCV", "centre": 90.0, "sd": 1.0}]}


@pytest.fixture
def control_alert(tmp_path: Path) -> Iterator[EmailMessage]:
    """The message of a passing run whose Cd CCVs break a fixed 1-3.5s limit (a warning)."""
    watching = _watch(tmp_path, {**FIXED_CD, "rejection_severity": "warn"}, {})
    watcher = next(watching)
    try:
        wait_for(lambda: len(_messages(watcher)) >= 1, what="the control alert's .eml")
        (message,) = _messages(watcher)
        yield message
    finally:
        watching.close()


def test_a_control_rule_on_a_passing_run_raises_a_control_alert(
    control_alert: EmailMessage,
) -> None:
    """A rejection rule set to warn on a passing run still raises an alert of kind control."""
    assert str(control_alert["Subject"]).startswith("[calwarden] CONTROL ")
    assert "1-3.5s" in str(control_alert["Subject"])
    assert control_alert["X-Calwarden-Alert"] == "control"


def test_a_control_alert_shows_the_chart_of_the_series_inline(
    control_alert: EmailMessage,
) -> None:
    """The HTML part shows the fired series' control chart as a related PNG, by cid."""
    html = control_alert.get_body(("html",))
    assert html is not None
    pictures = [p for p in control_alert.walk() if p.get_content_type() == "image/png"]
    assert pictures, "no chart in the message"
    content_id = str(pictures[0]["Content-ID"]).strip("<>")
    assert f"cid:{content_id}" in html.get_content()
    assert pictures[0].get_content()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize(
    ("rule", "alerts", "mails"),
    [("1-2s", {}, 0), ("1-3s", {}, 0), ("1-3s", {"control_rules": ["1-3s"]}, 1)],
    ids=["1-2s-default", "1-3s-default", "1-3s-listed"],
)
def test_warning_rules_mail_only_when_listed(
    tmp_path: Path, rule: str, alerts: dict[str, Any], mails: int
) -> None:
    """A warning rule's finding on a passing run sends mail only when control_rules lists it."""
    # Centre 100, SD 1.1: the Cd CCVs (98.6, 97.2, 97.1 %) have their run mean at -2.2 SD;
    # centre 90, SD 1: far above, so 1-3s fires (a warning by default).
    fixed = {"centre": 100.0, "sd": 1.1} if rule == "1-2s" else {"centre": 90.0, "sd": 1.0}
    control = {"fixed": [{"analyte": "Cd", "kind": "CCV", **fixed}], "rules": [rule]}
    watching = _watch(tmp_path, control, alerts)
    watcher = next(watching)
    try:
        wait_for(lambda: watcher.outcomes >= 1, what="the run judged")
        assert watcher.sender is not None
        if mails:
            wait_for(lambda: len(_messages(watcher)) >= mails, what="the control alert")
        assert watcher.sender.wait_settled(10)
        verdict = json.loads((tmp_path / "out" / "bwl-metals-pass.verdict.json").read_text())
        assert f"control.{rule}" in {f["rule"] for f in verdict["findings"]}
        assert verdict["status"] == "pass"
        assert len(_messages(watcher)) == mails
    finally:
        watching.close()


def test_alerts_switched_off_write_no_message(tmp_path: Path) -> None:
    """alerts.enabled false: no sender thread, no outbox file, even for a control rule."""
    watching = _watch(tmp_path, {**FIXED_CD, "rejection_severity": "warn"}, {"enabled": False})
    watcher = next(watching)
    try:
        wait_for(lambda: watcher.outcomes >= 1, what="the run judged")
        assert watcher.sender is None
        assert _messages(watcher) == []
    finally:
        watching.close()
