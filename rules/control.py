"""Control charts of check-standard recoveries: limits, the Westgard multirules, EWMA.

Pure maths on series of control points kept in time order, one series per control
material (say the CCV of one analyte at one level): no files, no clock, no logging.
A series is judged against its :class:`ControlLimits` (a centre and an SD) through
each point's z-score, z = (value − centre) / SD; every message states z in SD units.

Sources:

- Westgard JO, Barry PL, Hunt MR, Groth T. A multi-rule Shewhart chart for quality
  control in clinical chemistry. Clin Chem 1981;27:493–501. The rule definitions
  below follow it as recalled and as restated in later tables of the rules; the
  paper itself was not re-read here [memory]. Where a reading is ours (a point
  exactly on a limit, more than two materials, how often a long pattern is
  reported) the rule's docstring says so.
- Roberts SW. Control chart tests based on geometric moving averages.
  Technometrics 1959;1:239–250 (the EWMA chart).
- Lucas JM, Saccucci MS. Exponentially weighted moving average control schemes:
  properties and enhancements. Technometrics 1990;32:1–12 (exact time-varying
  limits, choice of λ and L) [memory].

Conventions (our reading): a point "exceeds" a limit only when strictly beyond it,
so z = 2.0 exactly is not a 1-2s point; a pattern longer than a rule needs is
reported once for every point that completes it (each such point's run is one the
rule rejects), so ten points above the mean followed by two more give three 10-x
violations.
"""

from __future__ import annotations

import functools
import math
import statistics
from collections.abc import Callable, Collection, Iterator, Sequence
from dataclasses import dataclass
from enum import StrEnum

from calwarden.rules.verdict import Severity

# --- points, limits, series ---------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class ControlPoint:
    """One control observation (a check standard's recovery, say).

    ``order`` places it in time: strictly increasing along a series and comparable
    across the series of one group (the log's running number, for instance), since
    the across-material rules merge a group's series on it; equal orders in two
    series mean "measured together". ``run`` names the run the point came from.
    ``label`` is a free name for messages (the sample id, say).
    """

    value: float
    run: str
    order: int
    label: str | None = None

    def __post_init__(self) -> None:
        if not math.isfinite(self.value):
            raise ValueError(f"a control value must be finite, got {self.value}")
        if not self.run:
            raise ValueError("a control point needs the name of its run")


class LimitSource(StrEnum):
    """Where a chart's centre and SD come from."""

    BASELINE = "baseline"  # mean and sample SD of the series' own first points
    FIXED = "fixed"  # given: an earlier period, a certificate, the method


@dataclass(frozen=True, slots=True)
class ControlLimits:
    """Centre line and SD of a control chart; the limits are centre ± k·SD.

    ``n`` is the number of baseline points behind the values (0 when fixed values
    come from no points the chart knows of). ``sd`` is the SD of one observation.

    How the variance splits between runs and within a run (the one-way
    random-effects decomposition of :func:`run_baseline`): ``sd_within`` is the
    SD of points of one run about their run's mean, and ``sd_between`` the SD of
    the runs' true means; ``sd`` is then √(between² + within²). ``None`` means the
    split is not known (every baseline run had one point, or fixed limits that
    give only one SD): the whole variance is then taken to lie between runs, the
    cautious choice, so a run's mean is judged by ``sd`` itself. ``runs`` is the
    number of baseline runs behind the values (0: not from a baseline); limits
    from few runs are widened for the uncertainty of their own SD (see
    :func:`prediction_factor`).
    """

    centre: float
    sd: float
    n: int
    source: LimitSource
    sd_within: float | None = None
    sd_between: float | None = None
    runs: int = 0

    def __post_init__(self) -> None:
        if not math.isfinite(self.centre):
            raise ValueError(f"the centre must be finite, got {self.centre}")
        if not (math.isfinite(self.sd) and self.sd > 0.0):
            raise ValueError(f"the SD must be finite and greater than zero, got {self.sd}")
        if self.n < 0:
            raise ValueError(f"n must not be negative, got {self.n}")
        if self.source is LimitSource.BASELINE and self.n < BASELINE_MINIMUM:
            raise ValueError(f"a baseline needs at least {BASELINE_MINIMUM} points, got {self.n}")
        for name, part in (("sd_within", self.sd_within), ("sd_between", self.sd_between)):
            if part is not None and not (math.isfinite(part) and part >= 0.0):
                raise ValueError(f"{name} must be finite and not negative, got {part}")
        if self.runs < 0:
            raise ValueError(f"runs must not be negative, got {self.runs}")

    @classmethod
    def fixed(
        cls, centre: float, sd: float, n: int = 0, sd_within: float | None = None
    ) -> ControlLimits:
        """Limits given by the laboratory rather than computed from the series.

        ``sd_within`` (optional, at most ``sd``): the part of ``sd`` seen within one
        run; the rest lies between runs.
        """
        between = None
        if sd_within is not None:
            if sd_within > sd:
                raise ValueError(f"sd_within ({sd_within}) must not exceed sd ({sd})")
            between = math.sqrt(sd * sd - sd_within * sd_within)
        return cls(
            centre=centre,
            sd=sd,
            n=n,
            source=LimitSource.FIXED,
            sd_within=sd_within,
            sd_between=between,
        )

    @property
    def widening(self) -> float:
        """The factor the SDs are widened by for a baseline of ``runs`` runs (1 if fixed)."""
        return prediction_factor(self.runs) if self.source is LimitSource.BASELINE else 1.0

    def z(self, value: float) -> float:
        """One observation ``value`` in SD units from the centre."""
        return (value - self.centre) / (self.sd * self.widening)

    def run_sd(self, count: int) -> float:
        """The SD of the mean of ``count`` points of one run: √(between² + within²/count).

        Unknown split: ``sd`` (all of it between runs). Widened as :attr:`widening`.
        """
        if self.sd_within is None or self.sd_between is None:
            return self.sd * self.widening
        variance = self.sd_between**2 + self.sd_within**2 / max(count, 1)
        return math.sqrt(variance) * self.widening

    def run_z(self, mean: float, count: int) -> float:
        """The mean of ``count`` points of one run in SDs of such a mean."""
        return (mean - self.centre) / self.run_sd(count)


