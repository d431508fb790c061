"""Reporting limits and data qualifiers, the low-level check at the reporting limit, and
duplicates near it (issue 15, items 1, 2 and 9).

A reporting limit (RL) is given in the measured solution, before dilution: the
``reporting_limit`` setting per analyte, or a row's own ``reporting_limit``
column, which wins. A result's limit is that times its dilution, so a sample
diluted 10× with an RL of 1 µg/L reports "< 10 µg/L" (common practice: the
reporting limit is adjusted by the dilution factor [memory]).

The data qualifiers are the letters of the US EPA Contract Laboratory Program
(CLP): the laboratory's qualifiers of the CLP Statement of Work for Organic
Superfund Methods (SOM02.4, Exhibit B, "data qualifiers") with their meaning as
the CLP National Functional Guidelines for Organic and for Inorganic Superfund
Methods Data Review (EPA-540-R-2017-002 and -001, "Data Qualifier Definitions")
give it [memory]:

- ``U``: the analyte was analysed for but not detected above the reported
  reporting limit (calwarden: the result is below the RL and, when a
  ``detection_limit`` is set, below it too);
- ``J``: the result is an estimated quantity (calwarden: at or above the
  detection limit but below the RL, the SOW's "between the MDL and the CRQL");
- ``B``: the analyte was also found in an associated method blank (calwarden: a
  method blank of the same batch reads at or above its detection limit, or its
  RL when no detection limit is set); not given to a ``U`` result;
- ``E``: the result exceeds the calibration range (calwarden: flagged
  ``over_range``, above the top standard).

``qualifier_letters`` maps them to the lab's own (``{B: V}``). They are given to
samples, duplicates, spikes, LCS and method blanks (``B`` not to a blank itself).
Without a reporting limit only ``E`` is given.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, replace

from calwarden.rules.acceptance.common import (
    below_the_curve,
    check_recovery,
    number,
    reading_finding,
    result_of,
    same_batch,
    span,
    within,
)
from calwarden.rules.model import FIELD_KINDS, Kind, Reading
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Result, Severity

#: The kinds whose results get a reporting limit and data qualifiers.
_QUALIFIED_KINDS = FIELD_KINDS
#: The kinds a contaminated method blank speaks for ("B").
_BATCH_SAMPLE_KINDS = frozenset({Kind.SAMPLE, Kind.DUP, Kind.MS, Kind.MSD})


def reporting_limit(context: AnalyteContext, reading: Reading) -> float | None:
    """The reading's reporting limit times its dilution (``None``: no reporting limit)."""
    base = reading.reporting_limit or context.criteria.reporting_limit
    return None if base is None else base * reading.dilution


def has_reporting_limits(context: AnalyteContext) -> bool:
    """Whether any reading of the analyte has a reporting limit (a cheap test rules start with)."""
    return context.criteria.reporting_limit is not None or any(
        r.reporting_limit is not None for r in context.readings
    )


def _detection_limit(context: AnalyteContext, reading: Reading) -> float | None:
    base = context.criteria.detection_limit
    return None if base is None else base * reading.dilution


def _below(context: AnalyteContext, result: Result, limit: float) -> bool:
    """Whether a result lies below ``limit`` (a response under the curve's bottom does)."""
    if result.concentration is not None:
        return result.concentration < limit
    calibration = context.calibration
    return (
        result.signal is not None
        and calibration is not None
        and calibration.fit is not None
        and result.measured is None
        and below_the_curve(calibration, result.signal)
    )


def _names(readings: Sequence[Reading]) -> str:
    shown = ", ".join(r.sample_id for r in readings[:8])
    return shown + (f" and {len(readings) - 8} more" if len(readings) > 8 else "")


def qualified(context: AnalyteContext, results: Sequence[Result]) -> list[Result]:
    """The results with their reporting limits and data qualifiers (module docstring).

    Runs after every rule, on the flagged results: ``E`` follows ``over_range``.
    """
    letters = context.criteria.qualifier_letters
    if not has_reporting_limits(context):
        # Fast path, the usual case: only "E" can be given.
        over = letters.get("E", "E")
        return [
            replace(result, qualifiers=(over,))
            if result.kind in _QUALIFIED_KINDS and Flag.OVER_RANGE in result.flags
            else result
            for result in results
        ]
    readings = {r.seq: r for r in context.readings}
    blanks = _detected_blanks(context)
    qualified_results = []
    for result in results:
        reading = readings.get(result.seq) if result.seq is not None else None
        if reading is None or reading.kind not in _QUALIFIED_KINDS:
            qualified_results.append(result)
            continue
        limit = reporting_limit(context, reading)
        below = limit is not None and _below(context, result, limit)
        found: list[str] = []
        if below:
            detection = _detection_limit(context, reading)
            detected = detection is not None and not _below(context, result, detection)
            found.append("J" if detected else "U")
        if (
            not below
            and reading.kind in _BATCH_SAMPLE_KINDS
            and any(same_batch(blank, reading) for blank in blanks)
        ):
            found.append("B")
        if Flag.OVER_RANGE in result.flags:
            found.append("E")
        if limit is None and not found:
            qualified_results.append(result)  # the usual case without limits: nothing to add
            continue
        qualified_results.append(
            replace(
                result,
                reporting_limit=limit,
                below_reporting_limit=below,
                qualifiers=tuple(letters.get(q, q) for q in found),
            )
        )
    return qualified_results


