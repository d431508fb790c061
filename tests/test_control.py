"""Control charts: baseline limits, the Westgard multirules, EWMA.

Each Westgard case is built from the rule's published definition (Westgard et al.,
Clin Chem 1981;27:493–501) on a chart of centre 0 and SD 1, so the values are the
z-scores. Limits are checked against numpy (mean, std with ddof=1) and the EWMA
against a numpy recurrence and its closed form. Demo data are invented.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest

from calwarden.rules.control import (
    BASELINE_RUNS,
    BASELINE_SIZE,
    EWMA_LAMBDA,
    EWMA_WIDTH,
    WESTGARD_RULES,
    ControlLimits,
    ControlPoint,
    ControlSeries,
    LimitSource,
    baseline_limits,
    evaluate_group,
    evaluate_series,
    ewma_chart,
    ewma_violations,
    prediction_factor,
    run_baseline,
)
from calwarden.rules.control_verdict import (
    ControlGroup,
    ControlHistory,
    ControlPolicy,
    with_control,
)
from calwarden.rules.verdict import Finding, Severity, Status, Verdict

UNIT = ControlLimits.fixed(centre=0.0, sd=1.0)


def series(
    values: list[float],
    runs: list[str] | None = None,
    name: str = "CCV Zn 50",
    limits: ControlLimits = UNIT,
    start: int = 0,
) -> ControlSeries:
    """A series of the given values, one run per point unless runs are given."""
    runs = runs or [f"R{i + 1:02d}" for i in range(len(values))]
    points = tuple(
        ControlPoint(value=v, run=r, order=start + 2 * i)
        for i, (v, r) in enumerate(zip(values, runs, strict=True))
    )
    return ControlSeries(name=name, points=points, limits=limits)


def fired(violations: tuple[object, ...], rule: str) -> list[object]:
    return [v for v in violations if getattr(v, "rule", None) == rule]


# --- the Westgard rules, one series -----------------------------------------------------


@dataclass(frozen=True)
class Case:
    rule: str
    values: list[float]
    runs: list[str] | None
    triggers: bool
    why: str


CASES = [
    Case("1-2s", [0.5, 2.3, 0.1], None, True, "one point beyond +2 SD"),
    Case("1-2s", [1.9, -1.99, 2.0], None, False, "none strictly beyond 2 SD"),
    Case("1-3s", [0.2, -3.1], None, True, "one point beyond -3 SD"),
    Case("1-3s", [2.9, -2.95, 3.0], None, False, "none strictly beyond 3 SD"),
    Case("2-2s", [0.3, 2.2, 2.4], None, True, "two consecutive beyond +2 SD"),
    Case("2-2s", [2.2, -2.4], None, False, "consecutive but on opposite 2 SD limits"),
    Case("2-2s", [2.5, 1.0, 2.5], None, False, "beyond +2 SD but not consecutive"),
    Case("R-4s", [2.1, -2.2], ["R01", "R01"], True, "+2 SD and -2 SD in one run"),
    Case("R-4s", [2.1, -2.2], ["R01", "R02"], False, "+2 SD and -2 SD in two runs"),
    Case("R-4s", [2.5, -1.8], ["R01", "R01"], False, "range 4.3 SD, one not beyond 2 SD"),
    Case("4-1s", [0.2, 1.1, 1.5, 1.2, 1.3], None, True, "four consecutive beyond +1 SD"),
    Case("4-1s", [1.1, 1.5, 0.9, 1.3, 1.2, 1.4], None, False, "streak broken at 0.9"),
    Case("4-1s", [-1.2, -1.3, -1.5, 1.1], None, False, "three below, then one above"),
    Case("10-x", [0.1, 0.4, 0.2, 0.8, 0.3, 0.1, 0.5, 0.2, 0.6, 0.1], None, True, "ten above"),
    Case("10-x", [-0.2] * 9 + [0.1], None, False, "nine below, then one above"),
    Case("10-x", [0.3] * 5 + [0.0] + [0.3] * 5, None, False, "a point on the mean breaks it"),
]


@pytest.mark.parametrize("case", CASES, ids=lambda c: f"{c.rule}: {c.why}")
def test_westgard_rule_follows_its_published_definition(case: Case) -> None:
    """Each rule breaks on a sequence its definition names, and only then."""
    violations = evaluate_series(series(case.values, case.runs), active={case.rule})
    assert bool(violations) is case.triggers


def test_every_rule_has_an_id_summary_and_cited_definition() -> None:
    """Each rule carries its stable id, a one-line summary and the 1981 source."""
    assert list(WESTGARD_RULES) == ["1-2s", "1-3s", "1-3.5s", "2-2s", "R-4s", "4-1s", "10-x"]
    for rule_id, rule in WESTGARD_RULES.items():
        assert rule.id == rule_id
        assert rule.summary and "\n" not in rule.summary
        source = "Basic QC Practices" if rule_id == "1-3.5s" else "Clin Chem 1981;27:493–501"
        assert source in (rule.find.__doc__ or "")


def test_only_1_2s_is_a_warning() -> None:
    """1-2s is a warning; every other Westgard rule rejects."""
    severities = {rule.id: rule.severity for rule in WESTGARD_RULES.values()}
    assert severities.pop("1-2s") is Severity.WARN
    assert set(severities.values()) == {Severity.FAIL}


def test_violation_names_its_points_runs_and_z_scores() -> None:
    """A 2-2s violation lists the two points, their runs and their z-scores."""
    (violation,) = evaluate_series(series([0.3, 2.2, 2.4]), active={"2-2s"})
    assert violation.severity is Severity.FAIL
    assert violation.indexes == (1, 2)
    assert violation.runs == ("R02", "R03")
    assert violation.run == "R03"
    assert "+2 SD" in violation.message
    assert "+2.20 SD" in violation.message and "+2.40 SD" in violation.message


def test_z_scores_use_the_limits() -> None:
    """Values are judged in SD units of the chart's own centre and SD."""
    limits = ControlLimits.fixed(centre=100.0, sd=4.0)
    (violation,) = evaluate_series(series([101.0, 113.0], limits=limits), active={"1-3s"})
    assert violation.points[0].z == pytest.approx(3.25)
    assert "+3.25 SD" in violation.message