#: Widening is computed for this rule multiple: the 3.5 SD of 1-3.5s, the rule that
#: rejects by default, so that its false-rejection rate is the nominal one.
_WIDENING_AT = 3.5


def prediction_factor(runs: int) -> float:
    """How much wider than its estimated SD a chart from ``runs`` baseline runs must be.

    A limit of k estimated SDs from a baseline of r runs is exceeded by a new
    in-control run more often than the normal tail at k says, since the SD itself
    is uncertain: the new run's standardised value follows Student's t with
    r − 1 degrees of freedom, scaled by √(1 + 1/r) for the uncertainty of the
    centre (the prediction interval for one new observation of a normal sample,
    e.g. Hahn & Meeker, Statistical Intervals, 1991 [memory]). The factor makes
    a limit at 3.5 SD (the default rejection, 1-3.5s) exceeded as often as the
    normal 3.5 SD tail (0.047 %): t⁻¹(Φ(3.5); r − 1)·√(1 + 1/r) / 3.5; about
    1.24 for 20 runs, 1.08 for 50, → 1. Narrower limits (2 and 3 SD) are then
    a little wider than needed, which only makes their warnings rarer.
    The degrees of freedom are those of the between-run mean square, which
    dominates a run mean's variance (our simplification). 1 for fewer than 2
    runs (no baseline from runs is known) and for fixed limits.
    """
    if runs < 2:
        return 1.0
    return _t_quantile_over_normal(runs - 1) * math.sqrt(1.0 + 1.0 / runs)


@functools.cache
def _t_quantile_over_normal(dof: int) -> float:
    from scipy.stats import norm, t  # imported when first needed: start-up time

    return float(t.ppf(norm.cdf(_WIDENING_AT), dof)) / _WIDENING_AT


#: Baseline length: at least 20 control measurements before limits are set is
#: Westgard's recommendation and common practice (also CLSI C24 [memory]).
BASELINE_SIZE = 20
#: Baseline runs: limits from at least 20 runs. A run's check standards share that
#: day's calibration, so what varies between days is seen only once per run; the
#: between-run SD of 20 runs has 19 degrees of freedom (±30 % at 95 % confidence),
#: and 20 control runs before limits are set is Westgard's recommendation and common
#: practice (CLSI C24 [memory]); :func:`prediction_factor` widens for what is left.
BASELINE_RUNS = 20
#: Fewest points that give a sample SD at all. Limits from so few are provisional:
#: the SD of 2 points is very uncertain, which is why 20 is recommended.
BASELINE_MINIMUM = 2
#: In-control baseline: points beyond ±3 SD of the first estimate are left out once
#: and the limits recomputed. Common practice, not from a single source.
BASELINE_EXCLUSION_SD = 3.0


@dataclass(frozen=True, slots=True)
class Baseline:
    """The outcome of :func:`baseline_limits`: limits, or why there are none.

    ``used`` and ``excluded`` are indexes into the series' points; ``problem`` is
    ``None`` exactly when ``limits`` is set.
    """

    limits: ControlLimits | None
    used: tuple[int, ...]
    excluded: tuple[int, ...] = ()
    problem: str | None = None


