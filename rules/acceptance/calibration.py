"""Rules on the initial calibration itself."""

from __future__ import annotations

from collections.abc import Iterator

from calwarden.rules.acceptance.common import number
from calwarden.rules.calibration import MandelResult, Model
from calwarden.rules.model import Kind
from calwarden.rules.rule import AnalyteContext, rule
from calwarden.rules.verdict import Finding, Flag, Severity

_NO_CURVE_NEEDED = frozenset({Kind.BLANK, Kind.CAL, Kind.ADDITION})


@rule("calibration.present", "The analyte has a calibration that determines its model")
def calibration_present(context: AnalyteContext) -> Iterator[Finding]:
    """Every quantitated analyte needs calibration standards that determine its model.

    Why: without a curve no concentration exists; reporting one would be invention
    (common practice). Settings: ``model``. Analytes measured only by standard
    addition need no calibration.

    Fails: Zn samples in a run with no ``cal`` rows for Zn, or with two standards
    for a quadratic. Passes: six Zn standards fitted with a line.
    """
    needs_curve = any(r.kind not in _NO_CURVE_NEEDED for r in context.readings)
    calibration = context.calibration
    if not needs_curve:
        return
    if calibration is None or calibration.fit is None:
        reason = calibration.problem if calibration else "no calibration standards in the run"
        yield Finding(
            "calibration.present",
            Severity.FAIL,
            f"{context.analyte} cannot be quantitated: {reason}",
            analyte=context.analyte,
            flag=Flag.NO_CALIBRATION,
            affected=tuple(context.results),
        )


@rule("calibration.levels", "The calibration has enough non-zero concentration levels")
def calibration_levels(context: AnalyteContext) -> Iterator[Finding]:
    """A curve needs enough distinct non-zero levels to show its shape.

    Why: US EPA SW-846 Method 8000D asks for at least five standards for a
    line and six for a quadratic [memory]. Settings: ``min_levels`` (5),
    ``min_levels_quadratic`` (6). A zero-concentration point does not count.

    Fails: a line through 1, 5, 10 and 50 µg/L (4 levels). Passes: 0.5, 1, 5,
    10, 25 and 50 µg/L (6 levels).
    """
    calibration = context.calibration
    if calibration is None:
        return
    levels = len({s.nominal for s in calibration.standards if s.nominal > 0})
    criteria = context.criteria
    required = (
        criteria.min_levels_quadratic if criteria.model is Model.QUADRATIC else criteria.min_levels
    )
    if levels < required:
        yield Finding(
            "calibration.levels",
            Severity.FAIL,
            f"{context.analyte} calibration has {levels} non-zero levels, at least {required} "
            f"needed for a {criteria.model.value} model",
            analyte=context.analyte,
            value=float(levels),
            limit=(float(required), None),
        )


@rule("calibration.r_squared", "The calibration's coefficient of determination is high enough")
def calibration_r_squared(context: AnalyteContext) -> Iterator[Finding]:
    """r² of the fit must reach the minimum.

    Why: a low r² means the points scatter about the curve (8000D accepts
    r ≥ 0.995 for a line [memory]; r² ≥ 0.995 is the stricter common practice).
    For a fit through zero r² is the uncentred one; for a weighted fit, the
    weighted r². Settings: ``min_r_squared`` (0.995). Not applied to average RF,
    which is judged by its %RSD.

    Fails: r² = 0.9871. Passes: r² = 0.99993.
    """
    calibration = context.calibration
    if calibration is None or calibration.fit is None or calibration.fit.r_squared is None:
        return
    if calibration.fit.model is Model.AVERAGE_RF:
        return
    r_squared = calibration.fit.r_squared
    minimum = context.criteria.min_r_squared
    if r_squared < minimum:
        yield Finding(
            "calibration.r_squared",
            Severity.FAIL,
            f"{context.analyte} calibration r² = {r_squared:.5f}, limit ≥ {minimum}",
            analyte=context.analyte,
            value=r_squared,
            limit=(minimum, None),
        )


@rule("calibration.back_calculation", "Each standard reads back close to its nominal value")
def calibration_back_calculation(context: AnalyteContext) -> Iterator[Finding]:
    """Every standard, read back through the fitted curve, must be near its nominal value.

    Why: r² hides a poor fit at the low end; back-calculated standards show it
    (FDA Bioanalytical Method Validation 2018, ICH M10 2022: ±15 %, ±20 % at
    the lowest level; TNI 2016 asks for the relative error of regression
    calibrations). Settings: ``back_calculation_pct`` (15),
    ``back_calculation_lowest_pct`` (20). Zero-concentration points are not judged.

    Fails: the 1 µg/L standard reads back 1.31 µg/L (+31 %). Passes: it reads
    back 1.04 µg/L (+4 %).
    """
    calibration = context.calibration
    if calibration is None or calibration.fit is None:
        return
    criteria = context.criteria
    lowest = calibration.range_low
    for standard in calibration.standards:
        if standard.nominal <= 0:
            continue
        tolerance = (
            criteria.back_calculation_lowest_pct
            if standard.nominal == lowest
            else criteria.back_calculation_pct
        )
        error = standard.error_pct
        if error is None or abs(error) > tolerance:
            found = "cannot be read back" if error is None else f"reads back {error:+.1f} %"
            yield Finding(
                "calibration.back_calculation",
                Severity.FAIL,
                f"{standard.sample_id} {context.analyte} (nominal {number(standard.nominal)}"
                f"{context.unit}) {found}, limit ±{number(tolerance)} %",
                analyte=context.analyte,
                sample_id=standard.sample_id,
                seq=standard.seq,
                value=error,
                limit=(-tolerance, tolerance),
            )


