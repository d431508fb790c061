"""The watcher in-process: real folder observers on temporary folders, the real ledger.

Every test waits for a condition with a deadline (never a fixed sleep to let the
daemon catch up) and stops its watchers in a fixture, so that no thread is left.
"""

from __future__ import annotations

import hashlib
import json
import random
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
from test_verdict_model import shape_problems
from waiting import wait_for
from watchdog.observers.polling import PollingObserver

from calwarden.daemon.intake.accept import Outcome
from calwarden.daemon.intake.lock import is_locked
from calwarden.daemon.intake.watcher import StartError, Watcher
from calwarden.daemon.outputs.files import STEM_LIMIT
from calwarden.daemon.outputs.verdict_model import VerdictDocument
from calwarden.daemon.settings.config import WatchPlan, build_config, plan_watch
from calwarden.daemon.stores.database import LEDGER_NAME
from calwarden.daemon.stores.ledger import Ledger

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
PASSING = (FIXTURES / "bwl-metals-pass.csv").read_bytes()
FAILING = (FIXTURES / "bwl-metals-fail.csv").read_bytes()
SMALL = (FIXTURES / "bwl-addition-short.csv").read_text(encoding="utf-8")  # 5 rows, fails
SMALL_RUN = "BWL-ICPMS-2-20261126-SB"  # its run column
SETTLE = 0.1
DEADLINE = 15.0  # generous: the machine is a shared 2-core one


def small_run(number: int) -> bytes:
    """The small fixture with its own run name: valid, distinct content."""
    return SMALL.replace(SMALL_RUN, f"{SMALL_RUN}-{number:04d}").encode("utf-8")


def sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def verdict(path: Path) -> dict[str, Any]:
    document: dict[str, Any] = json.loads(path.read_text(encoding="utf-8"))
    return document


@dataclass
class Running:
    """A started watcher and the outcomes it has reported."""

    watcher: Watcher
    outcomes: list[Outcome] = field(default_factory=list)

    def wait_outcomes(self, count: int, timeout: float = DEADLINE) -> list[Outcome]:
        wait_for(lambda: len(self.outcomes) >= count, timeout, f"{count} outcome(s)")
        assert self.watcher.fault is None
        return list(self.outcomes)

    def wait_path(self, path: str, timeout: float = DEADLINE) -> Outcome:
        wait_for(lambda: any(o.path == path for o in self.outcomes), timeout, f"{path} judged")
        (outcome,) = [o for o in self.outcomes if o.path == path]
        return outcome


@pytest.fixture
def start(events: list[dict[str, Any]]) -> Iterator[Callable[[WatchPlan], Running]]:
    """Start watchers; each is stopped when the test ends, whatever happened."""
    started: list[Watcher] = []

    def _start(plan: WatchPlan) -> Running:
        outcomes: list[Outcome] = []
        watcher = Watcher(plan, on_outcome=outcomes.append)
        watcher.start()
        started.append(watcher)
        return Running(watcher, outcomes)

    yield _start
    for watcher in started:
        watcher.stop()
    for watcher in started:
        assert watcher.wait(10), "the worker did not end"


def plan_for(
    inbox: Path, out: Path, *, settle: float = SETTLE, pictures: bool = False, **watch: object
) -> WatchPlan:
    """A plan for one inbox; ``watch`` holds extra keys of the configuration's watch section.

    Pictures are off unless asked for: they are drawn in idle moments, so they would
    make the output folder's contents depend on timing.
    """
    config = build_config({"watch": watch, "control": {"charts": pictures}}, "test")
    return plan_watch(config, inbox=inbox, out=out, settle_seconds=settle)


def named(events: list[dict[str, Any]], name: str) -> list[dict[str, Any]]:
    return [event for event in events if event["event"] == name]


def open_ledger(plan: WatchPlan) -> Ledger:
    return Ledger.open(plan.state_dir / LEDGER_NAME, read_only=True)


# --------------------------------------------------------------------------- settling


