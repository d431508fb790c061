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
from dataclasses import replace

from calwarden.rules.acceptance.common import (
    below_the_curve,
    number,
    result_of,
    same_batch,
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
    readings = {r.seq: r for r in context.readings}
    letters = context.criteria.qualifier_letters
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
    listed (for the record) and each carries its adjusted limit and the data
    qualifiers ``U``, ``J``, ``B``, ``E`` (module docstring). Settings:
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
        shown = ", ".join(f"{r.sample_id} < {number(limit)}" for r, limit in below[:8])
        more = f" and {len(below) - 8} more" if len(below) > 8 else ""
        yield Finding(
            "reporting.limit",
            Severity.INFO,
            f"{len(below)} {context.analyte} result(s) below the reporting limit, reported as "
            f"less than it{context.unit and ' (' + context.unit.strip() + ')'}: {shown}{more}",
            analyte=context.analyte,
            sample_id=below[0][0].sample_id,
            seq=below[0][0].seq,
            affected=tuple(r.seq for r, _ in below),
        )