def test_active_rules_limit_what_is_reported() -> None:
    """Only the active rules are applied."""
    data = series([3.5, 3.4])  # breaks 1-2s, 1-3s and 2-2s
    assert {v.rule for v in evaluate_series(data)} == {"1-2s", "1-3s", "2-2s"}
    assert {v.rule for v in evaluate_series(data, active={"1-3s"})} == {"1-3s"}


def test_unknown_rule_id_is_refused() -> None:
    """Asking for a rule that does not exist is a programming error."""
    with pytest.raises(ValueError, match="unknown control rule"):
        evaluate_series(series([0.0]), active={"2-3s"})


def test_long_pattern_is_reported_at_each_point_completing_it() -> None:
    """Twelve points above the mean break 10-x at the 10th, 11th and 12th."""
    violations = evaluate_series(series([0.5] * 12), active={"10-x"})
    assert [v.indexes[-1] for v in violations] == [9, 10, 11]


def test_violations_come_in_time_order() -> None:
    """Violations are ordered by the point that completes them, then by rule."""
    violations = evaluate_series(series([3.2, 0.0, 2.5, 2.6]))
    assert [(v.rule, v.indexes[-1]) for v in violations] == [
        ("1-2s", 0),
        ("1-3s", 0),
        ("1-2s", 2),
        ("1-2s", 3),
        ("2-2s", 3),
    ]


def test_r_4s_within_one_series_of_several_points_per_run() -> None:
    """Two CCVs of one material in one run, at +2.3 and -2.1 SD, break R-4s."""
    data = series([0.1, 2.3, -2.1], runs=["R01", "R02", "R02"])
    (violation,) = evaluate_series(data, active={"R-4s"})
    assert violation.indexes == (1, 2)
    assert "4.40 SD apart" in violation.message