def baseline_limits(
    points: Sequence[ControlPoint],
    size: int = BASELINE_SIZE,
    minimum: int = BASELINE_MINIMUM,
    *,
    in_control_only: bool = False,
    exclusion_sd: float = BASELINE_EXCLUSION_SD,
) -> Baseline:
    """Centre and SD from the first ``size`` points: their mean and sample SD (n − 1).

    At least 20 points (``size``'s default) is Westgard's recommendation and
    common practice; fewer than ``size`` but at least ``minimum`` (default 2) give
    limits whose ``n`` says how few points are behind them. Fewer than ``minimum``
    points, or points that do not vary (SD 0), give no limits and a stated
    ``problem``: this is data, not a programming error, so nothing is raised.

    ``in_control_only``: compute once, leave out the points beyond
    ±``exclusion_sd`` SD (3 by default) of that first estimate, and compute again
    from the rest, once (no further rounds). Common practice, not from a single
    source. The left-out points are not replaced by later ones.

    Raises ``ValueError`` only for impossible settings (``minimum`` below 2,
    ``size`` below ``minimum``, a non-positive ``exclusion_sd``).
    """
    if minimum < BASELINE_MINIMUM:
        raise ValueError(f"minimum must be at least {BASELINE_MINIMUM}, got {minimum}")
    if size < minimum:
        raise ValueError(f"size ({size}) must be at least minimum ({minimum})")
    if not exclusion_sd > 0.0:
        raise ValueError(f"exclusion_sd must be greater than zero, got {exclusion_sd}")
    used = tuple(range(min(size, len(points))))
    outcome = _mean_sd(points, used, minimum)
    if isinstance(outcome, str):
        return Baseline(limits=None, used=used, problem=outcome)
    centre, sd = outcome
    excluded: tuple[int, ...] = ()
    if in_control_only:
        excluded = tuple(i for i in used if abs(points[i].value - centre) > exclusion_sd * sd)
        if excluded:
            used = tuple(i for i in used if i not in excluded)
            outcome = _mean_sd(points, used, minimum)
            if isinstance(outcome, str):
                return Baseline(limits=None, used=used, excluded=excluded, problem=outcome)
            centre, sd = outcome
    limits = ControlLimits(centre=centre, sd=sd, n=len(used), source=LimitSource.BASELINE)
    return Baseline(limits=limits, used=used, excluded=excluded)


def _mean_sd(
    points: Sequence[ControlPoint], indexes: Sequence[int], minimum: int
) -> tuple[float, float] | str:
    """Mean and sample SD of the indexed points, or why they cannot be had."""
    if len(indexes) < minimum:
        return (
            f"{len(indexes)} baseline point(s), at least {minimum} needed "
            f"({BASELINE_SIZE} recommended)"
        )
    values = [points[i].value for i in indexes]
    # statistics works in exact fractions internally: no cancellation on large values.
    centre = statistics.fmean(values)
    sd = statistics.stdev(values)
    if not (math.isfinite(sd) and sd > 0.0):
        return f"the {len(values)} baseline points do not vary (SD 0): no limits"
    return centre, sd


def run_baseline(
    points: Sequence[ControlPoint],
    *,
    exclusion_sd: float = BASELINE_EXCLUSION_SD,
) -> Baseline:
    """Centre, SD and its split between and within runs, from every given point.

    A one-way random-effects analysis of variance with the runs as groups (the
    decomposition of ISO 5725-2 into repeatability and between-group variance,
    and of CLSI EP05 into within-run and between-run precision [memory]): for k
    runs of n_i points (N in all) with run means m_i and grand mean m,

    * MSW = Σ (x − m_i)² / (N − k), the within-run variance s_w²;
    * MSB = Σ n_i (m_i − m)² / (k − 1);
    * s_b² = max(0, (MSB − MSW) / n₀), n₀ = (N − Σ n_i² / N) / (k − 1) (n₀ = n
      when balanced), the between-run variance;
    * centre m (the mean of all points), SD √(s_b² + s_w²) of one observation.

    When every run has one point, the within-run part cannot be told apart: the
    SD is the points' sample SD, all of it counted as between runs. Points beyond
    ±``exclusion_sd`` SD of a first estimate are left out once, then everything
    is computed again (common practice). Needs at least 2 runs; fewer, or points
    that do not vary, give no limits and a stated ``problem``.
    """
    if not exclusion_sd > 0.0:
        raise ValueError(f"exclusion_sd must be greater than zero, got {exclusion_sd}")
    used = tuple(range(len(points)))
    outcome = _decompose(points, used)
    if isinstance(outcome, str):
        return Baseline(limits=None, used=used, problem=outcome)
    excluded = tuple(
        i for i in used if abs(points[i].value - outcome.centre) > exclusion_sd * outcome.sd
    )
    if excluded:
        used = tuple(i for i in used if i not in excluded)
        outcome = _decompose(points, used)
        if isinstance(outcome, str):
            return Baseline(limits=None, used=used, excluded=excluded, problem=outcome)
    return Baseline(limits=outcome, used=used, excluded=excluded)


