"""Invariants over every fixture and over generated runs: a failing run says what to do, and a
result that could not be computed is never silent (tests/verdict_invariants.py)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_exports import EXPORTS
from test_golden import FIXTURES
from verdict_invariants import problems

from calwarden.daemon.outputs.verdict_json import verdict_to_json
from calwarden.daemon.parsing.native import decode_table, normalise
from calwarden.daemon.pipeline import judge_file
from calwarden.daemon.settings.config import load_config
from calwarden.rules.criteria import build_criteria
from calwarden.rules.errors import InputError
from calwarden.rules.evaluate import evaluate

PROJECT = Path(__file__).resolve().parent.parent
FIXTURE_FILES = {
    **{f"fixtures/{name}": config for name, config in FIXTURES.items()},
    **{f"fixtures/demo/{p.name}": None for p in sorted((PROJECT / "fixtures/demo").glob("*.csv"))},
    **{f"fixtures/exports/{name}": config for name, (config, _, _) in EXPORTS.items()},
}
INVARIANT = settings(derandomize=True, max_examples=150, deadline=None, database=None)


def _judge(relative: str, config_name: str | None) -> dict[str, Any]:
    config = load_config(PROJECT / "config" / config_name if config_name else None)
    return judge_file(PROJECT / relative, config).document


@pytest.mark.parametrize("relative", sorted(FIXTURE_FILES))
def test_every_fixture_keeps_the_invariants(relative: str) -> None:
    """Each fixture's verdict says what to do when it fails and leaves no result silent."""
    assert problems(_judge(relative, FIXTURE_FILES[relative])) == []


def test_failing_fixtures_say_what_to_rerun() -> None:
    """The failing fixtures each name samples to re-run (none needs the whole-run fallback)."""
    for name in ("bwl-metals-fail.csv", "bwl-lc-istd.csv", "bwl-addition-short.csv"):
        document = _judge(f"fixtures/{name}", None)
        assert document["status"] == "fail"
        assert document["reruns"], name
        assert not [e for e in document["repeat"] if e["what"] == "run"], name


def test_quadratic_fixture_under_a_line_asks_for_a_new_calibration() -> None:
    """The OES run judged with the linear default fails its calibration: repeat calibration."""
    document = _judge("fixtures/bwl-quadratic.csv", None)
    assert {(e["what"], e["analyte"]) for e in document["repeat"]} == {
        ("calibration", "Na"),
        ("calibration", "K"),
    }


# --------------------------------------------------------------------------- generated runs

HEADER = "seq,sample_id,kind,analyte,response,nominal,dilution,parent,added,batch"
#: A straight Zn calibration (response ≈ 100 + 1000·c), blank subtracted.
LEVELS = (1, 2, 5, 10, 20, 50)
CALIBRATION = [
    "1,CAL-BLK,blank,Zn,100,,,,,",
    *(f"{i + 2},CAL-{i + 1},cal,Zn,{100 + 1000 * c:.1f},{c},,,," for i, c in enumerate(LEVELS)),
]
#: Numbers a careless or hostile file may hold in one cell.
EXTREMES = ["1e308", "-1e308", "1.7976931348623157e308", "1e300", "1e-308", "5e-324", "1e200"]


@st.composite
def _sequences(draw: st.DrawFn, low_level: bool = False) -> str:
    """A run: the calibration, then QC and samples in a random order with random readings."""
    rows = list(CALIBRATION)
    seq = len(CALIBRATION)
    samples: list[str] = []
    for _ in range(draw(st.integers(1, 18))):
        seq += 1
        kinds = ["sample"] * 5 + ["icv", "ccv", "ccv", "ccb", "mb", "lcs", "dup", "ms"]
        kind = draw(st.sampled_from([*kinds, "llccv", "llccv"] if low_level else kinds))
        level = draw(st.sampled_from([0.0, 0.4, 2.0, 8.0, 30.0, 70.0]))
        # mostly a true reading; sometimes 20 % off (a failing check or LCS)
        bias = draw(st.sampled_from([1.0, 1.0, 1.0, 0.8, 1.25]))
        nominal = {"icv": 20.0, "ccv": 10.0, "lcs": 20.0, "llccv": 2.0}.get(kind)
        concentration = nominal if nominal is not None else level
        response = 100 + 1000 * concentration * bias
        dilution = draw(st.sampled_from(["", "", "", "10", "1e308"]))
        batch = draw(st.sampled_from(["", "B-1", "B-2"]))
        parent = added = ""
        if kind in ("dup", "ms"):
            if not samples:
                kind = "sample"
            else:
                parent = draw(st.sampled_from(samples))
                added = "10" if kind == "ms" else ""
                response += 10000 if kind == "ms" else 0
        name = f"{kind.upper()}-{seq}"
        if kind == "sample":
            samples.append(name)
        rows.append(
            f"{seq},{name},{kind},Zn,{response:.1f},{'' if nominal is None else nominal},"
            f"{dilution},{parent},{added},{batch}"
        )
    if draw(st.booleans()):  # a closing check most of the time
        rows.append(f"{seq + 1},CCV-END,ccv,Zn,10100,10,,,,")
    return "\n".join([HEADER, *rows]) + "\n"


