"""Rules on check standards and control samples: ICV, CCV, LCS."""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.acceptance.common import (
    check_limits,
    check_recovery,
    number,
    recovery_finding,
    recovery_pct,
    result_of,
    rounded_for_limits,
    same_batch,
    span,
    superseded_checks,
    within,
)
from calwarden.rules.model import Kind, Reading
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity


@rule("check.recovery", "ICV and CCV concentrations recover within limits")
def check_standard_recovery(context: AnalyteContext) -> Iterator[Finding]:
    """Each initial and continuing calibration verification recovers its nominal value.

    Why: the ICV (second source) proves the curve, each CCV proves it still
    holds (US EPA 6010D / 6020B and 200.7 / 200.8: ±10 % [memory]). Samples it
    brackets are judged by ``bracket.reportable``. Settings:
    ``icv_recovery_pct`` and ``ccv_recovery_pct`` (90–110).

    With ``ccv_rerun_policy`` allowing it, a failing CCV re-run at once and
    passing is ``check.rerun``'s (info) instead. With ``compare_rounded_digits``
    set (none), the recovery is rounded to that many significant digits before
    it is compared with the limits (the method's reporting digits).

    Fails: CCV-2 Zn recovered 84.0 %. Passes: CCV-2 Zn recovered 101.3 %.
    """
    superseded = superseded_checks(context)
    for reading in context.of_kind(Kind.ICV, Kind.CCV):
        if reading.seq in superseded:
            continue  # check.rerun: an allowed re-run passed
        recovery = check_recovery(context, reading)
        limits = check_limits(context, reading.kind)
        finding = recovery_finding("check.recovery", context, reading, recovery, limits)
        if finding:
            yield finding


@rule("lcs.recovery", "Laboratory control samples recover within limits")
def lcs_recovery(context: AnalyteContext) -> Iterator[Finding]:
    """Each LCS recovers its known concentration.

    Why: the LCS carries a known amount through the whole preparation, so it
    shows losses or contamination of the method (US EPA 6010D / 6020B:
    80–120 % [memory]). The samples of its batch are ``lcs.batch``'s. Settings:
    ``lcs_recovery_pct`` (80–120).

    Fails: LCS-1 Cu recovered 71.5 %. Passes: 98.2 %.
    """
    limits = context.criteria.lcs_recovery_pct
    for reading in context.of_kind(Kind.LCS):
        recovery = _lcs_recovery(context, reading)
        detail = f" of {number(reading.nominal or 0)}{context.unit}"
        finding = recovery_finding("lcs.recovery", context, reading, recovery, limits, detail)
        if finding:
            yield finding


def _lcs_recovery(context: AnalyteContext, reading: Reading) -> float | None:
    result = result_of(context, reading)
    recovery = recovery_pct(result.concentration if result else None, reading.nominal)
    return rounded_for_limits(context, recovery)


#: What a failing LCS speaks for: the samples prepared with it.
_BATCH_SAMPLE_KINDS = frozenset({Kind.SAMPLE, Kind.DUP, Kind.MS, Kind.MSD})


@rule("lcs.batch", "The samples of a failing LCS's preparation batch are not reportable")
def lcs_batch(context: AnalyteContext) -> Iterator[Finding]:
    """A failing LCS makes every sample prepared with it unreportable.

    Why: the LCS went through the preparation beside the samples; when it does
    not recover, the preparation lost or added analyte, and the batch's samples
    must be prepared and measured again (US EPA SW-846 Chapter One and 6010D /
    6020B: a batch whose LCS fails is re-prepared [memory]). The batch is the
    ``batch`` column; an LCS without one speaks for the whole run, and a sample
    without one is counted in every batch. Samples, duplicates and spikes are
    flagged ``lcs_failed``. No settings: it follows ``lcs.recovery``'s limits.

    Fails: LCS-1 Zn recovered 71.5 % in batch B-1: the samples of B-1 are
    flagged, those of B-2 are not. Passes: LCS-1 recovered 98.2 %.
    """
    limits = context.criteria.lcs_recovery_pct
    for lcs in context.of_kind(Kind.LCS):
        recovery = _lcs_recovery(context, lcs)
        if recovery is not None and within(recovery, limits):
            continue
        samples = [
            r for r in context.readings if r.kind in _BATCH_SAMPLE_KINDS and same_batch(lcs, r)
        ]
        if not samples:
            continue
        batch = f"batch {lcs.batch}" if lcs.batch else "the run"
        found = "cannot be quantitated" if recovery is None else f"recovered {recovery:.1f} %"
        shown = ", ".join(r.sample_id for r in samples[:8])
        more = f" and {len(samples) - 8} more" if len(samples) > 8 else ""
        yield Finding(
            "lcs.batch",
            Severity.FAIL,
            f"{len(samples)} {context.analyte} result(s) of {batch} not reportable because "
            f"{lcs.sample_id} {found} (limit {span(limits)}): prepare again and re-run "
            f"{shown}{more}",
            analyte=context.analyte,
            sample_id=samples[0].sample_id,
            seq=samples[0].seq,
            value=recovery,
            limit=limits,
            flag=Flag.LCS_FAILED,
            affected=tuple(r.seq for r in samples),
            causes=(lcs.seq,),
        )
