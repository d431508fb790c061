"""The rolling control-chart log: a run's control observations against their history.

For every judged run, the daemon logs each control observation (ICV, CCV, LCS
and internal-standard recoveries, calibration slopes; see
``rules/control_points.py``) in the ledger, and judges each series it touched
by the Westgard multirules (``rules/control.py``) against the series' limits:

* limits come from a baseline, the first ``baseline_points`` (default 20)
  in-control points of the series from at least ``baseline_runs`` (default 5)
  runs (points that failed their own run's criteria are left out, then points
  beyond 3 SD of the first estimate, once), set when the series first has them
  and then **locked**; ``calwarden chart baseline``
  sets new ones, and every set is kept with its date; or
* a fixed centre and SD from the configuration (``control.fixed``).

A violation completed by one of this run's points becomes a finding in the
run's verdict (rule id ``control.<rule>``): a warning for 1-2s, a failure for
the rejection rules, both configurable. This is the one place where history
enters a verdict: the verdict of a run depends on the runs judged before it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

from pydantic import Field, field_validator

from calwarden.daemon.outputs.verdict_json import add_repeat
from calwarden.daemon.outputs.verdict_model import ControlChartEntry, FindingEntry, VerdictDocument
from calwarden.daemon.settings.section import Section
from calwarden.daemon.stores.control import ControlHistory
from calwarden.daemon.stores.records import (
    NewLimits,
    NewPoint,
    SeriesKey,
    StoredLimits,
    StoredPoint,
)
from calwarden.rules.control import (
    BASELINE_SIZE,
    DEFAULT_RULES,
    EWMA_LAMBDA,
    EWMA_WIDTH,
    WESTGARD_RULES,
    ControlLimits,
    ControlPoint,
    ControlSeries,
    LimitSource,
    baseline_limits,
    evaluate_group,
    ewma_violations,
)
from calwarden.rules.control_points import ControlObservation
from calwarden.rules.verdict import Severity

SeriesKind = Literal["ICV", "CCV", "LCS", "ISTD", "slope"]
_HISTORY = 40  # points of history a rule can need: 10-x across two levels needs at most 20
_BASELINE_SEARCH = 2000  # points looked through for a baseline spanning enough runs


class FixedLimits(Section):
    """A centre and SD given by the laboratory for some series."""

    analyte: str = Field(description="the analyte (or internal standard) of the series")
    kind: SeriesKind = Field(description="ICV, CCV, LCS, ISTD or slope")
    level: str | None = Field(
        default=None, description="the level as charts name it (e.g. '20 µg/L'); absent: every"
    )
    instrument: str | None = Field(default=None, description="absent: every instrument")
    centre: float
    sd: float = Field(gt=0)

    def matches(self, key: SeriesKey) -> bool:
        return (
            self.analyte.casefold() == key.analyte.casefold()
            and self.kind == key.kind
            and (self.level is None or self.level == key.level)
            and (self.instrument is None or self.instrument == key.instrument)
        )


class ControlSettings(Section):
    """The ``control`` section: the control-chart log, its limits and its rules."""

    enabled: bool = Field(default=True, description="log control points and apply the rules")
    baseline_points: int = Field(
        default=BASELINE_SIZE,
        ge=2,
        le=1000,
        description="limits are set from this many first points of a series (20 is "
        "Westgard's recommendation and common practice)",
    )
    baseline_runs: int = Field(
        default=5,
        ge=1,
        le=1000,
        description="a baseline spans at least this many runs (common practice: limits "
        "from one or two sequences are too narrow)",
    )
    rules: tuple[str, ...] = Field(
        default=DEFAULT_RULES, description="the Westgard rules applied (ids as `calwarden rules`)"
    )
    warning_severity: Literal["warn", "info"] = Field(
        default="warn", description="severity of a 1-2s finding"
    )
    rejection_severity: Literal["fail", "warn"] = Field(
        default="fail", description="severity of 1-3s, 2-2s, R-4s, 4-1s and 10-x findings"
    )
    kinds: tuple[SeriesKind, ...] = Field(
        default=("ICV", "CCV", "LCS", "slope"),
        description="which series the rules judge; every series is logged and charted. "
        "ISTD is left out by default: its points drift together within a sequence, and "
        "each run's own istd.recovery rule judges them",
    )
    fixed: tuple[FixedLimits, ...] = Field(
        default=(), description="fixed centre and SD for some series instead of a baseline"
    )
    ewma: bool = Field(
        default=False,
        description="also judge each series by an EWMA chart, for slow drifts "
        "(Roberts 1959; exact limits as in Lucas & Saccucci 1990)",
    )
    ewma_lambda: float = Field(
        default=EWMA_LAMBDA, gt=0, le=1, description="weight of the newest point (0.2)"
    )
    ewma_width: float = Field(
        default=EWMA_WIDTH, gt=0, le=10, description="limits at this many EWMA SDs (3)"
    )
    ewma_severity: Literal["warn", "fail"] = Field(
        default="warn", description="severity of an ewma finding"
    )
    chart_points: int = Field(
        default=60, ge=5, le=1000, description="points drawn on each control chart"
    )
    charts: bool = Field(default=True, description="draw the charts as PNG after each run")

    @field_validator("rules")
    @classmethod
    def _known_rules(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        unknown = sorted(set(value) - set(WESTGARD_RULES))
        if unknown:
            raise ValueError(
                f"unknown control rule {unknown[0]!r}; known: {', '.join(WESTGARD_RULES)}"
            )
        return value


@dataclass(frozen=True, slots=True)
class Assessment:
    """A run's control points, the limits they set, and the findings they raise."""

    points: tuple[NewPoint, ...]
    limits: tuple[NewLimits, ...]
    findings: tuple[FindingEntry, ...]
    series: tuple[ControlChartEntry, ...]  # one summary per series, for the verdict JSON