def _detected_blanks(context: AnalyteContext) -> list[Reading]:
    """The method blanks that read at or above their detection limit (or their RL)."""
    found = []
    for blank in context.of_kind(Kind.MB):
        result = result_of(context, blank)
        threshold = _detection_limit(context, blank) or reporting_limit(context, blank)
        if result is None or result.concentration is None or threshold is None:
            continue
        if result.concentration >= threshold:
            found.append(blank)
    return found


@rule("reporting.limit", "Results below the reporting limit are reported as less than it")
def reporting_limit_rule(context: AnalyteContext) -> Iterator[Finding]:
    """Results below the reporting limit (times their dilution) are reported as "< RL".

    Why: a concentration below the lowest level the lab can quantify with
    confidence is reported as "less than" that level, adjusted by the dilution,
    not as a number (US EPA CLP National Functional Guidelines, qualifier
    ``U``; SW-846 Chapter One: the reporting limit [memory]). A reporting limit
    below the lowest calibration standard is not supported by the calibration
    (6010D / 6020B: the lowest standard at or below the reporting limit
    [memory]; TNI 2016 V1M4 1.7.1.1): a warning. The results below it are
    listed (for the record) and each carries its adjusted limit.

    Data qualifiers, with the letters and meaning of the US EPA Contract
    Laboratory Program (the laboratory qualifiers of the CLP Statement of Work
    for Organic Superfund Methods, SOM02.4 Exhibit B, as the CLP National
    Functional Guidelines for Organic and Inorganic Superfund Methods Data
    Review, EPA-540-R-2017-002 and -001, define them [memory]), on samples,
    duplicates, spikes, LCS and method blanks: ``U`` not detected (below the RL,
    and below ``detection_limit`` when set); ``J`` estimated (at or above the
    detection limit, below the RL); ``B`` also found in a method blank of its
    batch (at or above the blank's detection limit, or its RL; not on a ``U``);
    ``E`` over the calibration range (``over_range``), given with or without a
    reporting limit. ``qualifier_letters`` maps them to the lab's own. Settings:
    ``reporting_limit`` (none), a ``reporting_limit`` column, ``detection_limit``
    (none), ``qualifier_letters`` ({}).

    Warns: a reporting limit of 0.5 µg/L with a lowest standard of 1 µg/L.
    Passes: a reporting limit of 2 µg/L and every result above it; with S-1 at
    0.6 µg/L it is listed as "< 2" (info).
    """
    calibration = context.calibration
    given = [r.reporting_limit for r in context.readings if r.reporting_limit is not None]
    if context.criteria.reporting_limit is not None:
        given.append(context.criteria.reporting_limit)
    if not given:
        return
    lowest = min(given)
    low = calibration.range_low if calibration is not None else None
    if low is not None and lowest < low:
        yield Finding(
            "reporting.limit",
            Severity.WARN,
            f"{context.analyte} reporting limit {number(lowest)}{context.unit} is below the "
            f"lowest standard ({number(low)}{context.unit}): the calibration does not support it",
            analyte=context.analyte,
            value=lowest,
            limit=(low, None),
        )
    below: list[tuple[Reading, float]] = []
    for reading in context.readings:
        if reading.kind not in _QUALIFIED_KINDS:
            continue
        limit = reporting_limit(context, reading)
        result = result_of(context, reading)
        if limit is not None and result is not None and _below(context, result, limit):
            below.append((reading, limit))
    if below:
        shown = ", ".join(
            f"{r.sample_id} < {number(limit)}{context.unit}" for r, limit in below[:8]
        )
        more = f" and {len(below) - 8} more" if len(below) > 8 else ""
        yield Finding(
            "reporting.limit",
            Severity.INFO,
            f"{len(below)} {context.analyte} result(s) below the reporting limit, reported as "
            f"less than it: {shown}{more}",
            analyte=context.analyte,
            sample_id=below[0][0].sample_id,
            seq=below[0][0].seq,
            affected=tuple(r.seq for r, _ in below),
        )


