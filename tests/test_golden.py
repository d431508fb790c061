"""Golden verdicts: each fixture's verdict, reduced to what a lab relies on, stays as recorded.

The intended outcome of each fixture is described in fixtures/README.md. To
record a deliberate change, run with CALWARDEN_UPDATE_GOLDEN=1 and review the diff.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import pytest

from calwarden.daemon.pipeline import judge_file
from calwarden.daemon.settings.config import load_config

PROJECT = Path(__file__).resolve().parent.parent
GOLDEN = Path(__file__).parent / "golden"
#: fixture → the configuration it is judged with (None: every default)
FIXTURES = {
    "bwl-metals-pass.csv": None,
    "bwl-metals-fail.csv": None,
    "bwl-lc-istd.csv": None,
    "bwl-addition.csv": None,
    "bwl-addition-short.csv": None,
    "bwl-quadratic.csv": "example.yaml",
    "bwl-bad-missing-nominal.csv": None,
}


def _round(value: float | None, digits: int = 6) -> float | None:
    return None if value is None else float(f"{value:.{digits}g}")


def reduce(document: dict[str, Any]) -> dict[str, Any]:
    """The parts of a verdict that a golden file pins, rounded to stable digits."""
    return {
        "status": document["status"],
        "error": document["error"],
        "findings": sorted(
            [
                f["rule"],
                f["severity"],
                f["analyte"],
                f["sample_id"],
                f["seq"],
                _round(f["value"], 4),
            ]
            for f in document["findings"]
        ),
        "calibrations": {
            analyte: {
                "model": c["model"],
                "coefficients": [_round(v, 8) for v in c["coefficients"] or []],
                "r_squared": _round(c["r_squared"], 8),
            }
            for analyte, c in document["calibrations"].items()
        },
        "results": [
            [
                r["seq"],
                r["sample_id"],
                r["analyte"],
                _round(r["concentration"]),
                r["flags"],
                r["qualifiers"],
            ]
            for r in document["results"]
        ],
    }


@pytest.mark.parametrize("name", sorted(FIXTURES))
def test_fixture_verdict_matches_its_golden_file(name: str) -> None:
    """The fixture's reduced verdict equals tests/golden/<fixture>.json."""
    config_name = FIXTURES[name]
    config = load_config(PROJECT / "config" / config_name if config_name else None)
    judged = reduce(judge_file(PROJECT / "fixtures" / name, config).document)
    golden = GOLDEN / f"{Path(name).stem}.json"
    if os.environ.get("CALWARDEN_UPDATE_GOLDEN") == "1":
        golden.write_text(json.dumps(judged, indent=1, ensure_ascii=False) + "\n", "utf-8")
    assert judged == json.loads(golden.read_text(encoding="utf-8"))


#: What fixtures/README.md says each fixture must give, computed there independently with numpy:
#: (status, the failing findings as (rule, analyte, sample_id)).
INTENDED = {
    "bwl-metals-pass.csv": ("pass", set()),
    "bwl-metals-fail.csv": (
        "fail",
        {
            ("check.recovery", "Zn", "CCV-2"),
            ("bracket.reportable", "Zn", "BW-1124-05"),
            ("bracket.reportable", "Zn", "BW-1124-11"),
            ("range.over", "Cu", "BW-1124-18"),
            ("duplicate.rpd", "Pb", "BW-1124-03-D"),
        },
    ),
    "bwl-lc-istd.csv": (
        "fail",
        {("istd.recovery", a, "BW-1125-08") for a in ("atrazine", "simazine", "metolachlor")},
    ),
    "bwl-addition.csv": ("pass", set()),
    "bwl-addition-short.csv": ("fail", {("addition.fit", "Pb", "BW-1126-22")}),
    "bwl-quadratic.csv": ("pass", set()),
    "bwl-bad-missing-nominal.csv": ("error", set()),
}


@pytest.mark.parametrize("name", sorted(INTENDED))
def test_fixture_gives_its_intended_outcome(name: str) -> None:
    """The fixture's status and failing findings are those its README intends."""
    config_name = FIXTURES[name]
    config = load_config(PROJECT / "config" / config_name if config_name else None)
    document = judge_file(PROJECT / "fixtures" / name, config).document
    failing = {
        (f["rule"], f["analyte"], f["sample_id"])
        for f in document["findings"]
        if f["severity"] == "fail"
    }
    assert (document["status"], failing) == INTENDED[name]


def test_failing_ccv_makes_exactly_its_bracketed_samples_unreportable() -> None:
    """In the failing metals run, Zn is flagged check_failed in BW-1124-05…16 and nowhere else."""
    document = judge_file(PROJECT / "fixtures" / "bwl-metals-fail.csv", load_config(None)).document
    flagged = {r["sample_id"] for r in document["results"] if "check_failed" in r["flags"]}
    assert flagged == {f"BW-1124-{n:02d}" for n in range(5, 17)}
    assert {r["analyte"] for r in document["results"] if "check_failed" in r["flags"]} == {"Zn"}


def test_quadratic_fixture_fails_under_the_default_line() -> None:
    """The curved OES run fails back-calculation when judged with the default linear model."""
    document = judge_file(PROJECT / "fixtures" / "bwl-quadratic.csv", load_config(None)).document
    rules = {f["rule"] for f in document["findings"] if f["severity"] == "fail"}
    assert "calibration.back_calculation" in rules
