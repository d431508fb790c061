"""The hostile-input corpus: each class of bad or careless input gives what its index says.

``tests/corpus/make_corpus.py`` writes the files (afresh, into a temporary folder) and
``tests/corpus/index.yaml`` says what each must give; every file goes through
``calwarden check --json`` in this process, under a deadline, and must also keep the
invariants of ``tests/fuzzing.py`` (valid JSON, the exit code of its status, no
internal error, nothing on stderr, no silently missing result).
"""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Any

import pytest
import yaml
from fuzzing import check_in_process, outcome_problems

CORPUS = Path(__file__).resolve().parent / "corpus"
PROJECT = CORPUS.parent.parent
sys.path.insert(0, str(CORPUS))
import make_corpus  # noqa: E402  (the generator beside the index)

INDEX: list[dict[str, Any]] = yaml.safe_load((CORPUS / "index.yaml").read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def corpus_files(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The corpus written afresh, as make_corpus.py writes it."""
    folder = tmp_path_factory.mktemp("corpus")
    make_corpus.write(folder / "files")
    return folder


def test_the_index_is_what_the_generator_writes(corpus_files: Path) -> None:
    """index.yaml is up to date with make_corpus.py (rerun the script after editing it)."""
    index = make_corpus.write(corpus_files / "again")
    assert make_corpus.index_text(index) == (CORPUS / "index.yaml").read_text(encoding="utf-8")


def test_the_corpus_holds_at_least_100_classes() -> None:
    """The corpus is the issue's promised size, each class with its own name."""
    names = [entry["name"] for entry in INDEX]
    assert len(names) >= 100
    assert len(set(names)) == len(names)


def _special(kind: str, folder: Path, entry: dict[str, Any], corpus: Path) -> Path:
    """Make what git cannot keep: FIFOs, folders and links."""
    path = folder / "input.csv"
    if kind == "directory":
        path.mkdir()
    elif kind == "fifo":
        os.mkfifo(path)
    elif kind == "link_to_fifo":
        os.mkfifo(folder / "pipe")
        path.symlink_to(folder / "pipe")
    elif kind == "link_to_dev_zero":
        path.symlink_to("/dev/zero")
    elif kind == "dev_null":
        return Path("/dev/null")
    elif kind == "dangling_link":
        path.symlink_to(folder / "nowhere.csv")
    elif kind == "missing":
        pass
    elif kind == "link_to_file":
        path.symlink_to(corpus / entry["file"])
    elif kind == "link_loop":
        path.symlink_to(folder / "other.csv")
        (folder / "other.csv").symlink_to(path)
    else:  # pragma: no cover
        raise AssertionError(f"unknown special {kind}")
    return path


def _finding_matches(document: dict[str, Any], entry: dict[str, Any]) -> bool:
    for finding in document["findings"]:
        if "rule" in entry and finding["rule"] != entry["rule"]:
            continue
        if "severity" in entry and finding["severity"] != entry["severity"]:
            continue
        if "message" in entry and entry["message"] not in finding["message"]:
            continue
        return True
    return False


@pytest.mark.skipif(sys.platform == "win32", reason="FIFOs, links and POSIX deadlines")
@pytest.mark.parametrize("entry", INDEX, ids=[entry["name"] for entry in INDEX])
def test_corpus_class(entry: dict[str, Any], corpus_files: Path, tmp_path: Path) -> None:
    """The class's file gives its exit code, status and message, and keeps the invariants."""
    if "special" in entry:
        path = _special(entry["special"], tmp_path, entry, corpus_files)
    else:
        path = corpus_files / entry["file"]
    options: list[str] = []
    if "config" in entry:
        options += ["--config", str(PROJECT / entry["config"])]
    out = tmp_path / "out"
    if entry.get("out"):
        options += ["--out", str(out)]
    outcome = check_in_process(path, *options, seconds=20.0)
    document, broken = outcome_problems(outcome)
    assert broken == [], broken
    assert document is not None
    assert (outcome.exit_code, document["status"]) == (entry["exit"], entry["status"]), (
        document.get("error") or [f["message"] for f in document["findings"]][:5]
    )
    if document["status"] == "error":
        assert entry.get("message", "") in document["error"]
    elif "rule" in entry or "message" in entry:
        assert _finding_matches(document, entry), [
            (f["rule"], f["severity"], f["message"]) for f in document["findings"]
        ]
    if entry.get("out"):
        written = sorted(p.name for p in out.iterdir())
        assert len(written) >= 4 and all(len(name.encode()) <= 255 for name in written), written
        if "flagged" in entry:
            flagged = next(out.glob("*.flagged.csv")).read_text(encoding="utf-8-sig")
            assert entry["flagged"] in flagged


def test_the_native_corpus_through_one_watcher_never_stops_it(
    corpus_files: Path, tmp_path: Path
) -> None:
    """Every native corpus file dropped into one running watcher: each judged, no fault.

    `check` has no ledger: a seq beyond 2^63 in a CCV passed there but stopped the daemon
    (exit 3, on every restart) when its control point reached the ledger.
    """
    from waiting import wait_for

    from calwarden.daemon.intake.accept import Outcome
    from calwarden.daemon.intake.watcher import Watcher
    from calwarden.daemon.settings.config import build_config, plan_watch

    inbox, out = tmp_path / "inbox", tmp_path / "out"
    inbox.mkdir()
    expected: dict[str, str] = {}
    for entry in INDEX:
        if "file" not in entry or "config" in entry or not entry["file"].endswith(".csv"):
            continue
        name = Path(entry["file"]).name
        if name.startswith("."):
            continue  # the watcher ignores hidden names by design
        (inbox / name).write_bytes((corpus_files / entry["file"]).read_bytes())
        expected[name] = entry["status"]
    config = build_config({"control": {"charts": False}}, "corpus")
    outcomes: list[Outcome] = []
    plan = plan_watch(config, inbox=inbox, out=out, settle_seconds=0.05)
    watcher = Watcher(plan, on_outcome=outcomes.append)
    watcher.start()
    try:
        wait_for(
            lambda: len(outcomes) >= len(expected) or watcher.fault is not None,
            120.0,
            f"{len(expected)} corpus files judged",
        )
    finally:
        watcher.stop()
        assert watcher.wait(10), "the worker did not end"
    assert watcher.fault is None
    wrong = {
        o.path: (o.status, expected[o.path])
        for o in outcomes
        if o.status not in (expected[o.path], "duplicate")  # the same bytes under two names
    }
    assert wrong == {}
    assert {o.path for o in outcomes} == set(expected)
