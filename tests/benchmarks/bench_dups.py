"""Benchmark: judging a run full of duplicates and spikes (a script, not a test).

    python tests/benchmarks/bench_dups.py [--rows 100000]

Makes a run with fixtures/benchmark/make_large.py (20 analytes) and turns three
samples in five into a duplicate, a matrix spike and a spike duplicate of the
sample before them, then judges it in process (``judge_file``, what ``calwarden
check`` does after start-up) at a quarter of the rows and at all of them. The
floor is the same run left as plain samples, judged in the same process: a
parent looked up by sample id keeps the run with duplicates near the floor, and
four times the rows near four times the time.
"""

from __future__ import annotations

import argparse
import csv
import sys
import tempfile
import time
from pathlib import Path

PROJECT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(PROJECT / "fixtures" / "benchmark"))

from make_large import write_large  # noqa: E402  (the fixture generator is a plain script)

from calwarden.daemon.pipeline import judge_file  # noqa: E402
from calwarden.daemon.settings.config import AppConfig  # noqa: E402

ANALYTES = 20


def with_duplicates(plain: Path, out: Path) -> int:
    """Copy ``plain`` turning samples 2, 3, 4 of every 5 into dup, ms, msd of sample 1."""
    with plain.open(encoding="utf-8", newline="") as source:
        rows = list(csv.reader(source))
    header = rows[0]
    sample, kind, parent, added = (
        header.index(c) for c in ("sample_id", "kind", "parent", "added")
    )
    made = 0
    for row in rows[1:]:
        if row[kind] != "sample":
            continue
        number = int(row[sample].removeprefix("LG-"))
        step = number % 5
        if step in (2, 3, 4):
            row[kind] = {2: "dup", 3: "ms", 4: "msd"}[step]
            row[parent] = f"LG-{number - step + 1:05d}"
            if step != 2:
                row[added] = "10"
            made += 1
    with out.open("w", encoding="utf-8", newline="") as target:
        csv.writer(target, lineterminator="\n").writerows(rows)
    return made


def _cpu(path: Path, config: AppConfig) -> float:
    start = time.process_time()
    judge_file(path, config)
    return time.process_time() - start


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    args = parser.parse_args()
    config = AppConfig()
    with tempfile.TemporaryDirectory(prefix="bench-dups-") as folder:
        figures = {}
        for rows in (args.rows // 4, args.rows):
            plain, dups = Path(folder) / f"plain-{rows}.csv", Path(folder) / f"dups-{rows}.csv"
            write_large(plain, analytes=ANALYTES, injections=rows // ANALYTES)
            made = with_duplicates(plain, dups)
            _cpu(plain, config)  # warm-up: imports, caches
            figures[rows] = (_cpu(plain, config), _cpu(dups, config), made)
    for rows, (floor, cpu, made) in figures.items():
        print(
            f"{rows:>8} rows ({made} dup/ms/msd rows): {cpu:6.2f} s CPU; floor (no dups) "
            f"{floor:6.2f} s; {cpu / floor:4.2f}× floor"
        )
    (small, small_floor), (large, large_floor) = (
        (figures[r][1], figures[r][0]) for r in (args.rows // 4, args.rows)
    )
    print(f"4× the rows: {large / small:4.2f}× the time (floor {large_floor / small_floor:4.2f}×)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
