"""What an evaluation produces: findings, per-reading results, calibrations, the verdict."""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum

from calwarden.rules.calibration import AdditionResult, Fit, MandelResult
from calwarden.rules.model import Kind, Reading


class Severity(StrEnum):
    FAIL = "fail"  # the run (or the named result) must not be reported as it is
    WARN = "warn"  # reportable, but the analyst should look
    INFO = "info"  # for the record


class Status(StrEnum):
    PASS = "pass"
    FAIL = "fail"
    ERROR = "error"  # the file could not be evaluated at all


#: A limit as (low, high); either end may be open.
Limit = tuple[float | None, float | None]


class Flag(StrEnum):
    """Short stable words on a result; other tools may rely on them."""

    OVER_RANGE = "over_range"  # above the highest standard: dilute and re-run
    BELOW_RANGE = "below_range"  # below the lowest non-zero standard: estimated value
    CALIBRATION_FAILED = "calibration_failed"  # the analyte's calibration did not pass
    NO_CALIBRATION = "no_calibration"  # no usable calibration for the analyte
    CHECK_FAILED = "check_failed"  # a neighbouring check standard failed
    NOT_BRACKETED = "not_bracketed"  # no check standard before or after it
    ISTD_OUT = "istd_out"  # the injection's internal standard is out of limits
    NOT_QUANTIFIABLE = "not_quantifiable"  # no concentration gives this response
    QC_FAILED = "qc_failed"  # this QC sample (blank, LCS, duplicate, spike) is out of limits
    NOT_JUDGED = "not_judged"  # a QC comparison that could not be made
    REPLICATES_DISAGREE = "replicates_disagree"  # the injections of one sample scatter too much
    BLANK_FAILED = "blank_failed"  # a calibration blank (ICB/CCB) next to it failed
    BLANK_CONTAMINATED = "blank_contaminated"  # below the multiple of a contaminated method blank
    LCS_FAILED = "lcs_failed"  # the LCS of its preparation batch failed
    BEYOND_INTERVAL = "beyond_interval"  # more field samples than allowed since the last check
    NOT_COMPUTABLE = "not_computable"  # a number of its result overflowed or is undefined
    # --- issue 15 (rules/acceptance/reporting.py, carryover.py)
    LOW_CHECK_FAILED = "low_check_failed"  # a low result next to a failing low-level check
    CARRYOVER = "carryover"  # right after a result above the top standard: carry-over suspected
    # --- issue 15: metals QC of the ICP methods, chromatography, mass spectrometry
    MATRIX_EFFECT = "matrix_effect"  # its serial dilution or post-digestion spike failed
    IDENTITY_UNCONFIRMED = "identity_unconfirmed"  # retention time or ion ratio out of limits


#: Flags that make a field sample's result unreportable: it goes on the re-run list.
RERUN_FLAGS = frozenset(
    {
        Flag.OVER_RANGE,
        Flag.CALIBRATION_FAILED,
        Flag.NO_CALIBRATION,
        Flag.CHECK_FAILED,
        Flag.NOT_BRACKETED,
        Flag.ISTD_OUT,
        Flag.NOT_QUANTIFIABLE,
        Flag.REPLICATES_DISAGREE,
        Flag.BLANK_FAILED,
        Flag.BLANK_CONTAMINATED,
        Flag.LCS_FAILED,
        Flag.BEYOND_INTERVAL,
        Flag.NOT_COMPUTABLE,
        Flag.LOW_CHECK_FAILED,
        Flag.CARRYOVER,
        Flag.MATRIX_EFFECT,
        Flag.IDENTITY_UNCONFIRMED,
    }
)


#: Results of sample material whose failed QC comparison puts them on the re-run list.
_RERUN_WHEN_QC_FAILED = frozenset({Kind.DUP, Kind.MS, Kind.MSD, Kind.ADDITION})


class Repeat(StrEnum):
    """What must be repeated beyond single samples."""

    CALIBRATION = "calibration"  # recalibrate, then re-run what the calibration quantitated
    RUN = "run"  # the analyte's run (or the whole run) as it stands cannot be reported


