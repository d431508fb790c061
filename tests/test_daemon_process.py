"""The real `calwarden watch`, `status` and `demo` commands, run as separate processes.

Each test starts `python -m daemon ...` with the interpreter running the tests and
this checkout first on the path, and waits for conditions with deadlines (never
fixed sleeps). The `spawn` fixture kills whatever a test started and did not stop.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest

from calwarden.daemon.cli.demo import run_demo
from calwarden.daemon.settings.store import StoreSettings
from calwarden.daemon.stores.database import Database, LedgerError
from calwarden.daemon.stores.engine import store_target

PROJECT = Path(__file__).resolve().parent.parent
FIXTURES = PROJECT / "fixtures"
PASSING = FIXTURES / "bwl-metals-pass.csv"
FAILING = FIXTURES / "bwl-metals-fail.csv"
BROKEN = FIXTURES / "bwl-bad-missing-nominal.csv"
SMALL_RUN = FIXTURES / "bwl-addition.csv"  # the quickest valid run to judge (24 readings)
SMALL_RUN_NAME = "BWL-ICPMS-2-20261126-SA"  # its `run` column, varied to make distinct files

SETTLE = "0.1"
START_SECONDS = 20.0  # generous deadlines: the machine is a shared 2-core VM
EXIT_SECONDS = 15.0
BURST = 200

posix_only = pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals and modes")


# --------------------------------------------------------------------------- helpers


def wait_for(predicate: Callable[[], bool], timeout: float) -> bool:
    """Poll ``predicate`` every 20 ms until it holds (True) or ``timeout`` passes (False)."""
    deadline = time.monotonic() + timeout
    while True:
        if predicate():
            return True
        if time.monotonic() >= deadline:
            return False
        time.sleep(0.02)


def _environment() -> dict[str, str]:
    """The test's environment with this checkout first on the import path."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(
        part for part in (str(PROJECT), env.get("PYTHONPATH")) if part
    )
    return env


def calwarden(*args: object, cwd: Path, timeout: float = 60.0) -> subprocess.CompletedProcess[str]:
    """Run one calwarden command to its end."""
    return subprocess.run(
        [sys.executable, "-m", "calwarden.daemon", *map(str, args)],
        cwd=cwd,
        env=_environment(),
        capture_output=True,
        text=True,
        encoding="utf-8",
        timeout=timeout,
        check=False,
    )


@dataclass
class Daemon:
    """A running `calwarden watch`, its output going to files (a full pipe would block it)."""

    process: subprocess.Popen[bytes]
    stdout_path: Path
    stderr_path: Path
    state_dir: Path

    @property
    def pid(self) -> int:
        return self.process.pid

    def stderr(self) -> str:
        return self.stderr_path.read_text(encoding="utf-8", errors="replace")

    def events(self) -> list[dict[str, Any]]:
        """The JSON log's events so far (a line still being written is left out)."""
        return read_events(self.state_dir)

    def wait_started(self) -> None:
        """Until this process has logged `daemon_started`; fails at once if it exits instead."""
        started = wait_for(
            lambda: (
                self.process.poll() is not None
                or any(
                    e["event"] == "daemon_started" and e.get("pid") == self.pid
                    for e in self.events()
                )
            ),
            START_SECONDS,
        )
        assert self.process.poll() is None, f"watch exited early:\n{self.stderr()}"
        assert started, f"no daemon_started within {START_SECONDS} s:\n{self.stderr()}"

    def exit_code(self) -> int:
        """Wait (generously) for the process to end and return its exit code."""
        try:
            return self.process.wait(timeout=EXIT_SECONDS)
        except subprocess.TimeoutExpired:
            pytest.fail(f"watch still running {EXIT_SECONDS} s later:\n{self.stderr()}")


Spawn = Callable[..., Daemon]