def test_slow_write_is_judged_once_when_complete(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], events: list[dict[str, Any]]
) -> None:
    """A file written in chunks with gaps shorter than the settle time is judged once, whole."""
    settle = 0.3
    running = start(plan_for(inbox, out, settle=settle))
    assert running.watcher.wait_idle(DEADLINE)
    chunks = 10  # the writing lasts twice the settle time
    step = len(PASSING) // chunks + 1
    with (inbox / "run.csv").open("wb") as stream:
        for begin in range(0, len(PASSING), step):
            stream.write(PASSING[begin : begin + step])
            stream.flush()
            time.sleep(settle / 5)  # the instrument writing: gaps shorter than the settle time
    (outcome,) = running.wait_outcomes(1)
    assert running.watcher.wait_idle(DEADLINE)  # the last write's events are settled too
    evaluated = named(events, "file_evaluated")
    assert len(evaluated) == 1
    assert evaluated[0]["sha256"] == outcome.sha256 == sha256(PASSING)
    assert outcome.status == "pass"
    assert verdict(out / "run.verdict.json")["source"]["sha256"] == sha256(PASSING)


@pytest.mark.parametrize("temporary", ["~run.tmp", ".run.part", "~run.csv", ".run.csv"])
def test_temporary_name_renamed_into_place_is_judged_by_its_new_name(
    inbox: Path,
    out: Path,
    start: Callable[[WatchPlan], Running],
    events: list[dict[str, Any]],
    temporary: str,
) -> None:
    """A file written under an ignored temporary name is judged only once renamed into place."""
    plan = plan_for(inbox, out)
    running = start(plan)
    (inbox / temporary).write_bytes(PASSING)
    # A file written after it settles after it: once judged, the temporary file
    # has sat unchanged for longer than the settle time.
    (inbox / "sentinel.csv").write_bytes(FAILING)
    running.wait_path("sentinel.csv")
    (inbox / temporary).replace(inbox / "run.csv")
    outcome = running.wait_path("run.csv")
    assert outcome.status == "pass"
    assert outcome.sha256 == sha256(PASSING)
    assert {o.path for o in running.outcomes} == {"sentinel.csv", "run.csv"}
    assert not [e for e in events if temporary in str(e.get("path", ""))]
    suffixes = (".verdict.json", ".report.txt", ".report.html", ".flagged.csv")
    expected = {
        ".calwarden",
        "sentinel.reruns.csv",  # it fails
        *(stem + suffix for stem in ("run", "sentinel") for suffix in suffixes),
    }
    overview = {"index.html"}  # the overview page, and its temporary file while written
    assert {p.name for p in out.iterdir() if not p.name.startswith(".index.html.")} - overview == (
        expected
    )
    ledger = open_ledger(plan)
    try:
        assert ledger.files.seen(plan.inboxes[0].name, temporary) is None
    finally:
        ledger.close()


def test_files_already_in_the_inbox_are_judged_at_start(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], events: list[dict[str, Any]]
) -> None:
    """Files that landed while no daemon ran are found by the reconciliation scan at start."""
    (inbox / "monday.csv").write_bytes(PASSING)
    (inbox / "tuesday.csv").write_bytes(FAILING)
    running = start(plan_for(inbox, out))
    outcomes = running.wait_outcomes(2)
    assert {(o.path, o.status) for o in outcomes} == {
        ("monday.csv", "pass"),
        ("tuesday.csv", "fail"),
    }
    assert [(e["reason"], e["files"]) for e in named(events, "rescan_found")] == [("start", 2)]
    assert (out / "monday.verdict.json").is_file()
    assert (out / "tuesday.verdict.json").is_file()


