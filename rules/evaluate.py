"""Judge a run: calibrate each analyte, quantitate every reading, apply every rule.

``evaluate(run, criteria)`` is the whole functional core seen from the shell:
a validated :class:`~rules.model.Run` in, a :class:`~rules.verdict.Verdict`
out, nothing read or written on the way.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace
from statistics import fmean

import numpy as np

from calwarden.rules.acceptance.reporting import qualified
from calwarden.rules.acceptance.samples import suggested_dilution
from calwarden.rules.calibration import (
    PARAMETERS,
    Fit,
    Model,
    Weighting,
    detection_limits,
    fit_calibration,
    mandel_test,
    relative_standard_error,
    standard_addition,
)
from calwarden.rules.criteria import AnalyteCriteria, Criteria
from calwarden.rules.errors import ConfigError
from calwarden.rules.model import Kind, Reading, Run
from calwarden.rules.registry import AnalyteContext, Rule, all_rules
from calwarden.rules.replicates import curve_of, replicate_group, replicate_sets
from calwarden.rules.verdict import (
    AdditionSeries,
    Calibration,
    Finding,
    Flag,
    ReplicateGroup,
    Result,
    Severity,
    StandardPoint,
    Verdict,
    status_of,
)

#: Kinds that are not read off the curve one by one: calibration points and addition points.
_NOT_QUANTITATED = frozenset({Kind.BLANK, Kind.CAL, Kind.ADDITION})
#: Cause before consequence: the order findings are listed in, by rule id prefix (or whole
#: id). A failed calibration explains failed checks, a failed check or blank explains the
#: bracket findings, and those explain the samples' flags; the first failure listed is the
#: headline (``calwarden status``, the log's ``reason``, the alert subject). Unlisted ids
#: come last, with the samples.
FINDING_STAGES: dict[str, int] = {
    "calibration": 0,
    "check": 1,
    "blank": 1,
    "lcs": 1,
    "istd": 1,
    "ics": 1,  # the interference check verifies the corrections, as a check standard does
    "run.required_qc": 1,  # missing QC explains the rest; run.field_samples comes last
    "bracket": 2,
    # consequences: a failed blank or LCS carried to the samples, whatever the prefix
    "blank.method_multiple": 2,
    "lcs.batch": 2,
    "replicate": 3,
}
_LAST_STAGE = 3


def finding_stage(rule_id: str) -> int:
    """The stage of a rule's findings in :data:`FINDING_STAGES` (whole id first, then prefix)."""
    if rule_id in FINDING_STAGES:
        return FINDING_STAGES[rule_id]
    return FINDING_STAGES.get(rule_id.split(".", 1)[0], _LAST_STAGE)


#: Mandel's test needs this many levels to say anything (ISO 8466-1 asks for at least 5).
_MANDEL_MIN_LEVELS = 5


def active_rules(criteria: Criteria) -> tuple[Rule, ...]:
    """The registered rules minus those the criteria switch off; unknown ids are a config error."""
    rules = all_rules()
    known = {r.id for r in rules}
    unknown = sorted(set(criteria.disabled_rules) - known)
    if unknown:
        raise ConfigError(
            f"criteria.disabled_rules: unknown rule id {unknown[0]!r}; known ids: "
            + ", ".join(sorted(known))
        )
    return tuple(r for r in rules if r.id not in criteria.disabled_rules)


def evaluate(run: Run, criteria: Criteria) -> Verdict:
    """The verdict on ``run`` under ``criteria``."""
    rules = active_rules(criteria)
    by_analyte: dict[str, list[Reading]] = {analyte: [] for analyte in run.analytes}
    for reading in run.readings:
        by_analyte[reading.analyte].append(reading)

    findings: list[Finding] = []
    calibrations: list[Calibration] = []
    results: list[Result] = []
    additions: list[AdditionSeries] = []
    replicates: list[ReplicateGroup] = []
    for analyte, rows in by_analyte.items():
        rows.sort(key=lambda r: r.seq)
        # Extreme numbers overflow quietly: result.computable turns them into findings.
        with np.errstate(all="ignore"):
            judged = _judge_analyte(analyte, tuple(rows), criteria.for_analyte(analyte), rules)
        findings.extend(judged.findings)
        if judged.calibration is not None:
            calibrations.append(judged.calibration)
        results.extend(judged.results)
        additions.extend(judged.additions)
        replicates.extend(judged.replicates)

    # Stable sorts: within one seq the analytes keep the run's order, within one stage
    # the findings keep the analytes' and the rules' order.
    results.sort(key=_seq_of)
    findings.sort(key=lambda finding: finding_stage(finding.rule))
    return Verdict(
        status=status_of(findings),
        run=run.name,
        instrument=run.instrument,
        findings=tuple(findings),
        calibrations=tuple(calibrations),
        results=tuple(results),
        additions=tuple(additions),
        # By first injection; within one, the analytes keep the run's order.
        replicates=tuple(sorted(replicates, key=lambda group: group.seqs[0])),
    )


