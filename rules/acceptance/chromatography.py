"""Chromatographic and mass-spectrometric identity: retention-time windows and ion ratios.

A result is of the analyte only when its peak elutes where the standards'
does and, by mass spectrometry, when its qualifier ion stands to its
quantifier ion as in the standards. The columns are ``retention_time`` and
``istd_retention_time`` (any one unit per run, minutes in the defaults) and
``qualifier_response`` (the qualifier ion's response; ``response`` is the
quantifier's). A run without them is not judged by these rules.
"""

from __future__ import annotations

from collections.abc import Iterator
from statistics import fmean

from calwarden.rules.acceptance.common import number, reading_finding
from calwarden.rules.model import CHECK_KINDS, REPORTABLE_KINDS, Kind, Reading
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity

#: Readings whose identity is judged: reportable results and check standards.
_JUDGED_KINDS = REPORTABLE_KINDS | CHECK_KINDS

#: Commission Decision 2002/657/EC, Table 4 [memory]: (relative intensity above, tolerance),
#: both in percent, the largest class first; at or below the last bound, the last tolerance.
ION_RATIO_TOLERANCES: dict[str, tuple[tuple[float, float], ...]] = {
    # GC-CI-MS, GC-MSn, LC-MS, LC-MSn
    "lc_ms": ((50.0, 20.0), (20.0, 25.0), (10.0, 30.0), (0.0, 50.0)),
    # GC-EI-MS
    "gc_ei_ms": ((50.0, 10.0), (20.0, 15.0), (10.0, 20.0), (0.0, 50.0)),
}


def graded_tolerance_pct(reference_ratio: float, technique: str = "lc_ms") -> float:
    """The relative ion-ratio tolerance for a reference qualifier/quantifier ratio.

    The size graded is the weaker ion's intensity as a percentage of the stronger
    one's (the base peak), as 2002/657/EC states it [memory].
    """
    relative = 100.0 * min(reference_ratio, 1.0 / reference_ratio)
    for above, tolerance in ION_RATIO_TOLERANCES[technique]:
        if relative > above:
            return tolerance
    return ION_RATIO_TOLERANCES[technique][-1][1]


def _rrt(reading: Reading) -> float | None:
    if reading.retention_time is None or not reading.istd_retention_time:
        return None
    return reading.retention_time / reading.istd_retention_time


def _calibration_reference(context: AnalyteContext) -> tuple[float | None, float | None]:
    standards = context.of_kind(Kind.CAL)
    times = [r.retention_time for r in standards if r.retention_time is not None]
    ratios = [v for v in (_rrt(r) for r in standards) if v is not None]
    return (fmean(times) if times else None, fmean(ratios) if ratios else None)


def _reference(
    context: AnalyteContext, reading: Reading, calibration: tuple[float | None, float | None]
) -> tuple[float | None, float | None, str]:
    """The reference (retention time, relative retention time) for a reading, and its name."""
    if context.criteria.rt_reference == "check" and reading.kind not in CHECK_KINDS:
        checks = [
            r
            for r in context.of_kind(Kind.ICV, Kind.CCV)
            if r.seq < reading.seq and r.retention_time is not None
        ]
        if checks:
            check = checks[-1]
            return check.retention_time, _rrt(check), check.sample_id
    return calibration[0], calibration[1], "the standards' mean"