def _decompose(points: Sequence[ControlPoint], indexes: Sequence[int]) -> ControlLimits | str:
    """The one-way random-effects limits of the indexed points, or why there are none."""
    runs: dict[str, list[float]] = {}
    for i in indexes:
        runs.setdefault(points[i].run, []).append(points[i].value)
    k, total = len(runs), len(indexes)
    if k < 2 or total < BASELINE_MINIMUM:
        return f"{total} baseline point(s) from {k} run(s); at least 2 runs needed"
    values = [points[i].value for i in indexes]
    centre = statistics.fmean(values)
    means = {run: statistics.fmean(group) for run, group in runs.items()}
    if total == k:
        sd = statistics.stdev(values)
        within: float | None = None
        between: float | None = None
    else:
        msw = math.fsum((x - means[r]) ** 2 for r, g in runs.items() for x in g) / (total - k)
        msb = math.fsum(len(g) * (means[r] - centre) ** 2 for r, g in runs.items()) / (k - 1)
        n0 = (total - math.fsum(len(g) ** 2 for g in runs.values()) / total) / (k - 1)
        between_var = max(0.0, (msb - msw) / n0)
        within, between = math.sqrt(msw), math.sqrt(between_var)
        sd = math.sqrt(between_var + msw)
    if not (math.isfinite(sd) and sd > 0.0):
        return f"the {total} baseline points do not vary (SD 0): no limits"
    return ControlLimits(
        centre=centre,
        sd=sd,
        n=total,
        source=LimitSource.BASELINE,
        sd_within=within,
        sd_between=between,
        runs=k,
    )


@dataclass(frozen=True, slots=True)
class ControlSeries:
    """One control material's points in time order, with the limits it is judged by.

    ``name`` (the material or level, e.g. "CCV Zn 50") names the series in
    messages and must be unique within a group.
    """

    name: str
    points: tuple[ControlPoint, ...]
    limits: ControlLimits

    def __post_init__(self) -> None:
        if not self.name:
            raise ValueError("a control series needs a name")
        for before, after in zip(self.points, self.points[1:], strict=False):
            if after.order <= before.order:
                raise ValueError(
                    f"{self.name}: points must be in time order (order {after.order} "
                    f"follows {before.order})"
                )

    def scored(self) -> tuple[PointRef, ...]:
        """Every point with its z-score in SDs of one observation, as within-run rules see it."""
        z = self.limits.z
        return tuple(
            PointRef(self.name, i, p.run, p.order, z(p.value), p.value, p.label)
            for i, p in enumerate(self.points)
        )

    def run_values(self) -> tuple[PointRef, ...]:
        """One value per run, as the across-run rules see it: the mean of the run's points.

        Its z is in SDs of such a mean (:meth:`ControlLimits.run_z`); it stands at
        the place of the run's last point (index, order, label), which completes it.
        """
        runs: dict[str, list[int]] = {}
        for i, point in enumerate(self.points):
            runs.setdefault(point.run, []).append(i)
        values = []
        for run, indexes in runs.items():
            mean = statistics.fmean(self.points[i].value for i in indexes)
            last = self.points[indexes[-1]]
            z = self.limits.run_z(mean, len(indexes))
            values.append(
                PointRef(self.name, indexes[-1], run, last.order, z, mean, last.label, len(indexes))
            )
        values.sort(key=lambda ref: ref.order)
        return tuple(values)


@dataclass(frozen=True, slots=True)
class PointRef:
    """A point as the rules see it: its series, its index there, its run and z-score."""

    series: str
    index: int  # position in its series' points
    run: str
    order: int
    z: float
    value: float
    label: str | None = None
    count: int = 1  # points behind it: more than 1 for a run's mean


@dataclass(frozen=True, slots=True)
class Violation:
    """One rule broken by some points.

    ``points`` are in time order; the last one completes the pattern, so its run
    (``run``) is the run the rule judges. Severity: ``WARN`` for Westgard's
    warning rule (1-2s), ``FAIL`` for a rejection.
    """

    rule: str
    severity: Severity
    points: tuple[PointRef, ...]
    message: str

    @property
    def run(self) -> str:
        """The run the violation judges: that of the point completing the pattern."""
        return self.points[-1].run

    @property
    def runs(self) -> tuple[str, ...]:
        """The runs of the points, each once, in time order."""
        return tuple(dict.fromkeys(p.run for p in self.points))

    @property
    def indexes(self) -> tuple[int, ...]:
        """The points' indexes in their series."""
        return tuple(p.index for p in self.points)


