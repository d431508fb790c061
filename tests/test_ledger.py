"""The ledger and the intake: the record of every judged file, and what status reads from it.

Watcher runs use real folder observers on temporary folders; the intake tests
feed it files directly, as the watcher's worker does once a file has settled.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from waiting import wait_for

from calwarden.daemon.cli.status import status_report
from calwarden.daemon.intake.accept import Intake, Outcome
from calwarden.daemon.intake.watcher import Watcher
from calwarden.daemon.settings.config import AppConfig, Inbox, WatchPlan, plan_watch
from calwarden.daemon.settings.store import StoreSettings
from calwarden.daemon.stores.database import Target
from calwarden.daemon.stores.engine import store_target
from calwarden.daemon.stores.ledger import Ledger

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
PASSING = (FIXTURES / "bwl-metals-pass.csv").read_bytes()
FAILING = (FIXTURES / "bwl-metals-fail.csv").read_bytes()
BROKEN = (FIXTURES / "bwl-bad-missing-nominal.csv").read_bytes()
SETTLE = 0.1
DEADLINE = 15.0


def sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


@pytest.fixture
def plan(tmp_path: Path, store: StoreSettings) -> WatchPlan:
    """One inbox, its ledger in a SQLite file or on the session's PostgreSQL server."""
    (tmp_path / "inbox").mkdir()
    (tmp_path / "out").mkdir()
    planned = plan_watch(
        AppConfig(), inbox=tmp_path / "inbox", out=tmp_path / "out", settle_seconds=SETTLE
    )
    return dataclasses.replace(planned, store=store)


def target(plan: WatchPlan) -> Target:
    return store_target(plan.state_dir, plan.store)


class Run:
    """A started watcher with the outcomes it reported."""

    def __init__(self, plan: WatchPlan) -> None:
        self.outcomes: list[Outcome] = []
        self.watcher = Watcher(plan, on_outcome=self.outcomes.append)

    def wait_outcomes(self, count: int) -> None:
        wait_for(lambda: len(self.outcomes) >= count, what=f"{count} outcome(s)")
        assert self.watcher.fault is None


@pytest.fixture
def running(plan: WatchPlan, events: list[dict[str, Any]]) -> Iterator[Run]:
    """A watcher on ``plan``, stopped when the test ends."""
    run = Run(plan)
    run.watcher.start()
    try:
        yield run
    finally:
        run.watcher.stop()
        assert run.watcher.wait(DEADLINE)


def drop_week(plan: WatchPlan, run: Run) -> None:
    """A pass, a fail, an error, a duplicate and a second version, each judged."""
    inbox = plan.inboxes[0].path
    (inbox / "monday.csv").write_bytes(PASSING)
    (inbox / "tuesday.csv").write_bytes(FAILING)
    (inbox / "wednesday.csv").write_bytes(BROKEN)
    run.wait_outcomes(3)
    (inbox / "monday-copy.csv").write_bytes(PASSING)
    run.wait_outcomes(4)
    (inbox / "wednesday.csv").write_bytes(FAILING + b"\n")  # corrected: a second version
    run.wait_outcomes(5)


def reader(plan: WatchPlan) -> Ledger:
    return Ledger.open(target(plan), read_only=True)


# --------------------------------------------------------------------------- the ledger file


def test_ledger_passes_integrity_check_after_a_run(plan: WatchPlan, running: Run) -> None:
    """After judging, copying and re-versioning files, PRAGMA integrity_check is ok."""
    drop_week(plan, running)
    running.watcher.stop()
    assert running.watcher.wait(DEADLINE)
    ledger = reader(plan)
    try:
        assert ledger.database.integrity() == "ok"
        assert ledger.files.counts() == {"pass": 1, "fail": 2, "error": 1, "duplicate": 1}
    finally:
        ledger.close()


def test_read_only_ledger_sees_counts_while_the_daemon_writes(
    plan: WatchPlan, running: Run
) -> None:
    """A read-only connection (as status uses) reads the counts while the writer is open."""
    drop_week(plan, running)
    assert not running.watcher.wait(0)  # still running, its connection open
    ledger = reader(plan)
    try:
        assert ledger.files.counts() == {"pass": 1, "fail": 2, "error": 1, "duplicate": 1}
        (last,) = ledger.files.latest()
        assert (last.path, last.version, last.outcome) == ("wednesday.csv", 2, "fail")
    finally:
        ledger.close()


# --------------------------------------------------------------------------- status


def test_status_report_gives_counts_and_last_failure(plan: WatchPlan, running: Run) -> None:
    """status names the counts, the daemon running, and the last failure with its reason."""
    inbox = plan.inboxes[0]
    (inbox.path / "monday.csv").write_bytes(PASSING)
    (inbox.path / "tuesday.csv").write_bytes(FAILING)
    running.wait_outcomes(2)
    (failed,) = [o for o in running.outcomes if o.status == "fail"]
    text, found = status_report(plan.state_dir, store=plan.store)
    assert found
    assert "daemon:       running" in text
    assert "files judged: 2 (pass 1, fail 1, error 0); duplicates not judged again: 0" in text
    (line,) = [line for line in text.splitlines() if line.startswith("last failure:")]
    assert f"{inbox.name}/tuesday.csv: FAIL ({failed.failures} failure(s))" in line
    assert failed.message and failed.message in text