# --------------------------------------------------------------------------- low-level check

#: The results a failing low-level check concerns, when they are low enough.
_LOW_COVERED_KINDS = frozenset({Kind.SAMPLE, Kind.DUP, Kind.MS, Kind.MSD, Kind.MB})


@dataclass(frozen=True, slots=True)
class _LowSpan:
    """Consecutive failing low-level checks and the low results around them."""

    failing: tuple[Reading, ...]
    covered: tuple[Reading, ...]
    reach: float  # results below this, in the measured solution, are covered


def _low_check_passes(context: AnalyteContext, reading: Reading) -> bool:
    recovery = check_recovery(context, reading)
    return recovery is not None and within(recovery, context.criteria.low_check_recovery_pct)


def _low_spans(context: AnalyteContext) -> list[_LowSpan]:
    """Each run of failing low-level checks with the low results up to the passing ones.

    As ``bracket.blank`` does: from the last passing low-level check before (or the
    run's start) to the next passing one after (or the run's end).
    """
    checks = [(r, _low_check_passes(context, r)) for r in context.of_kind(Kind.LLCCV)]
    field = [r for r in context.readings if r.kind in _LOW_COVERED_KINDS]
    spans = []
    index = 0
    while index < len(checks):
        if checks[index][1]:
            index += 1
            continue
        end = index
        while end + 1 < len(checks) and not checks[end + 1][1]:
            end += 1
        failing = tuple(r for r, _ in checks[index : end + 1])
        start = checks[index - 1][0].seq if index > 0 else None
        stop = checks[end + 1][0].seq if end + 1 < len(checks) else None
        reach = context.criteria.low_check_covers_multiple * max(r.nominal or 0.0 for r in failing)
        covered = tuple(
            r
            for r in field
            if (start is None or r.seq > start)
            and (stop is None or r.seq < stop)
            and _is_low(context, r, reach)
        )
        spans.append(_LowSpan(failing, covered, reach))
        index = end + 1
    return spans


def _is_low(context: AnalyteContext, reading: Reading, reach: float) -> bool:
    result = result_of(context, reading)
    if result is None:
        return False
    if result.measured is not None:
        return result.measured < reach
    calibration = context.calibration
    return (
        result.signal is not None
        and calibration is not None
        and below_the_curve(calibration, result.signal)
    )


@rule("check.low_level", "Low-level checks at the reporting limit recover within their window")
def check_low_level(context: AnalyteContext) -> Iterator[Finding]:
    """Each low-level calibration verification (kind ``llccv``) recovers its nominal value.

    Why: a CCV at mid-range shows the slope holds, not the low end, where the
    intercept and the blank decide; a check at or near the reporting limit shows
    the curve still reads low results right (US EPA 6010D / 6020B: the low-level
    CCV, LLCCV, at the lower limit of quantitation, within ±30 % [memory]).
    A failure concerns the low results around it (``bracket.low_level``): it fails
    when there are any, and warns when none is low enough. Settings:
    ``low_check_recovery_pct`` (70–130), ``low_check_covers_multiple`` (2).

    Fails: LLCCV-2 Zn at 2 µg/L recovered 62 % with S-3 at 1.5 µg/L after it.
    Passes: LLCCV-2 recovered 88 %.
    """
    limits = context.criteria.low_check_recovery_pct
    covered = {r.seq: bool(s.covered) for s in _low_spans(context) for r in s.failing}
    for reading in context.of_kind(Kind.LLCCV):
        if reading.seq not in covered:
            continue
        recovery = check_recovery(context, reading)
        found = "cannot be quantitated" if recovery is None else f"recovered {recovery:.1f} %"
        severity = Severity.FAIL if covered[reading.seq] else Severity.WARN
        after = "" if covered[reading.seq] else " (no result low enough for it to concern)"
        yield reading_finding(
            "check.low_level",
            severity,
            context,
            reading,
            f"{reading.sample_id} {context.analyte} at {number(reading.nominal or 0.0)}"
            f"{context.unit} {found}, limit {span(limits)}{after}",
            value=recovery,
            limit=limits,
            flag=Flag.QC_FAILED,
        )


