"""Rules on continuing calibration blanks and method blanks."""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.acceptance.common import number, reading_finding, result_of
from calwarden.rules.model import Kind
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
    in the measured solution.

    Fails: CCB-3 Zn at 1.42 µg/L with a lowest standard of 0.5 µg/L.
    Passes: CCB-3 Zn at 0.03 µg/L.
    """
    calibration = context.calibration
    limit = context.criteria.blank_limit or (calibration.range_low if calibration else None)
    if limit is None:
        return
    for reading in context.of_kind(Kind.CCB, Kind.MB):
        result = result_of(context, reading)
        if result is None or result.measured is None:
            continue  # not quantifiable: calibration.present or range.on_curve says so
        if abs(result.measured) >= limit:
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
