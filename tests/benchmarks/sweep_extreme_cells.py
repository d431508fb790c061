"""Every one-cell extreme value in the native fixtures, judged and checked (a script, not a test).

    python tests/benchmarks/sweep_extreme_cells.py

Puts each extreme number (1e308, -1e308, the largest double, 1e300, 1e200, 1e-308
and the smallest subnormal) into each numeric cell (response, nominal, dilution,
added, istd_response) of each row of the native fixtures, one cell at a time, and
counts how each file ends: refused as input, judged pass or fail, an internal error,
and how many judged files break the invariants of tests/verdict_invariants.py (a
failing run that says nothing to do, a result silently left without a number).
The suite runs a derandomised sample of the same cases
(tests/test_verdict_invariants.py); this prints the whole sweep.
"""

from __future__ import annotations

import sys
import warnings
from collections import Counter
from pathlib import Path

PROJECT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(PROJECT / "tests"))

from verdict_invariants import problems  # noqa: E402  (a helper of the tests)

from calwarden.daemon.outputs.verdict_json import verdict_to_json  # noqa: E402
from calwarden.daemon.parsing.native import decode_table, normalise  # noqa: E402
from calwarden.rules.criteria import build_criteria  # noqa: E402
from calwarden.rules.errors import InputError  # noqa: E402
from calwarden.rules.evaluate import evaluate  # noqa: E402

EXTREMES = ("1e308", "-1e308", "1.7976931348623157e308", "1e300", "1e200", "1e-308", "5e-324")
COLUMNS = ("response", "nominal", "dilution", "added", "istd_response")
FIXTURES = ("bwl-metals-pass.csv", "bwl-lc-istd.csv", "bwl-addition.csv", "bwl-addition-short.csv")


def main() -> int:
    warnings.simplefilter("ignore")  # numpy's overflow warnings: the outcome is what counts
    outcomes: Counter[str] = Counter()
    broken: list[str] = []
    criteria = build_criteria({})
    for name in FIXTURES:
        lines = (PROJECT / "fixtures" / name).read_text(encoding="utf-8").splitlines()
        header = lines[0].split(",")
        for row in range(1, len(lines)):
            for column in (header.index(c) for c in COLUMNS if c in header):
                for value in EXTREMES:
                    fields = lines[row].split(",")
                    fields[column] = value
                    text = "\n".join([*lines[:row], ",".join(fields), *lines[row + 1 :]]) + "\n"
                    try:
                        run = normalise(decode_table(text.encode("utf-8")))
                    except InputError:
                        outcomes["refused as input"] += 1
                        continue
                    try:
                        verdict = evaluate(run, criteria)
                    except Exception as error:
                        outcomes[f"internal error ({type(error).__name__})"] += 1
                        continue
                    outcomes[verdict.status.value] += 1
                    document = verdict_to_json(
                        verdict, source_path=name, sha256=None, criteria_sha256=None
                    )
                    found = problems(document)
                    if found:
                        where = f"{name} line {row + 1} {header[column]}={value}"
                        broken.append(f"{where}: {found[0]}")
    total = sum(outcomes.values())
    print(f"{total} one-cell cases")
    for outcome, count in sorted(outcomes.items()):
        print(f"  {outcome:<32} {count:>6}")
    print(f"  {'break an invariant':<32} {len(broken):>6}")
    for line in broken[:20]:
        print(f"    {line}")
    return 1 if broken else 0


if __name__ == "__main__":
    raise SystemExit(main())
