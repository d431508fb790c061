"""The evaluation as a whole, cross-checked against numpy: blank handling, internal
standards, quantitation, and rules that never raise."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from calwarden.rules.criteria import build_criteria
from calwarden.rules.evaluate import evaluate
from calwarden.rules.model import Kind, Reading, Run
from calwarden.rules.verdict import Severity, Status

PROJECT = Path(__file__).resolve().parent.parent
LEVELS = [1.0, 2.0, 5.0, 10.0, 20.0, 50.0]
RESPONSES = [1090.0, 2110.0, 5060.0, 10180.0, 19950.0, 50310.0]
BLANKS = [95.0, 105.0]


def _run(*extra: Reading, istd: list[float] | None = None) -> Run:
    rows = [
        Reading(line=1 + i, seq=1 + i, sample_id=f"BLK-{i}", kind=Kind.BLANK, analyte="Zn",
                response=b)
        for i, b in enumerate(BLANKS)
    ]  # fmt: skip
    for i, (level, response) in enumerate(zip(LEVELS, RESPONSES, strict=True)):
        rows.append(
            Reading(
                line=10 + i,
                seq=10 + i,
                sample_id=f"CAL-{i + 1}",
                kind=Kind.CAL,
                analyte="Zn",
                response=response,
                nominal=level,
                istd_response=istd[i] if istd else None,
            )
        )
    return Run((*rows, *extra), "test")


def _sample(seq: int, response: float, dilution: float = 1.0) -> Reading:
    return Reading(line=seq, seq=seq, sample_id=f"S-{seq}", kind=Kind.SAMPLE, analyte="Zn",
                   response=response, dilution=dilution)  # fmt: skip


@pytest.mark.parametrize(
    ("mode", "x", "y"),
    [
        ("subtract", LEVELS, [r - np.mean(BLANKS) for r in RESPONSES]),
        ("zero_point", [*LEVELS, 0.0, 0.0], [*RESPONSES, *BLANKS]),
        ("none", LEVELS, RESPONSES),
    ],
)
def test_blank_mode_fits_the_points_numpy_fits(mode: str, x: list[float], y: list[float]) -> None:
    """Each blank mode fits exactly the points numpy.polyfit gets for that mode."""
    verdict = evaluate(_run(), build_criteria({"defaults": {"blank": mode}}))
    (calibration,) = verdict.calibrations
    assert calibration.fit is not None
    slope, intercept = np.polyfit(x, y, 1)
    assert calibration.fit.coefficients == pytest.approx((intercept, slope), rel=1e-10)


def test_internal_standard_fits_the_response_ratio() -> None:
    """With istd_response, the fit is of (response − blank) / istd_response on nominal."""
    istd = [100000.0, 98000.0, 101000.0, 99500.0, 100500.0, 97000.0]
    verdict = evaluate(_run(istd=istd), build_criteria({"defaults": {"blank": "none"}}))
    (calibration,) = verdict.calibrations
    assert calibration.fit is not None
    ratios = [r / i for r, i in zip(RESPONSES, istd, strict=True)]
    slope, intercept = np.polyfit(LEVELS, ratios, 1)
    assert calibration.fit.coefficients == pytest.approx((intercept, slope), rel=1e-10)
    assert calibration.istd_reference == pytest.approx(np.mean(istd))


def test_sample_concentration_is_the_inverted_line_times_the_dilution() -> None:
    """A sample reads (y − blank − b0) / b1 in solution, times its dilution as reported."""
    verdict = evaluate(_run(_sample(30, 7000.0, dilution=4.0)), build_criteria(None))
    slope, intercept = np.polyfit(LEVELS, [r - np.mean(BLANKS) for r in RESPONSES], 1)
    measured = (7000.0 - np.mean(BLANKS) - intercept) / slope
    (result,) = verdict.results
    assert result.measured == pytest.approx(measured, rel=1e-12)
    assert result.concentration == pytest.approx(4.0 * measured, rel=1e-12)


def test_sample_uncertainty_is_the_textbook_s_x0_times_the_dilution() -> None:
    """The reported uncertainty is s(x0) of Miller & Miller ch. 5, scaled by the dilution."""
    verdict = evaluate(_run(_sample(30, 7000.0, dilution=4.0)), build_criteria(None))
    x = np.array(LEVELS)
    y = np.array(RESPONSES) - np.mean(BLANKS)
    slope, intercept = np.polyfit(x, y, 1)
    s = np.sqrt(np.sum((y - intercept - slope * x) ** 2) / (len(x) - 2))
    y0 = 7000.0 - np.mean(BLANKS)
    s_x0 = (s / slope) * np.sqrt(
        1 + 1 / len(x) + (y0 - y.mean()) ** 2 / (slope**2 * np.sum((x - x.mean()) ** 2))
    )
    (result,) = verdict.results
    assert result.uncertainty == pytest.approx(4.0 * s_x0, rel=1e-10)


KINDS = [Kind.SAMPLE, Kind.CCV, Kind.CCB, Kind.MB, Kind.LCS, Kind.DUP, Kind.MS, Kind.ICV]


@st.composite
def _field_readings(draw: st.DrawFn) -> list[Reading]:
    count = draw(st.integers(0, 25))
    readings = []
    for index in range(count):
        kind = draw(st.sampled_from(KINDS))
        needs_nominal = kind in (Kind.CCV, Kind.ICV, Kind.LCS)
        readings.append(
            Reading(
                line=100 + index,
                seq=100 + index,
                sample_id=f"X-{index}",
                kind=kind,
                analyte="Zn",
                response=draw(st.floats(-1e6, 1e7, allow_nan=False)),
                nominal=draw(st.floats(0, 100)) if needs_nominal else None,
                dilution=draw(st.sampled_from([1.0, 2.0, 10.0])),
                parent="X-0" if kind in (Kind.DUP, Kind.MS) else None,
                added=draw(st.floats(0.1, 50)) if kind is Kind.MS else None,
            )
        )
    return readings


@settings(max_examples=60, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(
    extra=_field_readings(),
    model=st.sampled_from(["linear", "linear_through_zero", "quadratic", "average_rf"]),
    weighting=st.sampled_from(["none", "1/x", "1/x2"]),
)
def test_any_valid_run_gets_a_verdict_and_its_status_follows_its_findings(
    extra: list[Reading], model: str, weighting: str
) -> None:
    """Rules never raise on a valid run, and the status is fail exactly when a finding fails."""
    criteria = build_criteria({"defaults": {"model": model, "weighting": weighting}})
    verdict = evaluate(_run(*extra), criteria)
    failing = any(f.severity is Severity.FAIL for f in verdict.findings)
    assert verdict.status is (Status.FAIL if failing else Status.PASS)


def test_fixture_intentions_hold_by_an_independent_numpy_check() -> None:
    """fixtures/check_fixtures.py, a separate numpy re-implementation, confirms every fixture."""
    result = subprocess.run(
        [sys.executable, str(PROJECT / "fixtures" / "check_fixtures.py")],
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 0, result.stdout[-2000:] + result.stderr


def _check(seq: int, kind: Kind, response: float) -> Reading:
    return Reading(line=seq, seq=seq, sample_id=f"{kind.value.upper()}-{seq}", kind=kind,
                   analyte="Zn", response=response, nominal=10.0)  # fmt: skip


def test_a_failed_ccv_is_listed_before_the_brackets_it_breaks() -> None:
    """Root cause first: CCV recovering 83 % is the first failure, its bracket findings follow."""
    run = _run(
        _check(20, Kind.ICV, 10150.0),
        _sample(21, 3000.0),
        _sample(22, 4000.0),
        _check(23, Kind.CCV, 8400.0),  # about 83 % of 10 µg/L
        _sample(24, 5000.0),
        _check(25, Kind.CCV, 10100.0),
    )
    verdict = evaluate(run, build_criteria({}))
    failures = [f.rule for f in verdict.findings if f.severity is Severity.FAIL]
    assert failures[0] == "check.recovery"
    assert "bracket.reportable" in failures[1:]


@pytest.mark.parametrize("name", ["bwl-metals-fail.csv", "bwl-lc-istd.csv", "bwl-quadratic.csv"])
def test_fixture_findings_are_ordered_cause_before_consequence(name: str) -> None:
    """Every fixture's findings run calibration, checks and blanks, brackets, samples."""
    from calwarden.daemon.pipeline import judge_file
    from calwarden.daemon.settings.config import load_config
    from calwarden.rules.evaluate import finding_stage

    judgement = judge_file(PROJECT / "fixtures" / name, load_config(None))
    stages = [finding_stage(f.rule) for f in judgement.verdict.findings]
    assert stages == sorted(stages)