# --- helpers shared by the rules ------------------------------------------------------------

Streams = Sequence[Sequence[PointRef]]
Window = tuple[PointRef, ...]


def _side(z: float, limit: float) -> int:
    """+1 beyond +limit, −1 beyond −limit, 0 otherwise (strictly beyond)."""
    if z > limit:
        return 1
    if z < -limit:
        return -1
    return 0


def _same_side_windows(stream: Sequence[PointRef], k: int, limit: float) -> Iterator[Window]:
    """Every window of ``k`` consecutive points all beyond +limit, or all beyond −limit."""
    streak = 0
    side = 0
    for i, point in enumerate(stream):
        s = _side(point.z, limit)
        streak = streak + 1 if s != 0 and s == side else (1 if s != 0 else 0)
        side = s
        if streak >= k:
            yield tuple(stream[i - k + 1 : i + 1])


def _merged(streams: Streams) -> list[PointRef]:
    """All streams' points in time order; equal orders keep the group's series order."""
    keyed = [(p.order, s, i, p) for s, stream in enumerate(streams) for i, p in enumerate(stream)]
    keyed.sort(key=lambda item: item[:3])
    return [item[3] for item in keyed]


def _by_run(points: Sequence[PointRef]) -> dict[str, list[PointRef]]:
    """Points grouped by run, runs in order of first appearance, points in time order."""
    runs: dict[str, list[PointRef]] = {}
    for point in points:
        runs.setdefault(point.run, []).append(point)
    return runs


def _name(point: PointRef) -> str:
    if point.count > 1:
        return f"{point.series} mean of {point.count} (run {point.run}) at {point.z:+.2f} SD"
    label = point.label if point.label else f"#{point.order}"
    return f"{point.series} {label} (run {point.run}) at {point.z:+.2f} SD"


def _describe(points: Window) -> str:
    if len(points) <= 4:
        return "; ".join(_name(p) for p in points)
    zs = [p.z for p in points]
    return (
        f"{len(points)} points from {_name(points[0])} to {_name(points[-1])}, "
        f"z from {min(zs):+.2f} to {max(zs):+.2f} SD"
    )


def _sign(points: Window) -> str:
    return "+" if points[-1].z > 0 else "-"


# --- the Westgard rules ---------------------------------------------------------------------
#
# Across runs the rules see one value per run and level: the mean of the run's points of
# that material, in SDs of such a mean (ControlSeries.run_values). Points of one run share
# that day's calibration, so counting them one by one would count one day's offset several
# times. Within a run (R-4s) the rules see the run's points themselves.


def find_1_2s(streams: Streams) -> Iterator[Window]:
    """1-2s: one control value beyond the mean ± 2 SD: a warning.

    Published (Westgard et al., Clin Chem 1981;27:493–501): the 1-2s rule is used
    as a warning, not to reject; it triggers inspection of the control data by the
    rejection rules. Reading implemented: each run's value of a material (the
    mean of its points in the run, judged by the SD of such a mean) beyond ±2 SD
    (strictly) gives one violation. Whether the rejection rules wait for this
    warning is the ``warning_gate`` option of :func:`evaluate_group`.
    """
    for stream in streams:
        for point in stream:
            if _side(point.z, 2.0):
                yield (point,)


def find_1_3s(streams: Streams) -> Iterator[Window]:
    """1-3s: one control value beyond the mean ± 3 SD: reject.

    Published (Westgard et al., Clin Chem 1981;27:493–501): the run is rejected
    when a single control measurement exceeds the mean + 3 SD or the mean − 3 SD.
    Chiefly sensitive to random error. Reading implemented: each run's value of a
    material (its mean, judged by the SD of a run mean) beyond ±3 SD (strictly).
    A single wild check standard is the run's own check.recovery rule's business.
    """
    for stream in streams:
        for point in stream:
            if _side(point.z, 3.0):
                yield (point,)


def find_1_3_5s(streams: Streams) -> Iterator[Window]:
    """1-3.5s: one control value beyond the mean ± 3.5 SD: reject.

    Published as one of the single rules of Westgard's QC-design menu (rules
    1-2.5s, 1-3s, 1-3.5s, chosen by the false rejection and error detection a
    method needs; Westgard JO, Basic QC Practices [memory]). Read as 1-3s, with
    3.5 SD. With many control series per run it keeps false rejections rare:
    0.05 % per series and run, against 0.27 % for 1-3s.
    """
    for stream in streams:
        for point in stream:
            if _side(point.z, 3.5):
                yield (point,)