def test_status_report_escapes_control_characters_of_a_file(plan: WatchPlan, running: Run) -> None:
    """A file named with CR holding a run named with ESC: status shows both escaped."""
    text = FAILING.decode("utf-8").replace("BWL-ICPMS-2-20261124-A", "R\x1b[2J-1")
    (plan.inboxes[0].path / "tues\rday.csv").write_text(text, encoding="utf-8")
    running.wait_outcomes(1)
    report, _ = status_report(plan.state_dir, store=plan.store)
    assert "\x1b" not in report and "\r" not in report
    assert "tues\\rday.csv: FAIL" in report and "run R\\x1b[2J-1" in report


def test_status_report_reads_the_ledger_after_the_daemon_stopped(
    plan: WatchPlan, running: Run
) -> None:
    """After a stop, status says the daemon is not running and still gives the counts."""
    (plan.inboxes[0].path / "wednesday.csv").write_bytes(BROKEN)
    running.wait_outcomes(1)
    running.watcher.stop()
    assert running.watcher.wait(DEADLINE)
    text, found = status_report(plan.state_dir, store=plan.store)
    assert found
    assert "daemon:       not running" in text
    assert "files judged: 1 (pass 0, fail 0, error 1)" in text
    assert "last error:" in text
    assert "last failure:" not in text


# --------------------------------------------------------------------------- the intake


@pytest.fixture
def intake(plan: WatchPlan) -> Iterator[Intake]:
    """The intake with its own writing ledger connection (no watcher running)."""
    ledger = Ledger.open(target(plan))
    try:
        yield Intake(ledger, plan.inboxes)
    finally:
        ledger.close()


def feed(intake: Intake, inbox: Inbox, name: str, data: bytes) -> Outcome:
    """Write a file into the inbox and hand it over as settled, as the worker does."""
    path = inbox.path / name
    path.write_bytes(data)
    info = path.stat()
    return intake.process(inbox, path, data, sha256(data), info.st_size, info.st_mtime_ns)


def test_same_content_at_the_same_path_is_unchanged(plan: WatchPlan, intake: Intake) -> None:
    """A file seen again with the same bytes (touched, rescanned) adds no ledger row."""
    inbox = plan.inboxes[0]
    assert feed(intake, inbox, "run.csv", PASSING).status == "pass"
    assert feed(intake, inbox, "run.csv", PASSING).status == "unchanged"
    assert intake.ledger.files.counts() == {"pass": 1, "fail": 0, "error": 0, "duplicate": 0}
    seen = intake.ledger.files.seen(inbox.name, "run.csv")
    assert seen is not None and seen.sha256 == sha256(PASSING)


def test_duplicate_row_points_at_the_judged_file(plan: WatchPlan, intake: Intake) -> None:
    """A duplicate's ledger row refers to the evaluation of the first file with that content."""
    inbox = plan.inboxes[0]
    feed(intake, inbox, "run.csv", FAILING)
    feed(intake, inbox, "copy.csv", FAILING)
    (original,) = intake.ledger.files.latest(outcome="fail")
    (duplicate,) = intake.ledger.files.latest(outcome="duplicate")
    assert duplicate.duplicate_of == original.id
    assert (duplicate.path, duplicate.run) == ("copy.csv", original.run)


def test_file_reverted_to_earlier_content_has_a_current_verdict(
    plan: WatchPlan, intake: Intake
) -> None:
    """A file rewritten back to its first content is judged again, as its newest version."""
    inbox = plan.inboxes[0]
    feed(intake, inbox, "run.csv", PASSING)
    feed(intake, inbox, "run.csv", FAILING)
    outcome = feed(intake, inbox, "run.csv", PASSING)  # the analyst restores the original export
    assert (outcome.status, outcome.version) == ("pass", 3)
    document = json.loads((inbox.out_dir / "run.verdict.json").read_text(encoding="utf-8"))
    assert document["source"]["sha256"] == sha256(PASSING)
    earlier = json.loads((inbox.out_dir / "run@v2.verdict.json").read_text(encoding="utf-8"))
    assert earlier["source"]["sha256"] == sha256(FAILING)


def test_file_rewritten_with_another_files_content_has_a_current_verdict(
    plan: WatchPlan, intake: Intake
) -> None:
    """A judged file rewritten with another file's bytes does not keep its old verdict."""
    inbox = plan.inboxes[0]
    feed(intake, inbox, "monday.csv", PASSING)
    feed(intake, inbox, "tuesday.csv", FAILING)
    feed(intake, inbox, "tuesday.csv", PASSING)  # Monday's export saved over Tuesday's
    document = json.loads((inbox.out_dir / "tuesday.verdict.json").read_text(encoding="utf-8"))
    assert document["source"]["sha256"] == sha256(PASSING)


def test_only_the_newest_runs_keep_pending_pictures(plan: WatchPlan) -> None:
    """After a backlog, all but the newest N judged runs are marked as not to be drawn."""
    from calwarden.daemon.stores.records import NewEvaluation

    ledger = Ledger.open(target(plan))
    try:
        for number in range(8):
            ledger.record_evaluation(
                NewEvaluation(
                    inbox="inbox",
                    path=f"run-{number}.csv",
                    sha256=f"{number:064x}",
                    size=1,
                    mtime_ns=number,
                    outcome="pass",
                    version=1,
                    output_stem=f"run-{number}",
                    run=None,
                    instrument=None,
                    failures=0,
                    warnings=0,
                    message=None,
                    criteria_sha256=None,
                    config_sha256=None,
                    calwarden_version="test",
                    evaluated_at="2026-12-01T00:00:00+00:00",
                    document=b"{}",
                    flagged=None,
                )
            )
        assert ledger.pictures.skip_old(3) == 5
        assert [stem for _, _, stem in ledger.pictures.pending(limit=10)] == [
            "run-7",
            "run-6",
            "run-5",
        ]
    finally:
        ledger.close()