@rule("bracket.low_level", "Low results next to a failing low-level check are not reportable")
def bracket_low_level(context: AnalyteContext) -> Iterator[Finding]:
    """A failing low-level check makes the low results around it unreportable.

    Why: the low-level check speaks for results near the reporting limit; when it
    fails, those since the last passing low-level check, up to the next one, may be
    biased and are re-run (6010D / 6020B [memory]); results well above it are the
    mid-range CCV's. "Low" is below ``low_check_covers_multiple`` (2, our choice)
    times the check's nominal, in the measured solution; samples, duplicates,
    spikes and method blanks are flagged ``low_check_failed``. No other settings:
    it follows ``check.low_level``'s limits.

    Fails: LLCCV-2 at 2 µg/L recovered 62 %: S-3 at 1.5 µg/L is flagged, S-4 at
    30 µg/L is not. Passes: LLCCV-2 recovered 88 %.
    """
    for low_span in _low_spans(context):
        if not low_span.covered:
            continue
        names = " and ".join(r.sample_id for r in low_span.failing)
        covered = list(low_span.covered)
        yield Finding(
            "bracket.low_level",
            Severity.FAIL,
            f"{len(covered)} low {context.analyte} result(s) (below {number(low_span.reach)}"
            f"{context.unit}) not reportable because {names} failed: re-run {_names(covered)}",
            analyte=context.analyte,
            sample_id=covered[0].sample_id,
            seq=covered[0].seq,
            flag=Flag.LOW_CHECK_FAILED,
            affected=tuple(r.seq for r in covered),
            causes=tuple(r.seq for r in low_span.failing),
        )


# --------------------------------------------------------------------------- duplicates near the RL

#: Kinds a duplicate may be made from (as ``duplicate.rpd`` reads them).
_PARENT_KINDS = frozenset({Kind.SAMPLE, Kind.LCS, Kind.MB})


def _parent(context: AnalyteContext, duplicate: Reading) -> Reading | None:
    """The parent's reading: the nearest one acquired before the duplicate, else the first."""
    candidates = [
        r for r in context.readings if r.kind in _PARENT_KINDS and r.sample_id == duplicate.parent
    ]
    earlier = [r for r in candidates if r.seq < duplicate.seq]
    return earlier[-1] if earlier else (candidates[0] if candidates else None)


@rule("duplicate.near_limit", "Duplicates near the reporting limit differ by at most the limit")
def duplicate_near_limit(context: AnalyteContext) -> Iterator[Finding]:
    """Below 5× the reporting limit, a duplicate and its parent differ by at most the limit.

    Why: near the reporting limit an RPD is large by nature (a 1 against a 2 is
    67 %), so the agreement is judged on the absolute difference instead, within
    the reporting limit (common practice, the "± RL" control limit of US EPA
    inorganic data review when either result is below 5× the quantitation limit
    [memory]). Judged only with a reporting limit (the parent's, dilution
    applied), when either result is below ``duplicate_min_multiple`` (5) times it;
    above, ``duplicate.rpd`` judges the RPD. Settings: ``reporting_limit``,
    ``duplicate_min_multiple`` (5), ``duplicate_max_difference_rl`` (1: the
    difference at most one reporting limit).

    Fails: RL 2 µg/L, S-1 at 3.0 and S-1-D at 5.6 µg/L (difference 2.6). Passes:
    S-1 at 3.0 and S-1-D at 4.1 µg/L (difference 1.1, RPD 31 %).
    """
    criteria = context.criteria
    if not has_reporting_limits(context):
        return
    for reading in context.of_kind(Kind.DUP):
        parent = _parent(context, reading)
        if parent is None:
            continue  # duplicate.rpd says the parent is missing
        limit = reporting_limit(context, parent)
        first, second = result_of(context, reading), result_of(context, parent)
        if limit is None or first is None or second is None:
            continue
        if first.concentration is None or second.concentration is None:
            continue  # duplicate.rpd says it cannot be judged
        if (
            min(first.concentration, second.concentration)
            >= criteria.duplicate_min_multiple * limit
        ):
            continue  # duplicate.rpd's
        difference = abs(first.concentration - second.concentration)
        allowed = criteria.duplicate_max_difference_rl * limit
        if difference <= allowed:
            continue
        yield reading_finding(
            "duplicate.near_limit",
            Severity.FAIL,
            context,
            reading,
            f"{reading.sample_id} {context.analyte} {number(first.concentration)} against "
            f"{parent.sample_id} {number(second.concentration)}{context.unit}: difference "
            f"{number(difference)}, limit ≤ {number(allowed)}{context.unit} (below "
            f"{number(criteria.duplicate_min_multiple)}× the reporting limit {number(limit)})",
            value=difference,
            limit=(None, allowed),
            flag=Flag.QC_FAILED,
        )