def series_name(key: SeriesKey) -> str:
    """How a series is named in messages: ``CCV Zn 20 µg/L``."""
    if key.kind == "slope":
        return f"slope {key.analyte}"
    if key.kind == "ISTD":
        return f"ISTD {key.analyte}"
    return f"{key.kind} {key.analyte} {key.level}".strip()


def series_limits(
    ledger: ControlHistory, settings: ControlSettings, key: SeriesKey
) -> tuple[ControlLimits | None, StoredLimits | None]:
    """The limits a series is judged by now, and the stored set they come from.

    Fixed limits from the configuration win over stored ones (and have no stored
    set); a series with neither has no limits yet.
    """
    fixed = next((f for f in settings.fixed if f.matches(key)), None)
    if fixed is not None:
        return ControlLimits.fixed(fixed.centre, fixed.sd), None
    stored = ledger.active_limits(key)
    if stored is None:
        return None, None
    limits = ControlLimits(
        centre=stored.centre, sd=stored.sd, n=stored.n, source=LimitSource(stored.source)
    )
    return limits, stored


def baseline_for(
    key: SeriesKey, points: Sequence[StoredPoint], size: int, runs: int, set_at: str
) -> NewLimits | None:
    """Limits from a series' first in-control points, or None while there are too few.

    The baseline is the shortest start of the series holding at least ``size``
    points from at least ``runs`` different runs: points of one run are not
    independent (a drifting run, an internal standard across one sequence), so
    limits from one or two runs would be too narrow.
    """
    seen_runs: set[str] = set()
    chosen: list[StoredPoint] = []
    for point in points:
        chosen.append(point)
        seen_runs.add(point.run)
        if len(chosen) >= size and len(seen_runs) >= runs:
            break
    else:
        return None
    control = [ControlPoint(p.value, p.run, p.id, p.sample_id) for p in chosen]
    baseline = baseline_limits(control, size=len(chosen), in_control_only=True)
    if baseline.limits is None:
        return None
    return NewLimits(
        key,
        baseline.limits.centre,
        baseline.limits.sd,
        baseline.limits.n,
        LimitSource.BASELINE.value,
        chosen[0].id,
        chosen[-1].id,
        set_at,
    )


