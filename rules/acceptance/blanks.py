"""Rules on continuing calibration blanks and method blanks."""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.acceptance.common import (
    below_the_curve,
    blank_fails,
    blank_limit,
    number,
    reading_finding,
    result_of,
    same_batch,
)
from calwarden.rules.model import Kind, Reading
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity


@rule("blank.contamination", "Calibration and method blanks stay below the lowest standard")
def blank_contamination(context: AnalyteContext) -> Iterator[Finding]:
    """Each CCB and method blank reads, in absolute value, below the blank limit.

    Why: a blank above the lowest calibration level means carry-over or
    contamination that would bias every low result (US EPA 6010D / 6020B:
    ICB/CCB below the LLOQ [memory]). A strongly negative blank is as wrong as
    a positive one, hence the absolute value. Settings: ``blank_limit``
    (default: the lowest non-zero standard), compared with the concentration
    in the measured solution. What a failing blank means for the samples is
    ``bracket.blank``'s (ICB/CCB) and ``blank.method_multiple``'s (method blank).

    Fails: CCB-3 Zn at 1.42 µg/L with a lowest standard of 0.5 µg/L.
    Passes: CCB-3 Zn at 0.03 µg/L.
    """
    limit = blank_limit(context)
    if limit is None:
        return
    for reading in context.of_kind(Kind.CCB, Kind.MB):
        result = result_of(context, reading)
        # None: not quantifiable, and calibration.present or range.on_curve says so
        if result is not None and result.measured is not None and blank_fails(context, reading):
            yield reading_finding(
                "blank.contamination",
                Severity.FAIL,
                context,
                reading,
                f"{reading.sample_id} {context.analyte} at {number(result.measured)}"
                f"{context.unit}, limit below {number(limit)}{context.unit}",
                value=result.measured,
                limit=(-limit, limit),
                flag=Flag.QC_FAILED,
            )


#: The kinds whose result a method blank's contamination would bias: the batch's samples.
_BATCH_SAMPLE_KINDS = frozenset({Kind.SAMPLE, Kind.DUP, Kind.MS, Kind.MSD})


def _names(readings: list[Reading]) -> str:
    shown = ", ".join(r.sample_id for r in readings[:8])
    return shown + (f" and {len(readings) - 8} more" if len(readings) > 8 else "")


@rule(
    "blank.method_multiple",
    "Samples below a multiple of a contaminated method blank are not reportable",
)
def blank_method_multiple(context: AnalyteContext) -> Iterator[Finding]:
    """A method blank above the blank limit makes its batch's low results unreportable.

    Why: the method blank went through the whole preparation, so what it reads
    is in every sample of its batch too. A sample at least ten times the blank
    is hardly biased by it and may be reported; one below must be prepared and
    measured again (common practice: the "10× rule" of US EPA data review, SW-846
    Chapter One and the CLP National Functional Guidelines [memory]). Judged on
    reported concentrations (dilution applied: contamination of the digest is
    diluted with it), for samples, duplicates and spikes of the blank's batch
    (the ``batch`` column; without it, the whole run). Only a positive blank
    contaminates; a strongly negative one is ``blank.contamination``'s alone.
    Settings: ``method_blank_multiple`` (10), the limit of ``blank.contamination``.

    Fails: MB-1 Zn at 2.0 µg/L (limit 1) and S-1 at 12 µg/L, below 10 × 2.0: S-1
    is flagged. Passes: S-1 at 31 µg/L, or MB-1 at 0.2 µg/L.
    """
    limit = blank_limit(context)
    calibration = context.calibration
    if limit is None or calibration is None:
        return
    multiple = context.criteria.method_blank_multiple
    for blank in context.of_kind(Kind.MB):
        blank_result = result_of(context, blank)
        if (
            blank_result is None
            or blank_result.measured is None
            or blank_result.concentration is None
            or blank_result.measured < limit
        ):
            continue
        threshold = multiple * blank_result.concentration
        low = []
        for sample in context.readings:
            if sample.kind not in _BATCH_SAMPLE_KINDS or not same_batch(blank, sample):
                continue
            result = result_of(context, sample)
            if result is None:
                continue
            if result.concentration is not None:
                if result.concentration < threshold:
                    low.append(sample)
            elif result.signal is not None and below_the_curve(calibration, result.signal):
                low.append(sample)  # under the bottom of the curve: lower still
        if not low:
            continue
        batch = f"batch {blank.batch}" if blank.batch else "the run"
        yield Finding(
            "blank.method_multiple",
            Severity.FAIL,
            f"{len(low)} {context.analyte} result(s) of {batch} below "
            f"{number(multiple)}× {blank.sample_id} ({number(blank_result.concentration)}"
            f"{context.unit}, limit below {number(limit)}{context.unit}): prepare again and "
            f"re-run {_names(low)}",
            analyte=context.analyte,
            sample_id=low[0].sample_id,
            seq=low[0].seq,
            value=blank_result.concentration,
            limit=(None, threshold),
            flag=Flag.BLANK_CONTAMINATED,
            affected=tuple(r.seq for r in low),
            causes=(blank.seq,),
        )
