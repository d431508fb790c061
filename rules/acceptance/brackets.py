"""Rules on the sequence: check standards bracketing the field samples."""

from __future__ import annotations

from bisect import bisect_left
from collections.abc import Iterator
from dataclasses import dataclass

from calwarden.rules.acceptance.common import check_passes
from calwarden.rules.model import CHECK_KINDS, FIELD_KINDS, Reading
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity


@dataclass(frozen=True, slots=True)
class _Sequence:
    checks: tuple[Reading, ...]
    check_seqs: tuple[int, ...]
    field: tuple[Reading, ...]


def _sequence(context: AnalyteContext) -> _Sequence:
    checks = tuple(r for r in context.readings if r.kind in CHECK_KINDS)
    field = tuple(r for r in context.readings if r.kind in FIELD_KINDS)
    return _Sequence(checks, tuple(r.seq for r in checks), field)


def _names(readings: list[Reading]) -> str:
    shown = ", ".join(r.sample_id for r in readings[:8])
    return shown + (f" and {len(readings) - 8} more" if len(readings) > 8 else "")


@rule("bracket.frequency", "No more field samples between check standards than allowed")
def bracket_frequency(context: AnalyteContext) -> Iterator[Finding]:
    """Count the field samples between consecutive check standards.

    Why: a drift is only caught as often as a check is run (US EPA 6010D /
    6020B and 200.8: a CCV every 10 samples [memory]). Field samples are
    sample, dup, ms, msd, lcs and mb. Settings:
    ``max_field_samples_between_checks`` (10).

    Fails: 12 samples between CCV-1 and CCV-2. Passes: 10.
    """
    sequence = _sequence(context)
    maximum = context.criteria.max_field_samples_between_checks
    field_seqs = [r.seq for r in sequence.field]
    for opening, closing in zip(sequence.checks, sequence.checks[1:], strict=False):
        count = bisect_left(field_seqs, closing.seq) - bisect_left(field_seqs, opening.seq)
        if count > maximum:
            yield Finding(
                "bracket.frequency",
                Severity.FAIL,
                f"{count} field samples of {context.analyte} between {opening.sample_id} "
                f"(seq {opening.seq}) and {closing.sample_id} (seq {closing.seq}), "
                f"at most {maximum} allowed",
                analyte=context.analyte,
                sample_id=closing.sample_id,
                seq=closing.seq,
                value=float(count),
                limit=(None, float(maximum)),
            )


@rule("bracket.closing", "A check standard follows the last field sample")
def bracket_closing(context: AnalyteContext) -> Iterator[Finding]:
    """The run must end its last bracket with a check standard.

    Why: without a closing CCV nothing shows the instrument still held its
    calibration for the last samples (US EPA 6010D / 6020B, 200.7 / 200.8:
    a check at the end of the run [memory]). Settings:
    ``require_closing_check`` (true).

    Fails: the run ends with three samples after CCV-2. Passes: CCV-3 follows them.
    """
    if not context.criteria.require_closing_check:
        return
    sequence = _sequence(context)
    last_check = sequence.check_seqs[-1] if sequence.check_seqs else None
    after = [r for r in sequence.field if last_check is None or r.seq > last_check]
    if after:
        where = "in the run" if last_check is None else "after the last one"
        yield Finding(
            "bracket.closing",
            Severity.FAIL,
            f"no check standard {where} for {context.analyte}: {_names(after)} not reportable",
            analyte=context.analyte,
            sample_id=after[-1].sample_id,
            seq=after[-1].seq,
            flag=Flag.NOT_BRACKETED,
            affected=tuple(r.seq for r in after),
        )


@rule("bracket.reportable", "Every field sample lies between two passing check standards")
def bracket_reportable(context: AnalyteContext) -> Iterator[Finding]:
    """A field sample is reportable only between a passing check before and one after it.

    Why: when a CCV fails, the instrument may have drifted at any point since
    the last passing check, so every sample since then, and up to the next
    passing check, must be re-run (US EPA 6010D / 6020B, 200.8 [memory]).
    Samples before the first check standard are not bracketed either. Samples
    after a passing last check are ``bracket.closing``'s concern (which a lab
    may switch off); samples after a failing last check, or in a run with no
    check at all, are unreportable here whatever that setting. No settings: it
    follows ``check.recovery``'s limits.

    Fails: CCV-2 Zn failed, so the Zn results between CCV-1 and CCV-3 are
    flagged. Passes: every check standard recovered within 90–110 %.
    """
    sequence = _sequence(context)
    passing = {r.seq: check_passes(context, r) for r in sequence.checks}
    spans: dict[tuple[int | None, int | None], list[Reading]] = {}
    for sample in sequence.field:
        position = bisect_left(sequence.check_seqs, sample.seq)
        before = sequence.checks[position - 1] if position > 0 else None
        after = sequence.checks[position] if position < len(sequence.checks) else None
        before_passed = before is not None and passing[before.seq]
        if after is None and before_passed:
            continue  # after a passing last check: bracket.closing's case
        if before_passed and after is not None and passing[after.seq]:
            continue
        key = (before.seq if before else None, after.seq if after else None)
        spans.setdefault(key, []).append(sample)
    for (before_seq, after_seq), samples in spans.items():
        if before_seq is None:
            where = "before any check standard" if after_seq else "in a run with no check standard"
            yield Finding(
                "bracket.reportable",
                Severity.FAIL,
                f"{_names(samples)} {context.analyte} acquired {where}: not reportable",
                analyte=context.analyte,
                sample_id=samples[0].sample_id,
                seq=samples[0].seq,
                flag=Flag.NOT_BRACKETED,
                affected=tuple(r.seq for r in samples),
            )
            continue
        failed = [
            r.sample_id
            for r in sequence.checks
            if r.seq in (before_seq, after_seq) and not passing[r.seq]
        ]
        yield Finding(
            "bracket.reportable",
            Severity.FAIL,
            f"{len(samples)} {context.analyte} result(s) not reportable because "
            f"{' and '.join(failed)} failed: re-run {_names(samples)}",
            analyte=context.analyte,
            sample_id=samples[0].sample_id,
            seq=samples[0].seq,
            flag=Flag.CHECK_FAILED,
            affected=tuple(r.seq for r in samples),
        )
