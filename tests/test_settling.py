"""Settling decisions without a clock: when a file is complete, when to retry, what to rescan."""

from __future__ import annotations

from pathlib import Path

import pytest

from calwarden.daemon.intake.settling import (
    Forget,
    GiveUp,
    Hinted,
    Ignore,
    Judge,
    Listed,
    Locked,
    Looked,
    Read,
    ReadBack,
    Retry,
    Settling,
    Step,
    Timing,
    Unreadable,
    Vanished,
    Wait,
    may_follow,
    start,
    step,
    to_rescan,
    wanted,
)
from calwarden.daemon.settings.config import build_config, plan_watch

TIMING = Timing(settle_seconds=2.0)
NOW = 1000.0  # monotonic seconds; any value will do
SIZE, MTIME = 4096, 1_700_000_000_000_000_000


def settling(due: float = NOW + 2.0, attempts: int = 0) -> Settling:
    """A candidate that was last seen with SIZE and MTIME."""
    return Settling(SIZE, MTIME, due, attempts)


def locked_times(state: Settling, times: int) -> list[Step]:
    """``times`` refusals in a row, each at the due time of the one before."""
    steps = []
    for _ in range(times):
        steps.append(step(state, Locked(), state.due, TIMING))
        assert steps[-1].state is not None
        state = steps[-1].state
    return steps


# --------------------------------------------------------------------------- hints


def test_a_hint_about_a_new_file_waits_one_settle_time() -> None:
    """A file never seen becomes a candidate due one settle time from now."""
    assert step(None, Hinted(SIZE, MTIME), NOW, TIMING) == Step(
        Settling(SIZE, MTIME, NOW + 2.0), Wait(NOW + 2.0)
    )


def test_a_hint_about_a_file_recorded_as_it_is_is_ignored() -> None:
    """A late event about a file the ledger holds with this size and mtime starts nothing."""
    assert step(None, Hinted(SIZE, MTIME, recorded=(SIZE, MTIME)), NOW, TIMING) == Step(
        None, Ignore()
    )


def test_a_hint_about_a_file_recorded_otherwise_makes_it_a_candidate() -> None:
    """A judged file with another size now (rewritten) settles again."""
    result = step(None, Hinted(SIZE + 1, MTIME, recorded=(SIZE, MTIME)), NOW, TIMING)
    assert result.action == Wait(NOW + 2.0)


def test_a_hint_showing_a_change_restarts_the_settle_time_from_now() -> None:
    """A write seen by its event settles one settle time after it, not after the next check."""
    result = step(settling(due=NOW + 0.5), Hinted(SIZE + 10, MTIME + 1), NOW, TIMING)
    assert result == Step(Settling(SIZE + 10, MTIME + 1, NOW + 2.0), Wait(NOW + 2.0))


def test_a_hint_showing_a_change_clears_failed_opens() -> None:
    """A file written again after refusals starts counting its failed opens afresh."""
    result = step(settling(attempts=3), Hinted(SIZE + 10, MTIME + 1), NOW, TIMING)
    assert result.state is not None and result.state.attempts == 0


def test_a_hint_showing_no_change_keeps_the_due_time() -> None:
    """An event that changes nothing (our own read, a touch of nothing) delays nothing."""
    state = settling(due=NOW + 0.5, attempts=2)
    assert step(state, Hinted(SIZE, MTIME), NOW, TIMING) == Step(state, Ignore())


def test_a_vanished_path_without_a_candidate_is_forgotten() -> None:
    """A hint for a path gone again (a temporary file renamed away) leaves no candidate."""
    assert step(None, Vanished(), NOW, TIMING).state is None


# --------------------------------------------------------------------------- due checks


def test_a_file_unchanged_at_its_due_time_is_read() -> None:
    """Size and mtime unchanged for the settle time: read it now."""
    state = settling()
    assert step(state, Looked(SIZE, MTIME), state.due, TIMING) == Step(state, Read())