@pytest.fixture
def spawn(tmp_path: Path) -> Iterator[Spawn]:
    """Start `calwarden watch ARGS...`; every process started is killed after the test."""
    started: list[Daemon] = []

    def start(*args: object, state_dir: Path, umask: int = -1) -> Daemon:
        number = len(started)
        stdout_path = tmp_path / f"watch-{number}.stdout"
        stderr_path = tmp_path / f"watch-{number}.stderr"
        with stdout_path.open("wb") as stdout, stderr_path.open("wb") as stderr:
            process = subprocess.Popen(
                [sys.executable, "-m", "calwarden.daemon", "watch", *map(str, args)],
                cwd=tmp_path,
                env=_environment(),
                stdin=subprocess.DEVNULL,
                stdout=stdout,
                stderr=stderr,
                umask=umask,
            )
        daemon = Daemon(process, stdout_path, stderr_path, state_dir)
        started.append(daemon)
        return daemon

    try:
        yield start
    finally:
        for daemon in started:
            if daemon.process.poll() is None:
                daemon.process.kill()
            daemon.process.wait(timeout=EXIT_SECONDS)


def read_events(state_dir: Path) -> list[dict[str, Any]]:
    try:
        lines = (state_dir / "calwarden.log").read_text(encoding="utf-8").splitlines()
    except FileNotFoundError:
        return []
    events = []
    for line in lines:
        try:
            events.append(json.loads(line))
        except json.JSONDecodeError:
            continue  # the line the daemon is writing right now
    return events


def verdicts(out: Path) -> list[Path]:
    return sorted(out.glob("*.verdict.json"))