def assess(
    ledger: ControlHistory,
    settings: ControlSettings,
    instrument: str,
    run: str,
    observations: Sequence[ControlObservation],
    now: str,
    *,
    replacing: tuple[str, str] = ("", ""),
    failed_baselines: dict[SeriesKey, int] | None = None,
) -> Assessment:
    """Log-to-be points of one run, and the Westgard findings they complete.

    ``replacing`` (inbox, path): the file whose earlier versions this run replaces;
    their points are not history for it. ``failed_baselines`` remembers, across
    calls, how many in-control points a series had when a baseline could not be
    set from them (all values equal, say), so that it is tried again only once
    the series has doubled, not on every run.
    """
    if failed_baselines is None:
        failed_baselines = {}
    points = tuple(
        NewPoint(
            SeriesKey(instrument, o.analyte, o.kind, o.level),
            run,
            o.seq,
            o.sample_id,
            o.acquired,
            o.value,
            o.unit,
            o.accepted,
        )
        for o in observations
    )
    if not settings.enabled or not points:
        return Assessment(points if settings.enabled else (), (), (), ())
    first_new = ledger.next_point_id()
    new_by_key: dict[SeriesKey, list[tuple[int, NewPoint]]] = {}
    for offset, point in enumerate(points):
        new_by_key.setdefault(point.key, []).append((first_new + offset, point))
    seq_of = {first_new + offset: point.seq for offset, point in enumerate(points)}

    new_limits: list[NewLimits] = []
    groups: dict[tuple[str, str, str], list[ControlSeries]] = {}
    summaries: list[ControlChartEntry] = []
    for key, fresh in new_by_key.items():
        limits, _ = series_limits(ledger, settings, key)
        size, in_control = ledger.series_size(key, excluding=replacing)
        fresh_in_control = sum(1 for _, point in fresh if point.accepted)
        if limits is None and in_control + fresh_in_control >= max(
            settings.baseline_points, 2 * failed_baselines.get(key, 0)
        ):
            earlier = ledger.series_points(
                key, first=_BASELINE_SEARCH, excluding=replacing, accepted_only=True
            )
            candidates = earlier + [
                StoredPoint(pid, p.run, p.seq, p.sample_id, p.acquired, p.value, p.unit, now)
                for pid, p in fresh
                if p.accepted
            ]
            established = baseline_for(
                key, candidates, settings.baseline_points, settings.baseline_runs, now
            )
            if established is not None:
                failed_baselines.pop(key, None)
                new_limits.append(established)
                limits = ControlLimits(
                    established.centre,
                    established.sd,
                    established.n,
                    LimitSource.BASELINE,
                )
            elif len({p.run for p in candidates}) >= settings.baseline_runs:
                # Enough points and runs, yet no limits (every value equal): not worth
                # looking again on every run. (Too few runs: the next run may do.)
                failed_baselines[key] = in_control + fresh_in_control
        size += len(fresh)
        summaries.append(
            {
                "instrument": key.instrument,
                "analyte": key.analyte,
                "kind": key.kind,
                "level": key.level,
                "points": size,
                "centre": limits.centre if limits else None,
                "sd": limits.sd if limits else None,
                "limits": limits.source.value if limits else None,
            }
        )
        if limits is None or key.kind not in settings.kinds:
            continue
        history = ledger.series_points(key, last=_HISTORY, excluding=replacing)
        series_points = [ControlPoint(p.value, p.run, p.id, p.sample_id) for p in history] + [
            ControlPoint(p.value, p.run, pid, p.sample_id) for pid, p in fresh
        ]
        groups.setdefault((key.instrument, key.analyte, key.kind), []).append(
            ControlSeries(series_name(key), tuple(series_points), limits)
        )

    findings: list[FindingEntry] = []
    for (_, analyte, _), group in sorted(groups.items()):
        violations = list(evaluate_group(group, settings.rules))
        if settings.ewma:
            for series in group:
                violations += ewma_violations(
                    series, settings.ewma_lambda, settings.ewma_width, Severity.WARN
                )
        rejected = {
            (v.points[-1].series, v.points[-1].index)
            for v in violations
            if v.severity is Severity.FAIL
        }
        for violation in violations:
            completing = violation.points[-1]
            if completing.order < first_new:
                continue  # completed by an earlier run: that run's verdict said so
            if violation.rule == "1-2s" and (completing.series, completing.index) in rejected:
                continue  # the rejection at the same point says more
            if violation.rule == "ewma":
                severity: str = settings.ewma_severity
            elif violation.severity is Severity.WARN:
                severity = settings.warning_severity
            else:
                severity = settings.rejection_severity
            findings.append(
                {
                    "rule": f"control.{violation.rule}",
                    "severity": severity,
                    "analyte": analyte,
                    "sample_id": completing.label,
                    "seq": seq_of.get(completing.order),
                    "value": round(completing.z, 4),
                    "limit": None,
                    "message": f"control chart {violation.rule}: {violation.message}",
                    "affected": [],
                    "causes": [],
                }
            )
    return Assessment(points, tuple(new_limits), tuple(findings), tuple(summaries))


