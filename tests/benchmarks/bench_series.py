"""Benchmark: the daemon's cost per file as the control log grows (a script, not a test).

    python tests/benchmarks/bench_series.py [--files 2000] [--run-name METHOD-A | --distinct]

Judges the demo's metals runs one after another through the daemon's intake
(``Intake.process``: judge, control log, outputs, one durable ledger record), in
process, on a fresh ledger, every copy made distinct by one digit of a blank's
response but all with the SAME run name (an instrument that writes its method's
name as the run), so the control log's series never gather enough distinct runs
for a baseline. ``--distinct`` gives every copy its own run name instead.

Prints the median milliseconds per file around file 1, 500 and 2,000 (CPU and
wall), beside the floor measured in the same run: the same files judged by the
pipeline alone (``judge_file``, what ``calwarden check`` does; no ledger, no
outputs). A flat cost is the same figure at every mark.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import io
import logging
import statistics
import sys
import tempfile
import time
from pathlib import Path

import structlog

PROJECT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(PROJECT))  # measure this checkout, whatever is installed

from calwarden.daemon.intake.accept import Intake  # noqa: E402
from calwarden.daemon.pipeline import judge_file  # noqa: E402
from calwarden.daemon.settings.config import load_config, plan_watch  # noqa: E402
from calwarden.daemon.stores.ledger import Ledger  # noqa: E402

TYPICAL = sorted((PROJECT / "fixtures" / "demo").glob("*metals*.csv"))
WINDOW = 10  # files each side of a mark
WARMUP = 5  # the first judgements pay for imports and caches


def _run_name(data: bytes) -> bytes:
    rows = csv.reader(io.StringIO(data.decode("utf-8")))
    header = next(rows)
    return next(rows)[header.index("run")].encode("utf-8")


def _blank_response(data: bytes) -> bytes:
    rows = csv.reader(io.StringIO(data.decode("utf-8")))
    header = next(rows)
    return next(rows)[header.index("response")].encode("utf-8")


class Copies:
    """The demo's metals runs, each copy distinct; one run name for all unless ``distinct``."""

    def __init__(self, run_name: str, distinct: bool) -> None:
        self._sources = [
            (data, _run_name(data), _blank_response(data))
            for data in (p.read_bytes() for p in TYPICAL)
        ]
        self._run_name = run_name.encode()
        self._distinct = distinct

    def make(self, number: int) -> bytes:
        data, run, response = self._sources[number % len(self._sources)]
        new_run = run + f"-{number:05d}".encode() if self._distinct else self._run_name
        made = data.replace(run, new_run)
        return made.replace(b"," + response + b",", b"," + response + f"{number:05d},".encode(), 1)


def _marks(files: int) -> list[int]:
    return [m for m in (1, 500, 2000, 5000, 10_000) if m <= files]


def _around(values: list[float], mark: int) -> float:
    low = max(0, mark - 1 - WINDOW)
    return statistics.median(values[low : mark - 1 + WINDOW + 1])


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=2000)
    parser.add_argument("--run-name", default="METHOD-A")
    parser.add_argument("--distinct", action="store_true", help="a run name per copy")
    args = parser.parse_args()
    # The daemon's events are not part of what is measured here.
    structlog.configure(wrapper_class=structlog.make_filtering_bound_logger(logging.WARNING))
    copies = Copies(args.run_name, args.distinct)
    with tempfile.TemporaryDirectory(prefix="bench-series-") as root:
        inbox_dir, out = Path(root) / "inbox", Path(root) / "out"
        inbox_dir.mkdir()
        out.mkdir()
        plan = plan_watch(load_config(None), config_dir=None, inbox=inbox_dir, out=out)
        inbox = plan.inboxes[0]
        config = inbox.config

        floor_cpu: list[float] = []
        for number in range(min(args.files, 200)):
            data = copies.make(number)
            path = inbox_dir / f"floor-{number:05d}.csv"
            cpu = time.process_time()
            judge_file(path, config, data=data, instrument=inbox.instrument)
            floor_cpu.append(time.process_time() - cpu)

        ledger = Ledger.open(plan.state_dir / "ledger.sqlite3")
        intake = Intake(ledger, plan.inboxes)
        cpu_ms: list[float] = []
        wall_ms: list[float] = []
        try:
            for number in range(args.files):
                data = copies.make(number)
                path = inbox_dir / f"run-{number:05d}.csv"
                path.write_bytes(data)
                sha = hashlib.sha256(data).hexdigest()
                cpu, wall = time.process_time(), time.perf_counter()
                intake.process(inbox, path, data, sha, len(data), number)
                cpu_ms.append((time.process_time() - cpu) * 1000)
                wall_ms.append((time.perf_counter() - wall) * 1000)
        finally:
            ledger.close()
    floor = statistics.median(floor_cpu[WARMUP:] if len(floor_cpu) > WARMUP else floor_cpu)
    names = "distinct run names" if args.distinct else f"one run name ({args.run_name})"
    print(f"{args.files} files, {names}; median ms per file within ±{WINDOW} files of each mark")
    print(f"  floor (judge_file alone, CPU): {floor * 1000:.1f} ms")
    for mark in _marks(args.files):
        cpu = _around(cpu_ms, mark)
        print(
            f"  file {mark:>6}: CPU {cpu:6.1f} ms ({cpu / (floor * 1000):4.1f}× floor), "
            f"wall {_around(wall_ms, mark):6.1f} ms"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