def sha256_of(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def first_failure(verdict: Path) -> str:
    """The message `status` shows for a failed run: its first failing finding."""
    document = json.loads(verdict.read_text(encoding="utf-8"))
    return next(f["message"] for f in document["findings"] if f["severity"] == "fail")


@pytest.fixture
def folders(tmp_path: Path) -> tuple[Path, Path]:
    """An empty inbox and an output folder beside it."""
    inbox, out = tmp_path / "inbox", tmp_path / "out"
    inbox.mkdir()
    return inbox, out


def start_watch(spawn: Spawn, inbox: Path, out: Path, *extra: object) -> Daemon:
    daemon = spawn(inbox, "--out", out, "--settle", SETTLE, *extra, state_dir=out / ".calwarden")
    daemon.wait_started()
    return daemon


def drop_and_wait(inbox: Path, out: Path, *sources: Path) -> None:
    """Copy the runs into the inbox and wait for all their verdicts."""
    for source in sources:
        shutil.copyfile(source, inbox / source.name)
    expected = {out / f"{source.stem}.verdict.json" for source in sources}
    assert wait_for(lambda: all(path.exists() for path in expected), START_SECONDS)


# --------------------------------------------------------------------------- stopping


@posix_only
@pytest.mark.parametrize("number", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
def test_a_stop_signal_ends_watch_with_exit_0(
    spawn: Spawn, folders: tuple[Path, Path], number: signal.Signals
) -> None:
    """SIGTERM or SIGINT to a running watch ends it with exit 0 and `daemon_stopped` logged."""
    inbox, out = folders
    daemon = start_watch(spawn, inbox, out)
    drop_and_wait(inbox, out, PASSING)  # it is at work, well past its start-up

    daemon.process.send_signal(number)

    assert daemon.exit_code() == 0, daemon.stderr()
    stopped = [e for e in daemon.events() if e["event"] == "daemon_stopped"]
    assert len(stopped) == 1
    assert stopped[0]["fault"] is None
    assert "Traceback" not in daemon.stderr()


# --------------------------------------------------------------------------- kill -9


def _burst_file(index: int) -> bytes:
    text = SMALL_RUN.read_text(encoding="utf-8")
    assert SMALL_RUN_NAME in text
    return text.replace(SMALL_RUN_NAME, f"BWL-BURST-{index:03d}").encode("utf-8")


def _judged(store: StoreSettings, state_dir: Path) -> list[tuple[str, str]]:
    """(path, sha256) of every judged row in the ledger right now, read beside the daemon."""
    database = Database(store_target(state_dir, store), read_only=True)
    try:
        rows = database.rows(
            "SELECT path, sha256 FROM evaluations WHERE outcome != 'duplicate' ORDER BY path"
        )
        assert database.integrity() == "ok"
    finally:
        database.close()
    return [(str(path), str(sha)) for path, sha in rows]


def _judged_rows(store: StoreSettings, state_dir: Path) -> int:
    try:
        return len(_judged(store, state_dir))
    except LedgerError:
        return -1  # not created yet, or busy for a moment


def store_config(tmp_path: Path, store: StoreSettings) -> tuple[str, ...]:
    """The --config arguments that put the daemon's ledger where ``store`` says."""
    if store.url is None:
        return ()
    config = tmp_path / "store.yaml"
    config.write_text(f"store:\n  url: '{store.url}'\n", encoding="utf-8")
    return ("--config", str(config))


@posix_only
@pytest.mark.parametrize("kill_after", [1, 60, 130], ids=lambda n: f"after-{n}-verdicts")
def test_kill_9_mid_burst_then_restart_judges_every_file_exactly_once(
    spawn: Spawn, folders: tuple[Path, Path], kill_after: int, store: StoreSettings
) -> None:
    """After kill -9 mid-burst and a restart, every file has one verdict and one ledger row."""
    inbox, out = folders
    state_dir = out / ".calwarden"
    options = store_config(inbox.parent, store)
    first = start_watch(spawn, inbox, out, *options)
    inputs = {}
    for index in range(BURST):
        path = inbox / f"burst-{index:03d}.csv"
        path.write_bytes(_burst_file(index))
        inputs[path.stem] = path

    assert wait_for(lambda: len(verdicts(out)) >= kill_after, START_SECONDS), first.stderr()
    first.process.kill()
    assert first.process.wait(timeout=EXIT_SECONDS) == -signal.SIGKILL
    judged_before_kill = len(verdicts(out))
    assert judged_before_kill < BURST, "the daemon finished before the kill; kill earlier"

    second = start_watch(spawn, inbox, out, *options)
    assert wait_for(lambda: _judged_rows(store, state_dir) >= BURST, 60.0), second.stderr()
    second.process.terminate()
    assert second.exit_code() == 0, second.stderr()

    assert [p.name for p in verdicts(out)] == sorted(f"{stem}.verdict.json" for stem in inputs)
    for stem, path in inputs.items():
        source = json.loads((out / f"{stem}.verdict.json").read_text(encoding="utf-8"))["source"]
        assert source["sha256"] == sha256_of(path), stem
    leftovers = [n for n in os.listdir(out) if n.startswith(".") and n.endswith(".tmp")]
    assert leftovers == []
    assert _judged(store, state_dir) == [
        (path.name, sha256_of(path)) for _, path in sorted(inputs.items())
    ]


# --------------------------------------------------------------------------- refusals


def test_a_second_daemon_on_the_same_output_folder_is_refused(
    spawn: Spawn, folders: tuple[Path, Path], tmp_path: Path
) -> None:
    """A second watch into a folder another daemon uses exits 2, naming that daemon's process."""
    inbox, out = folders
    first = start_watch(spawn, inbox, out)
    other_inbox = tmp_path / "other-inbox"
    other_inbox.mkdir()

    second = calwarden("watch", other_inbox, "--out", out, "--settle", SETTLE, cwd=tmp_path)

    assert second.returncode == 2
    assert f"process {first.pid}" in second.stderr
    assert "Traceback" not in second.stderr
    assert first.process.poll() is None  # the first daemon goes on


@pytest.mark.parametrize(
    ("case", "expected"),
    [
        ("unknown key", "watch.settle_secnds: unknown key (did you mean settle_seconds?)"),
        ("missing inbox", "does not exist"),
        ("output inside the inbox", "overlap"),
    ],
)
def test_a_configuration_error_exits_2_with_a_plain_message(
    tmp_path: Path, case: str, expected: str
) -> None:
    """watch refuses a bad configuration with exit 2 and one plain line, no traceback."""
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    args: list[object] = [inbox, "--out", tmp_path / "out"]
    if case == "unknown key":
        config = tmp_path / "calwarden.yaml"
        config.write_text("watch:\n  settle_secnds: 1\n", encoding="utf-8")
        args += ["--config", config]
    elif case == "missing inbox":
        args[0] = tmp_path / "no-such-folder"
    else:
        args[2] = inbox / "out"

    result = calwarden("watch", *args, cwd=tmp_path)

    assert result.returncode == 2
    assert expected in result.stderr
    assert result.stderr.startswith("calwarden: ")
    assert len(result.stderr.strip().splitlines()) == 1
    assert "Traceback" not in result.stderr


# --------------------------------------------------------------------------- faults


def test_an_output_folder_replaced_by_a_file_ends_watch_with_exit_3(
    spawn: Spawn, tmp_path: Path
) -> None:
    """When its output folder becomes a file, watch stops with exit 3 and says why on stderr."""
    inbox, out, state_dir = tmp_path / "inbox", tmp_path / "out", tmp_path / "state"
    inbox.mkdir()
    out.mkdir()
    config = tmp_path / "calwarden.yaml"
    config.write_text("watch:\n  state_dir: state\n", encoding="utf-8")  # the ledger stays
    daemon = spawn(inbox, "--out", out, "--config", config, "--settle", SETTLE, state_dir=state_dir)
    daemon.wait_started()

    shutil.rmtree(out)  # it holds the overview page by now
    out.write_text("not a folder\n", encoding="utf-8")
    shutil.copyfile(PASSING, inbox / PASSING.name)

    assert daemon.exit_code() == 3
    stderr = daemon.stderr()
    assert f"calwarden: stopped after a fault: cannot write the outputs in {out}" in stderr
    assert "Traceback" not in stderr
    assert any(e["event"] == "daemon_fault" for e in daemon.events())


# --------------------------------------------------------------------------- status


def test_status_while_watch_runs_shows_counts_last_failure_and_the_daemon(
    spawn: Spawn, folders: tuple[Path, Path], tmp_path: Path
) -> None:
    """status during a watch names the running process, the counts and the last failure."""
    inbox, out = folders
    daemon = start_watch(spawn, inbox, out)
    drop_and_wait(inbox, out, PASSING, FAILING, BROKEN)

    result = calwarden("status", "--out", out, cwd=tmp_path)

    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert f"daemon:       running (process {daemon.pid})" in lines
    assert "files judged: 3 (pass 1, fail 1, error 1); duplicates not judged again: 0" in lines
    failure = next(i for i, line in enumerate(lines) if line.startswith("last failure:"))
    assert f"{inbox.name}/{FAILING.name}: FAIL" in lines[failure]
    assert lines[failure + 1].strip() == first_failure(out / f"{FAILING.stem}.verdict.json")


def test_status_after_watch_stopped_says_not_running_and_keeps_the_counts(
    spawn: Spawn, folders: tuple[Path, Path], tmp_path: Path
) -> None:
    """status after the daemon stopped says it is not running and still shows what it did."""
    inbox, out = folders
    daemon = start_watch(spawn, inbox, out)
    drop_and_wait(inbox, out, PASSING, FAILING)
    daemon.process.terminate()
    assert daemon.exit_code() == 0

    result = calwarden("status", "--out", out, cwd=tmp_path)

    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert "daemon:       not running" in lines
    assert "files judged: 2 (pass 1, fail 1, error 0); duplicates not judged again: 0" in lines
    assert any(line.startswith("last failure:") and FAILING.name in line for line in lines)


# --------------------------------------------------------------------------- output files


@posix_only
def test_outputs_are_readable_as_the_umask_allows(spawn: Spawn, folders: tuple[Path, Path]) -> None:
    """Under umask 022 the verdict, flagged copy and report are written 0644, like any file."""
    inbox, out = folders
    daemon = spawn(
        inbox, "--out", out, "--settle", SETTLE, state_dir=out / ".calwarden", umask=0o022
    )
    daemon.wait_started()
    drop_and_wait(inbox, out, PASSING)

    files = [p for p in out.iterdir() if p.is_file() and "index.html" not in p.name]
    modes = {p.name: oct(p.stat().st_mode & 0o777) for p in files}

    assert modes == {
        f"{PASSING.stem}{suffix}": "0o644"
        for suffix in (".verdict.json", ".flagged.csv", ".report.txt", ".report.html")
    }


# --------------------------------------------------------------------------- demo

#: Each file the demo drops, with the word its line starts with (fixtures/demo/README.md).
DEMO_LINES = {
    "bwl-demo-1130-metals.csv": "PASS",
    "bwl-demo-1201-metals.csv": "PASS",
    "bwl-demo-1202-metals.csv": "FAIL",
    "bwl-demo-1203-herbicides.csv": "PASS",
    "bwl-demo-1204-metals.csv": "PASS",
    "bwl-demo-1204-broken.csv": "ERROR",
    "bwl-demo-1130-metals-copy.csv": "SAME",
}
DEMO_RUNS = {name: word for name, word in DEMO_LINES.items() if word != "SAME"}
DEMO_STATUS = {"PASS": "pass", "FAIL": "fail", "ERROR": "error"}
VERDICT_WORDS = ("PASS", "FAIL", "ERROR", "SAME")


@dataclass(frozen=True)
class DemoRuns:
    folder: Path
    first: subprocess.CompletedProcess[str]
    first_verdicts: dict[str, tuple[str, str]]  # verdict file → (status, source sha256)
    second: subprocess.CompletedProcess[str]


def _verdict_lines(stdout: str) -> list[str]:
    return [line.strip() for line in stdout.splitlines() if line.strip().startswith(VERDICT_WORDS)]


@pytest.fixture(scope="module")
def demo_runs(tmp_path_factory: pytest.TempPathFactory) -> DemoRuns:
    """The demo run twice in one folder, with strays left between the runs (~13 s)."""
    cwd = tmp_path_factory.mktemp("demo")
    folder = cwd / "calwarden-demo"
    first = calwarden("demo", "--dir", folder, cwd=cwd, timeout=120)
    first_verdicts = {}
    for path in verdicts(folder / "out"):
        document = json.loads(path.read_text(encoding="utf-8"))
        first_verdicts[path.name] = (document["status"], document["source"]["sha256"])
    (folder / "out" / "left-by-the-first-demo.txt").write_text("stray\n", encoding="utf-8")
    shutil.copyfile(PASSING, folder / "inbox" / "left-by-the-first-demo.csv")
    # The second run in-process with a short settle time: the folder handling is the same.
    printed: list[str] = []
    code = run_demo(folder, say=printed.append, settle_seconds=0.2, pictures=False)
    second = subprocess.CompletedProcess(["demo"], code, "\n".join(printed) + "\n", "")
    return DemoRuns(folder, first, first_verdicts, second)


def test_demo_prints_one_verdict_line_per_dropped_file(demo_runs: DemoRuns) -> None:
    """demo exits 0 and prints, in order, one PASS/FAIL/ERROR/SAME line per file dropped."""
    assert demo_runs.first.returncode == 0, demo_runs.first.stderr
    lines = _verdict_lines(demo_runs.first.stdout)
    assert [line.split()[:2] for line in lines] == [
        [word, f"{name}:"] for name, word in DEMO_LINES.items()
    ]


def test_demo_prints_the_summary(demo_runs: DemoRuns) -> None:
    """demo ends with a summary counting the files by outcome and saying where things are."""
    stdout = demo_runs.first.stdout
    assert "7 files, 1 duplicate, 1 error, 1 fail, 4 pass." in stdout.splitlines()
    assert f"calwarden status --out {demo_runs.folder.resolve() / 'out'}" in stdout


def test_demo_leaves_the_overview_and_reports_with_their_pictures(demo_runs: DemoRuns) -> None:
    """After the demo the overview links the failing run's HTML report, which names its status."""
    out = demo_runs.folder / "out"
    overview = (out / "index.html").read_text(encoding="utf-8")
    assert "bwl-demo-1202-metals.report.html" in overview
    report = (out / "bwl-demo-1202-metals.report.html").read_text(encoding="utf-8")
    assert "✗ FAIL</span> CCV-2 Cu recovered 83.1 %" in report  # pictures: the second run has none


def test_demo_writes_a_verdict_for_every_run(demo_runs: DemoRuns) -> None:
    """demo leaves each distinct run's verdict, with its status and its source's hash."""
    assert demo_runs.first_verdicts == {
        f"{Path(name).stem}.verdict.json": (
            DEMO_STATUS[word],
            sha256_of(FIXTURES / "demo" / name),
        )
        for name, word in DEMO_RUNS.items()
    }


def test_a_second_demo_in_the_same_folder_starts_afresh(demo_runs: DemoRuns) -> None:
    """demo run again in its own folder clears the first one's files and ledger, then works."""
    assert demo_runs.second.returncode == 0, demo_runs.second.stderr
    assert _verdict_lines(demo_runs.second.stdout) == _verdict_lines(demo_runs.first.stdout)
    assert not (demo_runs.folder / "out" / "left-by-the-first-demo.txt").exists()
    assert not (demo_runs.folder / "inbox" / "left-by-the-first-demo.csv").exists()
    status = calwarden("status", "--out", demo_runs.folder / "out", cwd=demo_runs.folder)
    assert "files judged: 6 (pass 4, fail 1, error 1); duplicates not judged again: 1" in (
        status.stdout.splitlines()
    )


def test_demo_refuses_a_folder_that_is_not_a_demo_folder(tmp_path: Path) -> None:
    """demo into a non-empty folder it did not make exits 2 and leaves the folder alone."""
    folder = tmp_path / "results"
    folder.mkdir()
    (folder / "week-48.xlsx").write_bytes(b"the lab's own file")

    result = calwarden("demo", "--dir", folder, cwd=tmp_path)

    assert result.returncode == 2
    assert "is not a calwarden demo folder" in result.stderr
    assert "Traceback" not in result.stderr
    assert sorted(p.name for p in folder.iterdir()) == ["week-48.xlsx"]


@posix_only
def test_watching_the_demo_folder_with_its_configuration_judges_nothing_again(
    demo_runs: DemoRuns, spawn: Spawn, tmp_path: Path
) -> None:
    """`watch --config calwarden.yaml`, as the demo suggests, does not judge its files again."""
    folder = tmp_path / "demo-copy"
    shutil.copytree(demo_runs.folder, folder)  # keeps sizes and times, as the ledger saw them
    daemon = spawn(
        "--config",
        folder / "calwarden.yaml",
        "--settle",
        SETTLE,
        state_dir=folder / "out" / ".calwarden",
    )
    daemon.wait_started()
    # A file dropped after one verdict came out is due after every file the start-up scan
    # found, so once its verdict exists the scan's files have all been dealt with.
    drop_and_wait(folder / "inbox", folder / "out", PASSING)
    drop_and_wait(folder / "inbox", folder / "out", FAILING)
    daemon.process.terminate()
    assert daemon.exit_code() == 0

    events = daemon.events()
    this_run = events[max(i for i, e in enumerate(events) if e["event"] == "daemon_started") :]
    judged = sorted(e["path"] for e in this_run if e["event"] == "file_evaluated")
    assert judged == sorted([PASSING.name, FAILING.name])
