"""Rules on field samples: calibrated range, internal standard, duplicates, spikes."""

from __future__ import annotations

import math
from bisect import bisect_left
from collections.abc import Callable, Iterable, Iterator

from calwarden.rules.acceptance.common import (
    not_judged,
    number,
    off_curve_results,
    quantitated_field_results,
    reading_finding,
    recovery_finding,
    recovery_pct,
    result_of,
    rpd_pct,
    span,
    within,
)
from calwarden.rules.acceptance.reporting import has_reporting_limits, reporting_limit
from calwarden.rules.model import REPORTABLE_KINDS, Kind, Reading
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Result, Severity

#: Kinds a duplicate or spike may be made from.
_PARENT_KINDS = frozenset({Kind.SAMPLE, Kind.LCS, Kind.MB})
#: Extra dilutions offered for an over-range sample, in the usual 1-2-5 steps.
_DILUTION_STEPS = (2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000, 10000)
#: An over-range sample is diluted to land at or below this share of the top standard,
#: leaving room for the sample's own variation (our choice).
_TARGET_SHARE_OF_TOP = 0.8


def suggested_dilution(measured: float, top: float, current: float) -> float | None:
    """Total dilution that brings ``measured`` to at most 80 % of the top standard.

    ``None`` when even the largest step is not enough (the analyst must plan it).
    """
    for step in _DILUTION_STEPS:
        if measured / step <= _TARGET_SHARE_OF_TOP * top:
            return current * step
    return None


@rule("result.computable", "Every result is a finite number")
def result_computable(context: AnalyteContext) -> Iterator[Finding]:
    """A result whose numbers overflow or are undefined is a failure, never a silent gap.

    Why: every input number is finite, yet arithmetic on extreme ones is not:
    a dilution of 1e308 times any concentration overflows to infinity, and a
    standard addition with ``added`` of 1e308 gives no number at all. Such a
    result would show as an empty concentration with nothing said; a QC tool
    that let it pass would pass a sample nobody can report (common practice:
    a result that cannot be calculated is not reportable). Judged for every
    result (response used, concentration measured and reported, uncertainty).
    No settings.

    Fails: S-1 Zn with a dilution of 1e308 (reported concentration infinite).
    Passes: S-1 Zn with a dilution of 10.
    """
    by_seq: dict[int, Reading] | None = None  # built when the first broken result needs it
    for seq, result in context.results.items():
        broken = [
            name
            for name, value in (
                ("response", result.signal),
                ("concentration in the measured solution", result.measured),
                ("reported concentration", result.concentration),
                ("uncertainty", result.uncertainty),
            )
            if value is not None and not math.isfinite(value)
        ]
        if not broken:
            continue
        if by_seq is None:
            by_seq = {r.seq: r for r in reversed(context.readings)}  # the first of a seq
        reading = by_seq.get(seq)
        numbers = f"dilution {result.dilution:g}"
        if reading is not None and reading.added is not None:
            numbers += f", added {reading.added:g}"
        yield Finding(
            "result.computable",
            Severity.FAIL,
            f"{result.sample_id} {context.analyte}: the {' and the '.join(broken)} cannot be "
            f"computed from the row's numbers ({numbers}): check them and re-run",
            analyte=context.analyte,
            sample_id=result.sample_id,
            seq=seq,
            flag=Flag.NOT_COMPUTABLE,
            affected=(seq,),
        )


