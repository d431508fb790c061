"""Benchmark of `calwarden watch` (a script, not a test: timings never gate the suite).

    python tests/benchmarks/bench_watch.py [--quick] [--settle 0.2] [--config CFG]
                                           [--only latency,backlog,idle,memory]
                                           [--memory-files N]

Measures the daemon's targets (issue 3) on typical files: the four metals runs of
fixtures/demo (116-124 rows each), every copy made distinct by renaming its run so
that each is judged, not recognised as a duplicate (three pass, one fails). They
all come from one instrument, so its control-chart log grows with every file.

1. Latency: files dropped one at a time into the inbox of an in-process Watcher
   (real observer, JSON log), each written at once; p50/p95/max. Target p95 < 300 ms.
2. Backlog: files already in the inbox when the Watcher starts; files judged per
   second from start to the last verdict, minus the settle time. Target >= 100 files/s.
3. Idle CPU: a `calwarden watch` process with nothing arriving; CPU time from
   /proc/<pid>/stat over wall time. Target < 1 % of a core. Measured with an empty
   inbox, and (full run) again at the end of 4, with its files judged in the inbox,
   over a window that holds one periodic rescan.
4. Memory: VmRSS of a `calwarden watch` process after a warm-up (a tenth of the
   files, at least three batches) and after all files, judged in batches, the files
   staying in the inbox. Target growth < 10 MB.

--quick uses fewer files and a shorter idle window; --config runs every measurement
with that calwarden configuration (e.g. `control: {enabled: false}` to leave the
control-chart log out). Linux only for 3 and 4 (/proc).
"""

from __future__ import annotations

import argparse
import csv
import dataclasses
import io
import json
import os
import queue
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections import defaultdict
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

PROJECT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(PROJECT))  # measure this checkout, whatever is installed

from calwarden.daemon.intake.accept import Outcome  # noqa: E402
from calwarden.daemon.intake.watcher import Watcher  # noqa: E402
from calwarden.daemon.logs import LOG_NAME, configure_logging  # noqa: E402
from calwarden.daemon.settings.config import WatchPlan, load_config, plan_watch  # noqa: E402

TYPICAL = sorted((PROJECT / "fixtures" / "demo").glob("*metals*.csv"))
WARMUP_DROPS = 3  # the first judgements of a process pay for imports and caches
MEGABYTE = 1_000_000


class BenchmarkError(Exception):
    """A measurement could not be made (a verdict never came, the daemon died)."""


@dataclass(frozen=True)
class Sizes:
    latency_files: int
    backlog_files: int
    idle_seconds: float
    memory_files: int
    memory_batch: int
    full_inbox_idle_seconds: float  # 0: skipped; longer than the 60 s rescan period


FULL = Sizes(100, 1000, 20.0, 10_000, 200, 62.0)
QUICK = Sizes(20, 200, 5.0, 1000, 100, 0.0)


@dataclass(frozen=True)
class Setup:
    """How every measurement runs the daemon."""

    settle: float
    config: Path | None  # a calwarden configuration, or the defaults

    def plan(self, inbox: Path, out: Path) -> WatchPlan:
        return plan_watch(
            load_config(self.config),
            config_dir=self.config.parent if self.config else None,
            inbox=inbox,
            out=out,
            settle_seconds=self.settle,
        )

    def arguments(self) -> list[str]:
        config = ["--config", str(self.config)] if self.config else []
        return ["--settle", str(self.settle), *config]


@dataclass(frozen=True)
class Row:
    measure: str
    value: str
    target: str
    met: bool | None  # None: not measured


# --------------------------------------------------------------------------- helpers


def _machine_speed() -> float:
    """Seconds for a fixed pure-Python workload: how fast this machine is right now.

    The same workload as bench_check.py, so that figures of both compare. The
    machine is shared and its speed varies; compare figures only between runs
    where this workload took about the same time.
    """
    start = time.perf_counter()
    total = 0
    for value in range(5_000_000):
        total += value % 7
    return time.perf_counter() - start