def _seq_of(result: Result) -> int:
    return result.seq if result.seq is not None else -1


@dataclass(frozen=True, slots=True)
class _AnalyteJudgement:
    findings: list[Finding]
    calibration: Calibration | None
    results: list[Result]
    additions: list[AdditionSeries]
    replicates: list[ReplicateGroup]


def _judge_analyte(
    analyte: str, rows: tuple[Reading, ...], criteria: AnalyteCriteria, rules: Sequence[Rule]
) -> _AnalyteJudgement:
    blank_signal = _blank_signal(rows, criteria)
    unit = next((r.unit for r in rows if r.unit), None)
    calibration = _calibrate(analyte, rows, criteria, blank_signal, unit)
    fit = calibration.fit if calibration else None
    series = _standard_additions(analyte, rows, blank_signal)

    preliminary: dict[int, Result] = {}
    for reading in rows:
        if reading.kind not in _NOT_QUANTITATED:
            # A reading on another basis than the curve cannot be read off it.
            usable = fit if calibration is not None and calibration.same_basis(reading) else None
            preliminary[reading.seq] = _quantitate(reading, usable, blank_signal, unit)
    for addition in series.values():
        preliminary[addition.seqs[0]] = _addition_result(addition, unit)

    context = AnalyteContext(analyte, criteria, rows, calibration, preliminary, series)
    findings = [finding for rule in rules for finding in rule.check(context)]

    flags: dict[int, list[Flag]] = {}
    for finding in findings:
        if finding.flag is not None:
            for seq in finding.affected:
                flags.setdefault(seq, []).append(finding.flag)
    calibration_failed = any(
        f.rule.startswith("calibration.") and f.severity is Severity.FAIL for f in findings
    )
    results = []
    for seq, result in preliminary.items():
        marks = flags.get(seq, [])
        if calibration_failed and result.kind is not Kind.ADDITION:
            marks = [*marks, Flag.CALIBRATION_FAILED]
        if marks:
            result = _with_flags(result, marks, calibration.range_high if calibration else None)
        results.append(result)
    results = qualified(context, results)  # reporting limits and data qualifiers, after the flags
    fit_of = curve_of(calibration, rows)
    replicates = [replicate_group(members, fit_of) for members in replicate_sets(results)]
    return _AnalyteJudgement(findings, calibration, results, list(series.values()), replicates)


def _with_flags(result: Result, marks: Iterable[Flag], top: float | None) -> Result:
    unique = tuple(dict.fromkeys(marks))
    suggested = None
    if Flag.OVER_RANGE in unique and result.measured is not None and top is not None:
        suggested = suggested_dilution(result.measured, top, result.dilution)
    return replace(result, flags=unique, suggested_dilution=suggested)


def _blank_signal(rows: Sequence[Reading], criteria: AnalyteCriteria) -> float | None:
    """The mean calibration-blank signal to subtract, or ``None`` when nothing is subtracted."""
    if criteria.blank != "subtract":
        return None
    blanks = [r.signal for r in rows if r.kind is Kind.BLANK]
    return fmean(blanks) if blanks else None


def _corrected(reading: Reading, blank_signal: float | None) -> float:
    return reading.signal - blank_signal if blank_signal is not None else reading.signal