@rule("range.over", "No result lies above the highest calibration standard")
def range_over(context: AnalyteContext) -> Iterator[Finding]:
    """A result above the top standard is an extrapolation and is not reported.

    Why: the curve is only known where standards were measured; beyond the
    top standard the response may bend (TNI 2016 V1M4 1.7.1.1: no
    quantitative results outside the calibrated range [published, via TNI
    guidance]). The finding suggests a total dilution that brings the result
    to at most 80 % of the top standard (our choice). Judged for samples,
    duplicates, spikes and LCS, on the concentration in the measured solution.

    Fails: S-07 Cu at 152 µg/L with a top standard of 50 µg/L: dilute 5× and
    re-run. Passes: S-07 Cu at 31.2 µg/L.
    """
    calibration = context.calibration
    if calibration is None or calibration.range_high is None:
        return
    top = calibration.range_high
    for reading, measured in quantitated_field_results(context):
        if measured > top:
            dilution = suggested_dilution(measured, top, reading.dilution)
            advice = (
                f"dilute to {number(dilution)}× in total and re-run"
                if dilution
                else "dilute and re-run (beyond a 10000-fold dilution: plan it by hand)"
            )
            yield reading_finding(
                "range.over",
                Severity.FAIL,
                context,
                reading,
                f"{reading.sample_id} {context.analyte} at {number(measured)}"
                f"{context.unit} in the measured solution is over range (top standard "
                f"{number(top)}{context.unit}): {advice}",
                value=measured,
                limit=(None, top),
                flag=Flag.OVER_RANGE,
            )


@rule("range.on_curve", "Every response has a concentration on the calibrated curve")
def range_on_curve(context: AnalyteContext) -> Iterator[Finding]:
    """A response that no concentration on the fitted curve gives cannot be reported.

    Why: a quadratic that bends over has a highest response; a reading above
    it has no concentration on the calibrated branch, which is an over-range
    result in all but name (common practice). No settings.

    A response under the bottom of an upward-curving quadratic is below the
    range instead, and ``range.under`` reports it.

    Fails: S-04 Na response 2.1e6 on a curve whose maximum is 1.9e6. Passes:
    S-04 Na response 1.2e6, read at 31 mg/L.
    """
    for reading, result, below in off_curve_results(context):
        if below:
            continue  # range.under's case: under the bottom of an upward curve
        yield reading_finding(
            "range.on_curve",
            Severity.FAIL,
            context,
            reading,
            f"{reading.sample_id} {context.analyte}: no concentration on the calibrated curve "
            f"gives response {number(result.signal or 0.0)} (above the curve's top): "
            "dilute and re-run",
            value=result.signal,
            flag=Flag.NOT_QUANTIFIABLE,
        )


@rule("range.under", "Results below the lowest standard are marked as estimates")
def range_under(context: AnalyteContext) -> Iterator[Finding]:
    """A result below the lowest non-zero standard is below the quantitation range.

    Why: below the lowest standard the relative uncertainty grows fast; such
    results are reported as estimated ("J" in US EPA data qualifiers) or as
    below the limit, not as a number (common practice). A warning: the run
    does not fail. Judged like ``range.over``. A CCB or method blank under the
    bottom of an upward quadratic has no concentration either: an info finding.
    A result below its reporting limit (``reporting.limit``) is reported as
    "< RL", not as an estimate, so it is not warned about here.

    Warns: S-03 Pb at 0.21 µg/L with a lowest standard of 0.5 µg/L. Passes:
    S-03 Pb at 2.4 µg/L, or at 0.21 µg/L with a reporting limit of 1 µg/L.
    """
    calibration = context.calibration
    if calibration is None or calibration.range_low is None:
        return
    low = calibration.range_low
    limits = has_reporting_limits(context)
    for reading, measured in quantitated_field_results(context):
        limit = reporting_limit(context, reading) if limits else None
        if limit is not None and measured * reading.dilution < limit:
            continue  # reported as "< RL": reporting.limit's
        if measured < low:
            yield reading_finding(
                "range.under",
                Severity.WARN,
                context,
                reading,
                f"{reading.sample_id} {context.analyte} at {number(measured)}"
                f"{context.unit} is below the lowest standard ({number(low)}{context.unit}): "
                "estimated value",
                value=measured,
                limit=(low, None),
                flag=Flag.BELOW_RANGE,
            )
    for reading, result, below in off_curve_results(context):
        if limits and reporting_limit(context, reading) is not None:
            continue  # under the curve's bottom, so below the limit: reported as "< RL"
        if below and reading.kind in REPORTABLE_KINDS:
            yield reading_finding(
                "range.under",
                Severity.WARN,
                context,
                reading,
                f"{reading.sample_id} {context.analyte} response {number(result.signal or 0.0)} "
                "is under the bottom of the curve: below the lowest standard "
                f"({number(low)}{context.unit}), no concentration given",
                value=result.signal,
                limit=(low, None),
                flag=Flag.BELOW_RANGE,
            )
        elif below:
            # A blank (CCB, method blank) reading under the bottom is clean, but must not be
            # left without a concentration and without a word (it once passed silently).
            yield reading_finding(
                "range.under",
                Severity.INFO,
                context,
                reading,
                f"{reading.sample_id} {context.analyte} response {number(result.signal or 0.0)} "
                "is under the bottom of the curve: the blank reads below the lowest standard "
                f"({number(low)}{context.unit}), no concentration given",
                value=result.signal,
                limit=(low, None),
                flag=Flag.BELOW_RANGE,
            )