# --- across materials ---------------------------------------------------------------------

ACROSS_CASES = [
    # (rule, level 1, level 2, runs of both, triggers, why)
    ("2-2s", [0.1, 2.3], [0.2, 2.5], ["R01", "R02"], True, "both levels beyond +2 SD in R02"),
    ("R-4s", [0.1, 2.2], [0.3, -2.3], ["R01", "R02"], True, "+2 SD and -2 SD across levels"),
    # Levels of one run share its calibration: 4-1s and 10-x count runs, not levels.
    ("4-1s", [1.2, 1.3], [1.4, 1.1], ["R01", "R02"], False, "two levels over two runs"),
    ("10-x", [0.2] * 5, [0.4] * 5, ["R01", "R02", "R03", "R04", "R05"], False, "five runs"),
    ("4-1s", [1.2, 1.3], [1.4, -0.1], ["R01", "R02"], False, "only three beyond +1 SD"),
]


@pytest.mark.parametrize("rule,first,second,runs,triggers,why", ACROSS_CASES)
def test_across_material_reading(
    rule: str, first: list[float], second: list[float], runs: list[str], triggers: bool, why: str
) -> None:
    """The across-material readings break on patterns no single level shows."""
    level_1 = series(first, runs, name="CCV Zn 10", start=0)
    level_2 = series(second, runs, name="CCV Zn 50", start=1)
    assert not evaluate_series(level_1, active={rule})
    assert not evaluate_series(level_2, active={rule})
    assert bool(evaluate_group([level_1, level_2], active={rule})) is triggers, why


def test_2_2s_does_not_pair_different_materials_in_different_runs() -> None:
    """Level 1 beyond +2 SD in R02 and level 2 in R03 are not a 2-2s pair."""
    level_1 = series([0.1, 2.3], ["R01", "R02"], name="CCV Zn 10", start=0)
    level_2 = series([0.2, 2.5], ["R01", "R03"], name="CCV Zn 50", start=1)  # none in R02
    assert not evaluate_group([level_1, level_2], active={"2-2s"})


def test_group_refuses_two_series_of_one_name() -> None:
    """Series of a group must be told apart by name."""
    with pytest.raises(ValueError, match="unique"):
        evaluate_group([series([0.0]), series([0.0])])


# --- the warning gate ---------------------------------------------------------------------


def test_warning_gate_hides_rejections_without_a_2s_point_in_the_run() -> None:
    """With the 1981 gate on, a 4-1s inside ±2 SD is not inspected."""
    data = series([1.2, 1.3, 1.1, 1.4])
    assert fired(evaluate_series(data), "4-1s")
    assert not evaluate_series(data, warning_gate=True)


def test_warning_gate_keeps_rejections_in_a_warned_run() -> None:
    """With the gate on, a 4-1s completed by a point beyond 2 SD is reported."""
    violations = evaluate_series(series([1.2, 1.3, 1.1, 2.2]), warning_gate=True)
    assert [v.rule for v in violations] == ["1-2s", "4-1s"]


# --- limits -------------------------------------------------------------------------------


def recoveries(n: int, seed: int, centre: float = 100.0, sd: float = 2.0) -> list[ControlPoint]:
    rng = np.random.default_rng(seed)
    return [
        ControlPoint(value=float(v), run=f"R{i:03d}", order=i)
        for i, v in enumerate(rng.normal(centre, sd, n))
    ]


def test_baseline_is_mean_and_sample_sd_of_first_20() -> None:
    """Limits from the first 20 points equal numpy's mean and std(ddof=1)."""
    points = recoveries(35, seed=11)
    outcome = baseline_limits(points)
    first = np.array([p.value for p in points[:BASELINE_SIZE]])
    assert outcome.limits is not None and outcome.problem is None
    assert outcome.limits.centre == pytest.approx(float(first.mean()), rel=1e-14)
    assert outcome.limits.sd == pytest.approx(float(first.std(ddof=1)), rel=1e-12)
    assert outcome.limits.n == 20 and outcome.limits.source is LimitSource.BASELINE
    assert outcome.used == tuple(range(20))


