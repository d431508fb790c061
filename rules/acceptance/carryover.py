"""Carry-over after a high result (issue 15, item 7)."""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.acceptance.common import (
    below_the_curve,
    blank_limit,
    number,
    reading_finding,
    result_of,
)
from calwarden.rules.acceptance.reporting import has_reporting_limits, reporting_limit
from calwarden.rules.model import Kind, Reading
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity

#: Injections carry-over would bias: the samples and what is made of them, and method blanks.
_EXPOSED_KINDS = frozenset({Kind.SAMPLE, Kind.DUP, Kind.MS, Kind.MSD, Kind.MB})
#: A blank injected to wash the system out (an instrument or calibration blank).
_WASH_KINDS = frozenset({Kind.CCB, Kind.BLANK})


def _high(context: AnalyteContext) -> float | None:
    """Above this, in the measured solution, a result may carry over (None: no curve)."""
    calibration = context.calibration
    top = calibration.range_high if calibration is not None else None
    return context.criteria.carryover_high or top


def _is_high(context: AnalyteContext, reading: Reading, high: float) -> float | None:
    """The reading's measured concentration when it is above ``high`` (inf: above the curve)."""
    result = result_of(context, reading)
    if result is None:
        return None
    if result.measured is not None:
        return result.measured if result.measured > high else None
    calibration = context.calibration
    if result.signal is None or calibration is None or calibration.fit is None:
        return None
    return None if below_the_curve(calibration, result.signal) else float("inf")


def _high_pairs(context: AnalyteContext) -> Iterator[tuple[Reading, float, Reading | None]]:
    """Each high reading, its measured level, and the injection right after it (or None)."""
    high = _high(context)
    if high is None:
        return
    readings = [r for r in context.readings if r.kind is not Kind.ADDITION]
    for index, reading in enumerate(readings):
        if reading.kind in (Kind.CAL, Kind.BLANK):
            continue
        level = _is_high(context, reading, high)
        if level is not None:
            following = readings[index + 1] if index + 1 < len(readings) else None
            yield reading, level, following


def _level(level: float) -> str:
    return "above the curve" if level == float("inf") else f"at {number(level)}"


@rule("carryover.next_injection", "The injection after a high result shows no carry-over")
def carryover_next_injection(context: AnalyteContext) -> Iterator[Finding]:
    """The injection right after one above the top standard is re-run when it reads above the RL.

    Why: a result above the calibrated range leaves analyte in the sample path,
    and the next injection reads part of it; a positive result right after a
    high one cannot be told from carry-over and is re-analysed (common practice,
    as the organics methods ask for a sample after a high one, e.g. SW-846 8260D
    [memory]). "High" is above ``carryover_high`` (default: the top standard), in
    the measured solution; the next injection is the analyte's next by ``seq``,
    judged when it is a sample, duplicate, spike or method blank; "above the RL"
    needs a reporting limit (``reporting_limit`` setting or column): without
    one, nothing is said. A blank between them is a wash: nothing to judge.
    With ``carryover_wash_blank`` on, ``carryover.wash_blank`` judges instead.
    Settings: ``carryover_high`` (the top standard), ``reporting_limit``.

    Fails: S-1 at 60 µg/L (top standard 50), then S-2 at 5 µg/L with an RL of 2:
    S-2 flagged ``carryover``. Passes: S-2 at 0.6 µg/L (< RL).
    """
    if context.criteria.carryover_wash_blank or not has_reporting_limits(context):
        return
    for high, level, following in _high_pairs(context):
        if following is None or following.kind not in _EXPOSED_KINDS:
            continue
        limit = reporting_limit(context, following)
        result = result_of(context, following)
        if limit is None or result is None:
            continue
        reported = result.concentration
        if reported is None:
            # no number: above the curve is above any limit, below it is not
            if _is_high(context, following, _high(context) or 0.0) is None:
                continue
        elif reported <= limit:
            continue
        shown = "above the curve" if reported is None else f"at {number(reported)}"
        yield reading_finding(
            "carryover.next_injection",
            Severity.FAIL,
            context,
            following,
            f"{following.sample_id} {context.analyte} {shown}{context.unit} (reporting limit "
            f"{number(limit)}) right after {high.sample_id} {_level(level)}{context.unit}, above "
            "the top standard: carry-over suspected, re-run it after a blank",
            value=reported,
            limit=(None, limit),
            flag=Flag.CARRYOVER,
        )


@rule("carryover.wash_blank", "A clean blank follows every result above the top standard")
def carryover_wash_blank(context: AnalyteContext) -> Iterator[Finding]:
    """With ``carryover_wash_blank`` on, a blank must follow each high result and read clean.

    Why: a lab that washes after a high sample shows the wash worked with the
    blank it injects next (common practice; SW-846 8000D: a blank after a
    high-concentration sample to show no carry-over [memory]). The blank is a
    ``ccb`` (or ``blank``) right after the high injection; it must read below the
    reporting limit (or, without one, the blank limit of ``blank.contamination``).
    A sample right after a high one with no blank between, or the first sample
    after a blank that is not clean, is flagged ``carryover`` and re-run. A
    failing blank with no sample after it warns. Off by default. Settings:
    ``carryover_wash_blank`` (false), ``carryover_high`` (the top standard),
    ``reporting_limit``.

    Fails: S-1 at 60 µg/L (top 50) and S-2 right after it with no blank between.
    Passes: S-1, then CCB-W at 0.1 µg/L, then S-2.
    """
    if not context.criteria.carryover_wash_blank:
        return
    readings = [r for r in context.readings if r.kind is not Kind.ADDITION]
    position = {r.seq: i for i, r in enumerate(readings)}
    for high, level, following in _high_pairs(context):
        if following is None:
            continue
        what = f"{high.sample_id} {_level(level)}{context.unit}, above the top standard"
        if following.kind in _EXPOSED_KINDS:
            yield reading_finding(
                "carryover.wash_blank",
                Severity.FAIL,
                context,
                following,
                f"{following.sample_id} {context.analyte} follows {what}, with no wash blank "
                "between: re-run it after a blank",
                flag=Flag.CARRYOVER,
            )
            continue
        if following.kind not in _WASH_KINDS:
            continue  # a check standard next: its own recovery shows what it shows
        limit = reporting_limit(context, following) or blank_limit(context)
        result = result_of(context, following)
        if limit is None or result is None or result.measured is None:
            continue
        if abs(result.measured) < limit:
            continue
        later = [r for r in readings[position[following.seq] + 1 :] if r.kind in _EXPOSED_KINDS][:1]
        message = (
            f"wash blank {following.sample_id} {context.analyte} at {number(result.measured)}"
            f"{context.unit} after {what} (limit below {number(limit)}{context.unit})"
        )
        if not later:
            yield Finding(
                "carryover.wash_blank",
                Severity.WARN,
                f"{message}: no sample after it",
                analyte=context.analyte,
                sample_id=following.sample_id,
                seq=following.seq,
                value=result.measured,
                limit=(None, limit),
            )
            continue
        yield Finding(
            "carryover.wash_blank",
            Severity.FAIL,
            f"{message}: carry-over suspected, re-run {later[0].sample_id} after a clean blank",
            analyte=context.analyte,
            sample_id=later[0].sample_id,
            seq=later[0].seq,
            value=result.measured,
            limit=(None, limit),
            flag=Flag.CARRYOVER,
            affected=(later[0].seq,),
            causes=(following.seq,),
        )
