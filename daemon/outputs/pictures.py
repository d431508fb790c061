"""Pictures on disk: each control series as a PNG, each run's calibrations as PNGs.

The drawing itself is ``drawing.py`` (plain data in, PNG bytes out);
this module reads the control log and the verdicts, decides each point's status,
and writes the files atomically. matplotlib is imported only when a picture
is drawn.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING

from calwarden.daemon.control_log.log import (
    SeriesFilter,
    series_limits,
    series_name,
)
from calwarden.daemon.outputs.files import PART_LIMIT, atomic_write, shortened
from calwarden.daemon.outputs.verdict_model import VerdictDocument
from calwarden.daemon.settings.control import ControlSettings
from calwarden.daemon.stores.control import ControlHistory
from calwarden.daemon.stores.records import SeriesKey, StoredLimits
from calwarden.rules.control import ControlPoint, ControlSeries, LimitSource, evaluate_group
from calwarden.rules.criteria import AnalyteCriteria, Criteria

if TYPE_CHECKING:
    from calwarden.daemon.outputs.drawing import AcceptanceWindow, ControlChart

CHARTS_FOLDER = "charts"
_HISTORY = 1000  # points read for one chart (it draws the last chart_points of them)
_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")
_LEVEL = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(.*?)\s*$")
#: Each series kind's own acceptance window in the criteria, and how a legend names it.
_WINDOWS = {
    "ICV": ("icv_recovery_pct", "ICV recovery"),
    "CCV": ("ccv_recovery_pct", "CCV recovery"),
    "LCS": ("lcs_recovery_pct", "LCS recovery"),
    "ISTD": ("istd_recovery_pct", "internal-standard recovery"),
}


@dataclass(frozen=True, slots=True)
class ChartCriteria:
    """The acceptance criteria the runs of a series are judged by, found by instrument.

    ``by_instrument`` holds the criteria of inboxes bound to one instrument;
    every other series takes ``default`` (the configuration's criteria).
    """

    default: Criteria
    by_instrument: tuple[tuple[str, Criteria], ...] = ()

    def for_series(self, key: SeriesKey) -> AnalyteCriteria:
        chosen = next((c for name, c in self.by_instrument if name == key.instrument), None)
        return (chosen or self.default).for_analyte(key.analyte)

    @classmethod
    def of(
        cls, default: Criteria, inboxes: Sequence[tuple[str | None, Criteria | None]]
    ) -> ChartCriteria:
        """From the configuration's criteria and each inbox's (instrument, criteria)."""
        return cls(
            default,
            tuple((name, c) for name, c in inboxes if name is not None and c is not None),
        )


def _quantity(value: float) -> str:
    return f"{value:.4g}"


def acceptance_window(criteria: AnalyteCriteria, key: SeriesKey) -> AcceptanceWindow | None:
    """The series kind's own recovery window (a CCV's 90–110 %); None for slopes.

    For a check standard whose level names its nominal ("25 µg/L"), the edge
    labels give the window as concentrations too ("110 % = 27.5 µg/L").
    """
    from calwarden.daemon.outputs.drawing import AcceptanceWindow

    known = _WINDOWS.get(key.kind)
    if known is None:
        return None
    field, what = known
    low, high = getattr(criteria, field)
    nominal, unit = None, ""
    level = _LEVEL.match(key.level) if key.kind != "ISTD" else None
    if level is not None:
        nominal, unit = float(level.group(1)), level.group(2)

    def label(percent: float) -> str:
        text = f"{percent:g} %"
        if nominal is None:
            return text
        return f"{text} = {_quantity(nominal * percent / 100.0)}" + (f" {unit}" if unit else "")

    return AcceptanceWindow(
        float(low), float(high), f"{what} {low:g}–{high:g} %", label(low), label(high)
    )


def safe_name(text: str) -> str:
    """A file-name-safe form of an analyte, level or instrument name.

    Never ``.`` or ``..`` (nor only dots): as a folder those would leave ``charts/``.
    """
    safe = _UNSAFE.sub("_", text.replace("µ", "u")).strip("_") or "_"
    return safe if safe.strip(".") else safe.replace(".", "_")


def chart_path(charts_dir: Path, key: SeriesKey) -> Path:
    """``charts/<instrument>/<analyte>--<kind>[--<level>].png``."""
    parts = [shortened(safe_name(key.analyte), PART_LIMIT), key.kind]
    if key.level and key.kind not in ("ISTD", "slope"):
        parts.append(shortened(safe_name(key.level), PART_LIMIT))
    return (
        charts_dir / shortened(safe_name(key.instrument), PART_LIMIT) / ("--".join(parts) + ".png")
    )


def calibration_picture_name(stem: str, analyte: str) -> str:
    return f"{stem}.calibration-{shortened(safe_name(analyte), PART_LIMIT)}.png"


def _when(text: str | None) -> datetime | None:
    if not text:
        return None
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        return None
    # One axis cannot mix zone-aware and naive times: aware ones are shown in UTC.
    return moment.astimezone(UTC).replace(tzinfo=None) if moment.tzinfo else moment


def _limits_note(stored: StoredLimits | None, fixed: bool) -> str:
    if fixed:
        return "fixed centre and SD from the configuration"
    if stored is None:
        return ""
    runs = f" of {stored.runs} runs" if stored.runs else ""
    return f"limits from {stored.n} baseline points{runs}, set {stored.set_at[:10]}"


def build_chart(
    ledger: ControlHistory,
    settings: ControlSettings,
    key: SeriesKey,
    criteria: ChartCriteria | None = None,
    *,
    axis: str | None = None,
) -> ControlChart:
    """The :class:`~drawing.ControlChart` of one series, as the ledger has it now.

    ``criteria``: the runs' acceptance criteria, whose window the chart shows until
    the series has limits. ``axis`` overrides ``settings.chart_axis``.
    """
    from calwarden.daemon.outputs.drawing import (
        BASELINE,
        IN_CONTROL,
        REJECTION,
        WARNING,
        ChartPoint,
        ControlChart,
    )

    points = ledger.series_points(key, last=_HISTORY)
    limits, stored = series_limits(ledger, settings, key)

    status = [IN_CONTROL] * len(points)
    rules: list[list[str]] = [[] for _ in points]
    if stored is not None and stored.first_point is not None and stored.last_point is not None:
        for index, point in enumerate(points):
            if point.accepted and stored.first_point <= point.id <= stored.last_point:
                status[index] = BASELINE
    if limits is not None and points and key.kind in settings.kinds:
        series = ControlSeries(
            series_name(key),
            tuple(ControlPoint(p.value, p.run, p.id, p.sample_id) for p in points),
            limits,
        )
        for violation in evaluate_group((series,), settings.rules):
            rejects = violation.rule in settings.rejecting and settings.rejection_severity == "fail"
            worst = REJECTION if rejects else WARNING
            for ref in violation.points:
                if status[ref.index] != REJECTION:
                    status[ref.index] = worst
            last = violation.points[-1].index
            if violation.rule not in rules[last]:
                rules[last].append(violation.rule)
    for index, point in enumerate(points):
        if not point.accepted:
            # It failed its own run's criteria (a CCV out of its limits, say): a reader
            # must not take it for an in-control point.
            status[index] = REJECTION
            rules[index].insert(0, "failed in its run")
    for names in rules:
        if len(names) > 1 and "1-2s" in names:
            names.remove("1-2s")  # the warning says nothing a rejection at the point does not
    unit = points[-1].unit if points else ""
    unit_label = "recovery (%)" if unit == "%" else f"slope ({unit})"
    level = f" {key.level}" if key.level and key.kind not in ("ISTD", "slope") else ""
    return ControlChart(
        title=f"{key.instrument} · {key.analyte} · {key.kind}{level}",
        unit_label=unit_label,
        # Drawn in time order: a backlog or a re-judged file may have logged points late.
        points=tuple(
            sorted(
                (
                    ChartPoint(
                        when=_when(p.acquired) or _when(p.evaluated_at),
                        value=p.value,
                        run=p.run,
                        status=status[i],
                        rules=tuple(rules[i]),
                    )
                    for i, p in enumerate(points)
                ),
                key=lambda point: point.when or datetime.max,
            )
        ),
        centre=None if limits is None else limits.centre,
        sd=None if limits is None else limits.sd,
        limits_note=_limits_note(stored, limits is not None and limits.source is LimitSource.FIXED)
        or (
            f"a baseline needs {settings.baseline_points} in-control points from "
            f"{settings.baseline_runs} runs"
        ),
        last_n=settings.chart_points,
        baseline_size=settings.baseline_points,
        axis=axis or settings.chart_axis,
        window=None
        if criteria is None or limits is not None
        else acceptance_window(criteria.for_series(key), key),
    )


def draw_series(
    ledger: ControlHistory,
    settings: ControlSettings,
    charts_dir: Path,
    keys: Iterable[SeriesKey],
    criteria: ChartCriteria | None = None,
    *,
    axis: str | None = None,
) -> list[Path]:
    """Draw the given series' charts; returns the files written."""
    from calwarden.daemon.outputs.drawing import control_chart_png

    written = []
    for key in keys:
        path = chart_path(charts_dir, key)
        path.parent.mkdir(parents=True, exist_ok=True)
        chart = build_chart(ledger, settings, key, criteria, axis=axis)
        atomic_write(path, control_chart_png(chart))
        written.append(path)
    return written


def draw_charts(
    ledger: ControlHistory,
    settings: ControlSettings,
    charts_dir: Path,
    chosen: SeriesFilter,
    criteria: ChartCriteria | None = None,
    *,
    axis: str | None = None,
) -> list[Path]:
    """Draw every chosen series of the log (``calwarden chart``)."""
    keys = [key for key in ledger.series_keys() if chosen.matches(key)]
    return draw_series(ledger, settings, charts_dir, keys, criteria, axis=axis)


def draw_calibration(document: VerdictDocument, out_folder: Path, stem: str, analyte: str) -> Path:
    """The picture of one calibration of a verdict: the curve over its standards, residuals."""
    from calwarden.daemon.outputs.drawing import calibration_png

    path = out_folder / calibration_picture_name(stem, analyte)
    out_folder.mkdir(parents=True, exist_ok=True)
    atomic_write(path, calibration_png(analyte, document["calibrations"][analyte]))
    return path