def test_a_file_changed_at_its_due_time_settles_again() -> None:
    """A file still growing waits another settle time from the moment it is seen changed."""
    state = settling()
    result = step(state, Looked(SIZE * 2, MTIME + 5), state.due, TIMING)
    assert result == Step(Settling(SIZE * 2, MTIME + 5, state.due + 2.0), Wait(state.due + 2.0))


def test_a_change_at_the_due_time_keeps_the_failed_opens() -> None:
    """Settling again after a change does not hide earlier failed opens."""
    result = step(settling(attempts=2), Looked(SIZE * 2, MTIME + 5), NOW, TIMING)
    assert result.state is not None and result.state.attempts == 2


def test_only_the_modification_time_changing_is_a_change() -> None:
    """Rewritten with the same length (a corrected value), the file settles again."""
    result = step(settling(), Looked(SIZE, MTIME + 1), NOW, TIMING)
    assert isinstance(result.action, Wait)


def test_a_file_gone_at_its_due_time_is_forgotten() -> None:
    """Deleted while settling: no longer a candidate, nothing judged."""
    assert step(settling(), Vanished(), NOW, TIMING) == Step(None, Forget())


# --------------------------------------------------------------------------- reads


def test_a_complete_read_is_judged_with_the_settled_size_and_mtime() -> None:
    """All bytes read and nothing changed meanwhile: judge them, as this size and mtime."""
    assert step(settling(), ReadBack(SIZE, MTIME, SIZE), NOW, TIMING) == Step(
        None, Judge(SIZE, MTIME)
    )


def test_a_file_changed_while_read_settles_again() -> None:
    """Written to during the read: the bytes are not trusted, the file settles again."""
    result = step(settling(), ReadBack(SIZE + 8, MTIME + 1, SIZE), NOW, TIMING)
    assert result == Step(Settling(SIZE + 8, MTIME + 1, NOW + 2.0), Wait(NOW + 2.0))


def test_a_short_read_settles_again() -> None:
    """Fewer bytes than the file's size came (truncated meanwhile): settle again."""
    assert isinstance(step(settling(), ReadBack(SIZE, MTIME, SIZE - 1), NOW, TIMING).action, Wait)


def test_a_file_too_large_to_load_is_judged_without_a_length() -> None:
    """A file hashed as a stream (no bytes loaded) is judged once it did not change."""
    assert step(settling(), ReadBack(SIZE, MTIME, None), NOW, TIMING).action == Judge(SIZE, MTIME)


def test_a_file_gone_while_read_is_forgotten() -> None:
    """Deleted between the check and the read: no longer a candidate."""
    assert step(settling(), Vanished(), NOW, TIMING).state is None


# --------------------------------------------------------------------------- retries


def test_a_refused_open_is_retried_after_half_a_second() -> None:
    """The first refusal (the instrument holds the file) waits 0.5 s."""
    result = step(settling(), Locked(), NOW, TIMING)
    assert result.action == Retry(NOW + 0.5, "file_locked", first=True)
    assert result.state == Settling(SIZE, MTIME, NOW + 0.5, attempts=1)


def test_refused_opens_back_off_doubling() -> None:
    """Each refusal in a row waits twice as long as the one before: 0.5, 1, 2, 4 s."""
    state = settling(due=NOW)
    delays = []
    for _ in range(4):
        result = step(state, Locked(), state.due, TIMING)
        assert isinstance(result.action, Retry) and result.state is not None
        delays.append(result.action.due - state.due)
        state = result.state
    assert delays == [0.5, 1.0, 2.0, 4.0]


def test_the_backoff_stops_growing_at_thirty_seconds() -> None:
    """However long a file stays locked, it is tried again at least every 30 s."""
    assert [TIMING.retry_delay(n) for n in (6, 7, 8, 50)] == [16.0, 30.0, 30.0, 30.0]


def test_only_the_first_refusal_is_said() -> None:
    """A locked file is logged once, not at every retry."""
    actions = [s.action for s in locked_times(settling(due=NOW), 3)]
    assert [isinstance(a, Retry) and a.first for a in actions] == [True, False, False]


