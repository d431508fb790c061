"""The rolling control-chart log: a run's control observations against their history.

For every judged run, the daemon logs each control observation (ICV, CCV, LCS
and internal-standard recoveries, calibration slopes; see
``rules/control_points.py``) in the ledger, and judges each series it touched
by the Westgard multirules (``rules/control.py``) against the series' limits:

* limits come from a baseline, the first whole runs of the series holding at
  least ``baseline_points`` (default 20) in-control points from at least
  ``baseline_runs`` (default 20) runs (points that failed their own run's
  criteria are left out, then points beyond 3 SD of the first estimate, once),
  split into the SD between runs and within a run (``rules.control.run_baseline``),
  set when the series first has them and then **locked**; ``calwarden chart
  baseline`` sets new ones, and every set is kept with its date; or
* a fixed centre and SD from the configuration (``control.fixed``).

:func:`assess` gives the run's points, any new limits, and the history of each
series it touched; ``rules.control_verdict.with_control`` turns that history
into the run's control findings (rule id ``control.<rule>``) inside the verdict.
This is the one place where history enters a verdict: the verdict of a run
depends on the runs judged before it.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass

from calwarden.daemon.settings.control import ControlSettings
from calwarden.daemon.stores.control import ControlHistory as ControlStore
from calwarden.daemon.stores.records import (
    NewLimits,
    NewPoint,
    SeriesKey,
    StoredLimits,
    StoredPoint,
)
from calwarden.rules.control import (
    ControlLimits,
    ControlPoint,
    ControlSeries,
    LimitSource,
    run_baseline,
)
from calwarden.rules.control_points import ControlObservation
from calwarden.rules.control_verdict import ControlGroup, ControlHistory
from calwarden.rules.verdict import ControlChart

_HISTORY_RUNS = 12  # runs of history a rule can need: 10-x needs ten runs' values
_BASELINE_SEARCH = 2000  # points looked through for a baseline spanning enough runs


@dataclass(frozen=True, slots=True)
class Assessment:
    """A run's control points, the limits they set, and the history the rules judge."""

    points: tuple[NewPoint, ...]
    limits: tuple[NewLimits, ...]
    history: ControlHistory


NOTHING = Assessment((), (), ControlHistory(first_new=0))


def series_name(key: SeriesKey) -> str:
    """How a series is named in messages: ``CCV Zn 20 µg/L``."""
    if key.kind == "slope":
        return f"slope {key.analyte}"
    if key.kind == "ISTD":
        return f"ISTD {key.analyte}"
    return f"{key.kind} {key.analyte} {key.level}".strip()


def stored_to_limits(stored: StoredLimits | NewLimits) -> ControlLimits:
    """The pure core's limits from a stored (or about to be stored) set."""
    return ControlLimits(
        centre=stored.centre,
        sd=stored.sd,
        n=stored.n,
        source=LimitSource(stored.source),
        sd_within=stored.sd_within,
        sd_between=stored.sd_between,
        runs=stored.runs,
    )


def series_limits(
    ledger: ControlStore, settings: ControlSettings, key: SeriesKey
) -> tuple[ControlLimits | None, StoredLimits | None]:
    """The limits a series is judged by now, and the stored set they come from.

    Fixed limits from the configuration win over stored ones (and have no stored
    set); a series with neither has no limits yet.
    """
    fixed = next((f for f in settings.fixed if f.matches(key)), None)
    if fixed is not None:
        return ControlLimits.fixed(fixed.centre, fixed.sd, sd_within=fixed.sd_within), None
    stored = ledger.active_limits(key)
    if stored is None:
        return None, None
    return stored_to_limits(stored), stored


def baseline_for(
    key: SeriesKey, points: Sequence[StoredPoint], size: int, runs: int, set_at: str
) -> NewLimits | None:
    """Limits from a series' first in-control runs, or None while there are too few.

    The baseline is the shortest start of the series made of whole runs holding
    at least ``size`` points from at least ``runs`` runs: points of one run share
    its calibration and are not independent, so the spread between runs is seen
    once per run, and limits from few runs are too narrow. Its centre and SDs
    come from the one-way random-effects decomposition of ``run_baseline``.
    """
    seen_runs: list[str] = []
    chosen: list[StoredPoint] = []
    for point in points:
        if point.run not in seen_runs:
            if len(chosen) >= size and len(seen_runs) >= runs:
                break  # the last run is whole: stop before the next one
            seen_runs.append(point.run)
        chosen.append(point)
    if len(chosen) < size or len(seen_runs) < runs:
        return None
    control = [ControlPoint(p.value, p.run, p.id, p.sample_id) for p in chosen]
    limits = run_baseline(control).limits
    if limits is None:
        return None
    return NewLimits(
        key,
        limits.centre,
        limits.sd,
        limits.n,
        LimitSource.BASELINE.value,
        chosen[0].id,
        chosen[-1].id,
        set_at,
        sd_within=limits.sd_within,
        sd_between=limits.sd_between,
        runs=limits.runs,
    )