def test_short_baseline_gives_limits_with_their_count() -> None:
    """Five points give provisional limits with n = 5."""
    points = recoveries(5, seed=12)
    outcome = baseline_limits(points)
    assert outcome.limits is not None
    assert outcome.limits.n == 5
    assert outcome.limits.sd == pytest.approx(float(np.std([p.value for p in points], ddof=1)))


def test_too_short_baseline_gives_a_reason_not_limits() -> None:
    """One point gives no limits and says why."""
    outcome = baseline_limits(recoveries(1, seed=13))
    assert outcome.limits is None
    assert outcome.problem is not None and "at least 2" in outcome.problem


def test_constant_baseline_gives_a_reason_not_limits() -> None:
    """Points that do not vary give no limits (the SD would be 0)."""
    points = [ControlPoint(value=98.5, run=f"R{i}", order=i) for i in range(20)]
    outcome = baseline_limits(points)
    assert outcome.limits is None
    assert outcome.problem is not None and "SD 0" in outcome.problem


def test_in_control_baseline_leaves_out_a_point_beyond_3_sd() -> None:
    """An outlier among 20 is left out once and the limits recomputed without it."""
    points = recoveries(20, seed=14)
    points[7] = ControlPoint(value=125.0, run="R007", order=7)
    outcome = baseline_limits(points, in_control_only=True)
    kept = np.array([p.value for i, p in enumerate(points) if i != 7])
    assert outcome.excluded == (7,)
    assert outcome.limits is not None and outcome.limits.n == 19
    assert outcome.limits.centre == pytest.approx(float(kept.mean()), rel=1e-14)
    assert outcome.limits.sd == pytest.approx(float(kept.std(ddof=1)), rel=1e-12)


def test_plain_baseline_keeps_the_outlier() -> None:
    """Without the in-control option every one of the first 20 points counts."""
    points = recoveries(20, seed=14)
    points[7] = ControlPoint(value=125.0, run="R007", order=7)
    outcome = baseline_limits(points)
    assert outcome.excluded == () and outcome.limits is not None and outcome.limits.n == 20


@pytest.mark.parametrize("sd", [0.0, -1.0, float("nan"), float("inf")])
def test_limits_refuse_a_non_positive_or_non_finite_sd(sd: float) -> None:
    """A chart's SD must be a positive finite number."""
    with pytest.raises(ValueError, match="SD"):
        ControlLimits.fixed(centre=100.0, sd=sd)


def test_series_refuses_points_out_of_time_order() -> None:
    """Points must come in increasing order."""
    points = (ControlPoint(1.0, "R01", 5), ControlPoint(1.0, "R02", 5))
    with pytest.raises(ValueError, match="time order"):
        ControlSeries("CCV Zn 50", points, UNIT)


def test_point_refuses_a_non_finite_value() -> None:
    """A control value must be a finite number."""
    with pytest.raises(ValueError, match="finite"):
        ControlPoint(float("nan"), "R01", 0)


# --- EWMA ---------------------------------------------------------------------------------

DRIFT_LIMITS = ControlLimits(centre=100.0, sd=2.0, n=20, source=LimitSource.BASELINE)


def drifting(n: int, seed: int, per_point: float) -> ControlSeries:
    """In-control noise around the centre plus a linear drift of ``per_point`` SD each point."""
    rng = np.random.default_rng(seed)
    values = 100.0 + 2.0 * (rng.normal(0.0, 1.0, n) + per_point * np.arange(n))
    return series([float(v) for v in values], limits=DRIFT_LIMITS)