@dataclass(frozen=True, slots=True)
class Finding:
    """One rule's observation about the run, in plain words."""

    rule: str
    severity: Severity
    message: str
    analyte: str | None = None
    sample_id: str | None = None
    seq: int | None = None
    value: float | None = None
    limit: Limit | None = None
    flag: Flag | None = None  # put on the results listed in ``affected``
    affected: tuple[int, ...] = ()  # seqs of this analyte's results the finding concerns
    # seqs of the QC readings whose failure this finding carries to the samples (consequences)
    causes: tuple[int, ...] = ()


@dataclass(frozen=True, slots=True)
class Result:
    """One non-calibration reading (or one standard-addition series) turned into a concentration.

    ``measured`` is the concentration in the measured solution; ``concentration``
    is ``measured`` times the dilution, as reported. ``uncertainty`` is the
    standard uncertainty of ``concentration`` from the calibration alone.
    """

    sample_id: str
    seq: int | None
    kind: Kind
    analyte: str
    line: int | None
    signal: float | None  # the response used (blank-corrected, ISTD ratio), None for additions
    measured: float | None
    concentration: float | None
    uncertainty: float | None
    dilution: float
    unit: str | None
    flags: tuple[Flag, ...] = ()
    suggested_dilution: float | None = None  # only with OVER_RANGE
    # --- issue 15: the reporting limit × dilution, and the data qualifiers (lab's letters)
    reporting_limit: float | None = None
    below_reporting_limit: bool = False  # reported as "< reporting_limit"
    qualifiers: tuple[str, ...] = ()


@dataclass(frozen=True, slots=True)
class ReplicateGroup:
    """Replicate injections of one sample (same id and kind, one analyte) as one reported result.

    ``concentration`` is read off the curve at the mean response (times the common
    dilution); ``uncertainty`` is the calibration's for a mean of m readings
    (:meth:`~rules.calibration.Fit.inverse_uncertainty` with ``replicates=m``).
    With differing dilutions the concentrations are averaged and ``uncertainty``
    is ``None``. ``rsd_pct`` is the %RSD of the injections' concentrations.
    ``flags`` are every injection's flags together. Each injection stays a
    :class:`Result` of its own.
    """

    sample_id: str
    kind: Kind
    analyte: str
    seqs: tuple[int, ...]
    signal: float | None  # mean response
    measured: float | None
    concentration: float | None
    uncertainty: float | None
    rsd_pct: float | None
    dilution: float | None  # None when the injections' dilutions differ
    unit: str | None
    flags: tuple[Flag, ...] = ()


@dataclass(frozen=True, slots=True)
class StandardPoint:
    """One calibration standard and how well the fit gives it back."""

    sample_id: str
    seq: int
    line: int
    nominal: float
    signal: float
    back_calculated: float | None
    error_pct: float | None


@dataclass(frozen=True, slots=True)
class Calibration:
    """One analyte's calibration: the fit, its standards and its figures of merit."""

    analyte: str
    unit: str | None
    fit: Fit | None  # None when the standards could not determine the model
    standards: tuple[StandardPoint, ...]
    blank_signal: float | None  # the mean blank subtracted, when blank correction applies
    uses_internal_standard: bool
    istd_reference: float | None  # mean ISTD response of the standards
    rse_pct: float | None
    mandel: MandelResult | None
    lod: float | None
    loq: float | None
    range_low: float | None  # lowest non-zero standard
    range_high: float | None
    problem: str | None = None  # why there is no fit, in plain words

    def same_basis(self, reading: Reading) -> bool:
        """Whether ``reading`` is on this curve's basis: both ratios, or both raw responses."""
        return (reading.istd_response is not None) == self.uses_internal_standard


