"""The verdict JSON document as types: what ``verdict_json`` writes and every reader reads.

The report, the alerts, the flagged copy and the pictures all read the verdict
document, never the core's objects (an ``error`` verdict has none). These
TypedDicts describe that document key by key, so mypy checks every key a
reader uses and every value it takes out, while the document stays a plain
dict: ``json.dumps`` writes it as before and ``json.loads`` reads back the same
shape (a verdict read from a file or the ledger is typed by annotating it).

Adding a key to the verdict is one line in its TypedDict here: a key every
document has is plain; a key only some documents have (the daemon's
``control_charts`` and ``pictures``, a calibration's fit figures) is
``NotRequired``. ``verdict_to_json`` must then write it (mypy refuses a
document literal that lacks a plain key or has an unknown one). Keys are never
renamed or removed (the README, "The verdict JSON").

Numbers are ``float | None``: JSON has no NaN or infinity, so such a value is
written as null. Enumerated values (status, severity, flags, models) are plain
``str`` here; their allowed values are listed beside them and in the README.
"""

# No ``from __future__ import annotations``: Python 3.11 tells NotRequired keys from
# required ones only when the annotations are evaluated as the class is made.
from typing import NotRequired, TypedDict

__all__ = [
    "AdditionEntry",
    "Affected",
    "CalibrationEntry",
    "ControlChartEntry",
    "FindingEntry",
    "FitEntry",
    "MandelEntry",
    "RerunEntry",
    "ResultEntry",
    "Source",
    "StandardEntry",
    "VerdictDocument",
]


class Source(TypedDict):
    path: str
    sha256: str | None  # of exactly the bytes judged; None when they could not be read


class Affected(TypedDict):
    seq: int
    sample_id: str | None


class FindingEntry(TypedDict):
    rule: str  # a rule id, or control.<Westgard rule> for a control-chart finding
    severity: str  # "fail" | "warn" | "info"
    analyte: str | None  # None: about the whole run
    sample_id: str | None
    seq: int | None
    value: float | None  # control-chart findings: the completing point's z-score
    limit: list[float | None] | None  # [low, high]; either end may be open
    message: str
    affected: list[Affected]
    causes: list[Affected]  # the failed QC readings a consequence carries to the samples


class FitEntry(TypedDict):
    """A fitted line: a calibration's, or a standard-addition series'."""

    model: str  # "linear" | "linear_through_zero" | "quadratic" | "average_rf"
    weighting: str  # "none" | "1/x" | "1/x2"
    coefficients: list[float | None]  # ascending powers: b0, b1, (b2)
    std_errors: list[float | None]
    covariance: list[list[float | None]] | None
    r_squared: float | None
    r: float | None
    residual_sd: float | None
    degrees_of_freedom: int
    points: int
    levels: int
    response_factor_mean: float | None
    response_factor_rsd_pct: float | None


class MandelEntry(TypedDict):
    statistic: float | None
    critical: float | None
    alpha: float
    significant: bool
    weighting: str  # the weighted space the test ran in: "none", "1/x" or "1/x2"
    stated_variance: bool  # the lab's stated reading repeatability was used


class StandardEntry(TypedDict):
    sample_id: str
    seq: int
    nominal: float | None
    response: float | None
    back_calculated: float | None
    error_pct: float | None


class CalibrationEntry(TypedDict):
    """One analyte's calibration; without a fit, the fit's own figures are absent."""

    model: str | None
    weighting: str | None
    coefficients: list[float | None] | None
    std_errors: list[float | None] | None
    r_squared: float | None
    residual_sd: float | None
    points: int
    # The figures only a fit has (FitEntry's), written after ``points`` when there is one.
    covariance: NotRequired[list[list[float | None]] | None]
    r: NotRequired[float | None]
    degrees_of_freedom: NotRequired[int]
    levels: NotRequired[int]
    response_factor_mean: NotRequired[float | None]
    response_factor_rsd_pct: NotRequired[float | None]
    range: list[float | None]  # [lowest non-zero standard, highest]
    unit: str | None
    blank_response_subtracted: float | None
    internal_standard: bool
    internal_standard_reference: float | None
    rse_pct: float | None
    mandel: MandelEntry | None
    lod: float | None
    loq: float | None
    problem: str | None  # why there is no fit, in plain words
    standards: list[StandardEntry]


class ResultEntry(TypedDict):
    sample_id: str
    seq: int | None
    kind: str  # a native kind word; "addition" for a standard-addition parent
    analyte: str
    concentration: float | None  # as reported, dilution applied
    uncertainty: float | None
    unit: str | None
    measured: float | None  # in the measured solution
    dilution: float | None
    response: float | None
    flags: list[str]  # the README lists them
    suggested_dilution: float | None
    reporting_limit: float | None  # dilution applied; None: no reporting limit
    reported_as: str | None  # "< 10" when below the reporting limit, else None
    qualifiers: list[str]  # data qualifiers, in the lab's letters (U, J, B, E by default)


class AdditionEntry(TypedDict):
    analyte: str
    parent: str
    seqs: list[int]
    added: list[float | None]
    responses: list[float | None]
    dilution: float | None
    concentration_measured: float | None
    std_dev_measured: float | None
    fit: FitEntry | None
    problem: str | None


class ReplicateEntry(TypedDict):
    """A sample injected more than once: the one result it reports."""

    sample_id: str
    kind: str
    analyte: str
    seqs: list[int]
    injections: int
    concentration: float | None
    uncertainty: float | None
    unit: str | None
    measured: float | None
    dilution: float | None
    response: float | None
    rsd_pct: float | None
    flags: list[str]


class RepeatEntry(TypedDict):
    """More than single samples to measure again: a calibration, or a run."""

    what: str  # "calibration" | "run"
    analyte: str | None  # None: the whole run
    reasons: list[str]  # the findings' messages


class RerunEntry(TypedDict):
    """One injection to re-run."""

    sample_id: str
    seq: int | None
    analytes: list[str]
    flags: list[str]
    by_analyte: dict[str, list[str]]  # analyte -> its flags
    suggested_dilution: float | None
    reasons: list[str]  # the failing findings' messages


class ControlChartEntry(TypedDict):
    """One control series the run added points to (written by the daemon only)."""

    instrument: str
    analyte: str
    kind: str  # "ICV" | "CCV" | "LCS" | "ISTD" | "slope"
    level: str
    points: int
    centre: float | None
    sd: float | None
    limits: str | None  # "baseline" | "fixed" | None: not yet
    sd_within: float | None  # the SD within one run, when the limits split it
    sd_between: float | None  # the SD between runs
    runs: int | None  # baseline runs behind the limits (None or 0: not known)


class VerdictDocument(TypedDict):
    """The verdict JSON, in the order its keys are written."""

    schema_version: int
    status: str  # "pass" | "fail" | "error"
    run: str | None
    instrument: str | None
    source: Source
    calwarden_version: str
    criteria_sha256: str | None
    caution: str
    findings: list[FindingEntry]
    calibrations: dict[str, CalibrationEntry]  # by analyte
    results: list[ResultEntry]
    additions: list[AdditionEntry]
    replicates: list[ReplicateEntry]
    reruns: list[RerunEntry]
    repeat: list[RepeatEntry]
    error: str | None  # why the file could not be judged (status "error")
    # Written by the daemon only:
    control_charts: NotRequired[list[ControlChartEntry]]
    pictures: NotRequired[list[str]]  # names of the run's calibration pictures