def test_replicate_injections_give_one_result_with_the_uncertainty_of_a_mean() -> None:
    """Three injections of S-9: the curve at the mean response, u of a mean of m = 3 readings."""
    run = _run(*(Reading(line=s, seq=s, sample_id="S-9", kind=Kind.SAMPLE, analyte="Zn",
                         response=r, dilution=2.0)
                 for s, r in ((20, 12200.0), (21, 12500.0), (22, 12000.0))))  # fmt: skip
    verdict = evaluate(run, build_criteria({}))
    (group,) = verdict.replicates
    (calibration,) = verdict.calibrations
    fit = calibration.fit
    assert fit is not None and calibration.blank_signal is not None
    mean_signal = float(np.mean([12200.0, 12500.0, 12000.0])) - calibration.blank_signal
    at_mean, single = fit.invert(mean_signal), fit.inverse_uncertainty(mean_signal)
    of_mean = fit.inverse_uncertainty(mean_signal, 3)
    assert at_mean is not None and single is not None and of_mean is not None
    assert group.seqs == (20, 21, 22)
    assert group.concentration == pytest.approx(2.0 * at_mean, rel=1e-12)
    assert group.uncertainty == pytest.approx(2.0 * of_mean, rel=1e-12)
    assert of_mean < single
    values = [r.concentration for r in verdict.results if r.sample_id == "S-9"]
    assert group.rsd_pct == pytest.approx(100 * np.std(values, ddof=1) / np.mean(values), rel=1e-12)
    assert len(values) == 3  # each injection is still a result