def find_2_2s(streams: Streams) -> Iterator[Window]:
    """2-2s: two consecutive control values beyond the same 2 SD limit: reject.

    Published (Westgard et al., Clin Chem 1981;27:493–501): the run is rejected
    when 2 consecutive control measurements exceed the same limit, either the
    mean + 2 SD or the mean − 2 SD. Chiefly sensitive to systematic error.

    Reading implemented, both as published: across runs within one material (the
    values of two consecutive runs), and within a run across materials (in a
    group, the values of two levels in the same run). Two levels in different
    runs are not paired. With more than two levels per run this pairs neighbours
    in group order only; the later 2-of-3 2s rule for three materials is not
    implemented.
    """
    for stream in streams:
        yield from _same_side_windows(stream, 2, 2.0)
    if len(streams) > 1:
        for run_points in _by_run(_merged(streams)).values():
            for window in _same_side_windows(run_points, 2, 2.0):
                if window[0].series != window[1].series:
                    yield window


def find_r_4s(streams: Streams) -> Iterator[Window]:
    """R-4s: within one run, one point beyond +2 SD and another beyond −2 SD: reject.

    Published (Westgard et al., Clin Chem 1981;27:493–501): the run is rejected
    when one control measurement in a group exceeds the mean + 2 SD and another
    exceeds the mean − 2 SD, so their range exceeds 4 SD. Chiefly sensitive to
    random error.

    Reading implemented: within a run only, on the run's points themselves (of
    every material in a group, or of one series that holds several points per
    run) in SDs of one observation, as the rule is conventionally applied;
    Westgard's later writing advises against applying it across runs, where it
    would mistake between-run shifts for random error [memory]. The literal
    two-sided reading is implemented: a range above 4 SD with one point not beyond
    2 SD (+2.5 and −1.8, say) is not a violation. One violation per run, naming
    its highest and lowest point. A single series with one point per run can
    never break it.
    """
    for run_points in _by_run(_merged(streams)).values():
        high = max(run_points, key=lambda p: p.z)
        low = min(run_points, key=lambda p: p.z)
        if high.z > 2.0 and low.z < -2.0:
            yield tuple(p for p in run_points if p is high or p is low)


def find_4_1s(streams: Streams) -> Iterator[Window]:
    """4-1s: four consecutive control values beyond the same 1 SD limit: reject.

    Published (Westgard et al., Clin Chem 1981;27:493–501): the run is rejected
    when 4 consecutive control measurements exceed the same limit, either the
    mean + 1 SD or the mean − 1 SD. Chiefly sensitive to systematic error.

    Reading implemented: the values of four consecutive runs of one material.
    The published reading also counts across materials; levels of one run share
    its calibration, so that count would take one day's offset for two
    observations, and it is not applied. Westgard's later writing allows 4-1s as
    a warning rule that triggers inspection or maintenance [memory].
    """
    for stream in streams:
        yield from _same_side_windows(stream, 4, 1.0)


def find_10_x(streams: Streams) -> Iterator[Window]:
    """10-x: ten consecutive control values on the same side of the mean: reject.

    Published (Westgard et al., Clin Chem 1981;27:493–501): the run is rejected
    when 10 consecutive control measurements fall on one side of the mean.
    Chiefly sensitive to systematic error.

    Reading implemented: as for 4-1s, the values of ten consecutive runs of one
    material. A value exactly on the mean is on neither side and breaks the
    sequence (our reading).
    """
    for stream in streams:
        yield from _same_side_windows(stream, 10, 0.0)


@dataclass(frozen=True, slots=True)
class WestgardRule:
    """One Westgard rule: its stable id, a one-line summary, its published role, its finder.

    ``within_run``: the rule looks at the points of a run (R-4s); otherwise at one
    value per run and material.
    """

    id: str
    summary: str
    severity: Severity
    find: Callable[[Streams], Iterator[Window]]
    message: Callable[[Window], str]
    within_run: bool = False


def _message_1_2s(points: Window) -> str:
    return f"{_name(points[0])}: beyond the 2 SD warning limit; inspect with the rejection rules"


def _message_1_3s(points: Window) -> str:
    return f"{_name(points[0])}: beyond the 3 SD limit"


def _message_1_3_5s(points: Window) -> str:
    return f"{_name(points[0])}: beyond the 3.5 SD limit"


def _message_2_2s(points: Window) -> str:
    return f"2 consecutive values beyond {_sign(points)}2 SD: {_describe(points)}"


