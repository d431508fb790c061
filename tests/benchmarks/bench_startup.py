"""Benchmark: start-up of `calwarden --version` and a cold `check` (a script, not a test).

    python tests/benchmarks/bench_startup.py [--repeat 7]

Each figure is the CPU time (user + system) of a whole process, best of
``--repeat``, beside its floor measured in the same run:

* ``calwarden --version`` against ``python -c pass``;
* ``calwarden check`` of a 152-row fixture against
  ``python -c 'import numpy, pydantic, yaml, scipy.special'`` (what judging
  cannot do without: the arrays, the configuration models, YAML and the F
  quantiles of the calibration tests).

Then ``python -X importtime`` of each command: the modules taking the most
time (cumulative, microseconds), so that a new import at start-up shows.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
from pathlib import Path

PROJECT = Path(__file__).resolve().parents[2]
SMALL = PROJECT / "fixtures" / "bwl-metals-pass.csv"
PYTHON = sys.executable
CALWARDEN = [PYTHON, "-m", "calwarden.daemon"]


def _cpu(args: list[str], repeat: int) -> float:
    """Best CPU seconds of ``repeat`` runs of a process (its children's rusage)."""
    best = float("inf")
    for _ in range(repeat):
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        subprocess.run(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=False)
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        best = min(best, (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime))
    return best


def _heaviest(args: list[str], count: int) -> list[tuple[int, str]]:
    """The top-level imports with the largest cumulative time under -X importtime."""
    done = subprocess.run(
        [args[0], "-X", "importtime", *args[1:]],
        capture_output=True,
        text=True,
        check=False,
        env={**os.environ, "PYTHONDONTWRITEBYTECODE": "1"},
    )
    found: list[tuple[int, str]] = []
    for line in done.stderr.splitlines():
        if not line.startswith("import time:") or "cumulative" in line:
            continue
        _, cumulative, name = line.split("|")
        if name.startswith(" ") and not name.startswith("  "):  # depth 0: imported from code
            found.append((int(cumulative), name.strip()))
    return sorted(found, reverse=True)[:count]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=7)
    args = parser.parse_args()
    figures = [
        ("calwarden --version", [*CALWARDEN, "--version"], [PYTHON, "-c", "pass"], 3.0),
        (
            "cold check, 152 rows",
            [*CALWARDEN, "check", str(SMALL)],
            [PYTHON, "-c", "import numpy, pydantic, yaml, scipy.special"],
            1.5,
        ),
        (
            "  (floor without scipy)",
            [*CALWARDEN, "check", str(SMALL)],
            [PYTHON, "-c", "import numpy, pydantic, yaml"],
            0.0,
        ),
    ]
    for name, command, floor_command, target in figures:
        cpu, floor = _cpu(command, args.repeat), _cpu(floor_command, args.repeat)
        aim = f"target ≤ {target:g}×" if target else ""
        print(
            f"{name:<26} {cpu * 1000:6.0f} ms CPU; floor {floor * 1000:6.0f} ms "
            f"({' '.join(floor_command[1:])}); {cpu / floor:4.2f}× floor {aim}"
        )
    for name, command, _, _ in figures[:2]:
        heavy = ", ".join(f"{module} {us / 1000:.0f}" for us, module in _heaviest(command, 8))
        print(f"importtime, {name} (ms, cumulative): {heavy}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
