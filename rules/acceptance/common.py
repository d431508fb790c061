"""Small helpers the rules share: recoveries, limits in words, number formatting."""

from __future__ import annotations

import math
from collections.abc import Iterator
from decimal import ROUND_HALF_UP, Decimal

from calwarden.rules.criteria import Range
from calwarden.rules.model import CHECK_KINDS, FIELD_KINDS, REPORTABLE_KINDS, Kind, Reading
from calwarden.rules.rule import AnalyteContext
from calwarden.rules.verdict import Calibration, Finding, Flag, Limit, Result, Severity


def number(value: float) -> str:
    """A number as a person reads it: four significant digits, no exponent for usual sizes."""
    if value == 0:
        return "0"
    if 1e-3 <= abs(value) < 1e6:
        return f"{value:.4g}"
    return f"{value:.3e}"


def span(limits: Range, suffix: str = " %") -> str:
    """``90–110 %``."""
    return f"{number(limits[0])}–{number(limits[1])}{suffix}"


def within(value: float, limits: Range) -> bool:
    return limits[0] <= value <= limits[1]


def recovery_pct(found: float | None, expected: float | None) -> float | None:
    """Found over expected in percent; ``None`` when either is missing or expected is zero."""
    if found is None or expected is None or expected == 0:
        return None
    return 100.0 * found / expected


def rpd_pct(first: float, second: float) -> float | None:
    """|a − b| over the mean of a and b, in percent; None when that mean is 0."""
    mean = (first + second) / 2
    return None if mean == 0 else 100.0 * abs(first - second) / abs(mean)


def check_recovery(context: AnalyteContext, reading: Reading) -> float | None:
    """Recovery of an ICV, CCV or low-level CCV, in percent (``None``: not quantifiable).

    Rounded to ``compare_rounded_digits`` significant digits when that is set.
    """
    result = context.results.get(reading.seq)
    recovery = recovery_pct(result.concentration if result else None, reading.nominal)
    return rounded_for_limits(context, recovery)


def check_limits(context: AnalyteContext, kind: Kind) -> Range:
    criteria = context.criteria
    return criteria.icv_recovery_pct if kind is Kind.ICV else criteria.ccv_recovery_pct


def check_passes(context: AnalyteContext, reading: Reading) -> bool:
    """Whether a check standard recovered within its limits (the bracketing rules ask too)."""
    recovery = check_recovery(context, reading)
    return recovery is not None and within(recovery, check_limits(context, reading.kind))


def istd_recovery_pct(context: AnalyteContext, reading: Reading) -> float | None:
    """The reading's internal-standard response over the standards' mean, in percent."""
    calibration = context.calibration
    if calibration is None or not calibration.istd_reference or reading.istd_response is None:
        return None
    return 100.0 * reading.istd_response / calibration.istd_reference


def istd_fails(context: AnalyteContext, reading: Reading) -> bool:
    """Whether ``istd.recovery`` fails the reading: internal standard out, or the wrong basis."""
    calibration = context.calibration
    if calibration is None:
        return False
    if not calibration.same_basis(reading):
        return True
    recovery = istd_recovery_pct(context, reading)
    return recovery is not None and not within(recovery, context.criteria.istd_recovery_pct)


def blank_limit(context: AnalyteContext) -> float | None:
    """The blank limit: ``blank_limit``, else the lowest non-zero standard (None: no curve)."""
    calibration = context.calibration
    return context.criteria.blank_limit or (calibration.range_low if calibration else None)


def blank_fails(context: AnalyteContext, reading: Reading) -> bool | None:
    """Whether a blank reads, in absolute value, at or above the blank limit; None: not judged."""
    limit = blank_limit(context)
    result = context.results.get(reading.seq)
    if limit is None or result is None or result.measured is None:
        return None
    return abs(result.measured) >= limit


def same_batch(qc: Reading, sample: Reading) -> bool:
    """Whether a batch QC sample (LCS, method blank) speaks for ``sample``.

    Without a batch on either side the QC sample speaks for the whole run: a
    sample whose batch is not known is counted in every batch (the cautious reading).
    """
    return qc.batch is None or sample.batch is None or qc.batch == sample.batch


def result_of(context: AnalyteContext, reading: Reading) -> Result | None:
    return context.results.get(reading.seq)


def reading_finding(
    rule_id: str,
    severity: Severity,
    context: AnalyteContext,
    reading: Reading,
    message: str,
    *,
    value: float | None = None,
    limit: Limit | None = None,
    flag: Flag | None = None,
) -> Finding:
    """A finding about one reading of the context's analyte; ``flag`` goes on its result."""
    return Finding(
        rule_id,
        severity,
        message,
        analyte=context.analyte,
        sample_id=reading.sample_id,
        seq=reading.seq,
        value=value,
        limit=limit,
        flag=flag,
        affected=(reading.seq,),
    )