@rule("istd.recovery", "Internal-standard responses stay near those of the standards")
def istd_recovery(context: AnalyteContext) -> Iterator[Finding]:
    """Each injection's internal-standard response, relative to the calibration's mean.

    Why: a suppressed or enhanced internal standard means the ratio no longer
    corrects the matrix effect (US EPA 6020B: 70–120 % of the calibration
    blank; 200.8: 60–125 % [memory]; 70–130 % of the standards' mean is our
    common-practice default). Failing injections' results are not reportable.
    Settings: ``istd_recovery_pct`` (70–130).

    Fails: S-11's atrazine-d5 at 55 % of the standards' mean. Passes: at 96 %.
    """
    calibration = context.calibration
    if calibration is None:
        return
    for reading in context.readings:
        if reading.kind in (Kind.CAL, Kind.BLANK, Kind.ADDITION):
            continue
        if not calibration.same_basis(reading):
            yield _basis_finding(context, reading, calibration.uses_internal_standard)
    if not calibration.istd_reference:
        return
    reference = calibration.istd_reference
    limits = context.criteria.istd_recovery_pct
    for reading in context.readings:
        if reading.istd_response is None or reading.kind in (Kind.CAL, Kind.BLANK):
            continue
        recovery = 100.0 * reading.istd_response / reference
        if within(recovery, limits):
            continue
        name = reading.istd or "internal standard"
        yield reading_finding(
            "istd.recovery",
            Severity.FAIL,
            context,
            reading,
            f"{reading.sample_id} {name} (for {context.analyte}) at {recovery:.1f} % of the "
            f"standards' mean, limit {span(limits)}",
            value=recovery,
            limit=limits,
            flag=Flag.ISTD_OUT,
        )


def _basis_finding(context: AnalyteContext, reading: Reading, curve_has_istd: bool) -> Finding:
    why = (
        "has no internal-standard response while the calibration uses one"
        if curve_has_istd
        else "has an internal-standard response while the calibration has none"
    )
    return reading_finding(
        "istd.recovery",
        Severity.FAIL,
        context,
        reading,
        f"{reading.sample_id} {context.analyte} {why}: it cannot be read off the curve",
        flag=Flag.ISTD_OUT,
    )


class _Candidates:
    """Readings sharing one sample id (or one parent), in run order."""

    __slots__ = ("_seqs", "_sorted", "readings")

    def __init__(self) -> None:
        self.readings: list[Reading] = []
        self._seqs: list[int] = []
        self._sorted = True

    def add(self, reading: Reading) -> None:
        if self._seqs and reading.seq < self._seqs[-1]:
            self._sorted = False
        self.readings.append(reading)
        self._seqs.append(reading.seq)

    def nearest_before(self, seq: int) -> Reading:
        """The last reading (in run order) acquired before ``seq``, else the first."""
        if self._sorted:  # in seq order (the usual case): halve, do not scan
            at = bisect_left(self._seqs, seq)
            return self.readings[at - 1] if at else self.readings[0]
        earlier = [r for r in self.readings if r.seq < seq]
        return earlier[-1] if earlier else self.readings[0]


