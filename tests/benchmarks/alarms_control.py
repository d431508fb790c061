"""Benchmark: how often control-chart rules fail good runs, and how fast they catch a shift.

    python tests/benchmarks/alarms_control.py [--quick]

Simulated laboratory (invented, fixed seeds): four analytes on one instrument, one
run a day; each run a calibration blank, six standards (1–50 µg/L), ICV (20), ICB,
LCS (20) and 24 samples with a CCV (25) and CCB after every eighth. The truth is a
straight line; each day's sensitivity differs (SD 8 %), which that day's own
calibration absorbs; every reading has 1 % proportional noise plus a little
absolute noise (0.02 µg/L). So the check standards of one run share the error of
that day's calibration (the between-run component), and each reading adds its own
(the within-run component).

Every run goes through the daemon's own path: a native CSV file, the real intake
(``calwarden.daemon.intake.accept.Intake``), the real control log in a real SQLite
ledger, default settings. A baseline is set from the first runs; then:

- in-control: several weeks of runs; the share of runs failed by a control-chart
  rule (a ``control.*`` finding of severity fail), target at most 2 %;
- shift: after the baseline and a few good runs the check standards (ICV, CCV, LCS)
  read 5 % high; the share of labs whose first or second shifted run fails by a
  control-chart rule, target at least 95 % ("caught within two runs").

``measure(quick)`` returns (figure, value, target); ``__main__`` prints the table.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import io
import sys
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
from structlog.testing import capture_logs

from calwarden.daemon.intake.accept import Intake
from calwarden.daemon.settings.config import build_config, plan_watch
from calwarden.daemon.stores.database import LEDGER_NAME
from calwarden.daemon.stores.ledger import Ledger

ANALYTES = {"Zn": 9500.0, "Cu": 21000.0, "Pb": 52000.0, "Cd": 14000.0}  # response per µg/L
STANDARDS = (1.0, 2.0, 5.0, 10.0, 25.0, 50.0)
CHECK = 20.0  # ICV and LCS
CCV = 25.0
SAMPLES = 24
CCV_EVERY = 8
DAY_SD = 0.08  # day-to-day sensitivity change, absorbed by the day's calibration
READING_RSD = 0.01  # proportional reading noise
ABSOLUTE_SD = 0.02  # absolute reading noise, µg/L
BLANK = 0.05  # blank level, µg/L equivalent
BASELINE_RUNS = 20
COLUMNS = ("seq", "sample_id", "kind", "analyte", "response", "nominal", "unit", "run")
CHECK_KINDS = ("icv", "ccv", "lcs")


def run_file(name: str, rng: np.random.Generator, shift: float = 0.0) -> bytes:
    """One simulated run as a native CSV file; ``shift`` on the check standards' readings."""
    day = {analyte: 1.0 + rng.normal(0.0, DAY_SD) for analyte in ANALYTES}
    rows: list[tuple[str, str, float | None]] = [("CAL-BLK", "blank", None)]
    rows += [(f"CAL-{i + 1}", "cal", c) for i, c in enumerate(STANDARDS)]
    rows += [("ICV", "icv", CHECK), ("ICB", "ccb", None), ("LCS", "lcs", CHECK)]
    checks = 0
    for i in range(SAMPLES):
        rows.append((f"S-{i + 1:02d}", "sample", None))
        if (i + 1) % CCV_EVERY == 0:
            checks += 1
            rows += [(f"CCV-{checks}", "ccv", CCV), (f"CCB-{checks}", "ccb", None)]
    concentrations = rng.uniform(1.5, 45.0, size=SAMPLES)
    text = io.StringIO()
    out = csv.writer(text, lineterminator="\n")
    out.writerow(COLUMNS)
    sample = 0
    for seq, (sample_id, kind, nominal) in enumerate(rows, start=1):
        if kind == "sample":
            true = float(concentrations[sample])
            sample += 1
        else:
            true = nominal or 0.0
        if kind in CHECK_KINDS:
            true *= 1.0 + shift
        for analyte, sensitivity in ANALYTES.items():
            reading = (true + BLANK) * (1.0 + rng.normal(0.0, READING_RSD))
            reading += rng.normal(0.0, ABSOLUTE_SD)
            response = reading * sensitivity * day[analyte]
            nominal_text = "" if nominal is None else f"{nominal:g}"
            out.writerow(
                (seq, sample_id, kind, analyte, f"{response:.1f}", nominal_text, "µg/L", name)
            )
    return text.getvalue().encode("utf-8")