def amend(document: VerdictDocument, assessment: Assessment) -> VerdictDocument:
    """The verdict document with the control findings and series added."""
    if not assessment.series and not assessment.findings:
        return document
    findings = [*document.get("findings", []), *assessment.findings]
    status = document["status"]
    if status == "pass" and any(f["severity"] == "fail" for f in assessment.findings):
        status = "fail"
    repeat = list(document.get("repeat", []))
    for finding in assessment.findings:  # a control rejection rejects the analyte's run
        if finding["severity"] == "fail":
            repeat = add_repeat(repeat, "run", finding.get("analyte"), finding["message"])
    return {
        **document,
        "status": status,
        "findings": findings,
        "repeat": repeat,
        "control_charts": list(assessment.series),
    }


# --------------------------------------------------------------------------- commands

EXPORT_COLUMNS = (
    "instrument",
    "analyte",
    "kind",
    "level",
    "point",
    "run",
    "seq",
    "sample_id",
    "acquired",
    "value",
    "unit",
    "in_control",
    "logged_at",
    "centre",
    "sd",
    "z",
)


@dataclass(frozen=True, slots=True)
class SeriesFilter:
    """Which series a chart command concerns; None matches every value."""

    instrument: str | None = None
    analyte: str | None = None
    kind: str | None = None

    def matches(self, key: SeriesKey) -> bool:
        return (
            (self.instrument is None or self.instrument.casefold() == key.instrument.casefold())
            and (self.analyte is None or self.analyte.casefold() == key.analyte.casefold())
            and (self.kind is None or self.kind.casefold() == key.kind.casefold())
        )


def export_rows(ledger: ControlHistory, chosen: SeriesFilter) -> list[list[str]]:
    """The control log as CSV rows (header first), each point with its series' active limits."""
    rows: list[list[str]] = [list(EXPORT_COLUMNS)]
    for key in ledger.series_keys():
        if not chosen.matches(key):
            continue
        limits = ledger.active_limits(key)
        for point in ledger.series_points(key):
            z = (point.value - limits.centre) / limits.sd if limits else None
            rows.append(
                [
                    key.instrument,
                    key.analyte,
                    key.kind,
                    key.level,
                    str(point.id),
                    point.run,
                    "" if point.seq is None else str(point.seq),
                    point.sample_id or "",
                    point.acquired or "",
                    repr(point.value),
                    point.unit,
                    "yes" if point.accepted else "no",
                    point.evaluated_at,
                    "" if limits is None else repr(limits.centre),
                    "" if limits is None else repr(limits.sd),
                    "" if z is None else f"{z:.4f}",
                ]
            )
    return rows


def recompute_baselines(
    ledger: ControlHistory, settings: ControlSettings, chosen: SeriesFilter, now: str
) -> tuple[list[NewLimits], list[str]]:
    """New limits from each chosen series' most recent in-control points.

    The baseline is the shortest end of the series holding ``baseline_points``
    points from ``baseline_runs`` runs. Returns the limits (not yet stored) and,
    for the series that have too few points, why.
    """
    found: list[NewLimits] = []
    skipped: list[str] = []
    for key in ledger.series_keys():
        if not chosen.matches(key):
            continue
        recent = ledger.series_points(key, last=_BASELINE_SEARCH, accepted_only=True)
        latest_first = list(reversed(recent))
        limits = baseline_for(
            key, latest_first, settings.baseline_points, settings.baseline_runs, now
        )
        if limits is None:
            skipped.append(
                f"{key.instrument} {series_name(key)}: {len(recent)} in-control point(s); a "
                f"baseline needs {settings.baseline_points} from {settings.baseline_runs} runs"
            )
            continue
        first, last = sorted((limits.first_point or 0, limits.last_point or 0))
        found.append(
            NewLimits(
                key, limits.centre, limits.sd, limits.n, limits.source, first, last, limits.set_at
            )
        )
    return found, skipped
