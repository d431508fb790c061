"""The standards themselves: a minimum response factor, a second-source ICV (issue 15 item 8)."""

from __future__ import annotations

from collections.abc import Iterator
from statistics import fmean

from calwarden.rules.acceptance.common import number, reading_finding
from calwarden.rules.model import Kind
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity


@rule("calibration.min_rf", "The standards' mean response factor reaches the method's minimum")
def calibration_min_rf(context: AnalyteContext) -> Iterator[Finding]:
    """The mean response factor of the calibration standards is at least the set minimum.

    Why: a compound the system barely answers (a degraded standard, an active
    inlet or source) gives a curve that fits yet cannot see low levels; the
    organics methods set a minimum average response factor per compound (US EPA
    SW-846 8260D and 8270E, tables of minimum response factors, for example 0.1
    or 0.05 [memory]). The response factor of a standard is its response (the
    blank-corrected internal-standard ratio when there is one) over its nominal
    concentration, as the ``average_rf`` model takes it; with an internal
    standard the methods' RF also holds the internal standard's concentration,
    so set the minimum on this basis. Judged only when set, for any model. A
    failure asks for a new calibration. Settings: ``min_response_factor`` (none).

    Fails: a mean response factor of 0.031 with a minimum of 0.05. Passes: 0.42.
    """
    minimum = context.criteria.min_response_factor
    calibration = context.calibration
    if minimum is None or calibration is None:
        return
    factors = [p.signal / p.nominal for p in calibration.standards if p.nominal > 0]
    if not factors:
        return  # calibration.present says why there is no curve
    mean = fmean(factors)
    if mean >= minimum:
        return
    yield Finding(
        "calibration.min_rf",
        Severity.FAIL,
        f"{context.analyte} mean response factor {number(mean)} over {len(factors)} standards "
        f"is below the minimum {number(minimum)}: recalibrate (check the standard and the system)",
        analyte=context.analyte,
        value=mean,
        limit=(minimum, None),
    )


def _key(source: str) -> str:
    return " ".join(source.split()).casefold()


@rule("check.second_source", "The ICV comes from another source than the calibration standards")
def check_second_source(context: AnalyteContext) -> Iterator[Finding]:
    """An ICV whose ``source`` is that of a calibration standard verifies nothing independent.

    Why: the ICV proves the calibration standards were made right only when it
    was made from another stock; one from the same source repeats any error of
    theirs (US EPA 6010D / 6020B and 200.7 / 200.8: the ICV, or quality control
    sample, from a second source [memory]). The ``source`` column records where
    a standard came from (maker and lot, as the lab writes it); sources are
    compared ignoring case and repeated spaces. With ``require_second_source``
    on, an ICV or standards without a recorded source fail too; off (default),
    a run without sources says nothing. A failure asks for the run to be
    verified again with a second-source ICV. Settings: ``require_second_source``
    (false).

    Fails: ICV source "Lot A-17", as CAL-3. Passes: ICV "Lot B-02", the standards
    "Lot A-17".
    """
    standards = {
        _key(r.source): r for r in context.of_kind(Kind.CAL) if r.source and r.source.strip()
    }
    required = context.criteria.require_second_source
    for icv in context.of_kind(Kind.ICV):
        source = icv.source.strip() if icv.source else ""
        if not source or not standards:
            if required:
                missing = "the ICV's" if not source else "the calibration standards'"
                yield reading_finding(
                    "check.second_source",
                    Severity.FAIL,
                    context,
                    icv,
                    f"{icv.sample_id} {context.analyte}: {missing} source is not recorded, so "
                    "the ICV is not shown to be a second source (require_second_source)",
                    flag=Flag.QC_FAILED,
                )
            continue
        same = standards.get(_key(source))
        if same is None:
            continue
        yield reading_finding(
            "check.second_source",
            Severity.FAIL,
            context,
            icv,
            f"{icv.sample_id} {context.analyte} is from source '{source}', as the calibration "
            f"standard {same.sample_id}: not a second-source verification, verify with an ICV "
            "from another source",
            flag=Flag.QC_FAILED,
        )