def _grouped(
    readings: Iterable[Reading], key: Callable[[Reading], str | None]
) -> dict[str | None, _Candidates]:
    """Readings by ``key``, built once per rule and analyte, so that finding every
    duplicate's parent takes time linear in the rows, not their square."""
    groups: dict[str | None, _Candidates] = {}
    for reading in readings:
        groups.setdefault(key(reading), _Candidates()).add(reading)
    return groups


def parents_by_id(
    context: AnalyteContext, kinds: frozenset[Kind] = _PARENT_KINDS
) -> dict[str | None, _Candidates]:
    """The analyte's readings that can be a parent (by default samples, LCS and method
    blanks) by sample id: built once per rule, looked up for each child."""
    return _grouped((r for r in context.readings if r.kind in kinds), lambda r: r.sample_id)


def parent_result(
    context: AnalyteContext, reading: Reading, parents: dict[str | None, _Candidates]
) -> tuple[Reading, Result] | None:
    """The parent's reading and result (the nearest one acquired before, else the first),
    from ``parents_by_id``: a duplicate's parent may be a sample, an LCS or a method blank
    (an LCS duplicate is routine)."""
    candidates = parents.get(reading.parent)
    if candidates is None:
        return None
    chosen = candidates.nearest_before(reading.seq)
    result = result_of(context, chosen)
    return (chosen, result) if result else None


@rule("duplicate.rpd", "Laboratory duplicates agree with their parent samples")
def duplicate_rpd(context: AnalyteContext) -> Iterator[Finding]:
    """Relative percent difference between a duplicate and its parent sample.

    Why: duplicates show the method's precision on a real matrix (US EPA
    6010D / 6020B: RPD ≤ 20 % [memory]). Near the quantitation limit RPDs are
    large by nature, so the rule applies only when both results are at least
    5× the lowest standard (common practice). A missing parent is a warning:
    the precision is then not shown. With a reporting limit, the 5× is of the
    parent's reporting limit (dilution applied), and below it
    ``duplicate.near_limit`` judges the difference instead. Settings:
    ``duplicate_max_rpd_pct`` (20), ``duplicate_min_multiple`` (5).

    Fails: S-05-D Pb 14.2 µg/L against S-05 at 10.1 µg/L (RPD 33.7 %). Passes:
    10.4 against 10.1 (RPD 2.9 %).
    """
    criteria = context.criteria
    calibration = context.calibration
    low = calibration.range_low if calibration else None
    parents = parents_by_id(context)
    for reading in context.of_kind(Kind.DUP):
        duplicate = result_of(context, reading)
        native = parent_result(context, reading, parents)
        if native is None:
            yield reading_finding(
                "duplicate.rpd",
                Severity.WARN,
                context,
                reading,
                f"{reading.sample_id} {context.analyte}: parent sample '{reading.parent}' "
                "is not in this run, precision not shown",
                flag=Flag.NOT_JUDGED,
            )
            continue
        parent = native[1]
        if duplicate is None or duplicate.measured is None or parent.measured is None:
            yield not_judged("duplicate.rpd", context, reading, "a result cannot be quantitated")
            continue
        if duplicate.concentration is None or parent.concentration is None:
            yield not_judged("duplicate.rpd", context, reading, "a result cannot be computed")
            continue
        smaller = min(duplicate.concentration, parent.concentration)
        limit = reporting_limit(context, native[0])
        if limit is not None:
            if smaller < criteria.duplicate_min_multiple * limit:
                continue  # near the reporting limit: duplicate.near_limit judges the difference
        elif low is None or min(duplicate.measured, parent.measured) < (
            criteria.duplicate_min_multiple * low
        ):
            yield not_judged(
                "duplicate.rpd",
                context,
                reading,
                f"below {number(criteria.duplicate_min_multiple)}× the lowest standard",
            )
            continue
        rpd = rpd_pct(duplicate.concentration, parent.concentration)
        if rpd is not None and rpd > criteria.duplicate_max_rpd_pct:
            yield reading_finding(
                "duplicate.rpd",
                Severity.FAIL,
                context,
                reading,
                f"{reading.sample_id} {context.analyte} {number(duplicate.concentration)} against "
                f"{reading.parent} {number(parent.concentration)}{context.unit}: RPD {rpd:.1f} %, "
                f"limit ≤ {number(criteria.duplicate_max_rpd_pct)} %",
                value=rpd,
                limit=(None, criteria.duplicate_max_rpd_pct),
                flag=Flag.QC_FAILED,
            )