def _calibrate(
    analyte: str,
    rows: Sequence[Reading],
    criteria: AnalyteCriteria,
    blank_signal: float | None,
    unit: str | None,
) -> Calibration | None:
    standards = [r for r in rows if r.kind is Kind.CAL]
    if not standards:
        return None
    x = [r.nominal or 0.0 for r in standards]
    y = [_corrected(r, blank_signal) for r in standards]
    if criteria.blank == "zero_point":
        for blank in (r for r in rows if r.kind is Kind.BLANK):
            x.append(0.0)
            y.append(blank.signal)
    non_zero = [value for value in x if value > 0]
    istd = [r.istd_response for r in standards if r.istd_response is not None]
    fit: Fit | None = None
    points: list[StandardPoint] = []
    rse = None
    mandel = None
    limits = None
    blanks = [r.signal for r in rows if r.kind is Kind.BLANK]
    problem = _mixed_basis(rows, use_blanks=criteria.blank != "none")
    if problem is None and not all(math.isfinite(value) for value in y):
        problem = _beyond_arithmetic(standards, y)  # a blank subtracted overflowed
    if problem is None:
        try:
            fit = fit_calibration(x, y, criteria.model, criteria.weighting)
            points = _standard_points(standards, y, fit)
            rse = _rse(points, fit, criteria)
            if criteria.model is Model.LINEAR and len(set(non_zero)) >= _MANDEL_MIN_LEVELS:
                mandel = mandel_test(
                    x,
                    y,
                    criteria.mandel_alpha,
                    _linearity_weighting(criteria),
                    criteria.linearity_reading_rsd_pct,
                )
            limits = detection_limits(fit, blanks)
            if not _finite_fit(fit):
                raise ArithmeticError("the fit's numbers overflow")
        except (ArithmeticError, np.linalg.LinAlgError):
            # Numbers no double arithmetic can fit (1e300, 5e-324): said, never raised.
            fit, rse, mandel, limits = None, None, None, None
            problem = _beyond_arithmetic(standards, y)
        except ValueError as error:  # degenerate points (too few levels…): no fit, said why
            fit, rse, mandel, limits = None, None, None, None
            problem = _beyond_arithmetic(standards, y) if points else str(error)
    if fit is None:
        points = _standard_points(standards, y, None)
    return Calibration(
        analyte=analyte,
        unit=unit,
        fit=fit,
        standards=tuple(points),
        blank_signal=blank_signal,
        uses_internal_standard=bool(istd),
        istd_reference=fmean(istd) if istd else None,
        rse_pct=rse,
        mandel=mandel,
        lod=limits[0] if limits else None,
        loq=limits[1] if limits else None,
        range_low=min(non_zero) if non_zero else None,
        range_high=max(non_zero) if non_zero else None,
        problem=problem,
    )


def _standard_points(
    standards: Sequence[Reading], y: Sequence[float], fit: Fit | None
) -> list[StandardPoint]:
    points = []
    for reading, value in zip(standards, y, strict=False):
        nominal = reading.nominal or 0.0
        back = fit.invert(value) if fit is not None else None
        error_pct = 100.0 * (back - nominal) / nominal if back is not None and nominal > 0 else None
        points.append(
            StandardPoint(
                reading.sample_id, reading.seq, reading.line, nominal, value, back, error_pct
            )
        )
    return points


def _rse(points: Sequence[StandardPoint], fit: Fit, criteria: AnalyteCriteria) -> float | None:
    judged = [(p.nominal, p.back_calculated) for p in points if p.nominal > 0]
    if not all(back is not None for _, back in judged):
        return None
    return relative_standard_error(
        [nominal for nominal, _ in judged],
        [back for _, back in judged if back is not None],
        PARAMETERS[criteria.model],
    )


def _finite_fit(fit: Fit) -> bool:
    """Whether every figure of the fit is a number: a standard of 1e200 leaves the
    coefficients finite but its sums of squares (residual SD, r², covariance) overflow."""
    figures = [*fit.coefficients, fit.residual_sd, fit.r_squared]
    if fit.covariance is not None:
        figures.extend(value for row in fit.covariance for value in row)
    return all(value is None or math.isfinite(value) for value in figures)