@dataclass(frozen=True, slots=True)
class AdditionSeries:
    """One standard-addition series: the native sample measured with increasing additions."""

    analyte: str
    parent: str
    seqs: tuple[int, ...]
    added: tuple[float, ...]
    signals: tuple[float, ...]
    dilution: float
    outcome: AdditionResult | None  # None when the points cannot give a line
    problem: str | None = None

    @property
    def r_squared(self) -> float | None:
        return self.outcome.fit.r_squared if self.outcome else None


def status_of(findings: tuple[Finding, ...] | list[Finding]) -> Status:
    """A judged run's status: ``fail`` when any finding fails, else ``pass``."""
    return Status.FAIL if any(f.severity is Severity.FAIL for f in findings) else Status.PASS


@dataclass(frozen=True, slots=True)
class ControlChart:
    """One control chart this run added points to, as the verdict summarises it."""

    instrument: str
    analyte: str
    kind: str
    level: str
    points: int  # the series' points, this run's included
    centre: float | None
    sd: float | None  # of one observation
    limits: str | None  # "baseline" or "fixed"; None while the series has none
    sd_within: float | None = None
    sd_between: float | None = None
    runs: int | None = None  # baseline runs behind the limits


@dataclass(frozen=True, slots=True)
class Verdict:
    """The whole judgement of a run."""

    status: Status
    run: str | None
    instrument: str | None
    findings: tuple[Finding, ...]
    calibrations: tuple[Calibration, ...]
    results: tuple[Result, ...]
    additions: tuple[AdditionSeries, ...] = ()
    error: str | None = None
    replicates: tuple[ReplicateGroup, ...] = ()
    control_charts: tuple[ControlChart, ...] = ()  # only when judged against a control log

    def reruns(self) -> tuple[Result, ...]:
        """Results that cannot be reported as they are, and failed QC made from a sample.

        A duplicate, a matrix spike or a standard-addition series that failed its
        own comparison is measured again first (common practice: re-analysis tells
        an injection problem from the sample's matrix), so it is on the list too.
        """
        return tuple(
            r
            for r in self.results
            if RERUN_FLAGS.intersection(r.flags)
            or (r.kind in _RERUN_WHEN_QC_FAILED and Flag.QC_FAILED in r.flags)
        )

    def repeats(self) -> tuple[RepeatAdvice, ...]:
        """What to repeat beyond the re-run list: a calibration, or an analyte's whole run.

        A failed calibration, or a failed ICV (it verifies the calibration), asks for a
        new calibration (US EPA 6010D / 6020B: recalibrate when the ICV fails [memory]).
        Any other failing finding that neither puts a result on the re-run list nor is
        carried to the samples by a consequence (``Finding.causes``) asks for the
        analyte's run to be repeated: a failing run always says what to do.
        """
        reruns = {(r.analyte, r.seq) for r in self.reruns()}
        kinds: dict[tuple[str | None, int | None], Kind] = {
            (r.analyte, r.seq): r.kind for r in self.results
        }
        fails = [f for f in self.findings if f.severity is Severity.FAIL]
        carried = {
            (f.analyte, seq)
            for f in fails
            if any((f.analyte, a) in reruns for a in f.affected)
            for seq in f.causes
        }
        advice: dict[tuple[Repeat, str | None], list[str]] = {}
        for finding in fails:
            key = (finding.analyte, finding.seq)
            if finding.rule.startswith("calibration.") or (
                finding.rule == "check.recovery" and kinds.get(key) is Kind.ICV
            ):
                what = Repeat.CALIBRATION
            elif key in carried or any((finding.analyte, a) in reruns for a in finding.affected):
                continue
            else:
                what = Repeat.RUN
            reasons = advice.setdefault((what, finding.analyte), [])
            if finding.message not in reasons:
                reasons.append(finding.message)
        return tuple(
            RepeatAdvice(what, analyte, tuple(reasons))
            for (what, analyte), reasons in advice.items()
        )


@dataclass(frozen=True, slots=True)
class RepeatAdvice:
    """One thing to repeat beyond single samples, with the findings that ask for it."""

    what: Repeat
    analyte: str | None  # None: the whole run
    reasons: tuple[str, ...]