def _message_r_4s(points: Window) -> str:
    spread = max(p.z for p in points) - min(p.z for p in points)
    return (
        f"run {points[-1].run}: one point beyond +2 SD and another beyond -2 SD, "
        f"{spread:.2f} SD apart: {_describe(points)}"
    )


def _message_4_1s(points: Window) -> str:
    return f"4 consecutive runs beyond {_sign(points)}1 SD: {_describe(points)}"


def _message_10_x(points: Window) -> str:
    where = "above" if points[-1].z > 0 else "below"
    return f"10 consecutive runs {where} the mean: {_describe(points)}"


#: The Westgard rules by stable id, in the order the 1981 flowchart applies them
#: (1-3.5s, from the later single-rule menu, beside 1-3s).
WESTGARD_RULES: dict[str, WestgardRule] = {
    rule.id: rule
    for rule in (
        WestgardRule(
            "1-2s",
            "One run's value beyond ±2 SD: a warning to inspect with the rejection rules",
            Severity.WARN,
            find_1_2s,
            _message_1_2s,
        ),
        WestgardRule(
            "1-3s", "One run's value beyond ±3 SD", Severity.FAIL, find_1_3s, _message_1_3s
        ),
        WestgardRule(
            "1-3.5s",
            "One run's value beyond ±3.5 SD",
            Severity.FAIL,
            find_1_3_5s,
            _message_1_3_5s,
        ),
        WestgardRule(
            "2-2s",
            "Two consecutive runs, or two levels of one run, beyond the same 2 SD limit",
            Severity.FAIL,
            find_2_2s,
            _message_2_2s,
        ),
        WestgardRule(
            "R-4s",
            "Within one run, one point beyond +2 SD and another beyond -2 SD",
            Severity.FAIL,
            find_r_4s,
            _message_r_4s,
            within_run=True,
        ),
        WestgardRule(
            "4-1s",
            "Four consecutive runs beyond the same 1 SD limit",
            Severity.FAIL,
            find_4_1s,
            _message_4_1s,
        ),
        WestgardRule(
            "10-x",
            "Ten consecutive runs on the same side of the mean",
            Severity.FAIL,
            find_10_x,
            _message_10_x,
        ),
    )
}

#: Every Westgard rule is active unless the caller chooses fewer.
DEFAULT_RULES: tuple[str, ...] = tuple(WESTGARD_RULES)

#: The rules a finding of which rejects the run by default; the others warn. With a
#: dozen control series per run (three materials of four analytes), 1-3s alone would
#: reject about 3 % of good runs and 2-2s another 1 %, so the default rejects at
#: 3.5 SD and reports the other rules as warnings; Westgard's later writing allows
#: 4-1s and 10-x as warning rules for inspection [memory]. The choice and its
#: measured rates: tests/benchmarks/alarms_control.py and the README.
DEFAULT_REJECTING: tuple[str, ...] = ("1-3.5s",)


def evaluate_series(
    series: ControlSeries,
    active: Collection[str] = DEFAULT_RULES,
    *,
    warning_gate: bool = False,
) -> tuple[Violation, ...]:
    """The Westgard violations of one series; see :func:`evaluate_group`."""
    return evaluate_group((series,), active, warning_gate=warning_gate)


def evaluate_group(
    group: Sequence[ControlSeries],
    active: Collection[str] = DEFAULT_RULES,
    *,
    warning_gate: bool = False,
) -> tuple[Violation, ...]:
    """The Westgard violations of several materials judged together (levels of one analyte).

    The across-run rules see each series' values per run (:meth:`ControlSeries.run_values`),
    R-4s the points of each run; 2-2s and R-4s also look across the group's
    levels within a run (see each ``find_*`` docstring). ``active`` picks the
    rules by id (an unknown id raises ``ValueError``). Violations come in time
    order of the point completing them, then in :data:`WESTGARD_RULES` order.

    ``warning_gate``: the 1981 procedure inspects with the rejection rules only
    when the 1-2s warning is broken; with the gate on, a rejection is kept only
    when the run it judges holds a value beyond ±2 SD (in any series of the
    group), so 4-1s and 10-x patterns wholly inside ±2 SD go unreported. Off by
    default: with a computer applying every rule costs nothing, and Westgard's
    later writing drops the gate for that reason [memory].
    """
    unknown = sorted(set(active) - set(WESTGARD_RULES))
    if unknown:
        raise ValueError(f"unknown control rule(s) {unknown}; known: {list(WESTGARD_RULES)}")
    names = [s.name for s in group]
    if len(set(names)) != len(names):
        raise ValueError(f"series names must be unique in a group, got {names}")
    per_run = [s.run_values() for s in group]
    points = [s.scored() for s in group]
    found: list[tuple[int, int, Violation]] = []
    seen: set[tuple[str, tuple[tuple[str, int], ...]]] = set()
    for rank, rule in enumerate(WESTGARD_RULES.values()):
        if rule.id not in active:
            continue
        for window in rule.find(points if rule.within_run else per_run):
            key = (rule.id, tuple((p.series, p.index) for p in window))
            if key in seen:
                continue
            seen.add(key)
            violation = Violation(rule.id, rule.severity, window, rule.message(window))
            found.append((window[-1].order, rank, violation))
    if warning_gate:
        warned = {w[0].run for w in find_1_2s(per_run)}
        found = [f for f in found if f[2].severity is Severity.WARN or f[2].run in warned]
    found.sort(key=lambda item: item[:2])
    return tuple(item[2] for item in found)


