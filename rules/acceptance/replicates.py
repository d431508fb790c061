"""Rules on replicate injections of one sample."""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.acceptance.common import number
from calwarden.rules.replicates import curve_of, replicate_group, replicate_sets
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity


@rule("replicate.rsd", "Replicate injections of one sample agree with each other")
def replicate_rsd(context: AnalyteContext) -> Iterator[Finding]:
    """The injections of one sample (same id and kind) must agree within a %RSD limit.

    Why: the reported result is their mean, with the uncertainty of a mean of m
    readings; that is only meaningful when the injections measure the same thing.
    A large scatter means an unstable introduction, carry-over or a blocked
    nebuliser, and the sample is re-run (common practice; no single source gives
    a limit for injection replicates, 10 % is our choice between the few % that
    replicate readings of one injection usually show and the 20 % RPD allowed
    between laboratory duplicates). Judged only when the mean reaches
    ``replicate_min_multiple`` times the lowest standard, as near the detection
    limit a %RSD says little. Settings: ``replicate_max_rsd_pct`` (10),
    ``replicate_min_multiple`` (5).

    Fails: S-07 Zn injected three times at 12.1, 14.6 and 10.2 µg/L (%RSD 17.9).
    Passes: 12.1, 12.4 and 11.9 µg/L (%RSD 2.1).
    """
    criteria = context.criteria
    calibration = context.calibration
    low = calibration.range_low if calibration is not None else None
    fit_of = curve_of(calibration, context.readings)
    for members in replicate_sets(list(context.results.values())):
        group = replicate_group(members, fit_of)
        rsd = group.rsd_pct
        if rsd is None or group.measured is None or low is None:
            continue
        if group.measured < criteria.replicate_min_multiple * low:
            continue
        maximum = criteria.replicate_max_rsd_pct
        if rsd > maximum:
            values = ", ".join(number(r.concentration or 0.0) for r in members)
            yield Finding(
                "replicate.rsd",
                Severity.FAIL,
                f"{group.sample_id} {context.analyte} injected {len(members)} times: {values}"
                f"{context.unit}, %RSD {rsd:.1f}, limit ≤ {number(maximum)} %",
                analyte=context.analyte,
                sample_id=group.sample_id,
                seq=group.seqs[0],
                value=rsd,
                limit=(None, maximum),
                flag=Flag.REPLICATES_DISAGREE,
                affected=group.seqs,
            )
