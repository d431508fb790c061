"""Metals QC of the ICP methods: interference checks, serial dilution, post-digestion spike.

The kinds are the methods' own: ``ics_a`` (the interferents alone), ``ics_ab``
(the interferents and the spiked analytes), ``serial_dilution`` (a native
sample diluted further, usually 1 + 4) and ``pds`` (a post-digestion spike of
a native sample's digestate). Sources: US EPA SW-846 Methods 6010D and 6020B,
and Method 200.7; the limits were recalled, not re-read [memory].
"""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.acceptance.common import (
    not_judged,
    number,
    reading_finding,
    recovery_finding,
    recovery_pct,
    result_of,
    span,
    within,
)
from calwarden.rules.acceptance.samples import parent_result, parents_by_id
from calwarden.rules.model import Kind
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity

#: Kinds a serial dilution or a post-digestion spike is made from (native samples).
_NATIVE_KINDS = frozenset({Kind.SAMPLE})


@rule("ics.recovery", "Interference check solutions recover their interferents and analytes")
def ics_recovery(context: AnalyteContext) -> Iterator[Finding]:
    """The two-solution interference check of the ICP methods.

    ICS-A holds the interferents alone (Al, Ca, Fe, Mg at high levels), ICS-AB
    the interferents and the analytes spiked at known levels. A spiked analyte
    or interferent (a row with a ``nominal``) must recover within limits; an
    analyte not spiked in that solution (no ``nominal``, or 0) must read, in
    absolute value, at most the unspiked limit, so that the interferents'
    spectral overlap is corrected.

    Why: US EPA 6010D and 200.7 check the interelement corrections at the
    start of each run: the ICS results within ±20 % of their true values, and
    the unspiked analytes below the lower limit of quantitation (6020B
    likewise) [memory]. A failure means the corrections no longer hold, so the
    analyte's run is repeated after they are put right. Settings:
    ``ics_recovery_pct`` (80–120), ``ics_unspiked_limit`` (none: the lowest
    calibration standard).

    Fails: ICS-AB Zn recovered 74.0 % of 10 µg/L; ICS-A Zn (not spiked) reads
    2.6 µg/L against a lowest standard of 1 µg/L. Passes: ICS-AB Zn 102 %,
    ICS-A Zn 0.3 µg/L.
    """
    limits = context.criteria.ics_recovery_pct
    calibration = context.calibration
    unspiked = context.criteria.ics_unspiked_limit or (
        calibration.range_low if calibration else None
    )
    for reading in context.of_kind(Kind.ICS_A, Kind.ICS_AB):
        name = "ICS-A" if reading.kind is Kind.ICS_A else "ICS-AB"
        result = result_of(context, reading)
        found = result.concentration if result else None
        if reading.nominal:
            recovery = recovery_pct(found, reading.nominal)
            detail = f" ({name}) of {number(reading.nominal)}{context.unit}"
            finding = recovery_finding("ics.recovery", context, reading, recovery, limits, detail)
            if finding:
                yield finding
            continue
        if unspiked is None or found is None:
            continue  # no curve: calibration.present says so
        if abs(found) > unspiked:
            yield reading_finding(
                "ics.recovery",
                Severity.FAIL,
                context,
                reading,
                f"{reading.sample_id} {context.analyte} ({name}, not spiked) reads "
                f"{number(found)}{context.unit}, limit ±{number(unspiked)}{context.unit}: "
                "correct the interelement corrections and repeat the run",
                value=found,
                limit=(-unspiked, unspiked),
                flag=Flag.QC_FAILED,
            )


@rule("serial_dilution.difference", "A serial dilution agrees with its undiluted sample")
def serial_dilution_difference(context: AnalyteContext) -> Iterator[Finding]:
    """The percent difference between a serial dilution and its undiluted parent.

    A ``serial_dilution`` row names its ``parent`` sample and carries its own
    total ``dilution`` (5 for a 1 + 4 dilution of an undiluted sample); its
    reported concentration is compared with the parent's:
    %D = |diluted − undiluted| / undiluted × 100.

    Why: a matrix that suppresses or enhances the signal does so less when
    diluted, so a diluted result that does not agree shows a matrix effect
    (US EPA 200.7 and the CLP inorganic statement of work: within 10 %;
    6010D / 6020B: 20 % [memory]). The comparison means something only well
    above the noise: judged when the undiluted result in the measured solution
    is at least 50× the calibration's detection limit (CLP [memory]); below
    that, or without a detection limit, it is not judged (info). A failure
    puts the parent on the re-run list (``matrix_effect``: by standard
    additions, or diluted). Settings: ``serial_dilution_max_difference_pct``
    (10), ``serial_dilution_min_multiple`` (50).

    Fails: S-1-SD Zn 24.5 µg/L against S-1 at 30.1 µg/L (%D 18.6 %). Passes:
    29.4 against 30.1 (%D 2.3 %).
    """
    criteria = context.criteria
    calibration = context.calibration
    lod = calibration.lod if calibration else None
    limit = criteria.serial_dilution_max_difference_pct
    parents = parents_by_id(context, _NATIVE_KINDS)
    for reading in context.of_kind(Kind.SERIAL_DILUTION):
        diluted = result_of(context, reading)
        native = parent_result(context, reading, parents)
        if native is None:
            yield not_judged(
                "serial_dilution.difference",
                context,
                reading,
                f"parent '{reading.parent}' not in this run",
            )
            continue
        parent, undiluted = native
        if (
            diluted is None
            or diluted.concentration is None
            or undiluted.concentration is None
            or undiluted.measured is None
        ):
            yield not_judged(
                "serial_dilution.difference", context, reading, "a result cannot be quantitated"
            )
            continue
        threshold = criteria.serial_dilution_min_multiple * lod if lod else None
        if threshold is None or undiluted.measured < threshold or undiluted.concentration <= 0:
            yield not_judged(
                "serial_dilution.difference",
                context,
                reading,
                f"{parent.sample_id} below {number(criteria.serial_dilution_min_multiple)}× the "
                "detection limit"
                + (f" ({number(threshold)}{context.unit})" if threshold is not None else ""),
            )
            continue
        difference = (
            100.0 * abs(diluted.concentration - undiluted.concentration) / undiluted.concentration
        )
        if difference <= limit:
            continue
        yield Finding(
            "serial_dilution.difference",
            Severity.FAIL,
            f"{reading.sample_id} {context.analyte} {number(diluted.concentration)} against "
            f"{parent.sample_id} {number(undiluted.concentration)}{context.unit}: %D "
            f"{difference:.1f} %, limit ≤ {number(limit)} %: a matrix effect, re-run "
            f"{parent.sample_id} by standard additions or diluted",
            analyte=context.analyte,
            sample_id=reading.sample_id,
            seq=reading.seq,
            value=difference,
            limit=(None, limit),
            flag=Flag.MATRIX_EFFECT,
            affected=(reading.seq, parent.seq),
        )


