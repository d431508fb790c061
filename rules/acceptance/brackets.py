"""Rules on the sequence: check standards bracketing the field samples."""

from __future__ import annotations

from bisect import bisect_left
from collections.abc import Iterator
from dataclasses import dataclass

from calwarden.rules.acceptance.common import (
    blank_fails,
    blank_limit,
    check_passes,
    istd_fails,
    number,
    result_of,
    superseded_checks,
)
from calwarden.rules.model import CHECK_KINDS, FIELD_KINDS, Kind, Reading
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
    sample, dup, ms, msd, lcs and mb. The samples after the allowed number were
    run without the check they were owed: they are named, flagged
    ``beyond_interval`` and put on the re-run list (common practice: re-run
    them in a bracket of the right length). Settings:
    ``max_field_samples_between_checks`` (10).

    Fails: 12 samples between CCV-1 and CCV-2: the 11th and 12th are flagged.
    Passes: 10.
    """
    sequence = _sequence(context)
    maximum = context.criteria.max_field_samples_between_checks
    field_seqs = [r.seq for r in sequence.field]
    for opening, closing in zip(sequence.checks, sequence.checks[1:], strict=False):
        first = bisect_left(field_seqs, opening.seq)
        count = bisect_left(field_seqs, closing.seq) - first
        if count > maximum:
            beyond = list(sequence.field[first + maximum : first + count])
            yield Finding(
                "bracket.frequency",
                Severity.FAIL,
                f"{count} field samples of {context.analyte} between {opening.sample_id} "
                f"(seq {opening.seq}) and {closing.sample_id} (seq {closing.seq}), "
                f"at most {maximum} allowed: re-run {_names(beyond)} in a shorter bracket",
                analyte=context.analyte,
                sample_id=closing.sample_id,
                seq=closing.seq,
                value=float(count),
                limit=(None, float(maximum)),
                flag=Flag.BEYOND_INTERVAL,
                affected=tuple(r.seq for r in beyond),
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
    check at all, are unreportable here whatever that setting. A check whose
    internal standard failed (``istd.recovery``) is no valid bracket however
    well it recovered: its ratio no longer shows what the samples' ratios do
    (common practice). A failing CCV that ``ccv_rerun_policy`` lets an immediate
    passing re-run stand for (``check.rerun``) breaks no bracket. No settings of
    its own: it follows the limits of ``check.recovery`` and ``istd.recovery``.

    Fails: CCV-2 Zn failed, so the Zn results between CCV-1 and CCV-3 are
    flagged; so are they when CCV-2 recovered 101 % with its internal standard
    at 55 %. Passes: every check standard recovered within 90–110 %.
    """
    sequence = _sequence(context)
    istd_failed = {r.seq for r in sequence.checks if istd_fails(context, r)}
    superseded = superseded_checks(context)  # failing CCVs an allowed re-run stands for
    passing = {
        r.seq: (check_passes(context, r) or r.seq in superseded) and r.seq not in istd_failed
        for r in sequence.checks
    }
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
            r for r in sequence.checks if r.seq in (before_seq, after_seq) and not passing[r.seq]
        ]
        names = " and ".join(
            f"{r.sample_id}'s internal standard" if r.seq in istd_failed else r.sample_id
            for r in failed
        )
        yield Finding(
            "bracket.reportable",
            Severity.FAIL,
            f"{len(samples)} {context.analyte} result(s) not reportable because "
            f"{names} failed: re-run {_names(samples)}",
            analyte=context.analyte,
            sample_id=samples[0].sample_id,
            seq=samples[0].seq,
            flag=Flag.CHECK_FAILED,
            affected=tuple(r.seq for r in samples),
            causes=tuple(r.seq for r in failed),
        )


@rule("bracket.blank", "Field samples next to a failing calibration blank are not reportable")
def bracket_blank(context: AnalyteContext) -> Iterator[Finding]:
    """A failing ICB or CCB makes the samples around it, up to the passing blanks, unreportable.

    Why: a calibration blank shows the baseline and carry-over at its point in
    the sequence; when one fails, every sample since the last passing blank may
    carry the same bias, up to the next passing one, and must be re-run (US EPA
    6010D / 6020B, 200.7 / 200.8: when a CCB fails, re-analyse the samples since
    the last acceptable CCB [memory]). With no passing blank before (or after),
    the span reaches back to the run's start (or on to its end). ICB and CCB are
    both kind ``ccb``. A blank that cannot be quantitated is left to
    ``calibration.present`` and ``range.on_curve``. No settings: it follows the
    limit of ``blank.contamination``.

    Fails: CCB-2 Zn at 1.42 µg/L (limit 1): the Zn results between CCB-1 and
    CCB-3 are flagged ``blank_failed``. Passes: every CCB below 1 µg/L.
    """
    limit = blank_limit(context)
    if limit is None:
        return
    judged = [
        (r, failed)
        for r in context.of_kind(Kind.CCB)
        if (failed := blank_fails(context, r)) is not None
    ]
    field = [r for r in context.readings if r.kind in FIELD_KINDS]
    index = 0
    while index < len(judged):
        if not judged[index][1]:
            index += 1
            continue
        end = index
        while end + 1 < len(judged) and judged[end + 1][1]:
            end += 1
        failing = [r for r, _ in judged[index : end + 1]]
        start_seq = judged[index - 1][0].seq if index > 0 else None
        stop_seq = judged[end + 1][0].seq if end + 1 < len(judged) else None
        samples = [
            r
            for r in field
            if (start_seq is None or r.seq > start_seq) and (stop_seq is None or r.seq < stop_seq)
        ]
        index = end + 1
        if not samples:
            continue
        levels = ", ".join(
            f"{r.sample_id} at {number(_measured(context, r))}{context.unit}" for r in failing
        )
        yield Finding(
            "bracket.blank",
            Severity.FAIL,
            f"{len(samples)} {context.analyte} result(s) not reportable because {levels} "
            f"failed (limit below {number(limit)}{context.unit}): re-run {_names(samples)}",
            analyte=context.analyte,
            sample_id=samples[0].sample_id,
            seq=samples[0].seq,
            flag=Flag.BLANK_FAILED,
            affected=tuple(r.seq for r in samples),
            causes=tuple(r.seq for r in failing),
        )


def _measured(context: AnalyteContext, reading: Reading) -> float:
    result = result_of(context, reading)
    return result.measured if result is not None and result.measured is not None else 0.0
