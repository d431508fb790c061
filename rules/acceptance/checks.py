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
)
from calwarden.rules.model import Kind
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding


@rule("check.recovery", "ICV and CCV concentrations recover within limits")
def check_standard_recovery(context: AnalyteContext) -> Iterator[Finding]:
    """Each initial and continuing calibration verification recovers its nominal value.

    Why: the ICV (second source) proves the curve, each CCV proves it still
    holds (US EPA 6010D / 6020B and 200.7 / 200.8: ±10 % [memory]). Samples it
    brackets are judged by ``bracket.reportable``. Settings:
    ``icv_recovery_pct`` and ``ccv_recovery_pct`` (90–110).

    Fails: CCV-2 Zn recovered 84.0 %. Passes: CCV-2 Zn recovered 101.3 %.
    """
    for reading in context.of_kind(Kind.ICV, Kind.CCV):
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
    80–120 % [memory]). Settings: ``lcs_recovery_pct`` (80–120).

    Fails: LCS-1 Cu recovered 71.5 %. Passes: 98.2 %.
    """
    limits = context.criteria.lcs_recovery_pct
    for reading in context.of_kind(Kind.LCS):
        result = result_of(context, reading)
        recovery = recovery_pct(result.concentration if result else None, reading.nominal)
        detail = f" of {number(reading.nominal or 0)}{context.unit}"
        finding = recovery_finding("lcs.recovery", context, reading, recovery, limits, detail)
        if finding:
            yield finding
