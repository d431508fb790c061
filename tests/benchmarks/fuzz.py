"""The long mutation fuzz: many seeded cases through the pipeline, counted (a script, not a test).

    python tests/benchmarks/fuzz.py --cases 10000 [--seed 0] [--show 10]

Each case is a fixture (native runs, and three exports with their configurations)
with one to three mutations (``tests/fuzzing.py``:
flipped and inserted bytes, cut files, repeated and swapped lines, extreme and junk
cells, other kinds, broken headers, line ends, byte-order marks, other encodings,
long cells), judged in memory exactly as ``calwarden check`` judges a file (reader,
evaluation, verdict JSON, report), each under a 10 s deadline. It prints how many
cases ended as error, fail and pass, how many broke an invariant (a crash, a hang,
invalid JSON, a silently missing result, a pass with a row that could not be used),
the first few of those, and the time per case beside a floor measured in the same
run on the same bytes: splitting them with the csv module alone.
"""

from __future__ import annotations

import argparse
import csv
import io
import sys
import time
import warnings
from collections import Counter
from pathlib import Path

PROJECT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(PROJECT / "tests"))

from fuzzing import (  # noqa: E402
    Hang,
    deadline,
    judge_in_memory,
    make_case,
    seed_bytes,
    seed_configs,
)


def floor_seconds(cases: list[bytes]) -> float:
    """The time to decode and split every case with the csv module: no judging at all."""
    start = time.perf_counter()
    for data in cases:
        text = data.decode("utf-8", "replace")
        try:
            for _ in csv.reader(io.StringIO(text, newline="")):
                pass
        except csv.Error:
            pass
    return time.perf_counter() - start


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", type=int, default=10_000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--show", type=int, default=10, help="broken cases to print")
    args = parser.parse_args()
    warnings.simplefilter("error")  # a numeric warning is an invariant broken, as in the suite
    configs = seed_configs()
    seeds = seed_bytes()
    outcomes: Counter[str] = Counter()
    broken: list[tuple[int, str, tuple[str, ...], list[str]]] = []
    datas: list[bytes] = []
    judging = 0.0
    for number in range(args.cases):
        case = make_case(number, seeds, args.seed)
        datas.append(case.data)
        start = time.perf_counter()
        try:
            with deadline(10.0):
                status, problems = judge_in_memory(case, configs)
        except Hang as error:
            status, problems = "hang", [str(error)]
        judging += time.perf_counter() - start
        outcomes[status] += 1
        if problems:
            broken.append((number, case.seed_name, case.mutations, problems))
    floor = floor_seconds(datas)
    n = args.cases
    print(f"mutation fuzz: {n} cases, seed {args.seed}")
    for status in ("error", "fail", "pass", "crash", "hang"):
        print(f"  {status:<6} {outcomes[status]:>7}  ({100 * outcomes[status] / n:.1f} %)")
    print(f"  invariants broken: {len(broken)} cases")
    for number, seed_name, mutations, problems in broken[: args.show]:
        print(f"    case {number} ({seed_name}, {'+'.join(mutations)}): {problems[0][:200]}")
    print(
        f"  time per case: {1000 * judging / n:.2f} ms judged, floor {1000 * floor / n:.3f} ms "
        f"(csv module split of the same bytes), ratio {judging / max(floor, 1e-9):.0f}x"
    )
    return 1 if broken else 0


if __name__ == "__main__":
    sys.exit(main())
