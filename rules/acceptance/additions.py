"""Rules on standard-addition series."""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.acceptance.common import number
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity


@rule("addition.fit", "Each standard-addition series has enough points and a straight response")
def addition_fit(context: AnalyteContext) -> Iterator[Finding]:
    """A standard-addition result rests on its own straight line of response against added.

    Why: the concentration is an extrapolation to zero response, so it is only
    as good as the line (common practice: at least 3 points, the unspiked one
    included, and r² ≥ 0.99). Settings: ``addition_min_points`` (3),
    ``addition_min_r_squared`` (0.99).

    A negative result (the unspiked response below the blank) is a warning: it
    is not a concentration.

    Fails: W-12 Pb with two points, or with r² = 0.962. Passes: four points,
    r² = 0.9994.
    """
    criteria = context.criteria
    for parent, series in context.additions.items():
        seqs = series.seqs
        r_squared = series.r_squared
        problem = None
        value: float | None = None
        limit: tuple[float | None, float | None] | None = None
        if len(seqs) < criteria.addition_min_points:
            problem = f"{len(seqs)} points, at least {criteria.addition_min_points} needed"
            value, limit = float(len(seqs)), (float(criteria.addition_min_points), None)
        elif series.problem:
            problem = series.problem
        elif r_squared is None or r_squared < criteria.addition_min_r_squared:
            shown = "undetermined" if r_squared is None else f"{r_squared:.4f}"
            problem = f"r² = {shown}, limit ≥ {number(criteria.addition_min_r_squared)}"
            value, limit = r_squared, (criteria.addition_min_r_squared, None)
        outcome = series.outcome
        if problem is None and outcome is not None and outcome.concentration < 0:
            yield Finding(
                "addition.fit",
                Severity.WARN,
                f"standard addition of {context.analyte} in {parent} gives "
                f"{number(outcome.concentration)}{context.unit}: the unspiked response is "
                "below the blank, so the native concentration is not determined",
                analyte=context.analyte,
                sample_id=parent,
                seq=seqs[0],
                value=outcome.concentration,
                limit=(0.0, None),
                flag=Flag.BELOW_RANGE,
                affected=(seqs[0],),
            )
        if problem:
            yield Finding(
                "addition.fit",
                Severity.FAIL,
                f"standard addition of {context.analyte} in {parent}: {problem}",
                analyte=context.analyte,
                sample_id=parent,
                seq=seqs[0],
                value=value,
                limit=limit,
                flag=Flag.QC_FAILED,
                affected=(seqs[0],),
            )
