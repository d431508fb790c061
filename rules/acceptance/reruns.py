"""The CCV re-run policy: when an immediate re-run may stand for a failing CCV (issue 15)."""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.acceptance.common import (
    check_limits,
    check_recovery,
    reading_finding,
    span,
    superseded_checks,
)
from calwarden.rules.model import Kind
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Severity


@rule("check.rerun", "A failing CCV stands only when the re-run policy allows no re-run for it")
def check_rerun(context: AnalyteContext) -> Iterator[Finding]:
    """A failing CCV re-run at once, and passing as the policy asks, is recorded, not failed.

    Why: labs differ in what they allow after a failing CCV. Some methods and
    quality systems let the analyst re-run the CCV once, at once, and go on when
    it passes; TNI's standard asks for two consecutive passing CCVs, started
    straight away with no sample between, or else corrective action and a new
    calibration (TNI 2016 V1M4 1.7.2 [memory]; US EPA 6010D / 6020B [memory]).
    ``ccv_rerun_policy`` says which: ``none`` (default: a failing CCV fails its
    brackets, as before), ``single`` (one immediate passing re-run) or
    ``two_passing`` (two). The re-runs must be CCVs with no field sample between
    them and the failing one; a CCV that is itself a re-run of an earlier failure
    gets no re-run of its own (no testing into compliance). A superseded CCV is
    an info finding here; ``check.recovery`` and ``bracket.reportable`` then leave
    it. Settings: ``ccv_rerun_policy`` (none); with ``compare_rounded_digits``
    (none) recoveries are rounded before the limits.

    Fails: (info) CCV-2 at 84 % re-run at once as CCV-2R at 99 % under ``single``;
    under ``none``, ``check.recovery`` fails CCV-2. Passes: every CCV within limits.
    """
    for seq, reruns in superseded_checks(context).items():
        reading = next(r for r in context.of_kind(Kind.CCV) if r.seq == seq)
        recovery = check_recovery(context, reading)
        limits = check_limits(context, Kind.CCV)
        found = "cannot be quantitated" if recovery is None else f"recovered {recovery:.1f} %"
        again = " and ".join(
            f"{r.sample_id} ({(check_recovery(context, r) or 0.0):.1f} %)" for r in reruns
        )
        yield reading_finding(
            "check.rerun",
            Severity.INFO,
            context,
            reading,
            f"{reading.sample_id} {context.analyte} {found} (limit {span(limits)}), re-run at "
            f"once: {again} passed, as ccv_rerun_policy "
            f"{context.criteria.ccv_rerun_policy} allows; it breaks no bracket",
            value=recovery,
            limit=limits,
        )