def test_burst_of_500_files_gives_500_verdicts(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """500 files landing at once each get exactly one verdict and one ledger row."""
    plan = plan_for(inbox, out)
    running = start(plan)
    for number in range(500):
        (inbox / f"run-{number:03d}.csv").write_bytes(small_run(number))
    outcomes = running.wait_outcomes(500, timeout=90)
    assert running.watcher.wait_idle(DEADLINE)
    assert len(running.outcomes) == 500
    assert len({o.path for o in outcomes}) == 500
    assert {o.status for o in outcomes} == {"fail"}  # the small fixture's own verdict
    assert len({o.run for o in outcomes}) == 500
    assert len(list(out.glob("*.verdict.json"))) == 500
    ledger = open_ledger(plan)
    try:
        counts = ledger.files.counts()
    finally:
        ledger.close()
    assert counts == {"pass": 0, "fail": 500, "error": 0, "duplicate": 0}


# --------------------------------------------------------------------------- content


def test_same_content_under_a_new_name_is_a_duplicate(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], events: list[dict[str, Any]]
) -> None:
    """A copy of a judged file is recorded as a duplicate and writes no outputs."""
    plan = plan_for(inbox, out)
    running = start(plan)
    (inbox / "run.csv").write_bytes(FAILING)
    running.wait_path("run.csv")

    def outputs() -> list[str]:  # the overview page is rewritten after every file
        return sorted(p.name for p in out.iterdir() if "index.html" not in p.name)

    before = outputs()
    (inbox / "run-copy.csv").write_bytes(FAILING)
    outcome = running.wait_path("run-copy.csv")
    assert outcome.status == "duplicate"
    assert outcome.duplicate_of == "run.csv"
    assert outputs() == before
    (duplicate,) = named(events, "file_duplicate")
    assert (duplicate["path"], duplicate["duplicate_of"]) == ("run-copy.csv", "run.csv")
    assert len(named(events, "file_evaluated")) == 1
    ledger = open_ledger(plan)
    try:
        (row,) = ledger.files.latest(outcome="duplicate")
    finally:
        ledger.close()
    assert (row.path, row.sha256) == ("run-copy.csv", sha256(FAILING))


def test_new_version_is_judged_again_and_the_earlier_verdict_kept(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """New content under a known name is version 2; version 1's outputs move to <stem>@v1."""
    running = start(plan_for(inbox, out))
    (inbox / "run.csv").write_bytes(PASSING)
    running.wait_outcomes(1)
    (inbox / "run.csv").write_bytes(FAILING)
    first, second = running.wait_outcomes(2)
    assert (first.version, first.status) == (1, "pass")
    assert (second.version, second.status) == (2, "fail")
    current = verdict(out / "run.verdict.json")
    assert (current["status"], current["source"]["sha256"]) == ("fail", sha256(FAILING))
    earlier = verdict(out / "run@v1.verdict.json")
    assert (earlier["status"], earlier["source"]["sha256"]) == ("pass", sha256(PASSING))
    assert "PASS" in (out / "run@v1.report.txt").read_text(encoding="utf-8")
    assert (out / "run@v1.flagged.csv").is_file()
    assert second.verdict_path == out / "run.verdict.json"


@pytest.mark.parametrize(
    "garbage",
    [
        random.Random(20261201).randbytes(400),
        b"",
        b"seq,sample_id,kind,analyte,response,nominal\n",
    ],
    ids=["binary", "empty", "header-only"],
)
def test_garbage_gets_an_error_verdict_and_watching_goes_on(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], garbage: bytes
) -> None:
    """A file that cannot be read is judged error, and the next file is judged as usual."""
    running = start(plan_for(inbox, out))
    (inbox / "garbage.csv").write_bytes(garbage)
    outcome = running.wait_path("garbage.csv")
    assert outcome.status == "error"
    assert outcome.message
    document = verdict(out / "garbage.verdict.json")
    assert (document["status"], document["error"]) == ("error", outcome.message)
    assert (out / "garbage.report.txt").is_file()
    (inbox / "next.csv").write_bytes(PASSING)
    assert running.wait_path("next.csv").status == "pass"
    assert running.watcher.fault is None


# --------------------------------------------------------------------------- observers


def test_dead_observer_is_restarted_and_nothing_is_missed(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], events: list[dict[str, Any]]
) -> None:
    """An observer that died is restarted, and a file written meanwhile is still judged."""
    running = start(plan_for(inbox, out, observer_check_seconds=0.2))
    assert running.watcher.wait_idle(DEADLINE)
    (dead,) = running.watcher.observers
    dead.stop()
    dead.join(DEADLINE)
    (inbox / "meanwhile.csv").write_bytes(FAILING)
    assert running.wait_path("meanwhile.csv").status == "fail"
    assert named(events, "observer_restarted")
    wait_for(lambda: running.watcher.observers, what="a new observer")
    (alive,) = running.watcher.observers
    assert alive is not dead and alive.is_alive()
    (inbox / "after.csv").write_bytes(PASSING)  # the new observer sees new files
    assert running.wait_path("after.csv").status == "pass"