# --- EWMA -----------------------------------------------------------------------------------

#: Weight of the newest point. 0.2 is common practice; Lucas & Saccucci (1990)
#: find 0.05–0.25 good at detecting small shifts [memory].
EWMA_LAMBDA = 0.2
#: Width L of the limits in SDs of the EWMA. 3 is common practice; Lucas &
#: Saccucci (1990) tabulate L for a chosen in-control run length (near 2.9 for
#: λ = 0.2 [memory]).
EWMA_WIDTH = 3.0


@dataclass(frozen=True, slots=True)
class EwmaPoint:
    """The EWMA after one point, with its exact limits at that point.

    ``ewma``, ``low`` and ``high`` are in the values' unit; ``z`` and ``limit_z``
    are the EWMA's distance from the centre and the limits' half-width in SDs of
    single observations (the chart's SD), so messages compare like with like.
    """

    index: int
    ewma: float
    low: float
    high: float
    z: float
    limit_z: float

    @property
    def beyond(self) -> bool:
        """Whether the EWMA lies strictly outside its limits."""
        return self.ewma > self.high or self.ewma < self.low


def ewma_chart(
    series: ControlSeries, lam: float = EWMA_LAMBDA, width: float = EWMA_WIDTH
) -> tuple[EwmaPoint, ...]:
    """The EWMA of a series' run values and its exact time-varying limits (Roberts 1959).

    On one value per run (the mean of the run's points, as the across-run
    Westgard rules see it): E_0 = centre, E_t = λ·x_t + (1 − λ)·E_{t−1}; the
    limits are centre ± L·SD·√(λ/(2 − λ)·(1 − (1 − λ)^(2t))), the exact variance
    of E_t for independent values of SD ``SD`` (Lucas & Saccucci 1990 [memory]),
    which widens towards the asymptotic L·SD·√(λ/(2 − λ)); SD is that of a run
    mean of the run's size. ``index`` is that of the run's last point. ``lam``
    must lie in (0, 1] (1 gives a Shewhart chart) and ``width`` be positive.
    """
    if not 0.0 < lam <= 1.0:
        raise ValueError(f"lambda must lie in (0, 1], got {lam}")
    if not (math.isfinite(width) and width > 0.0):
        raise ValueError(f"the limits' width L must be greater than zero, got {width}")
    centre = series.limits.centre
    asymptotic = lam / (2.0 - lam)
    keep = 1.0 - lam
    ewma = centre
    chart: list[EwmaPoint] = []
    for t, value in enumerate(series.run_values(), start=1):
        sd = series.limits.run_sd(value.count)
        ewma = lam * value.value + keep * ewma
        half_z = width * math.sqrt(asymptotic * (1.0 - keep ** (2 * t)))
        half = half_z * sd
        chart.append(
            EwmaPoint(value.index, ewma, centre - half, centre + half, (ewma - centre) / sd, half_z)
        )
    return tuple(chart)


def ewma_violations(
    series: ControlSeries,
    lam: float = EWMA_LAMBDA,
    width: float = EWMA_WIDTH,
    severity: Severity = Severity.WARN,
) -> tuple[Violation, ...]:
    """One ``ewma`` violation for every point after which the EWMA is beyond its limits.

    For slow drifts the Westgard rules are late to see. A supplementary chart, so
    a warning by default; pass ``severity=Severity.FAIL`` to reject on it.
    """
    points = {value.index: value for value in series.run_values()}
    violations = []
    for step in ewma_chart(series, lam, width):
        if not step.beyond:
            continue
        point = points[step.index]
        direction = "upwards" if step.z > 0 else "downwards"
        message = (
            f"{_name(point)}: EWMA (lambda {lam:g}) at {step.z:+.2f} SD, beyond its "
            f"limit of ±{step.limit_z:.2f} SD: a drift {direction}"
        )
        violations.append(Violation("ewma", severity, (point,), message))
    return tuple(violations)