@rule("rt.window", "Peaks elute within the retention-time window of the standards")
def rt_window(context: AnalyteContext) -> Iterator[Finding]:
    """Each result's retention time lies within its window around the reference.

    The reference is the calibration standards' mean retention time, or (with
    ``rt_reference: check``) that of the check standard acquired last before the
    reading; check standards are judged against the standards' mean. The window
    is absolute (± ``rt_window_min``) and, when ``rrt_window_pct`` is set and
    ``istd_retention_time`` is given, also relative: the analyte's retention
    time over its internal standard's within ± that percent of the reference's.
    Samples, duplicates, spikes, LCS and check standards with a
    ``retention_time`` are judged; blanks and rows without one are not.

    Why: a peak outside the window may be another compound (US EPA 8000D sets
    windows from the standards and centres them on the day's check [memory];
    SANTE/11312/2021: ±0.1 min of the standards [memory]; Commission Decision
    2002/657/EC: relative retention time within 0.5 % by GC, 2.5 % by LC
    [memory]). The result is not confirmed and goes on the re-run list
    (``identity_unconfirmed``). Settings: ``rt_window_min`` (0.1),
    ``rrt_window_pct`` (none), ``rt_reference`` (calibration).

    Fails: S-3 atrazine at 6.42 min against the standards' 6.21 min (window
    ±0.1). Passes: at 6.24 min.
    """
    criteria = context.criteria
    calibration = _calibration_reference(context)
    if calibration == (None, None):
        return
    for reading in context.of_kind(*_JUDGED_KINDS):
        if reading.retention_time is None:
            continue
        time_ref, ratio_ref, name = _reference(context, reading, calibration)
        window = criteria.rt_window_min
        if window is not None and time_ref is not None:
            shift = reading.retention_time - time_ref
            if abs(shift) > window:
                yield reading_finding(
                    "rt.window",
                    Severity.FAIL,
                    context,
                    reading,
                    f"{reading.sample_id} {context.analyte} at {number(reading.retention_time)} "
                    f"min against {name} {number(time_ref)} min (window ±{number(window)}): "
                    "not confirmed",
                    value=reading.retention_time,
                    limit=(time_ref - window, time_ref + window),
                    flag=Flag.IDENTITY_UNCONFIRMED,
                )
                continue
        relative = criteria.rrt_window_pct
        ratio = _rrt(reading)
        if relative is None or ratio is None or ratio_ref is None:
            continue
        deviation = 100.0 * (ratio - ratio_ref) / ratio_ref
        if abs(deviation) > relative:
            yield reading_finding(
                "rt.window",
                Severity.FAIL,
                context,
                reading,
                f"{reading.sample_id} {context.analyte} relative retention time "
                f"{ratio:.4f} against {name} {ratio_ref:.4f} ({deviation:+.2f} %, window "
                f"±{number(relative)} %): not confirmed",
                value=ratio,
                limit=(ratio_ref * (1 - relative / 100), ratio_ref * (1 + relative / 100)),
                flag=Flag.IDENTITY_UNCONFIRMED,
            )


@rule("ion.ratio", "Qualifier-to-quantifier ion ratios match those of the standards")
def ion_ratio(context: AnalyteContext) -> Iterator[Finding]:
    """Each result's ion ratio (``qualifier_response`` / ``response``) against the standards'.

    The reference is the mean ratio of the calibration standards that give a
    qualifier response. The tolerance is relative to it and graded by the
    ratio's size (the weaker ion as a percentage of the stronger), as
    Commission Decision 2002/657/EC Table 4 grades it [memory]: for LC-MS,
    LC-MS/MS, GC-CI-MS and GC-MS/MS ±20 % above 50 %, ±25 % above 20 %, ±30 %
    above 10 %, ±50 % at or below 10 %; for GC-EI-MS ±10, ±15, ±20 and ±50 %
    (``ion_ratio_technique: gc_ei_ms``). ``ion_ratio_tolerance_pct`` sets one
    tolerance for every size instead (SANTE/11312/2021: ±30 % [memory]).
    Judged for samples, duplicates, spikes, LCS and check standards with a
    qualifier response, at or above the lowest standard (below it, the
    estimate is flagged by ``range.under`` and ratios are noise).

    Why: the ratio confirms that the peak is the analyte; a result whose ratio
    is out is not confirmed and goes on the re-run list
    (``identity_unconfirmed``). Settings: ``ion_ratio_tolerance_pct`` (none:
    graded), ``ion_ratio_technique`` (lc_ms).

    Fails: S-3 ion ratio 0.31 against the standards' 0.52 (−40 %, tolerance
    ±20 %). Passes: 0.49 (−5.8 %).
    """
    criteria = context.criteria
    calibration = context.calibration
    ratios = [
        r.qualifier_response / r.response
        for r in context.of_kind(Kind.CAL)
        if r.qualifier_response is not None and r.response > 0
    ]
    reference = fmean(ratios) if ratios else 0.0
    if reference <= 0:
        return
    tolerance = criteria.ion_ratio_tolerance_pct or graded_tolerance_pct(
        reference, criteria.ion_ratio_technique
    )
    low = calibration.range_low if calibration else None
    for reading in context.of_kind(*_JUDGED_KINDS):
        if reading.qualifier_response is None or reading.response <= 0:
            continue
        result = context.results.get(reading.seq)
        if result is None or result.measured is None or (low is not None and result.measured < low):
            continue
        ratio = reading.qualifier_response / reading.response
        deviation = 100.0 * (ratio - reference) / reference
        if abs(deviation) <= tolerance:
            continue
        yield reading_finding(
            "ion.ratio",
            Severity.FAIL,
            context,
            reading,
            f"{reading.sample_id} {context.analyte} ion ratio {ratio:.3g} against the "
            f"standards' {reference:.3g} ({deviation:+.1f} %, tolerance ±{number(tolerance)} %): "
            "not confirmed",
            value=ratio,
            limit=(reference * (1 - tolerance / 100), reference * (1 + tolerance / 100)),
            flag=Flag.IDENTITY_UNCONFIRMED,
        )