def test_ewma_equals_the_numpy_recurrence() -> None:
    """E_t = λ·x_t + (1 − λ)·E_{t−1} from E_0 = centre, as a numpy recurrence gives it."""
    data = drifting(40, seed=21, per_point=0.05)
    x = np.array([p.value for p in data.points])
    expected = np.empty_like(x)
    previous = DRIFT_LIMITS.centre
    for t in range(x.size):
        previous = EWMA_LAMBDA * x[t] + (1.0 - EWMA_LAMBDA) * previous
        expected[t] = previous
    got = np.array([step.ewma for step in ewma_chart(data)])
    np.testing.assert_allclose(got, expected, rtol=1e-14)


def test_ewma_equals_its_closed_form() -> None:
    """E_t = (1 − λ)^t·centre + λ·Σ (1 − λ)^(t−i)·x_i, the geometric weights of Roberts 1959."""
    data = drifting(30, seed=22, per_point=0.0)
    lam, x = 0.1, np.array([p.value for p in data.points])
    t = np.arange(1, x.size + 1)
    weights = lam * (1.0 - lam) ** (t[:, None] - t[None, :]) * (t[None, :] <= t[:, None])
    expected = (1.0 - lam) ** t * DRIFT_LIMITS.centre + weights @ x
    got = np.array([step.ewma for step in ewma_chart(data, lam=lam)])
    np.testing.assert_allclose(got, expected, rtol=1e-12)


def test_ewma_limits_are_the_exact_time_varying_ones() -> None:
    """Limits are centre ± L·σ·√(λ/(2−λ)·(1−(1−λ)^(2t))), λ·L·σ at the first point."""
    data = drifting(25, seed=23, per_point=0.0)
    lam, width, sd = EWMA_LAMBDA, EWMA_WIDTH, DRIFT_LIMITS.sd
    t = np.arange(1, 26)
    half = width * sd * np.sqrt(lam / (2.0 - lam) * (1.0 - (1.0 - lam) ** (2 * t)))
    chart = ewma_chart(data)
    np.testing.assert_allclose([s.high for s in chart], DRIFT_LIMITS.centre + half, rtol=1e-14)
    np.testing.assert_allclose([s.low for s in chart], DRIFT_LIMITS.centre - half, rtol=1e-14)
    assert chart[0].high - DRIFT_LIMITS.centre == pytest.approx(lam * width * sd, rel=1e-14)


def test_ewma_limit_variance_matches_simulation() -> None:
    """The variance behind the limits matches that of simulated in-control EWMAs."""
    rng = np.random.default_rng(24)
    lam, sd, steps = EWMA_LAMBDA, 1.0, 8
    x = rng.normal(0.0, sd, (40_000, steps))
    e = np.zeros(x.shape[0])
    simulated = []
    for t in range(steps):
        e = lam * x[:, t] + (1.0 - lam) * e
        simulated.append(e.var())
    t = np.arange(1, steps + 1)
    exact = sd**2 * lam / (2.0 - lam) * (1.0 - (1.0 - lam) ** (2 * t))
    np.testing.assert_allclose(simulated, exact, rtol=0.03)  # ~1.5 % sampling error at 40,000


def test_ewma_flags_a_slow_drift() -> None:
    """A drift of 0.15 SD per point is flagged by the EWMA, upwards."""
    violations = ewma_violations(drifting(30, seed=25, per_point=0.15))
    assert violations
    assert all(v.rule == "ewma" and v.severity is Severity.WARN for v in violations)
    assert "upwards" in violations[0].message


def test_ewma_is_quiet_while_every_point_is_within_1_sd() -> None:
    """Points within ±1 SD never take the EWMA (λ 0.2, L 3) beyond its limits."""
    # |E_t| ≤ c·(1 − q^t) for |x| ≤ c SD, q = 1 − λ, and the limit is
    # 3·√(1/9·(1 − q^(2t))) = √(1 − q^(2t)) ≥ 1 − q^t: with c < 1 never beyond.
    rng = np.random.default_rng(26)
    wandering = [100.0 + 2.0 * float(z) for z in rng.uniform(-0.999, 0.999, 60)]
    steady_high = [100.0 + 2.0 * 0.999] * 60  # the worst case: always at the edge
    for values in (wandering, steady_high):
        assert not ewma_violations(series(values, limits=DRIFT_LIMITS))