def assess(
    ledger: ControlStore,
    settings: ControlSettings,
    instrument: str,
    run: str,
    observations: Sequence[ControlObservation],
    now: str,
    *,
    replacing: tuple[str, str] = ("", ""),
    failed_baselines: dict[SeriesKey, int] | None = None,
    few_runs: dict[SeriesKey, frozenset[str]] | None = None,
) -> Assessment:
    """Log-to-be points of one run, any limits they set, and the history to judge them by.

    ``replacing`` (inbox, path): the file whose earlier versions this run replaces;
    their points are not history for it. ``failed_baselines`` remembers, across
    calls, how many in-control points a series had when a baseline could not be
    set from them (all values equal, say), so that it is tried again only once
    the series has doubled, not on every run. ``few_runs`` remembers the runs a
    search found when they were too few for a baseline: the next search can only
    succeed once a run not among them arrives (the first points of a series are
    its window, and points only ever join it at the end), so the series is not
    read again for each file of the same run (an instrument that writes its
    method's name as the run). The caller forgets it when a file's new version
    supersedes points, which changes the window. The findings are made from the
    history by ``rules.control_verdict.with_control``.
    """
    if failed_baselines is None:
        failed_baselines = {}
    if few_runs is None:
        few_runs = {}
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
        return Assessment(points if settings.enabled else (), (), ControlHistory(first_new=0))
    first_new = ledger.next_point_id()
    new_by_key: dict[SeriesKey, list[tuple[int, NewPoint]]] = {}
    for offset, point in enumerate(points):
        new_by_key.setdefault(point.key, []).append((first_new + offset, point))
    seq_of = {first_new + offset: point.seq for offset, point in enumerate(points)}

    new_limits: list[NewLimits] = []
    groups: dict[tuple[str, str, str], list[ControlSeries]] = {}
    charts: list[ControlChart] = []
    for key, fresh in new_by_key.items():
        limits, _ = series_limits(ledger, settings, key)
        size, in_control = ledger.series_size(key, excluding=replacing)
        fresh_in_control = sum(1 for _, point in fresh if point.accepted)
        known_runs = few_runs.get(key, frozenset())
        if (
            limits is None
            and in_control + fresh_in_control
            >= max(settings.baseline_points, 2 * failed_baselines.get(key, 0))
            and not (run in known_runs and len(known_runs) < settings.baseline_runs)
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
            candidate_runs = frozenset(p.run for p in candidates)
            if established is not None:
                failed_baselines.pop(key, None)
                few_runs.pop(key, None)
                new_limits.append(established)
                limits = stored_to_limits(established)
            elif len(candidate_runs) >= settings.baseline_runs:
                # Enough points and runs, yet no limits (every value equal): not worth
                # looking again on every run.
                failed_baselines[key] = in_control + fresh_in_control
            else:
                # Too few runs: only a run not among these can make a baseline.
                few_runs[key] = candidate_runs
        size += len(fresh)
        charts.append(
            ControlChart(
                instrument=key.instrument,
                analyte=key.analyte,
                kind=key.kind,
                level=key.level,
                points=size,
                centre=limits.centre if limits else None,
                sd=limits.sd if limits else None,
                limits=limits.source.value if limits else None,
                sd_within=limits.sd_within if limits else None,
                sd_between=limits.sd_between if limits else None,
                runs=limits.runs if limits else None,
            )
        )
        if limits is None or key.kind not in settings.kinds:
            continue
        # Enough history for the longest rule: ten runs' values, each of a few points.
        per_run = max(len(fresh), 1)
        history = ledger.series_points(key, last=_HISTORY_RUNS * per_run, excluding=replacing)
        series_points = [ControlPoint(p.value, p.run, p.id, p.sample_id) for p in history] + [
            ControlPoint(p.value, p.run, pid, p.sample_id) for pid, p in fresh
        ]
        groups.setdefault((key.instrument, key.analyte, key.kind), []).append(
            ControlSeries(series_name(key), tuple(series_points), limits)
        )
    judged = tuple(
        ControlGroup(analyte, tuple(group), seq_of)
        for (_, analyte, _), group in sorted(groups.items())
    )
    told = ControlHistory(first_new=first_new, groups=judged, charts=tuple(charts))
    return Assessment(points, tuple(new_limits), told)


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


def export_rows(
    ledger: ControlStore, chosen: SeriesFilter, settings: ControlSettings | None = None
) -> list[list[str]]:
    """The control log as CSV rows (header first), each point with its series' limits.

    The limits are those the series is judged by: fixed ones from ``settings``
    when it gives some, else the active stored set. ``z`` is in SDs of one
    observation, as the chart draws it (not widened for the baseline's size).
    """
    settings = settings if settings is not None else ControlSettings()
    rows: list[list[str]] = [list(EXPORT_COLUMNS)]
    for key in ledger.series_keys():
        if not chosen.matches(key):
            continue
        limits, _ = series_limits(ledger, settings, key)
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
    ledger: ControlStore, settings: ControlSettings, chosen: SeriesFilter, now: str
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
        found.append(dataclasses.replace(limits, first_point=first, last_point=last))
    return found, skipped
