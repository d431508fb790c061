"""Rules on what a run holds at all: samples to report, and the QC its method requires."""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.model import Kind
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Severity

#: Injections of real material whose results a lab reports (QC samples are not).
_SAMPLE_KINDS = frozenset({Kind.SAMPLE, Kind.DUP, Kind.MS, Kind.MSD, Kind.ADDITION})
#: Plain names of the kinds, for messages.
_KIND_NAMES = {
    Kind.BLANK: "calibration blank",
    Kind.CAL: "calibration standard",
    Kind.ICV: "ICV",
    Kind.CCV: "CCV",
    Kind.CCB: "CCB",
    Kind.MB: "method blank",
    Kind.LCS: "LCS",
    Kind.SAMPLE: "sample",
    Kind.DUP: "duplicate",
    Kind.MS: "matrix spike",
    Kind.MSD: "matrix spike duplicate",
    Kind.ADDITION: "standard-addition point",
    Kind.LLCCV: "low-level CCV",
    Kind.ICS_A: "ICS-A",
    Kind.ICS_AB: "ICS-AB",
    Kind.SERIAL_DILUTION: "serial dilution",
    Kind.PDS: "post-digestion spike",
}


@rule("run.required_qc", "The run holds the QC samples its method requires")
def run_required_qc(context: AnalyteContext) -> Iterator[Finding]:
    """Each analyte's run holds at least as many of each QC kind as the method asks.

    Why: the other rules judge the QC a run holds, and pass when it holds none: a
    file cut off right after its ICV, or a run without the method blank or LCS
    its method asks for, would pass with nothing shown. The defaults ask for one
    ICV and one CCV per run (US EPA 6010D / 6020B and 200.7 / 200.8: an ICV after
    calibrating, CCVs during and at the end of the run [memory]); a method blank
    and an LCS per preparation batch (SW-846 Chapter One [memory]) or CCBs are
    the lab's to add. Judged for analytes with calibration standards (an
    analyte read by standard addition has no curve to verify). A shortfall is
    repaired only by measuring again, so the advice is to repeat the run.
    Settings: ``required_qc`` (kind: least count per run; ``{icv: 1, ccv: 1}``).

    Fails: a run cut off after its ICV holds no CCV. Passes: a CCV closes it.
    """
    if not context.of_kind(Kind.CAL):
        return
    for kind, least in context.criteria.required_qc.items():
        held = len(context.of_kind(kind))
        if held >= least:
            continue
        name = _KIND_NAMES[kind]
        yield Finding(
            "run.required_qc",
            Severity.FAIL,
            f"the {context.analyte} run holds {held} {name}(s), the method requires at least "
            f"{least} (required_qc): repeat the run with them",
            analyte=context.analyte,
            value=float(held),
        )


@rule("run.field_samples", "The run holds field samples to report")
def run_field_samples(context: AnalyteContext) -> Iterator[Finding]:
    """Warn when an analyte's run holds no sample, duplicate, spike or addition.

    Why: a run of only blanks, standards and QC can pass every rule and still
    report nothing; it is usually a file cut short or exported from the wrong
    sequence, and a "pass" on it would be read as results released (common
    practice). A warning, since a calibration-only run can be deliberate. No
    settings.

    Warns: a file with a blank and six standards only. Passes: it holds a sample.
    """
    if not context.of_kind(*_SAMPLE_KINDS):
        yield Finding(
            "run.field_samples",
            Severity.WARN,
            f"the {context.analyte} run holds no field samples (only "
            f"{', '.join(sorted({_KIND_NAMES[r.kind] for r in context.readings}))}): "
            f"nothing to report; is the file complete?",
            analyte=context.analyte,
        )