def _document(text: str, criteria: dict[str, Any] | None = None) -> dict[str, Any] | None:
    try:
        run = normalise(decode_table(text.encode("utf-8")), run_name="generated")
    except InputError:
        return None
    verdict = evaluate(run, build_criteria({"defaults": criteria or {}}))
    return verdict_to_json(verdict, source_path="generated.csv", sha256=None, criteria_sha256=None)


@INVARIANT
@given(_sequences())
def test_generated_runs_keep_the_invariants(text: str) -> None:
    """Any mix of passing and failing QC, batches and extreme dilutions keeps the invariants."""
    document = _document(text)
    assert document is not None
    assert problems(document) == [], text


#: Criteria of issue 15's rules: reporting limits, carry-over, CCV re-runs, rounding.
_ISSUE_15_CRITERIA = st.fixed_dictionaries(
    {
        "reporting_limit": st.sampled_from([1.0, 2.0]),
        "detection_limit": st.sampled_from([0.3, 0.5]),
        "carryover_wash_blank": st.booleans(),
        "ccv_rerun_policy": st.sampled_from(["none", "single", "two_passing"]),
        "compare_rounded_digits": st.sampled_from([None, 3]),
    }
)


@settings(derandomize=True, max_examples=80, deadline=None, database=None)
@given(_sequences(low_level=True), _ISSUE_15_CRITERIA)
def test_generated_runs_with_reporting_limits_keep_the_invariants(
    text: str, criteria: dict[str, Any]
) -> None:
    """Low-level checks, reporting limits, carry-over and re-run policies keep the invariants."""
    document = _document(text, criteria)
    assert document is not None
    assert problems(document) == [], (text, criteria)


#: Native fixtures whose rows may be mutated, and the numeric columns mutated.
MUTABLE = ("bwl-metals-pass.csv", "bwl-lc-istd.csv", "bwl-addition.csv", "bwl-metals-fail.csv")
MUTATED_COLUMNS = ("response", "nominal", "dilution", "added", "istd_response")


def _mutable_cells(name: str) -> tuple[list[str], list[tuple[int, int]]]:
    lines = (PROJECT / "fixtures" / name).read_text(encoding="utf-8").splitlines()
    header = lines[0].split(",")
    columns = [header.index(c) for c in MUTATED_COLUMNS if c in header]
    cells = [(row, column) for row in range(1, len(lines)) for column in columns]
    return lines, cells


CELLS = {name: _mutable_cells(name) for name in MUTABLE}


@INVARIANT
@given(st.data())
def test_one_extreme_cell_in_a_fixture_keeps_the_invariants(data: st.DataObject) -> None:
    """One extreme number in any cell, standards included: refused, or judged and never silent."""
    name = data.draw(st.sampled_from(MUTABLE))
    lines, cells = CELLS[name]
    row, column = data.draw(st.sampled_from(cells))
    value = data.draw(st.sampled_from(EXTREMES))
    fields = lines[row].split(",")
    fields[column] = value
    text = "\n".join([*lines[:row], ",".join(fields), *lines[row + 1 :]]) + "\n"
    document = _document(text)
    if document is not None:
        assert problems(document) == [], (name, row + 1, column, value)


@pytest.mark.parametrize("value", ["1e300", "1.7976931348623157e308", "5e-324"])
def test_an_extreme_standard_is_a_failing_calibration_finding(value: str) -> None:
    """A nominal no fit can hold fails the calibration, naming the standard's line and seq."""
    lines = (PROJECT / "fixtures/bwl-metals-pass.csv").read_text(encoding="utf-8").splitlines()
    header = lines[0].split(",")
    fields = lines[5].split(",")  # CAL-1 Zn, seq 2, on line 6
    fields[header.index("nominal")] = value
    document = _document("\n".join([*lines[:5], ",".join(fields), *lines[6:]]) + "\n")
    assert document is not None
    assert document["status"] == "fail"
    present = [f for f in document["findings"] if f["rule"] == "calibration.present"]
    assert [f["analyte"] for f in present] == ["Zn"]
    assert "CAL-1 (line 6, seq 2)" in present[0]["message"]
    assert problems(document) == []