@rule("spike.recovery", "Matrix spikes recover the amount added")
def spike_recovery(context: AnalyteContext) -> Iterator[Finding]:
    """Recovery of a matrix spike or spike duplicate: (spiked − native) / added.

    Why: a spike in the real matrix shows interferences the clean LCS cannot
    (US EPA 6010D / 6020B: 75–125 % [memory]). When the native concentration
    exceeds 4× the spike, the difference is lost in the native's own
    variation and the spike is not judged (same methods [memory]). Settings:
    ``spike_recovery_pct`` (75–125), ``spike_max_native_ratio`` (4).

    Fails: S-09-MS Zn recovered 61.0 % of 20 µg/L added. Passes: 97.5 %.
    """
    criteria = context.criteria
    limits = criteria.spike_recovery_pct
    parents = parents_by_id(context)
    for reading in context.of_kind(Kind.MS, Kind.MSD):
        spiked = result_of(context, reading)
        native = parent_result(context, reading, parents)
        added = reading.added or 0.0
        if native is None:
            yield not_judged(
                "spike.recovery", context, reading, f"parent '{reading.parent}' not in this run"
            )
            continue
        parent = native[1]
        if spiked is None or spiked.concentration is None or parent.concentration is None:
            yield not_judged("spike.recovery", context, reading, "a result cannot be quantitated")
            continue
        if parent.concentration > criteria.spike_max_native_ratio * added:
            yield not_judged(
                "spike.recovery",
                context,
                reading,
                f"native {number(parent.concentration)} exceeds "
                f"{number(criteria.spike_max_native_ratio)}× the spike of {number(added)}",
            )
            continue
        recovery = recovery_pct(spiked.concentration - parent.concentration, added)
        detail = f" of {number(added)}{context.unit} added to {reading.parent}"
        finding = recovery_finding(
            "spike.recovery", context, reading, recovery, limits, detail, "cannot be judged"
        )
        if finding:
            yield finding


@rule("spike.rpd", "A matrix spike and its duplicate agree")
def spike_rpd(context: AnalyteContext) -> Iterator[Finding]:
    """Relative percent difference between a matrix spike and its spike duplicate.

    Why: the pair shows the method's precision in the sample's own matrix, at a
    level the spike makes measurable (US EPA 6010D / 6020B: RPD ≤ 20 % [memory]).
    Each MSD is paired with the matrix spike of the same parent acquired
    nearest before it (else the first). Settings: ``spike_max_rpd_pct`` (20).

    Fails: S-09-MS Zn 24.1 and S-09-MSD 31.0 µg/L (RPD 25.0 %). Passes: 24.1 and
    24.9 µg/L (RPD 3.3 %).
    """
    limit = context.criteria.spike_max_rpd_pct
    spikes = _grouped(context.of_kind(Kind.MS), lambda r: r.parent)
    for duplicate in context.of_kind(Kind.MSD):
        partners = spikes.get(duplicate.parent)
        if partners is None:
            continue  # a lone MSD is judged by spike.recovery alone
        spike = partners.nearest_before(duplicate.seq)
        first, second = result_of(context, spike), result_of(context, duplicate)
        if first is None or second is None:
            continue
        if first.concentration is None or second.concentration is None:
            continue  # not quantifiable: another rule says so
        rpd = rpd_pct(first.concentration, second.concentration)
        if rpd is None or rpd <= limit:
            continue
        yield reading_finding(
            "spike.rpd",
            Severity.FAIL,
            context,
            duplicate,
            f"{duplicate.sample_id} {context.analyte} {number(second.concentration)} against "
            f"{spike.sample_id} {number(first.concentration)}{context.unit}: RPD {rpd:.1f} %, "
            f"limit ≤ {number(limit)} %",
            value=rpd,
            limit=(None, limit),
            flag=Flag.QC_FAILED,
        )