def test_ewma_refuses_a_lambda_outside_0_1() -> None:
    """λ must lie in (0, 1]."""
    with pytest.raises(ValueError, match="lambda"):
        ewma_chart(drifting(3, seed=27, per_point=0.0), lam=0.0)


# --- limits between and within runs ---------------------------------------------------------


def one_way_numpy(runs: list[list[float]]) -> tuple[float, float, float]:
    """Mean, within-run and between-run SD by the one-way ANOVA formulas (ISO 5725-2 [memory])."""
    values = np.concatenate([np.array(r) for r in runs])
    sizes = np.array([len(r) for r in runs])
    means = np.array([np.mean(r) for r in runs])
    k, total = len(runs), len(values)
    msw = sum(float(np.sum((np.array(r) - m) ** 2)) for r, m in zip(runs, means, strict=True))
    msw /= total - k
    msb = float(np.sum(sizes * (means - values.mean()) ** 2)) / (k - 1)
    n0 = (total - float(np.sum(sizes**2)) / total) / (k - 1)
    return float(values.mean()), float(np.sqrt(msw)), float(np.sqrt(max(0.0, (msb - msw) / n0)))


def points_of(runs: list[list[float]]) -> list[ControlPoint]:
    order = iter(range(10_000))
    return [ControlPoint(v, f"R{i:02d}", next(order)) for i, r in enumerate(runs) for v in r]


def test_run_baseline_equals_the_one_way_anova_in_numpy() -> None:
    """Unbalanced runs: centre, within and between SD equal the numpy ANOVA formulas."""
    rng = np.random.default_rng(41)
    runs = [list(100 + rng.normal(0, 0.7) + rng.normal(0, 1.0, size=n)) for n in [3, 2, 3, 1] * 5]
    limits = run_baseline(points_of(runs)).limits
    assert limits is not None
    centre, within, between = one_way_numpy(runs)
    assert limits.centre == pytest.approx(centre, rel=1e-12)
    assert limits.sd_within == pytest.approx(within, rel=1e-9)
    assert limits.sd_between == pytest.approx(between, rel=1e-9)
    assert limits.sd == pytest.approx(np.hypot(within, between), rel=1e-9)
    assert (limits.runs, limits.n) == (20, 45)


def test_run_baseline_recovers_known_components() -> None:
    """On 2,000 simulated runs of 3 points (between SD 0.5, within 1.0) the split is found."""
    rng = np.random.default_rng(42)
    runs = [list(100 + rng.normal(0, 0.5) + rng.normal(0, 1.0, size=3)) for _ in range(2000)]
    limits = run_baseline(points_of(runs)).limits
    assert limits is not None and limits.sd_within is not None and limits.sd_between is not None
    assert limits.sd_within == pytest.approx(1.0, rel=0.03)
    assert limits.sd_between == pytest.approx(0.5, rel=0.1)


def test_one_point_per_run_gives_the_sample_sd_all_between_runs() -> None:
    """Runs of one point each: the SD is numpy's ddof=1 SD and the split is unknown."""
    values = [99.1, 100.4, 100.9, 98.7, 101.2]
    limits = run_baseline(points_of([[v] for v in values])).limits
    assert limits is not None
    assert limits.sd == pytest.approx(float(np.std(values, ddof=1)), rel=1e-12)
    assert limits.sd_within is None and limits.run_sd(1) == pytest.approx(
        limits.sd * limits.widening
    )