class Lab:
    """One inbox and ledger, judged through the real intake with the given control settings."""

    def __init__(self, root: Path, control: dict[str, Any] | None = None) -> None:
        (root / "inbox").mkdir(parents=True)
        data = {"control": {"charts": False, **(control or {})}}
        plan = plan_watch(
            build_config(data, "bench"), inbox=root / "inbox", out=root / "out", settle_seconds=0.1
        )
        self.inbox = plan.inboxes[0]
        self.ledger = Ledger.open(plan.state_dir / LEDGER_NAME)
        self.intake = Intake(self.ledger, plan.inboxes)
        self.count = 0

    def judge(self, data: bytes) -> dict[str, Any]:
        """Judge one run; its verdict document."""
        import json

        self.count += 1
        path = self.inbox.path / f"run-{self.count:03d}.csv"
        path.write_bytes(data)
        stat = path.stat()
        outcome = self.intake.process(
            self.inbox,
            path,
            data,
            hashlib.sha256(data).hexdigest(),
            stat.st_size,
            stat.st_mtime_ns,
        )
        assert outcome.verdict_path is not None
        document: dict[str, Any] = json.loads(outcome.verdict_path.read_text(encoding="utf-8"))
        return document


def control_failures(document: dict[str, Any]) -> list[str]:
    """The control-chart rules that failed this run."""
    return [
        f["rule"]
        for f in document["findings"]
        if f["rule"].startswith("control.") and f["severity"] == "fail"
    ]


@contextmanager
def _lab(control: dict[str, Any] | None = None) -> Iterator[Lab]:
    with tempfile.TemporaryDirectory() as folder, capture_logs():
        lab = Lab(Path(folder), control)
        try:
            yield lab
        finally:
            lab.ledger.close()


def in_control(
    labs: int, runs: int, control: dict[str, Any] | None
) -> tuple[float, dict[str, int]]:
    """Share of in-control runs after the baseline failed by control rules; failures by rule."""
    failed = judged = 0
    by_rule: dict[str, int] = {}
    for seed in range(labs):
        rng = np.random.default_rng(1000 + seed)
        with _lab(control) as lab:
            for i in range(BASELINE_RUNS + runs):
                rules = control_failures(lab.judge(run_file(f"L{seed}-R{i:03d}", rng)))
                if i < BASELINE_RUNS:
                    continue
                judged += 1
                failed += bool(rules)
                for rule in set(rules):
                    by_rule[rule] = by_rule.get(rule, 0) + 1
    return failed / judged, by_rule


def shift_caught(labs: int, shift: float, control: dict[str, Any] | None) -> tuple[float, float]:
    """Share of labs whose 1st, and 1st or 2nd, shifted run fails by control rules."""
    first = within_two = 0
    for seed in range(labs):
        rng = np.random.default_rng(5000 + seed)
        with _lab(control) as lab:
            for i in range(BASELINE_RUNS + 3):
                lab.judge(run_file(f"S{seed}-R{i:03d}", rng))
            caught = [
                bool(control_failures(lab.judge(run_file(f"S{seed}-X{j}", rng, shift))))
                for j in range(2)
            ]
        first += caught[0]
        within_two += caught[0] or caught[1]
    return first / labs, within_two / labs


#: The previous defaults' behaviour as far as settings reach it: every rule rejects.
EVERY_RULE_REJECTS = {
    "rejecting": ["1-3s", "1-3.5s", "2-2s", "R-4s", "4-1s", "10-x"],
}


def measure(quick: bool) -> list[tuple[str, float, str]]:
    """The figures (name, value in %, target) with default settings, and every rule rejecting."""
    labs, runs, shift_labs = (4, 30, 6) if quick else (24, 60, 25)
    rate, by_rule = in_control(labs, runs, None)
    first, two = shift_caught(shift_labs, 0.05, None)
    figures = [
        (f"in-control runs failed by control rules ({labs * runs} runs)", 100 * rate, "≤ 2 %"),
        ("5 % shift caught in the first run", 100 * first, "informative"),
        ("5 % shift caught within two runs", 100 * two, "≥ 95 %"),
    ]
    for rule, count in sorted(by_rule.items()):
        figures.append((f"  of which {rule}", 100 * count / (labs * runs), "informative"))
    strict_labs = max(2, labs // 3)
    strict, strict_by_rule = in_control(strict_labs, runs, EVERY_RULE_REJECTS)
    figures.append(
        (
            f"every rule rejecting: runs failed ({strict_labs * runs} runs)",
            100 * strict,
            "informative",
        )
    )
    for rule, count in sorted(strict_by_rule.items()):
        figures.append((f"  of which {rule}", 100 * count / (strict_labs * runs), "informative"))
    return figures


def _meets(value: float, target: str) -> str:
    bound = target.strip("≤≥ %")
    if target.startswith("≤"):
        return "meets" if value <= float(bound) else "MISSES"
    if target.startswith("≥"):
        return "meets" if value >= float(bound) else "MISSES"
    return ""


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer simulated labs and runs")
    args = parser.parse_args(argv)
    for name, value, target in measure(args.quick):
        print(f"{name:<58} {value:7.4f}   target {target:<12} {_meets(value, target)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