def test_inbox_folder_made_again_is_watched_again(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], events: list[dict[str, Any]]
) -> None:
    """An inbox folder deleted and made again (a share remounted) gets an observer again."""
    running = start(plan_for(inbox, out, observer_check_seconds=0.2))  # rescans every 60 s
    assert running.watcher.wait_idle(DEADLINE)
    inbox.rmdir()
    wait_for(lambda: named(events, "observer_start_failed"), what="the failed restart")
    inbox.mkdir()
    (inbox / "run.csv").write_bytes(PASSING)
    # Far sooner than the next periodic rescan, far later than a restart and the settle time.
    running.wait_outcomes(1, timeout=5)
    assert running.watcher.observers


def test_polling_inbox_is_watched(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """With polling: true a PollingObserver lists the inbox and finds new files."""
    running = start(plan_for(inbox, out, polling=True, polling_interval_seconds=0.1))
    assert running.watcher.wait_idle(DEADLINE)  # the start scan is over: only polling finds it
    (observer,) = running.watcher.observers
    assert isinstance(observer, PollingObserver)
    (inbox / "run.csv").write_bytes(PASSING)
    assert running.wait_path("run.csv").status == "pass"


# --------------------------------------------------------------------------- what is judged


def test_deleting_a_judged_file_keeps_its_verdict(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], events: list[dict[str, Any]]
) -> None:
    """A delete event is ignored: the verdict and the ledger row of the deleted file stay."""
    plan = plan_for(inbox, out)
    running = start(plan)
    (inbox / "run.csv").write_bytes(PASSING)
    running.wait_path("run.csv")
    outputs = {  # the overview page changes with every file
        p.name: p.read_bytes() for p in out.iterdir() if p.is_file() and p.name != "index.html"
    }
    count = len(events)
    (inbox / "run.csv").unlink()
    (inbox / "sentinel.csv").write_bytes(FAILING)  # its events come after the delete's
    running.wait_path("sentinel.csv")
    assert {p.name: p.read_bytes() for p in out.iterdir() if p.name in outputs} == outputs
    assert [e["path"] for e in events[count:] if "path" in e] == ["sentinel.csv"]
    ledger = open_ledger(plan)
    try:
        assert ledger.files.counts()["pass"] == 1
    finally:
        ledger.close()


def test_names_not_matching_the_patterns_are_not_judged(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], events: list[dict[str, Any]]
) -> None:
    """A *.txt file is left alone when the patterns are *.csv."""
    running = start(plan_for(inbox, out))
    (inbox / "notes.txt").write_bytes(PASSING)
    (inbox / "sentinel.csv").write_bytes(FAILING)  # settles after notes.txt would have
    running.wait_path("sentinel.csv")
    assert running.watcher.wait_idle(DEADLINE)
    assert [o.path for o in running.outcomes] == ["sentinel.csv"]
    assert not [e for e in events if e.get("path") == "notes.txt"]
    assert not list(out.glob("notes*"))


def test_patterns_match_ignoring_case(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """RUN.CSV matches the pattern *.csv."""
    running = start(plan_for(inbox, out))
    (inbox / "RUN.CSV").write_bytes(PASSING)
    assert running.wait_path("RUN.CSV").status == "pass"
    assert verdict(out / "RUN.verdict.json")["status"] == "pass"


# --------------------------------------------------------------------------- restarts


def test_restart_does_not_judge_judged_files_again(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], events: list[dict[str, Any]]
) -> None:
    """A watcher restarted on the same output folder skips the files the ledger knows."""
    plan = plan_for(inbox, out)
    first = start(plan)
    (inbox / "run.csv").write_bytes(PASSING)
    (inbox / "run-copy.csv").write_bytes(PASSING)  # a duplicate is known too
    (inbox / "broken.csv").write_bytes(b"")
    first.wait_outcomes(3)
    first.watcher.stop()
    assert first.watcher.wait(DEADLINE)
    count = len(events)
    second = start(plan)
    assert second.watcher.wait_idle(DEADLINE)
    later = [e["event"] for e in events[count:]]
    assert "daemon_started" in later
    assert not {"file_evaluated", "file_duplicate", "rescan_found"} & set(later)
    assert second.outcomes == []