def test_prediction_factor_is_the_t_quantile_at_the_3_5_sd_tail() -> None:
    """For 20 runs: t⁻¹(Φ(3.5); 19)·√(1 + 1/20)/3.5 (scipy), about 1.24; 1 for fixed limits."""
    from scipy.stats import norm, t

    expected = float(t.ppf(norm.cdf(3.5), 19)) * np.sqrt(1 + 1 / 20) / 3.5
    assert prediction_factor(BASELINE_RUNS) == pytest.approx(expected, rel=1e-12)
    assert 1.2 < expected < 1.25
    assert prediction_factor(0) == 1.0 and prediction_factor(1000) < 1.01


def test_widened_limits_give_the_nominal_false_rate_for_a_new_run() -> None:
    """Simulated 20-run baselines: a new run passes 3.5 widened SDs about 0.047 % of the time."""
    rng = np.random.default_rng(43)
    trials = 200_000
    base = rng.normal(size=(trials, BASELINE_RUNS))
    new = rng.normal(size=trials)
    z = (new - base.mean(axis=1)) / (base.std(axis=1, ddof=1) * prediction_factor(BASELINE_RUNS))
    assert float(np.mean(np.abs(z) > 3.5)) == pytest.approx(0.000465, abs=0.00015)


def test_a_run_is_judged_by_its_mean_and_the_sd_of_a_run_mean() -> None:
    """Three points of one run give one value: their mean, in SDs of √(between² + within²/3)."""
    limits = ControlLimits.fixed(centre=100.0, sd=1.25, sd_within=1.0)  # between 0.75
    data = ControlSeries(
        "CCV Zn 25",
        tuple(ControlPoint(v, "R01", i, f"CCV-{i + 1}") for i, v in enumerate([101, 102, 103])),
        limits,
    )
    (value,) = data.run_values()
    assert (value.value, value.count, value.label, value.index) == (102.0, 3, "CCV-3", 2)
    assert value.z == pytest.approx(2.0 / np.sqrt(0.75**2 + 1.0 / 3))


def test_4_1s_does_not_count_points_of_one_run() -> None:
    """Four points beyond +1 SD from two runs are two run values: no 4-1s (the old one fired)."""
    data = series([1.5, 1.6, 1.4, 1.7], runs=["R01", "R01", "R02", "R02"])
    assert not evaluate_series(data, active={"4-1s"})
    assert evaluate_series(series([1.5, 1.6, 1.4, 1.7]), active={"4-1s"})


# --- control findings into the verdict ------------------------------------------------------


def _verdict(status: Status = Status.PASS) -> Verdict:
    return Verdict(status, "R02", "ICP-1", (Finding("check.recovery", Severity.WARN, "x"),), (), ())


def _history(z: float) -> ControlHistory:
    data = series([0.1, z], name="CCV Zn 25")  # run R02's point is the new one (order 2)
    return ControlHistory(first_new=2, groups=(ControlGroup("Zn", (data,), {2: 28}),))


def test_with_control_adds_the_new_runs_findings_and_derives_the_status() -> None:
    """A run value at +4 SD adds one failing control.1-3.5s finding and fails the verdict."""
    judged = with_control(_verdict(), _history(4.0), ControlPolicy())
    assert judged.status is Status.FAIL
    (finding,) = [f for f in judged.findings if f.rule.startswith("control.")]
    assert (finding.rule, finding.severity, finding.seq, finding.value) == (
        "control.1-3.5s",
        Severity.FAIL,
        28,
        4.0,
    )
    assert judged.findings[0].rule == "check.recovery"  # the run's own findings first


def test_with_control_warning_rules_keep_the_run_passing() -> None:
    """A run value at +3.2 SD is a 1-3s warning by default: the verdict still passes."""
    judged = with_control(_verdict(), _history(3.2), ControlPolicy())
    assert judged.status is Status.PASS
    assert [f.rule for f in judged.findings[1:]] == ["control.1-3s"]


def test_with_control_leaves_an_error_verdict_alone() -> None:
    """A file that could not be judged keeps its error verdict."""
    broken = Verdict(Status.ERROR, None, None, (), (), (), error="bad file")
    assert with_control(broken, _history(9.0), ControlPolicy()) is broken