@rule("calibration.linearity", "A straight line is not significantly worse than a quadratic")
def calibration_linearity(context: AnalyteContext) -> Iterator[Finding]:
    """Mandel's fitting test on a straight-line calibration, in the weighted space of its noise.

    Why: a curved response fitted with a line biases mid-range results even
    when r² looks fine (ISO 8466-1:1990 §4.1.3, Mandel 1964). Applied to
    ``linear`` fits with at least 5 levels; a warning, since the lab may prefer
    a narrower range to a quadratic. The F test assumes equal variances, which
    ISO 8466-1 checks first from replicates at both ends of the range; routine
    runs have none, and reading noise that grows with the response made the
    unweighted test warn on one straight curve in eight (46 % with a 1/x² fit
    tested unweighted). So the test runs in the weighted space of the noise:
    a weighted calibration's own weights; for an unweighted one the variance
    model ``linearity_variance`` (``proportional``: 1/x² weights, default;
    ``constant``: the plain test). Generalised least squares makes the weighted
    problem a homoscedastic one, so PG follows F(1, N − 3) again (Draper &
    Smith §9.2 [memory]). With only six standards s² has three degrees of
    freedom and F(0.99; 1, 3) = 34: state the method's validated reading
    repeatability (``linearity_reading_rsd_pct``) to test against a known
    variance, F(0.99; 1, ∞) = 6.63, which sees a 6 % bend at the top standard
    against 1 % noise; a statement the run's residuals contradict (χ² test at
    1 %) is set aside. Figures: tests/benchmarks/alarms_calibration.py.
    Settings: ``mandel_alpha`` (0.01), ``linearity_variance`` (proportional),
    ``linearity_reading_rsd_pct`` (none).

    Warns: a detector saturating at the top standards, y = 1000·x − 8·x² (PG = 6.9e5
    > F = 34.1, in 1/x² space). Passes: the straight response of the case base (PG = 0.09).
    """
    calibration = context.calibration
    if calibration is None or calibration.mandel is None:
        return
    mandel = calibration.mandel
    if mandel.significant:
        yield Finding(
            "calibration.linearity",
            Severity.WARN,
            f"{context.analyte} calibration is curved (Mandel PG = {number(mandel.statistic)} > "
            f"F = {number(mandel.critical)}, tested {_space(mandel)}): consider a quadratic "
            "model or a narrower range",
            analyte=context.analyte,
            value=mandel.statistic,
            limit=(None, mandel.critical),
        )


def _space(mandel: MandelResult) -> str:
    """Where the test ran, in a few words: "weighted 1/x2, stated 1 % RSD"."""
    space = "unweighted" if mandel.weighting == "none" else f"weighted {mandel.weighting}"
    return f"{space}, stated repeatability" if mandel.stated_variance else space


@rule("calibration.rf_rsd", "Average response factors agree with each other")
def calibration_rf_rsd(context: AnalyteContext) -> Iterator[Finding]:
    """With the average-RF model, the standards' response factors must agree.

    Why: averaging response factors assumes a line through zero; their %RSD
    tells whether that holds (US EPA SW-846 Method 8000D: ≤ 20 % [memory]).
    Settings: ``max_rf_rsd_pct`` (20). Only for ``model: average_rf``.

    Fails: RFs of 980 to 1,620 counts per ng/mL (%RSD 24.7). Passes: %RSD 3.1.
    """
    calibration = context.calibration
    if calibration is None or calibration.fit is None:
        return
    rsd = calibration.fit.rf_rsd_pct
    maximum = context.criteria.max_rf_rsd_pct
    if calibration.fit.model is Model.AVERAGE_RF and rsd is not None and rsd > maximum:
        yield Finding(
            "calibration.rf_rsd",
            Severity.FAIL,
            f"{context.analyte} response factors vary by {rsd:.1f} % RSD, "
            f"limit ≤ {number(maximum)} %",
            analyte=context.analyte,
            value=rsd,
            limit=(None, maximum),
        )


@rule("calibration.rse", "The calibration's relative standard error is small enough")
def calibration_rse(context: AnalyteContext) -> Iterator[Finding]:
    """Relative standard error of the calibration (US EPA SW-846 Method 8000D).

    Why: RSE weighs every standard's relative error and suits weighted and
    quadratic fits (8000D: ≤ 20 % [memory]). Off by default, as the
    back-calculation rule covers it; switch on with ``max_rse_pct``.

    Fails (with ``max_rse_pct: 10``): RSE 12.8 %. Passes: RSE 4.2 %.
    """
    calibration = context.calibration
    maximum = context.criteria.max_rse_pct
    if maximum is None or calibration is None or calibration.rse_pct is None:
        return
    if calibration.rse_pct > maximum:
        yield Finding(
            "calibration.rse",
            Severity.FAIL,
            f"{context.analyte} calibration RSE {calibration.rse_pct:.1f} %, "
            f"limit ≤ {number(maximum)} %",
            analyte=context.analyte,
            value=calibration.rse_pct,
            limit=(None, maximum),
        )