def test_leftover_temporary_outputs_are_removed_at_start(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], events: list[dict[str, Any]]
) -> None:
    """Half-written outputs of a killed daemon are deleted at start; nothing else is."""
    leftovers = [".run.verdict.json.abc123.tmp", ".run.flagged.csv.k9x2_q.tmp"]
    kept = [".notes.tmp", "run.verdict.json", "readme.txt"]
    for name in leftovers + kept:
        (out / name).write_bytes(b"x")
    running = start(plan_for(inbox, out))
    assert running.watcher.wait_idle(DEADLINE)
    assert sorted(p.name for p in out.iterdir() if p.is_file()) == sorted(kept)
    removed = sorted(Path(e["path"]).name for e in named(events, "temporary_file_removed"))
    assert removed == sorted(leftovers)


def test_two_inboxes_write_to_their_own_output_folders(
    tmp_path: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """With two inboxes in the configuration, outputs go to OUT/<name>/."""
    for folder in ("icpms", "lcms"):
        (tmp_path / folder).mkdir()
    config = build_config(
        {
            "watch": {"out": "out", "settle_seconds": SETTLE},
            "control": {"charts": False},
            "inboxes": [
                {"path": "icpms", "name": "metals"},
                {"path": "lcms", "name": "herbicides"},
            ],
        },
        "test",
    )
    plan = plan_watch(config, config_dir=tmp_path)
    running = start(plan)
    (tmp_path / "icpms" / "run.csv").write_bytes(PASSING)
    (tmp_path / "lcms" / "run.csv").write_bytes(PASSING)  # same content, another inbox
    outcomes = running.wait_outcomes(2)
    assert sorted((o.inbox, o.status) for o in outcomes) == [
        ("herbicides", "pass"),
        ("metals", "pass"),
    ]
    out = tmp_path / "out"
    assert verdict(out / "metals" / "run.verdict.json")["status"] == "pass"
    assert verdict(out / "herbicides" / "run.verdict.json")["status"] == "pass"
    assert not (out / "run.verdict.json").exists()
    assert (out / ".calwarden" / LEDGER_NAME).is_file()


# --------------------------------------------------------------------------- the state lock


def test_second_watcher_on_the_same_plan_cannot_start(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """While one watcher runs, another on the same state folder raises StartError."""
    plan = plan_for(inbox, out)
    start(plan)
    second = Watcher(plan)
    with pytest.raises(StartError, match="another calwarden daemon"):
        second.start()


def test_a_damaged_ledger_cannot_start(inbox: Path, out: Path) -> None:
    """A ledger that is not a database is a StartError (exit 2) naming it, lock released."""
    plan = plan_for(inbox, out)
    plan.state_dir.mkdir(parents=True, exist_ok=True)
    ledger = plan.state_dir / LEDGER_NAME
    ledger.write_bytes(b"SQLite format 3\0" + bytes(range(256)) * 20)
    with pytest.raises(StartError, match="move it aside") as caught:
        Watcher(plan).start()
    assert str(ledger) in str(caught.value)
    assert not is_locked(plan.state_dir)


def test_state_lock_is_released_when_the_watcher_stops(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """Once the first watcher has stopped, a second one on the same plan starts."""
    plan = plan_for(inbox, out)
    first = start(plan)
    first.watcher.stop()
    assert first.watcher.wait(DEADLINE)
    second = start(plan)
    assert second.watcher.wait_idle(DEADLINE)
    assert second.watcher.fault is None


def test_pictures_are_drawn_when_the_daemon_is_idle(
    start: Callable[[WatchPlan], Running], inbox: Path, out: Path
) -> None:
    """With pictures on, each judged run gets a calibration picture per analyte and charts."""
    running = start(plan_for(inbox, out, pictures=True))
    (inbox / "run.csv").write_bytes(PASSING)
    running.wait_outcomes(1)
    assert running.watcher.wait_pictures(60)
    document = json.loads((out / "run.verdict.json").read_text(encoding="utf-8"))
    analytes = sorted(document["calibrations"])
    pictures = sorted(p.name for p in out.glob("run.calibration-*.png"))
    assert pictures == sorted(f"run.calibration-{a}.png" for a in analytes)
    assert document["pictures"] == [f"run.calibration-{a}.png" for a in document["calibrations"]]
    charts = list((out / "charts").rglob("*.png"))
    assert len(charts) == len(document["control_charts"])
    assert shape_problems(document, VerdictDocument) == []  # the daemon's keys fit the model
    assert all(p.read_bytes().startswith(b"\x89PNG") for p in [*charts, out / pictures[0]])


@pytest.mark.parametrize(
    "name", ["r" * 240, "µ" * 78, "é" * 120], ids=["240-ascii", "78-3byte", "120-2byte"]
)
def test_too_long_a_name_gets_shortened_outputs_and_watching_goes_on(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running], name: str
) -> None:
    """A file whose outputs' names would pass 255 bytes is judged under a shortened stem."""
    running = start(plan_for(inbox, out))
    (inbox / f"{name}.csv").write_bytes(PASSING)
    assert running.wait_path(f"{name}.csv").status == "pass"
    (written,) = out.glob("*.verdict.json")
    assert len(written.name.removesuffix(".verdict.json").encode()) <= STEM_LIMIT
    assert verdict(written)["source"]["path"].endswith(f"{name}.csv")
    (inbox / "next.csv").write_bytes(FAILING)
    assert running.wait_path("next.csv").status == "fail"
    assert running.watcher.fault is None


def test_two_long_names_alike_at_the_start_get_two_outputs(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """Two long names that differ only after the cut get two verdicts, not one."""
    running = start(plan_for(inbox, out))
    for ending in ("a", "b"):
        (inbox / f"{'r' * 240}{ending}.csv").write_bytes(small_run(ord(ending)))
    running.wait_outcomes(2)
    assert len(list(out.glob("*.verdict.json"))) == 2


def test_lost_ledger_never_overwrites_an_archived_verdict(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """With the ledger lost, the next archive goes to the next free @v number, not over @v1."""
    plan = plan_for(inbox, out)
    running = start(plan)
    (inbox / "run.csv").write_bytes(PASSING)
    running.wait_outcomes(1)
    (inbox / "run.csv").write_bytes(FAILING)
    running.wait_outcomes(2)
    running.watcher.stop()
    assert running.watcher.wait(10)
    for leftover in plan.state_dir.glob(f"{LEDGER_NAME}*"):
        leftover.unlink()
    again = start(plan)
    again.wait_outcomes(1)  # the current file, judged afresh as version 1
    (inbox / "run.csv").write_bytes(small_run(7))
    again.wait_outcomes(2)
    assert verdict(out / "run@v1.verdict.json")["source"]["sha256"] == sha256(PASSING)
    assert verdict(out / "run@v2.verdict.json")["source"]["sha256"] == sha256(FAILING)


# --------------------------------------------------------------------------- links


def test_link_out_of_the_inbox_is_skipped_unread_and_logged(
    inbox: Path,
    out: Path,
    tmp_path: Path,
    start: Callable[[WatchPlan], Running],
    events: list[dict[str, Any]],
) -> None:
    """inbox/passwd.csv → a file outside: never judged, a link_outside_inbox event instead."""
    secret = tmp_path / "elsewhere" / "passwd"
    secret.parent.mkdir()
    secret.write_text("root:x:0:0:root:/root:/bin/bash\n", encoding="utf-8")
    (inbox / "passwd.csv").symlink_to(secret)
    running = start(plan_for(inbox, out))
    (inbox / "sentinel.csv").write_bytes(FAILING)
    running.wait_path("sentinel.csv")
    assert running.watcher.wait_idle(DEADLINE)
    assert [o.path for o in running.outcomes] == ["sentinel.csv"]
    (refused,) = named(events, "link_outside_inbox")
    assert (refused["path"], refused["target"]) == ("passwd.csv", str(secret.resolve()))
    assert not list(out.glob("passwd*"))


def test_link_out_of_the_inbox_is_judged_when_the_setting_allows(
    inbox: Path, out: Path, tmp_path: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """watch.follow_links_outside: true judges what the link points at."""
    target = tmp_path / "share" / "run.csv"
    target.parent.mkdir()
    target.write_bytes(PASSING)
    (inbox / "run.csv").symlink_to(target)
    running = start(plan_for(inbox, out, follow_links_outside=True))
    assert running.wait_path("run.csv").status == "pass"


def test_link_within_the_inbox_is_judged(
    inbox: Path, out: Path, start: Callable[[WatchPlan], Running]
) -> None:
    """A link whose target is inside the inbox is an ordinary file there."""
    (inbox / "archive").mkdir()
    (inbox / "archive" / "run.txt").write_bytes(PASSING)
    (inbox / "run.csv").symlink_to(inbox / "archive" / "run.txt")
    running = start(plan_for(inbox, out))
    assert running.wait_path("run.csv").status == "pass"