def test_a_locked_file_is_never_given_up() -> None:
    """Refusals go on being retried: the instrument releases the file in the end."""
    steps = locked_times(settling(due=NOW), 20)
    assert all(isinstance(s.action, Retry) for s in steps)


def test_an_unreadable_file_is_given_up_at_the_fifth_failure() -> None:
    """Four failed reads are retried; the fifth drops the file (the next rescan tries it)."""
    state: Settling | None = settling(due=NOW)
    actions = []
    for _ in range(5):
        assert state is not None
        result = step(state, Unreadable("OSError(5, 'Input/output error')"), state.due, TIMING)
        actions.append(result.action)
        state = result.state
    assert all(isinstance(action, Retry) for action in actions[:4])
    assert actions[4] == GiveUp("file_unreadable") and state is None


# --------------------------------------------------------------------------- rescans


def listed(name: str, size: int, mtime_ns: int) -> Listed:
    return Listed(Path("/inbox") / name, name, size, mtime_ns)


def test_a_rescan_skips_files_recorded_as_they_are() -> None:
    """A file the ledger holds with this size and mtime is not queued again."""
    found = [listed("a.csv", 10, 5), listed("b.csv", 20, 6)]
    assert to_rescan(found, {"a.csv": (10, 5)}, set()) == [found[1]]


def test_a_rescan_queues_a_file_recorded_otherwise() -> None:
    """A file changed while the daemon was down is queued again."""
    found = [listed("a.csv", 11, 5)]
    assert to_rescan(found, {"a.csv": (10, 5)}, set()) == found


def test_a_rescan_skips_files_already_settling() -> None:
    """A candidate keeps its own settle time: the rescan does not queue it twice."""
    found = [listed("a.csv", 10, 5)]
    assert to_rescan(found, {}, {Path("/inbox/a.csv")}) == []


def test_a_rescan_queues_oldest_first() -> None:
    """A backlog is judged in the order the instrument wrote it."""
    found = [listed("c.csv", 1, 30), listed("a.csv", 1, 10), listed("b.csv", 1, 20)]
    assert [item.relative for item in to_rescan(found, {}, set())] == ["a.csv", "b.csv", "c.csv"]


def test_a_file_found_by_a_rescan_waits_one_settle_time() -> None:
    """A rescanned file settles like a hinted one."""
    assert start(listed("a.csv", 10, 5), NOW, TIMING) == Step(
        Settling(10, 5, NOW + 2.0), Wait(NOW + 2.0)
    )


@pytest.mark.parametrize(
    ("relative", "expected"),
    [
        ("run.csv", True),
        ("RUN.CSV", True),
        ("run.tmp", False),
        ("~run.csv", False),
        ("sub/run.csv", False),
        ("notes.txt", False),
    ],
)
def test_wanted_files_match_the_inbox_patterns(
    inbox: Path, tmp_path: Path, relative: str, expected: bool
) -> None:
    """Patterns match ignoring case, temporary names are not judged, nor a sub-folder's files."""
    plan = plan_watch(build_config({}, "test"), inbox=inbox, out=tmp_path / "out")
    watched = plan.inboxes[0]
    assert wanted(watched, watched.path / relative) is expected


@pytest.mark.parametrize(
    ("target", "follow", "expected"),
    [
        ("inside/run.csv", False, True),
        ("../etc/passwd", False, False),
        ("../etc/passwd", True, True),
    ],
)
def test_a_target_outside_the_inbox_is_followed_only_when_allowed(
    inbox: Path, tmp_path: Path, target: str, follow: bool, expected: bool
) -> None:
    """A file's real path must lie in the inbox unless follow_links_outside is set."""
    config = build_config({"watch": {"follow_links_outside": follow}}, "test")
    watched = plan_watch(config, inbox=inbox, out=tmp_path / "out").inboxes[0]
    assert may_follow(watched, (watched.path / target).resolve()) is expected
