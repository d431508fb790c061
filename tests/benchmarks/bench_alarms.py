"""False alarms and detection, measured together (a script, not a test).

    python tests/benchmarks/bench_alarms.py [--quick]

A QC screen is judged by how rarely it fails good runs and how surely it fails bad
ones, so every figure here comes with its twin. Two simulations, each with fixed seeds
and run through the same rule functions the daemon uses:

- ``alarms_control.py``: weeks of in-control runs with a two-level noise model
  (reading noise within a run, a day-to-day sensitivity change that each day's own
  calibration absorbs), judged one after another against the control log; then a
  shift in the check standards, and how many runs it takes to be caught.
- ``alarms_calibration.py``: Monte Carlo of straight calibrations (unweighted and
  1/x² weighted, proportional plus absolute noise) and of curves that bend low at
  the top standard, through the linearity test.

Each prints (figure, value, target); the table in the README ("False alarms and
detection") is this script's output.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import alarms_calibration
import alarms_control


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer simulated runs")
    args = parser.parse_args()
    rows: list[tuple[str, float, str]] = []
    for module in (alarms_control, alarms_calibration):
        rows.extend(module.measure(args.quick))
    width = max(len(name) for name, _, _ in rows)
    print(f"{'figure':<{width}}  {'measured':>9}  target")
    for name, value, target in rows:
        print(f"{name:<{width}}  {value:>7.1f} %  {target}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