class TypicalRuns:
    """Distinct typical run files: the demo's metals runs, each copy's run renamed."""

    def __init__(self) -> None:
        if not TYPICAL:
            raise BenchmarkError(f"no typical runs (*metals*.csv) in {PROJECT / 'fixtures/demo'}")
        self._sources = [(data, _run_name(data)) for data in (p.read_bytes() for p in TYPICAL)]

    def make(self, number: int) -> bytes:
        data, run = self._sources[number % len(self._sources)]
        return data.replace(run, run + f"-{number:05d}".encode())


def _run_name(data: bytes) -> bytes:
    rows = csv.reader(io.StringIO(data.decode("utf-8")))
    header = next(rows)
    return next(rows)[header.index("run")].encode("utf-8")


def _percentile(values: list[float], percent: int) -> float:
    return statistics.quantiles(values, n=100, method="inclusive")[percent - 1]


def _p95(values: list[float]) -> float:
    return _percentile(values, 95)


def _spread(values: list[float]) -> str:
    return f"p50 {statistics.median(values):.0f}, p95 {_p95(values):.0f}, max {max(values):.0f} ms"


def _say(text: str) -> None:
    print(text, flush=True)


def _wait_for(predicate: Callable[[], bool], timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while not predicate():
        if time.monotonic() > deadline:
            raise BenchmarkError(f"{what}: not within {timeout:g} s")
        time.sleep(0.02)


def _folders(root: str) -> tuple[Path, Path]:
    inbox, out = Path(root) / "inbox", Path(root) / "out"
    inbox.mkdir()
    out.mkdir()
    return inbox, out


@contextmanager
def _file_log(plan: WatchPlan) -> Iterator[None]:
    """The daemon's own JSON log in the state folder, as `calwarden watch` writes it."""
    undo = configure_logging(
        plan.state_dir,
        max_bytes=plan.settings.log_max_bytes,
        backups=plan.settings.log_backups,
        console=False,
    )
    try:
        yield
    finally:
        undo()


def _events(state_dir: Path, name: str) -> list[dict[str, Any]]:
    """The events called ``name`` of the daemon's JSON log, oldest first (rotated files too)."""
    logs = sorted(state_dir.glob(f"{LOG_NAME}.*"), key=lambda p: -int(p.suffix[1:]))
    found = []
    for log in [*logs, state_dir / LOG_NAME]:
        with log.open(encoding="utf-8") as lines:
            found.extend(e for line in lines if (e := json.loads(line)).get("event") == name)
    return found


def _judging_trend(state_dir: Path) -> str:
    """The daemon's own time per file (file_evaluated.seconds) by tenth of the files, in ms."""
    seconds = [event["seconds"] for event in _events(state_dir, "file_evaluated")]
    if len(seconds) < 10:
        return "too few files"
    tenth = len(seconds) // 10
    means = [statistics.fmean(seconds[i * tenth : (i + 1) * tenth]) * 1000 for i in range(10)]
    return " ".join(f"{mean:.0f}" for mean in means)


# --------------------------------------------------------------------------- 1. latency


class TimedWatcher(Watcher):
    """A Watcher that notes when its worker checks whether a file has settled.

    The daemon offers no hook for the moment a file is found settled: the worker
    decides it in ``_check_candidate`` (size and mtime unchanged since the last
    check), so the entry of the last call for a file is that moment. This times a
    private method; if it is renamed, the exact figure becomes "n/a".
    """

    def __init__(self, plan: WatchPlan, **kwargs: Any) -> None:
        super().__init__(plan, **kwargs)
        self.checks: dict[Path, list[int]] = defaultdict(list)

    def _check_candidate(self, candidate: Any) -> None:
        self.checks[candidate.path].append(time.time_ns())
        super()._check_candidate(candidate)


def measure_latency(runs: TypicalRuns, files: int, setup: Setup) -> list[Row]:
    exact: list[float] = []
    external: list[float] = []
    resettled = 0
    wait = 30 + 2 * setup.settle
    with tempfile.TemporaryDirectory(prefix="bench-watch-") as root:
        inbox, out = _folders(root)
        plan = setup.plan(inbox, out)
        outcomes: queue.Queue[Outcome] = queue.Queue()
        with _file_log(plan):
            watcher = TimedWatcher(plan, on_outcome=outcomes.put)
            watcher.start()
            try:
                if not watcher.wait_idle(30):
                    raise BenchmarkError(f"latency: the watcher did not start ({watcher.fault})")
                for number in range(files + WARMUP_DROPS):
                    path = inbox / f"run-{number:05d}.csv"
                    path.write_bytes(runs.make(number))
                    closed = time.time_ns()
                    try:
                        outcome = outcomes.get(timeout=wait)
                    except queue.Empty:
                        raise BenchmarkError(
                            f"latency: no verdict for {path.name} within {wait:g} s "
                            f"(fault: {watcher.fault})"
                        ) from None
                    if outcome.path != path.name or outcome.verdict_path is None:
                        raise BenchmarkError(f"latency: unexpected outcome {outcome}")
                    if number < WARMUP_DROPS:
                        continue
                    # The kernel stamps ctime at the os.replace that puts the verdict in place.
                    replaced = outcome.verdict_path.stat().st_ctime_ns
                    external.append((replaced - closed) / 1e6 - setup.settle * 1000)
                    checks = watcher.checks.get(path, [])
                    if checks:
                        exact.append((replaced - checks[-1]) / 1e6)
                        resettled += len(checks) > 1
            finally:
                watcher.stop()
            judged = [e["seconds"] * 1000 for e in _events(plan.state_dir, "file_evaluated")]
    target = "p95 < 300 ms"
    rows = []
    if exact:
        rows.append(Row("latency, settled -> verdict", _spread(exact), target, _p95(exact) < 300))
    else:
        rows.append(Row("latency, settled -> verdict", "n/a (no hook)", target, None))
    rows.append(
        Row(
            "latency, last write + settle -> verdict",
            _spread(external),
            target,
            _p95(external) < 300,
        )
    )
    _say(f"  latency: {files} files, settle {setup.settle:g} s, after {WARMUP_DROPS} warm-up files")
    _say(
        "    the daemon's own file_evaluated.seconds (judge to ledger): "
        f"{_spread(judged[WARMUP_DROPS:])}"
    )
    if exact:
        _say(
            f"    files still changing at their first settle check: {resettled} of {files} "
            "(each waited one more settle period)"
        )
    return rows


# --------------------------------------------------------------------------- 2. backlog


def measure_backlog(runs: TypicalRuns, files: int, setup: Setup) -> list[Row]:
    with tempfile.TemporaryDirectory(prefix="bench-watch-") as root:
        inbox, out = _folders(root)
        for number in range(files):
            (inbox / f"run-{number:05d}.csv").write_bytes(runs.make(100_000 + number))
        plan = setup.plan(inbox, out)
        done = threading.Event()
        statuses: dict[str, int] = defaultdict(int)

        def count(outcome: Outcome) -> None:
            statuses[outcome.status] += 1
            if sum(statuses.values()) >= files:
                done.set()

        with _file_log(plan):
            watcher = Watcher(plan, on_outcome=count)
            cpu = time.process_time()
            start = time.perf_counter()
            watcher.start()
            try:
                finished = done.wait(timeout=60 + files)
                elapsed = time.perf_counter() - start
                cpu = time.process_time() - cpu
            finally:
                watcher.stop()
            trend = _judging_trend(plan.state_dir)
        if not finished:
            raise BenchmarkError(
                f"backlog: {sum(statuses.values())} of {files} judged ({watcher.fault})"
            )
        verdicts = sum(1 for _ in out.glob("*.verdict.json"))
        if verdicts != files:
            raise BenchmarkError(f"backlog: {verdicts} verdicts for {files} files")
    rate = files / (elapsed - setup.settle)
    outcome_counts = ", ".join(f"{n} {status}" for status, n in sorted(statuses.items()))
    _say(
        f"  backlog: {files} files ({outcome_counts}) in {elapsed:.1f} s, settle "
        f"{setup.settle:g} s; {1000 / rate:.1f} ms per file; process CPU "
        f"{cpu / (elapsed - setup.settle):.2f} core"
    )
    _say(f"    file_evaluated.seconds, mean ms by tenth of the files: {trend}")
    return [
        Row(
            f"backlog catch-up ({files} files)",
            f"{rate:.0f} files/s",
            ">= 100 files/s",
            rate >= 100,
        )
    ]


# --------------------------------------------------------------------------- daemon process


class DaemonProcess:
    """A `calwarden watch` process, measured through /proc (Linux)."""

    def __init__(self, inbox: Path, out: Path, setup: Setup) -> None:
        self.out = out
        self.process = subprocess.Popen(
            [
                *(sys.executable, "-m", "calwarden.daemon", "watch", str(inbox)),
                *("--out", str(out), *setup.arguments()),
            ],
            cwd=PROJECT,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        self.pid = self.process.pid

    def wait_started(self) -> None:
        log = self.out / ".calwarden" / LOG_NAME

        def started() -> bool:
            self.check_alive()
            return log.exists() and "daemon_started" in log.read_text(encoding="utf-8")

        _wait_for(started, 60, "calwarden watch start-up")

    def check_alive(self) -> None:
        if self.process.poll() is not None:
            raise BenchmarkError(f"calwarden watch exited {self.process.returncode}")

    def cpu_seconds(self) -> float:
        text = Path(f"/proc/{self.pid}/stat").read_text()
        fields = text[text.rindex(")") + 2 :].split()  # after "pid (comm) "
        utime, stime = int(fields[11]), int(fields[12])  # fields 14 and 15 of proc(5)
        return (utime + stime) / os.sysconf("SC_CLK_TCK")

    def status(self, key: str) -> int:
        """A number of /proc/<pid>/status: ``VmRSS`` in bytes, ``Threads`` as is."""
        for line in Path(f"/proc/{self.pid}/status").read_text().splitlines():
            name, _, value = line.partition(":")
            if name == key:
                number, *unit = value.split()
                return int(number) * (1024 if unit == ["kB"] else 1)
        raise BenchmarkError(f"no {key} in /proc/{self.pid}/status")

    def open_files(self) -> int:
        return len(os.listdir(f"/proc/{self.pid}/fd"))

    def wait_quiet(self, timeout: float) -> float:
        """Wait until the daemon has used at most one CPU tick in a second; seconds waited.

        After a burst the daemon still works (drawing pictures when idle): the idle
        window starts when that is done.
        """
        start = time.perf_counter()
        tick = 1 / os.sysconf("SC_CLK_TCK")
        while time.perf_counter() - start < timeout:
            before = self.cpu_seconds()
            time.sleep(1.0)
            self.check_alive()
            if self.cpu_seconds() - before <= tick:
                return time.perf_counter() - start
        raise BenchmarkError(f"the daemon was still busy after {timeout:g} s")

    def stop(self) -> int:
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        return self.process.returncode


# --------------------------------------------------------------------------- 3. idle CPU


def _idle_window(daemon: DaemonProcess, seconds: float) -> tuple[float, float]:
    """CPU seconds and wall seconds of the daemon over a window where nothing arrives."""
    cpu, start = daemon.cpu_seconds(), time.perf_counter()
    time.sleep(seconds)  # the measurement window itself
    daemon.check_alive()
    return daemon.cpu_seconds() - cpu, time.perf_counter() - start


def _idle_row(measure: str, cpu: float, wall: float) -> Row:
    share = 100 * cpu / wall
    tick = 1 / os.sysconf("SC_CLK_TCK")
    value = f"{share:.2f} % of a core" if cpu else f"< {100 * tick / wall:.2f} % (no CPU tick)"
    return Row(measure, value, "< 1 %", share < 1)


def measure_idle(seconds: float, setup: Setup) -> list[Row]:
    with tempfile.TemporaryDirectory(prefix="bench-watch-") as root:
        inbox, out = _folders(root)
        daemon = DaemonProcess(inbox, out, setup)
        try:
            daemon.wait_started()
            daemon.wait_quiet(60)
            cpu, wall = _idle_window(daemon, seconds)
            rss = daemon.status("VmRSS")
        finally:
            code = daemon.stop()
    _say(
        f"  idle: {cpu:.2f} s CPU in {wall:.1f} s (clock ticks of "
        f"{1000 / os.sysconf('SC_CLK_TCK'):.0f} ms); RSS {rss / MEGABYTE:.1f} MB; exit {code}"
    )
    return [_idle_row(f"idle CPU, empty inbox ({seconds:g} s)", cpu, wall)]


# --------------------------------------------------------------------------- 4. memory


def measure_memory(runs: TypicalRuns, sizes: Sizes, setup: Setup) -> list[Row]:
    """RSS growth between two quiet moments: after the warm-up files and after the last.

    The daemon draws its pictures when nothing is due, after the verdicts; matplotlib
    and its caches cost tens of MB once, so each RSS is read only after the daemon
    has caught up with its drawing (and gone quiet).
    """
    files, batch = sizes.memory_files, sizes.memory_batch
    warmup = max(3 * batch, files // 10 // batch * batch)
    trace: list[tuple[int, int]] = []  # (files judged, RSS bytes), busy
    full_idle: tuple[float, float] | None = None
    drawing = 0.0  # seconds spent waiting for the daemon to go quiet
    with tempfile.TemporaryDirectory(prefix="bench-watch-") as root:
        inbox, out = _folders(root)
        daemon = DaemonProcess(inbox, out, setup)
        try:
            daemon.wait_started()
            start = time.perf_counter()
            baseline: tuple[int, int, int] | None = None  # quiet RSS, open files, threads
            number = 0
            while number < files:
                pending = []
                for _ in range(min(batch, files - number)):
                    name = f"run-{number:05d}"
                    (inbox / f"{name}.csv").write_bytes(runs.make(200_000 + number))
                    pending.append(out / f"{name}.verdict.json")
                    number += 1
                pending.reverse()

                def all_present(pending: list[Path] = pending) -> bool:
                    daemon.check_alive()
                    while pending and pending[-1].exists():
                        pending.pop()
                    return not pending

                _wait_for(all_present, 120 + 2 * batch, f"memory: verdicts up to file {number}")
                trace.append((number, daemon.status("VmRSS")))
                if number == warmup:
                    drawing += daemon.wait_quiet(900)
                    baseline = (
                        daemon.status("VmRSS"),
                        daemon.open_files(),
                        daemon.status("Threads"),
                    )
                if number % (files // 10 or 1) < batch:
                    so_far, rss = time.perf_counter() - start, trace[-1][1] / MEGABYTE
                    _say(f"    memory: {number} files in {so_far:.0f} s, RSS {rss:.1f} MB")
            elapsed = time.perf_counter() - start - drawing
            drained = daemon.wait_quiet(900)
            end = (daemon.status("VmRSS"), daemon.open_files(), daemon.status("Threads"))
            peak = daemon.status("VmHWM")
            if sizes.full_inbox_idle_seconds:
                # The same daemon, its inbox now full of judged files: the periodic
                # reconciliation scan is its idle work.
                full_idle = _idle_window(daemon, sizes.full_inbox_idle_seconds)
        finally:
            code = daemon.stop()
        trend = _judging_trend(out / ".calwarden")
    if baseline is None:
        raise BenchmarkError("memory: no measurement after the warm-up")
    growth = (end[0] - baseline[0]) / MEGABYTE
    step = max(1, len(trace) // 10)
    curve = ", ".join(f"{n}: {rss / MEGABYTE:.1f}" for n, rss in trace[step - 1 :: step])
    _say(
        f"  memory: {files} files in batches of {batch} in {elapsed:.0f} s "
        f"({files / elapsed:.0f} files/s with settling); exit {code}"
    )
    _say(f"    RSS MB right after n files' verdicts: {curve}; peak {peak / MEGABYTE:.1f}")
    _say(
        f"    quiet after the warm-up ({drawing:.0f} s of drawing) and at the end "
        f"({drained:.0f} s): RSS {baseline[0] / MEGABYTE:.1f} -> {end[0] / MEGABYTE:.1f} MB, "
        f"open files {baseline[1]} -> {end[1]}, threads {baseline[2]} -> {end[2]}"
    )
    _say(f"    file_evaluated.seconds, mean ms by tenth of the files: {trend}")
    rows = [
        Row(
            f"memory growth, files {warmup} -> {files}",
            f"{growth:+.1f} MB ({baseline[0] / MEGABYTE:.1f} -> {end[0] / MEGABYTE:.1f} RSS)",
            "< 10 MB",
            growth < 10,
        )
    ]
    if full_idle is not None:
        cpu, wall = full_idle
        _say(f"    idle with the {files} files in the inbox: {cpu:.2f} s CPU in {wall:.1f} s")
        rows.append(_idle_row(f"idle CPU, {files} judged files ({wall:.0f} s)", cpu, wall))
    return rows


# --------------------------------------------------------------------------- main

DEFINITIONS = """\
Definitions:
  settled -> verdict: from the worker's settle decision (the entry of its last
    settle check of the file, timed by instrumenting Watcher._check_candidate: the
    daemon has no public hook for that moment) to the verdict file's ctime, which
    the kernel stamps when os.replace puts the verdict in place (the file-system
    clock ticks every few ms, so this may read a few ms short).
  last write + settle -> verdict: from the moment this script closed the file, plus
    the settle time, to the same ctime; it adds the wait for the folder event, the
    rest of any picture the worker was drawing when the file arrived and, for a file
    still changing at its first settle check, one more settle period.
  backlog: N / (start() to the last outcome - settle time); memory: VmRSS once
    quiet after the warm-up files vs once quiet after the last (MB = 10^6 bytes),
    quiet meaning at most one CPU tick in a second (pictures drawn); idle CPU: user +
    system CPU time of the daemon process over the window's wall time, from the
    moment it has gone quiet."""


def _table(rows: list[Row]) -> None:
    width = max(len(row.measure) for row in rows)
    value_width = max(len(row.value) for row in rows)
    print(f"\n{'measure':<{width}}  {'value':<{value_width}}  {'target':<14}  met?")
    for row in rows:
        met = "n/a" if row.met is None else ("yes" if row.met else "NO")
        print(f"{row.measure:<{width}}  {row.value:<{value_width}}  {row.target:<14}  {met}")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer files, a shorter idle window")
    parser.add_argument("--settle", type=float, default=0.2, help="settle time (default 0.2 s)")
    parser.add_argument("--config", type=Path, help="a calwarden configuration for the daemon")
    parser.add_argument("--memory-files", type=int, help="files for the memory measurement")
    parser.add_argument(
        "--only",
        default="latency,backlog,idle,memory",
        help="comma-separated subset of latency, backlog, idle, memory",
    )
    args = parser.parse_args()
    sizes = QUICK if args.quick else FULL
    if args.memory_files:
        sizes = dataclasses.replace(sizes, memory_files=args.memory_files)
    setup = Setup(args.settle, args.config.resolve() if args.config else None)
    chosen = [name.strip() for name in args.only.split(",") if name.strip()]
    _say(f"machine speed: fixed workload {_machine_speed():.3f} s (lower is faster)")
    runs = TypicalRuns()
    _say(f"typical files: {', '.join(p.name for p in TYPICAL)}, each run renamed per copy")
    if setup.config:
        _say(f"configuration: {setup.config}")
    measurements: dict[str, Callable[[], list[Row]]] = {
        "latency": lambda: measure_latency(runs, sizes.latency_files, setup),
        "backlog": lambda: measure_backlog(runs, sizes.backlog_files, setup),
        "idle": lambda: measure_idle(sizes.idle_seconds, setup),
        "memory": lambda: measure_memory(runs, sizes, setup),
    }
    rows: list[Row] = []
    failed = False
    for name in chosen:
        if name not in measurements:
            parser.error(f"unknown measurement {name!r}")
        try:
            rows.extend(measurements[name]())
        except (BenchmarkError, OSError) as error:
            _say(f"  {name}: could not be measured: {error}")
            rows.append(Row(name, "failed", "", None))
            failed = True
    _table(rows)
    print(f"\n{DEFINITIONS}")
    print(f"machine speed after: fixed workload {_machine_speed():.3f} s")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