@rule("pds.recovery", "Post-digestion spikes recover the amount added")
def pds_recovery(context: AnalyteContext) -> Iterator[Finding]:
    """Recovery of a post-digestion spike, (spiked − native) / added, and when one is due.

    A ``pds`` row names its ``parent`` sample and the ``added`` concentration.
    With ``pds_after_failed_spike`` on, a matrix spike that fails its recovery
    (``spike_recovery_pct``, judged as ``spike.recovery`` judges it) asks for a
    post-digestion spike of the same parent in the run.

    Why: a spike added after the digestion tells a matrix effect on the
    measurement from a loss in the preparation; US EPA 6010D / 6020B ask for
    one when the matrix spike fails, recovering 80–120 % [memory]. A failing
    one puts the parent on the re-run list (``matrix_effect``: by standard
    additions, or diluted). Settings: ``pds_recovery_pct`` (80–120),
    ``pds_after_failed_spike`` (off; the metals presets switch it on).

    Fails: S-1-PDS Zn recovered 68.0 % of 20 µg/L added to S-1. Passes: 98.5 %.
    """
    criteria = context.criteria
    limits = criteria.pds_recovery_pct
    parents = parents_by_id(context, _NATIVE_KINDS)
    for reading in context.of_kind(Kind.PDS):
        spiked = result_of(context, reading)
        native = parent_result(context, reading, parents)
        added = reading.added or 0.0
        if native is None:
            yield not_judged(
                "pds.recovery", context, reading, f"parent '{reading.parent}' not in this run"
            )
            continue
        parent, undiluted = native
        if spiked is None or spiked.concentration is None or undiluted.concentration is None:
            yield not_judged("pds.recovery", context, reading, "a result cannot be quantitated")
            continue
        recovery = recovery_pct(spiked.concentration - undiluted.concentration, added)
        detail = f" of {number(added)}{context.unit} added to {parent.sample_id}"
        finding = recovery_finding("pds.recovery", context, reading, recovery, limits, detail)
        if finding:
            yield Finding(
                finding.rule,
                finding.severity,
                finding.message + f": a matrix effect, re-run {parent.sample_id} by standard "
                "additions or diluted",
                analyte=finding.analyte,
                sample_id=finding.sample_id,
                seq=finding.seq,
                value=finding.value,
                limit=finding.limit,
                flag=Flag.MATRIX_EFFECT,
                affected=(reading.seq, parent.seq),
            )
    if criteria.pds_after_failed_spike:
        yield from _missing_pds(context)


def _missing_pds(context: AnalyteContext) -> Iterator[Finding]:
    """A failing matrix spike whose parent has no post-digestion spike in the run."""
    limits = context.criteria.spike_recovery_pct
    spiked_after = {r.parent for r in context.of_kind(Kind.PDS)}
    parents = parents_by_id(context, _NATIVE_KINDS)
    for spike in context.of_kind(Kind.MS):
        if spike.parent in spiked_after:
            continue
        result = result_of(context, spike)
        native = parent_result(context, spike, parents)
        if result is None or native is None or result.concentration is None:
            continue  # spike.recovery says why it is not judged
        undiluted = native[1].concentration
        added = spike.added or 0.0
        if undiluted is None or undiluted > context.criteria.spike_max_native_ratio * added:
            continue
        recovery = recovery_pct(result.concentration - undiluted, added)
        if recovery is None or within(recovery, limits):
            continue
        yield reading_finding(
            "pds.recovery",
            Severity.FAIL,
            context,
            spike,
            f"{spike.sample_id} {context.analyte} recovered {recovery:.1f} % (limit "
            f"{span(limits)}) and {spike.parent} has no post-digestion spike in the run: "
            f"spike {spike.parent}'s digestate and measure both again",
            value=recovery,
            limit=limits,
            flag=Flag.QC_FAILED,
        )