def recovery_finding(
    rule_id: str,
    context: AnalyteContext,
    reading: Reading,
    recovery: float | None,
    limits: Range,
    detail: str = "",
    missing: str = "cannot be quantitated",
) -> Finding | None:
    """The failing finding of a QC sample whose recovery is missing or outside ``limits``."""
    if recovery is not None and within(recovery, limits):
        return None
    found = missing if recovery is None else f"recovered {recovery:.1f} %"
    return reading_finding(
        rule_id,
        Severity.FAIL,
        context,
        reading,
        f"{reading.sample_id} {context.analyte} {found}{detail}, limit {span(limits)}",
        value=recovery,
        limit=limits,
        flag=Flag.QC_FAILED,
    )


def quantitated_field_results(context: AnalyteContext) -> Iterator[tuple[Reading, float]]:
    """Each field result read off the curve, with its concentration in the measured solution."""
    for reading in context.readings:
        if reading.kind not in REPORTABLE_KINDS:
            continue
        result = context.results.get(reading.seq)
        if result is not None and result.measured is not None:
            yield reading, result.measured


def below_the_curve(calibration: Calibration, signal: float) -> bool:
    """Whether a response no concentration gives lies on the low side of the calibrated range.

    A quadratic has no concentration for responses beyond its turning point: past
    the top when it bends over (over range), under the bottom when it curves
    upwards (below range). Which side is told by the response at the lowest standard.
    """
    fit = calibration.fit
    if fit is None:
        return False
    low = calibration.range_low if calibration.range_low is not None else fit.x_low
    high = calibration.range_high if calibration.range_high is not None else fit.x_high
    at_low = fit.predict(low)
    rising = fit.predict(high) >= at_low
    return signal < at_low if rising else signal > at_low


def off_curve_results(context: AnalyteContext) -> Iterator[tuple[Reading, Result, bool]]:
    """Results no concentration on the curve gives, with whether they lie below the range.

    Check standards (check.recovery), addition series (addition.fit) and readings
    on another basis than the curve (istd.recovery) are left to their own rules.
    """
    calibration = context.calibration
    if calibration is None or calibration.fit is None:
        return
    for reading in context.readings:
        result = context.results.get(reading.seq)
        if result is None or result.measured is not None or result.signal is None:
            continue
        if reading.kind in _OWN_RULE_KINDS or not calibration.same_basis(reading):
            continue
        yield reading, result, below_the_curve(calibration, result.signal)


_OWN_RULE_KINDS = frozenset({Kind.ICV, Kind.CCV, Kind.ADDITION})


# --------------------------------------------------------------------------- issue 15, item 10


def rounded_for_limits(context: AnalyteContext, value: float | None) -> float | None:
    """``value`` rounded to ``compare_rounded_digits`` significant digits (None: as it is).

    Half away from zero on the decimal digits shown (ASTM E29's rounding method
    [memory]), so 89.95 % to three digits is 90.0 %, whatever its binary form.
    """
    digits = context.criteria.compare_rounded_digits
    if digits is None or value is None or value == 0 or not math.isfinite(value):
        return value
    exact = Decimal(repr(value))
    exponent = exact.adjusted() - digits + 1
    return float(exact.quantize(Decimal(1).scaleb(exponent), rounding=ROUND_HALF_UP))


def superseded_checks(context: AnalyteContext) -> dict[int, tuple[Reading, ...]]:
    """Failing CCVs that the re-run policy lets immediate passing re-runs stand for, by seq.

    ``ccv_rerun_policy``: ``single``, one CCV right after the failing one (no field
    sample between) that passes; ``two_passing``, two such CCVs in a row that both
    pass. A CCV that is itself within the re-runs of an earlier failing one is never
    superseded: one failure, one chance (no testing into compliance).
    """
    policy = context.criteria.ccv_rerun_policy
    if policy == "none":
        return {}
    needed = 1 if policy == "single" else 2
    checks = [r for r in context.readings if r.kind in CHECK_KINDS]
    field = [r.seq for r in context.readings if r.kind in FIELD_KINDS]

    def immediate(first: Reading, last: Reading) -> bool:
        return not any(first.seq < seq < last.seq for seq in field)

    passes = {r.seq: check_passes(context, r) for r in checks}
    found: dict[int, tuple[Reading, ...]] = {}
    for index, check in enumerate(checks):
        if check.kind is not Kind.CCV or passes[check.seq]:
            continue
        before = checks[max(0, index - needed) : index]
        if any(r.kind is Kind.CCV and not passes[r.seq] and immediate(r, check) for r in before):
            continue  # a re-run of an earlier failure
        reruns = tuple(checks[index + 1 : index + 1 + needed])
        if (
            len(reruns) == needed
            and all(r.kind is Kind.CCV and passes[r.seq] for r in reruns)
            and immediate(check, reruns[-1])
        ):
            found[check.seq] = reruns
    return found


def not_judged(rule_id: str, context: AnalyteContext, reading: Reading, why: str) -> Finding:
    """An info finding: this reading could not be judged by the rule, and why."""
    return reading_finding(
        rule_id,
        Severity.INFO,
        context,
        reading,
        f"{reading.sample_id} {context.analyte} not judged: {why}",
        flag=Flag.NOT_JUDGED,
    )