def _beyond_arithmetic(standards: Sequence[Reading], y: Sequence[float]) -> str:
    """Why a calibration of extreme numbers has no fit, naming its most extreme value.

    The most extreme value is the one farthest from 1 in orders of magnitude (a
    non-finite one first): 1e300 and 5e-324 both overflow or vanish in the sums of
    squares of a least-squares fit.
    """

    def distance(value: float) -> float:
        if not math.isfinite(value):
            return math.inf
        return abs(math.log10(abs(value))) if value != 0.0 else 0.0

    candidates = [
        (distance(value), reading, what, value)
        for reading, signal in zip(standards, y, strict=False)
        for what, value in (("nominal", reading.nominal or 0.0), ("response", signal))
    ]
    _, reading, what, value = max(candidates, key=lambda c: c[0])
    shown = "blank-corrected response out of range" if not math.isfinite(value) else f"{value:g}"
    return (
        "its calibration cannot be fitted because its numbers are beyond what "
        f"double-precision arithmetic holds; the most extreme is {reading.sample_id} "
        f"(line {reading.line}, seq {reading.seq}), {what} {shown}"
    )


def _linearity_weighting(criteria: AnalyteCriteria) -> Weighting:
    """The weighted space of the linearity test: the calibration's, or the variance model's."""
    if criteria.weighting is not Weighting.NONE:
        return criteria.weighting
    if criteria.linearity_variance == "proportional":
        return Weighting.INVERSE_X_SQUARED
    return Weighting.NONE


def _mixed_basis(rows: Sequence[Reading], *, use_blanks: bool) -> str | None:
    """Why the calibration points cannot share one curve: some with an internal standard, some not.

    Ratios and raw responses differ by the internal standard's size, so one
    curve through both would be meaningless.
    """
    kinds = (Kind.CAL, Kind.BLANK) if use_blanks else (Kind.CAL,)
    points = [r for r in rows if r.kind in kinds]
    with_istd = [r for r in points if r.istd_response is not None]
    if not with_istd or len(with_istd) == len(points):
        return None
    without = next(r for r in points if r.istd_response is None)
    return (
        f"{len(with_istd)} of {len(points)} calibration points have an internal-standard "
        f"response and {without.sample_id} (line {without.line}) has none"
    )


def _quantitate(
    reading: Reading, fit: Fit | None, blank_signal: float | None, unit: str | None
) -> Result:
    signal = _corrected(reading, blank_signal)
    measured = fit.invert(signal) if fit is not None else None
    uncertainty = (
        fit.inverse_uncertainty(signal) if fit is not None and measured is not None else None
    )
    return Result(
        sample_id=reading.sample_id,
        seq=reading.seq,
        kind=reading.kind,
        analyte=reading.analyte,
        line=reading.line,
        signal=signal,
        measured=measured,
        concentration=measured * reading.dilution if measured is not None else None,
        uncertainty=uncertainty * reading.dilution if uncertainty is not None else None,
        dilution=reading.dilution,
        unit=reading.unit or unit,
        suggested_dilution=None,
    )


def _standard_additions(
    analyte: str, rows: Sequence[Reading], blank_signal: float | None
) -> dict[str, AdditionSeries]:
    grouped: dict[str, list[Reading]] = {}
    for reading in rows:
        if reading.kind is Kind.ADDITION:
            grouped.setdefault(reading.parent or "", []).append(reading)
    series = {}
    for parent, points in grouped.items():
        added = tuple(r.added or 0.0 for r in points)
        signals = tuple(_corrected(r, blank_signal) for r in points)
        outcome = None
        problem = None
        try:
            outcome = standard_addition(added, signals)
        except (ValueError, ArithmeticError) as error:  # degenerate numbers: no fit, said why
            problem = str(error)
        series[parent] = AdditionSeries(
            analyte=analyte,
            parent=parent,
            seqs=tuple(r.seq for r in points),
            added=added,
            signals=signals,
            dilution=points[0].dilution,
            outcome=outcome,
            problem=problem,
        )
    return series


def _addition_result(series: AdditionSeries, unit: str | None) -> Result:
    outcome = series.outcome
    measured = outcome.concentration if outcome else None
    deviation = outcome.std_dev if outcome else None
    return Result(
        sample_id=series.parent,
        seq=series.seqs[0],
        kind=Kind.ADDITION,
        analyte=series.analyte,
        line=None,
        signal=None,
        measured=measured,
        concentration=measured * series.dilution if measured is not None else None,
        uncertainty=deviation * series.dilution if deviation is not None else None,
        dilution=series.dilution,
        unit=unit,
    )
