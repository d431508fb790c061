"""Pictures: control charts and calibration curves, drawn from plain data to PNG bytes.

Pure functions: data in, PNG bytes out; no files, no clock. matplotlib draws them
through its object interface (a :class:`~matplotlib.figure.Figure` on a
``FigureCanvasAgg``), never through ``pyplot``: no display is needed, no global
figure state is touched, and two threads may each draw their own picture. Every
size, colour and font size is given here, not taken from matplotlib's defaults
where it matters to the reading. matplotlib is imported by the drawing functions
only, so building a :class:`ControlChart` and starting the command line stay light.

The PNGs are deterministic: the same input gives the same bytes (no software or
date stamp is written), so a picture can be an output the daemon reproduces.

Choices made here (ours, not from a standard):

- Markers differ by shape *and* colour, so a chart reads in greyscale too: open
  circle for a baseline point, filled circle in control, triangle for a warning,
  a cross for a rejection.
- The y axis of a control chart spans at least centre ± 4 SD and at most
  centre ± 8 SD: a far outlier would otherwise squash the limit lines into one
  band. A point beyond is drawn at the edge and labelled with its value.
  Without limits it spans at least the points' mean ± 5 %: a few points with
  an autoscaled axis would make 0.5 % of noise look like a trend.
- Only the latest few violations carry their rule ids on the chart; the subtitle
  says how many more there are.
- Before a series has control limits, the runs' own acceptance window (a CCV's
  recovery limits, say) is drawn as a light band between dash-dot lines, and the
  legend says it is the acceptance window and that there is no baseline yet: the
  window judges each run on its own, it is not a control limit.
- By default the x axis is the run order (``axis="run"``): one evenly spaced slot
  per run, the points of one run side by side in it, a few slots labelled with
  the run's name and date. Overnight and weekend gaps would otherwise leave most
  of a time axis empty. ``axis="time"`` places points at their acquisition times.
- The residual panel of a calibration shows ±15 % (the default
  ``back_calculation_pct`` of :mod:`rules.criteria`) as guide lines labelled as
  guides: a verdict does not record which limit its run used.
"""

from __future__ import annotations

import io
import math
import textwrap
import threading
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING, Any, TypeGuard

from calwarden.daemon.outputs.verdict_model import CalibrationEntry
from calwarden.rules.control import BASELINE_SIZE

#: The daemon draws in two threads (the worker's pictures, the alert sender's inline
#: charts); matplotlib's caches (fonts, text layout) are not documented as thread-safe,
#: so one picture is drawn at a time.
DRAWING = threading.Lock()

if TYPE_CHECKING:
    from matplotlib.artist import Artist
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

__all__ = [
    "AXES",
    "BASELINE",
    "IN_CONTROL",
    "REJECTION",
    "STATUSES",
    "WARNING",
    "AcceptanceWindow",
    "ChartPoint",
    "ControlChart",
    "calibration_figure",
    "calibration_png",
    "control_chart_figure",
    "control_chart_png",
]

IN_CONTROL = "in control"
WARNING = "warning"
REJECTION = "rejection"
BASELINE = "baseline"  # a point the limits were computed from
#: Every status a :class:`ChartPoint` may have, in the legend's order.
STATUSES = (BASELINE, IN_CONTROL, WARNING, REJECTION)
#: The x axes a control chart may have: run order (evenly spaced) or acquisition time.
AXES = ("run", "time")

DPI = 100
CONTROL_SIZE_INCHES = (10.0, 6.0)  # 1000 × 600 px
CALIBRATION_SIZE_INCHES = (9.0, 8.0)  # 900 × 800 px
#: How many violations carry their rule ids on a control chart (the latest ones).
ANNOTATED_VIOLATIONS = 6
#: The y axis of a control chart: at least and at most this many SD about the centre.
_SPAN_MIN_SD = 4.0
_SPAN_MAX_SD = 8.0
#: Room left beyond the outermost point, in SD, so its label fits on its own side.
_ROOM_SD = 1.0
#: Without limits the y axis spans at least the mean ± this fraction of it.
_UNLIMITED_HALF_SPAN = 0.05
_RESIDUAL_HEIGHT_PT = 130.0
#: At most this many runs are named under a run axis (the rest are ticks without text).
_RUN_LABELS = 7
#: The points of one run share this much of its slot on a run axis.
_RUN_SPREAD = 0.5

# Colours: dark enough on white, apart in hue and in lightness (greyscale).
_INK = "#222222"
_MUTED = "#5b6670"
_LINE = "#9aa3aa"
_BLUE = "#1f5f99"
_AMBER = "#b77800"
_RED = "#c0341d"
_WINDOW_FILL = "#e9f0f6"

_TITLE_PT = 13.0
_SUBTITLE_PT = 10.0
_LABEL_PT = 10.5
_TICK_PT = 9.5
_SMALL_PT = 9.0


@dataclass(frozen=True, slots=True)
class _Marker:
    marker: str
    face: str
    edge: str
    size: float  # scatter area, pt²
    label: str


_MARKERS = {
    BASELINE: _Marker("o", "white", _MUTED, 30.0, "baseline (sets the limits)"),
    IN_CONTROL: _Marker("o", _BLUE, _BLUE, 30.0, "in control"),
    WARNING: _Marker("^", _AMBER, _AMBER, 62.0, "warning"),
    REJECTION: _Marker("X", _RED, _RED, 80.0, "rejection"),
}
_TEXT_COLOUR = {BASELINE: _MUTED, IN_CONTROL: _BLUE, WARNING: _AMBER, REJECTION: _RED}


@dataclass(frozen=True, slots=True)
class ChartPoint:
    """One point of a control chart.

    ``when`` is the acquisition time (``None`` when unknown); ``status`` is one of
    :data:`STATUSES`; ``rules`` are the ids of the Westgard rules the point
    violates ("2-2s", "1-3s" …), shown beside it.
    """

    when: datetime | None
    value: float
    run: str
    status: str = IN_CONTROL
    rules: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if not math.isfinite(self.value):
            raise ValueError(f"a chart value must be finite, got {self.value}")
        if self.status not in STATUSES:
            raise ValueError(f"unknown status {self.status!r}; one of {', '.join(STATUSES)}")


@dataclass(frozen=True, slots=True)
class AcceptanceWindow:
    """The runs' own acceptance limits in the chart's unit (a CCV's 90–110 % recovery).

    Drawn only while a chart has no control limits. ``what`` names the window in
    the legend ("CCV recovery 90–110 %"); ``low_label`` and ``high_label`` are the
    texts at the right edge ("110 % = 27.5 µg/L").
    """

    low: float
    high: float
    what: str
    low_label: str = ""
    high_label: str = ""

    def __post_init__(self) -> None:
        if not (math.isfinite(self.low) and math.isfinite(self.high) and self.low < self.high):
            raise ValueError(f"a window needs finite low < high, got {self.low}, {self.high}")


@dataclass(frozen=True, slots=True)
class ControlChart:
    """What a control chart shows: a series of points and, once set, its limits.

    ``centre`` and ``sd`` are both given (``sd`` > 0) or both ``None`` (no limits
    yet: fewer points than a baseline needs, ``baseline_size``). ``limits_note``
    says where the limits come from ("limits from the first 20 points, set
    2026-12-01"), or why there are none. Only the last ``last_n`` points are
    drawn. ``axis`` is ``"run"`` (one evenly spaced slot per run, in the order of
    ``points``) or ``"time"`` (acquisition times; when any point shown has no
    time, every point is placed by its position in the series instead, 1 for the
    first point of ``points``). ``window``, the runs' own acceptance limits, is
    drawn while there are no control limits.
    """

    title: str
    unit_label: str
    points: tuple[ChartPoint, ...]
    centre: float | None = None
    sd: float | None = None
    limits_note: str = ""
    last_n: int = 60
    baseline_size: int = BASELINE_SIZE
    axis: str = "run"
    window: AcceptanceWindow | None = None

    def __post_init__(self) -> None:
        if self.axis not in AXES:
            raise ValueError(f"unknown axis {self.axis!r}; one of {', '.join(AXES)}")
        if (self.centre is None) != (self.sd is None):
            raise ValueError("give both the centre and the SD, or neither")
        if self.centre is not None and not math.isfinite(self.centre):
            raise ValueError(f"the centre must be finite, got {self.centre}")
        if self.sd is not None and not (math.isfinite(self.sd) and self.sd > 0.0):
            raise ValueError(f"the SD must be finite and greater than zero, got {self.sd}")
        if self.last_n < 1:
            raise ValueError(f"last_n must be at least 1, got {self.last_n}")


# --- shared helpers ---------------------------------------------------------------------


def _new_figure(size: tuple[float, float]) -> Figure:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    figure = Figure(figsize=size, dpi=DPI, layout="constrained", facecolor="white")
    FigureCanvasAgg(figure)  # attaches itself: Agg, never a display
    return figure


def _png(figure: Figure) -> bytes:
    _lay_out(figure)  # once, here: savefig would otherwise draw the whole figure twice
    buffer = io.BytesIO()
    # No "Software" stamp (matplotlib's version) and no date: same input, same bytes.
    figure.savefig(buffer, format="png", dpi=DPI, metadata={"Software": None})
    return buffer.getvalue()


def _lay_out(figure: Figure) -> None:
    """Run the constrained layout now and fix its result (later texts must fit inside it)."""
    from matplotlib.layout_engine import ConstrainedLayoutEngine

    engine = figure.get_layout_engine()
    if isinstance(engine, ConstrainedLayoutEngine):  # not yet run (afterwards a placeholder)
        engine.execute(figure)
        figure.set_layout_engine("none")


def _decimals(step: float) -> int:
    """Decimals that show ``step`` (an SD, a span) to about two significant digits."""
    if not (math.isfinite(step) and step > 0.0):
        return 2
    return max(0, min(6, 1 - math.floor(math.log10(step))))


def _style_axes(ax: Axes) -> None:
    ax.tick_params(labelsize=_TICK_PT, color=_MUTED, labelcolor=_INK)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(_MUTED)
    ax.grid(axis="y", color="#e6e9ec", linewidth=0.6)
    ax.set_axisbelow(True)


def _titles(figure: Figure, ax: Axes, title: str, subtitle: str, colour: str = _MUTED) -> None:
    figure.suptitle(title, x=0.01, ha="left", fontsize=_TITLE_PT, fontweight="bold", color=_INK)
    ax.set_title(subtitle, loc="left", fontsize=_SUBTITLE_PT, color=colour, pad=8)


def _edge_label(ax: Axes, y: float, text: str, colour: str) -> None:
    """A label just right of the plot at height ``y`` (data units)."""
    ax.annotate(
        text,
        xy=(1.0, y),
        xycoords=("axes fraction", "data"),
        xytext=(5, 0),
        textcoords="offset points",
        ha="left",
        va="center",
        fontsize=_SMALL_PT,
        color=colour,
        annotation_clip=False,
    )


# --- control chart ----------------------------------------------------------------------


def control_chart_png(chart: ControlChart) -> bytes:
    """The control chart as a PNG of 1000 × 600 px."""
    with DRAWING:
        return _png(control_chart_figure(chart))


def control_chart_figure(chart: ControlChart) -> Figure:
    """The control chart as a matplotlib figure on an Agg canvas (for tests, other formats)."""
    from matplotlib import dates as mdates
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from matplotlib.ticker import FuncFormatter, MaxNLocator

    total = len(chart.points)
    first = max(0, total - chart.last_n)
    shown = chart.points[first:]
    timed = bool(shown) and all(p.when is not None for p in shown)
    by_run = chart.axis == "run" and bool(shown)
    by_time = chart.axis == "time" and timed
    slots: list[tuple[str, datetime | None]] = []  # a run axis: each slot's run and time
    if by_run:
        xs, slots = _run_positions(shown)
    elif by_time:
        # matplotlib.dates carries no type annotations, hence the ignores.
        xs = [float(mdates.date2num(p.when)) for p in shown]  # type: ignore[no-untyped-call]
    else:
        xs = [float(first + i + 1) for i in range(len(shown))]
    values = [p.value for p in shown]

    figure = _new_figure(CONTROL_SIZE_INCHES)
    ax = figure.add_subplot()
    _style_axes(ax)

    centre, sd = chart.centre, chart.sd
    window = chart.window if centre is None else None  # limits, once set, replace it
    low, high = _control_span(values, centre, sd)
    # A point off the axis is drawn on its edge (and labelled with its value).
    drawn = [min(max(v, low), high) for v in values]
    off_scale = [i for i, v in enumerate(values) if v != drawn[i]]

    # The limit lines first, so the points lie over them.
    if centre is not None and sd is not None:
        decimals = _decimals(sd)
        ax.axhline(centre, color=_INK, linewidth=1.1, zorder=1)
        _edge_label(ax, centre, f"centre {centre:.{decimals}f}", _INK)
        for k, colour, style, width in (
            (1, _LINE, ":", 0.9),
            (2, _AMBER, "--", 1.0),
            (3, _RED, "-", 1.0),
        ):
            for sign, mark in ((1, "+"), (-1, "−")):
                y = centre + sign * k * sd
                ax.axhline(y, color=colour, linestyle=style, linewidth=width, zorder=1)
                label = f"{mark}{k}s {y:.{decimals}f}"
                _edge_label(ax, y, label, _MUTED if k == 1 else colour)
        ax.set_ylim(low, high)
    elif window is not None:
        ax.axhspan(window.low, window.high, color=_WINDOW_FILL, zorder=0, gid="window")
        for y, text in ((window.low, window.low_label), (window.high, window.high_label)):
            ax.axhline(y, color=_MUTED, linestyle="-.", linewidth=1.0, zorder=1)
            _edge_label(ax, y, text or f"{y:g}", _MUTED)
        ax.set_ylim(*_unlimited_span([*values, window.low, window.high]))
    elif values:
        ax.set_ylim(*_unlimited_span(values))

    ax.plot(xs, drawn, color=_LINE, linewidth=0.8, zorder=2, gid="series")
    present = [s for s in STATUSES if any(p.status == s for p in shown)]
    for status in present:
        marker = _MARKERS[status]
        indexes = [i for i, p in enumerate(shown) if p.status == status]
        ax.scatter(
            [xs[i] for i in indexes],
            [drawn[i] for i in indexes],
            s=marker.size,
            marker=marker.marker,
            facecolors=marker.face,
            edgecolors=marker.edge,
            linewidths=1.0,
            zorder=3,
            clip_on=False,  # a point drawn on the edge shows whole
            gid=f"status: {status}",
        )

    labels, unlabelled = _violation_labels(shown, values, off_scale, _decimals(sd or 0.0))

    # Axes: dates readable, values without offsets or scientific notation.
    if by_run:
        _run_axis(ax, slots)
    elif by_time:
        tz = shown[0].when.tzinfo if shown[0].when is not None else None
        locator = mdates.AutoDateLocator(tz=tz, minticks=4, maxticks=9)  # type: ignore[no-untyped-call]
        concise = mdates.ConciseDateFormatter(locator, tz=tz)  # type: ignore[no-untyped-call]
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(concise)
    else:
        ax.xaxis.set_major_locator(MaxNLocator(integer=True, nbins=10))
        missing = sum(p.when is None for p in shown)
        if shown and missing < len(shown):
            ax.set_xlabel(
                f"point number in the series ({missing} of {len(shown)} points have no time)",
                fontsize=_LABEL_PT,
                color=_INK,
            )
        else:
            ax.set_xlabel("point number in the series", fontsize=_LABEL_PT, color=_INK)
    if by_run:
        ax.set_xlim(0.4, len(slots) + 0.6)
    elif xs and max(xs) == min(xs):
        pad = 0.5 if by_time else 1.0  # one point, or all at one time: half a day either side
        ax.set_xlim(xs[0] - pad, xs[0] + pad)
    else:
        ax.margins(x=0.03)
    ax.yaxis.set_major_formatter(FuncFormatter(_grouped))
    ax.set_ylabel(chart.unit_label, fontsize=_LABEL_PT, color=_INK)
    if not shown:
        ax.text(
            0.5,
            0.5,
            "no points yet",
            transform=ax.transAxes,
            ha="center",
            va="center",
            fontsize=_LABEL_PT,
            color=_MUTED,
        )

    # Legend: only the statuses present, one row beneath the plot.
    handles: list[Artist] = [
        Line2D(
            [],
            [],
            linestyle="none",
            marker=_MARKERS[s].marker,
            markersize=math.sqrt(_MARKERS[s].size),
            markerfacecolor=_MARKERS[s].face,
            markeredgecolor=_MARKERS[s].edge,
            label=_MARKERS[s].label,
        )
        for s in present
    ]
    if window is not None:
        handles.append(
            Patch(
                facecolor=_WINDOW_FILL,
                edgecolor=_MUTED,
                linestyle="-.",
                label=f"acceptance window of each run ({window.what}); no baseline yet",
            )
        )
    if handles:
        figure.legend(
            handles=handles,
            loc="outside lower center",
            ncols=len(handles),
            frameon=False,
            fontsize=_SMALL_PT + 0.5,
            handletextpad=0.3,
            columnspacing=1.6,
        )

    _titles(figure, ax, chart.title, _control_subtitle(chart, len(shown), unlabelled, off_scale))
    _place_labels(figure, ax, labels, xs, drawn, centre)  # last: it needs the laid-out axes
    return figure


def _control_span(
    values: Sequence[float], centre: float | None, sd: float | None
) -> tuple[float, float]:
    """The y axis: centre ± 4 SD widened to the points within ± 8 SD, with room for labels."""
    if centre is None or sd is None:
        return (-math.inf, math.inf)
    cap_low, cap_high = centre - _SPAN_MAX_SD * sd, centre + _SPAN_MAX_SD * sd
    inside = [v for v in values if cap_low <= v <= cap_high]
    low = min([centre - _SPAN_MIN_SD * sd] + [v - _ROOM_SD * sd for v in inside])
    high = max([centre + _SPAN_MIN_SD * sd] + [v + _ROOM_SD * sd for v in inside])
    return (low, high)


def _unlimited_span(values: Sequence[float]) -> tuple[float, float]:
    """Without limits: the points, but at least their mean ± 5 %, so noise is not magnified."""
    mean = math.fsum(values) / len(values)
    low = min(min(values), mean - _UNLIMITED_HALF_SPAN * abs(mean))
    high = max(max(values), mean + _UNLIMITED_HALF_SPAN * abs(mean))
    pad = 0.08 * (high - low) or 1.0
    return (low - pad, high + pad)


def _run_positions(
    shown: Sequence[ChartPoint],
) -> tuple[list[float], list[tuple[str, datetime | None]]]:
    """Each point's x on a run axis, and each slot's run and first time.

    A run is one slot (1, 2, 3 … in the order given); consecutive points of one
    run share it, side by side within ``_RUN_SPREAD``. The same run name coming
    back later (a re-judged file) is a new slot: the axis follows the points.
    """
    groups: list[list[int]] = []
    for i, point in enumerate(shown):
        if groups and shown[groups[-1][0]].run == point.run:
            groups[-1].append(i)
        else:
            groups.append([i])
    xs = [0.0] * len(shown)
    slots: list[tuple[str, datetime | None]] = []
    for slot, members in enumerate(groups, start=1):
        step = _RUN_SPREAD / (len(members) - 1) if len(members) > 1 else 0.0
        for j, index in enumerate(members):
            xs[index] = slot + (j - (len(members) - 1) / 2) * step
        first = shown[members[0]]
        slots.append((first.run, first.when))
    return xs, slots


def _short(text: str, width: int = 18) -> str:
    """A run name that fits under a tick: its start and end, an ellipsis between."""
    if len(text) <= width:
        return text
    keep = width - 1
    return f"{text[: keep - keep // 2]}…{text[len(text) - keep // 2 :]}"


def _run_axis(ax: Axes, slots: Sequence[tuple[str, datetime | None]]) -> None:
    """A tick per run, a few of them named (run name, date), the last always."""
    from matplotlib.ticker import FixedLocator, NullFormatter

    count = len(slots)
    step = max(1, math.ceil(count / _RUN_LABELS))
    named = list(range(1, count + 1, step))
    if named[-1] != count:
        if len(named) > 1 and count - named[-1] < step / 2:
            named[-1] = count  # the last run's name would run into its neighbour's
        else:
            named.append(count)
    ax.xaxis.set_major_locator(FixedLocator([float(n) for n in named]))
    ax.xaxis.set_minor_locator(FixedLocator([float(n) for n in range(1, count + 1)]))
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xticklabels(
        [
            _short(slots[n - 1][0])
            + (f"\n{when:%Y-%m-%d}" if (when := slots[n - 1][1]) is not None else "")
            for n in named
        ],
        fontsize=_SMALL_PT,
    )
    ax.set_xlabel(
        f"runs in order, evenly spaced whatever the time between them ({count} run"
        f"{'s' if count != 1 else ''})",
        fontsize=_LABEL_PT,
        color=_INK,
    )


def _control_subtitle(
    chart: ControlChart, shown: int, unlabelled: int, off_scale: Sequence[int]
) -> str:
    total = len(chart.points)
    parts = [chart.limits_note] if chart.limits_note else []
    if chart.centre is None and total < chart.baseline_size:
        parts.insert(0, f"no limits yet: {total} of {chart.baseline_size} points")
    elif chart.centre is None:
        parts.insert(0, "no limits")  # enough points, but no limits: the note says why
    if shown < total:
        parts.append(f"{shown} of {total} points shown")
    elif chart.centre is not None:
        parts.append(f"{total} points")
    if unlabelled:
        parts.append(f"the latest {ANNOTATED_VIOLATIONS} violations labelled, +{unlabelled} more")
    if off_scale:
        parts.append(f"{len(off_scale)} off scale, drawn at the edge")
    return _pack(parts, 125)


@dataclass(frozen=True, slots=True)
class _Label:
    """Text beside the points ``first``..``last`` (indexes into the points shown)."""

    first: int
    last: int
    text: str
    status: str


def _violation_labels(
    shown: Sequence[ChartPoint], values: Sequence[float], off_scale: Sequence[int], decimals: int
) -> tuple[list[_Label], int]:
    """The labels to draw, and how many violations go unlabelled.

    Consecutive points breaking the same rules make one violation with one label
    ("10-x (11 points)"): a long pattern is reported at every point completing it,
    and eleven labels would bury the points. The latest few violations are
    labelled, and the last two points off scale always are, with their values.
    """
    groups: list[list[int]] = []
    for i, point in enumerate(shown):
        if not point.rules and i not in off_scale:
            continue
        if (
            groups
            and point.rules
            and groups[-1][-1] == i - 1
            and shown[i - 1].rules == point.rules
            and i not in off_scale
            and i - 1 not in off_scale
        ):
            groups[-1].append(i)
        else:
            groups.append([i])
    ruled = [g for g in groups if shown[g[0]].rules]
    chosen = ruled[-ANNOTATED_VIOLATIONS:]
    chosen += [g for g in groups if g[0] in off_scale[-2:] and g not in chosen]
    labels = []
    for group in sorted(chosen):
        first, last = group[0], group[-1]
        text = ", ".join(shown[first].rules)
        if len(group) > 1:
            text += f" ({len(group)} points)"
        if first in off_scale:
            value = f"{values[first]:.{decimals}f}, off scale"
            text = f"{text}: {value}" if text else value
        worst = max((shown[i].status for i in group), key=STATUSES.index)
        labels.append(_Label(first, last, text, worst))
    return labels, len([g for g in ruled if g not in chosen])


def _place_labels(
    figure: Figure,
    ax: Axes,
    labels: Sequence[_Label],
    xs: Sequence[float],
    drawn: Sequence[float],
    centre: float | None,
) -> None:
    """Each label beside its points where it covers no other label and no point.

    Works in points (1/72 in) on the laid-out axes. A label is centred over its
    points, above them when they lie above the centre line and below otherwise;
    the candidates are that side at growing distances (with a thin leader line),
    then the other side; labels near either end of the x axis are aligned inwards,
    away from the limit labels at the right edge. When every candidate collides,
    the least bad one is taken: one that covers points but no label, else the first.
    """
    if not labels:
        return
    _lay_out(figure)  # the final axes size, so that sizes in points are right
    box = ax.get_position()
    width_pt = box.width * CONTROL_SIZE_INCHES[0] * 72.0
    height_pt = box.height * CONTROL_SIZE_INCHES[1] * 72.0
    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()

    def to_pt(x: float, y: float) -> tuple[float, float]:
        return ((x - x0) / ((x1 - x0) or 1.0) * width_pt, (y - y0) / ((y1 - y0) or 1.0) * height_pt)

    points = [to_pt(x, y) for x, y in zip(xs, drawn, strict=True)]
    obstacles = [(px - 5.0, py - 5.0, px + 5.0, py + 5.0) for px, py in points]
    placed: list[tuple[float, float, float, float]] = []
    line_pt = _SMALL_PT * 1.3
    for label in labels:
        members = range(label.first, label.last + 1)
        x = 0.5 * (xs[label.first] + xs[label.last])
        top = max(drawn[i] for i in members)
        bottom = min(drawn[i] for i in members)
        x_pt = to_pt(x, top)[0]
        text_pt = 0.6 * _SMALL_PT * len(label.text) + 3.0
        if x_pt + text_pt / 2 > width_pt:
            ha, dx, left = "right", -3.0, x_pt - 3.0 - text_pt
        elif x_pt - text_pt / 2 < 0.0:
            ha, dx, left = "left", 3.0, x_pt + 3.0
        else:
            ha, dx, left = "center", 0.0, x_pt - text_pt / 2
        preferred = drawn[label.last] >= centre if centre is not None else True
        candidates = []
        for above in (preferred, not preferred):
            anchor = to_pt(x, top if above else bottom)[1]
            for dy in (9.0, 22.0, 35.0, 48.0):
                low = anchor + dy if above else anchor - dy - line_pt
                if low >= 0.0 and low + line_pt <= height_pt:
                    candidates.append((above, dy, (left, low, left + text_pt, low + line_pt)))
        if not candidates:
            candidates.append((preferred, 9.0, (left, 0.0, left + text_pt, line_pt)))

        def clear(rect: tuple[float, float, float, float], others: Sequence[Any]) -> bool:
            return not any(_overlap(rect, other) for other in others)

        choice = next(
            (c for c in candidates if clear(c[2], placed) and clear(c[2], obstacles)),
            next((c for c in candidates if clear(c[2], placed)), candidates[0]),
        )
        above, dy, rect = choice
        placed.append(rect)
        ax.annotate(
            label.text,
            xy=(x, top if above else bottom),
            xytext=(dx, dy if above else -dy),
            textcoords="offset points",
            ha=ha,
            va="bottom" if above else "top",
            fontsize=_SMALL_PT,
            color=_TEXT_COLOUR[label.status],
            bbox={"boxstyle": "round,pad=0.15", "facecolor": "white", "edgecolor": "none"},
            arrowprops={"arrowstyle": "-", "color": _LINE, "linewidth": 0.6, "shrinkA": 0}
            if dy > 9.0
            else None,
            zorder=4,
        )


def _overlap(a: tuple[float, float, float, float], b: tuple[float, float, float, float]) -> bool:
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


# --- calibration ------------------------------------------------------------------------


def calibration_png(analyte: str, calibration: CalibrationEntry) -> bytes:
    """One calibration of the verdict JSON (``calibrations[analyte]``) as a PNG of 900 × 800 px.

    Top: the standards and the fitted curve (response against concentration, the
    verdict's ascending coefficients, as :meth:`rules.calibration.Fit.predict`);
    bottom: each standard's back-calculation error (%) with ±15 % guide lines.
    Without a fit (``problem`` set, or no coefficients): the points and the problem.
    """
    with DRAWING:
        return _png(calibration_figure(analyte, calibration))


def calibration_figure(analyte: str, calibration: CalibrationEntry) -> Figure:
    """The calibration as a matplotlib figure on an Agg canvas (for tests, other formats)."""
    import numpy as np
    from matplotlib.ticker import FuncFormatter, NullFormatter

    from calwarden.rules.criteria import AnalyteCriteria

    guide = float(AnalyteCriteria.model_fields["back_calculation_pct"].default)
    placed = [(s, x) for s in calibration.get("standards") or () if _finite(x := s.get("nominal"))]
    standards = [s for s, _ in placed]
    nominal = [float(x) for _, x in placed]
    response = [s.get("response") for s in standards]
    coefficients = list(calibration.get("coefficients") or ())
    finite_coefficients = [float(c) for c in coefficients if _finite(c)]
    problem = calibration.get("problem")
    fitted = not problem and bool(coefficients) and len(finite_coefficients) == len(coefficients)
    unit = calibration.get("unit")

    figure = _new_figure(CALIBRATION_SIZE_INCHES)
    top, bottom = figure.subplots(
        2, 1, sharex=True, gridspec_kw={"height_ratios": [2.3, 1.0], "hspace": 0.04}
    )
    for ax in (top, bottom):
        _style_axes(ax)

    low, high = _calibrated_range(calibration, nominal)
    drawn = [(x, float(y)) for x, y in zip(nominal, response, strict=True) if _finite(y)]
    # Over two decades or more the low standards vanish on linear axes: log-log
    # (where a line stays a line), when every standard and response is positive.
    log_scale = (
        low > 0.0
        and high / low >= 100.0
        and bool(drawn)
        and all(x > 0.0 and y > 0.0 for x, y in drawn)
    )
    if log_scale:
        top.set_xscale("log")
        top.set_yscale("log")
        for axis in (top.xaxis, top.yaxis):
            axis.set_major_formatter(FuncFormatter(_grouped))
            axis.set_minor_formatter(NullFormatter())

    top.scatter(
        [x for x, _ in drawn],
        [y for _, y in drawn],
        s=36,
        marker="o",
        facecolors=_BLUE,
        edgecolors="white",
        linewidths=0.6,
        zorder=3,
        label=f"standards ({len(drawn)})",
        gid="standards",
    )
    if fitted and high > 0.0:
        b = [*finite_coefficients, 0.0, 0.0]
        if log_scale:
            grid = np.geomspace(low / 1.15, high * 1.15, 200)
        else:
            span = high - low
            start = max(0.0, low - 0.03 * span) if low >= 0 else low - 0.03 * span
            if span == 0.0:  # one level (average RF, say): from zero up to it
                start, span = 0.0, high
            grid = np.linspace(start, high + 0.04 * span, 200)
        curve = b[0] + grid * (b[1] + grid * b[2])
        if log_scale:
            curve = np.where(curve > 0.0, curve, np.nan)  # log axes: leave out what cannot show
        top.plot(
            grid,
            curve,
            color=_INK,
            linewidth=1.3,
            zorder=2,
            label=_equation(calibration),
            gid="fit",
        )

    response_label = (
        "response ratio (analyte/ISTD)" if calibration.get("internal_standard") else "response"
    )
    if calibration.get("blank_response_subtracted") is not None:
        response_label += ", blank subtracted"
    top.set_ylabel(response_label, fontsize=_LABEL_PT, color=_INK)
    if not log_scale:
        top.yaxis.set_major_formatter(FuncFormatter(_grouped))
    if drawn or fitted:
        top.legend(loc="upper left", fontsize=_SMALL_PT + 0.5, framealpha=1.0, edgecolor="#d5dadf")

    # Back-calculation errors.
    errors = [
        (x, float(error))
        for x, s in zip(nominal, standards, strict=True)
        if _finite(error := s.get("error_pct"))
    ]
    bottom.axhline(0.0, color=_INK, linewidth=0.9, zorder=1)
    reach = max([guide * 1.4] + [abs(e) * 1.15 for _, e in errors])
    for sign in (1, -1):
        bottom.axhline(sign * guide, color=_AMBER, linestyle="--", linewidth=0.9, zorder=1)
    if guide / reach * _RESIDUAL_HEIGHT_PT >= 12.0:  # the two labels' gap, in points
        for sign in (1, -1):
            _edge_label(
                bottom, sign * guide, f"{'+' if sign > 0 else '−'}{guide:g} % guide", _AMBER
            )
    else:
        _edge_label(bottom, 0.0, f"±{guide:g} % guides", _AMBER)
    if errors:
        bottom.vlines(
            [x for x, _ in errors],
            0.0,
            [e for _, e in errors],
            color=_LINE,
            linewidth=1.0,
            zorder=2,
        )
        bottom.scatter(
            [x for x, _ in errors],
            [e for _, e in errors],
            s=30,
            marker="o",
            facecolors=_BLUE,
            edgecolors="white",
            linewidths=0.6,
            zorder=3,
            gid="errors",
        )
    else:
        bottom.text(
            0.5,
            0.5,
            "no back-calculated values",
            transform=bottom.transAxes,
            ha="center",
            va="center",
            fontsize=_LABEL_PT,
            color=_MUTED,
            bbox={"boxstyle": "square,pad=0.4", "facecolor": "white", "edgecolor": "none"},
            zorder=4,
        )
    bottom.set_ylim(-reach, reach)
    bottom.set_ylabel("back-calculation\nerror (%)", fontsize=_LABEL_PT, color=_INK)
    bottom.set_title(
        f"dashed: ±{guide:g} % guides, calwarden's default back-calculation limit "
        "(this run's own limit may differ)",
        loc="left",
        fontsize=_SMALL_PT,
        color=_MUTED,
    )
    concentration = "nominal concentration" + (f" ({unit})" if unit else "")
    if log_scale:
        concentration += ", log scale"
        response_label += ", log scale"
        top.set_ylabel(response_label, fontsize=_LABEL_PT, color=_INK)
    bottom.set_xlabel(concentration, fontsize=_LABEL_PT, color=_INK)

    if problem or not fitted:
        reason = str(problem) if problem else "no fitted curve"
        subtitle = _wrap(f"no fit: {reason}", 110)
        _titles(figure, top, f"{analyte} · calibration", subtitle, _RED)
    else:
        _titles(figure, top, f"{analyte} · calibration", _calibration_subtitle(calibration, unit))
    return figure


def _finite(value: object) -> TypeGuard[float]:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


def _calibrated_range(
    calibration: CalibrationEntry, nominal: Sequence[float]
) -> tuple[float, float]:
    bounds = calibration.get("range") or [None, None]
    low = float(bounds[0]) if _finite(bounds[0]) else min(nominal, default=0.0)
    high = float(bounds[1]) if _finite(bounds[1]) else max(nominal, default=1.0)
    return low, high


_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def _number(value: float) -> str:
    """Four significant digits, no e-notation for everyday sizes: 9479, 21 170, 0.02311."""
    if value == 0.0 or not math.isfinite(value):
        return f"{value:g}"
    magnitude = math.floor(math.log10(abs(value)))
    if -4 <= magnitude < 9:
        text = f"{abs(value):,.{max(0, 3 - magnitude)}f}".replace(",", " ")
    else:
        mantissa, exponent = f"{abs(value):.3e}".split("e")
        text = f"{mantissa}×10{str(int(exponent)).translate(_SUPERSCRIPT)}"
    return f"−{text}" if value < 0 else text


def _grouped(value: float, _position: object = None) -> str:
    """A tick label with thousands grouped by a space: 500 000."""
    text = f"{abs(value):,.10g}".replace(",", " ") if abs(value) >= 1e4 else f"{abs(value):.10g}"
    return f"−{text}" if value < 0 else text


def _pack(parts: Sequence[str], width: int) -> str:
    """``parts`` joined by " · ", a new line started rather than a part broken."""
    lines: list[str] = []
    for part in parts:
        if lines and len(lines[-1]) + 3 + len(part) <= width:
            lines[-1] += " · " + part
        else:
            lines.append(part)
    return "\n".join(lines)


def _wrap(text: str, width: int) -> str:
    return "\n".join(textwrap.wrap(text, width, break_on_hyphens=False))


def _equation(calibration: CalibrationEntry) -> str:
    # Drawn only for a fit, whose coefficients are all finite.
    b = [float(c) for c in calibration.get("coefficients") or () if _finite(c)]
    model = calibration.get("model")
    if model == "average_rf":
        rf = calibration.get("response_factor_mean")
        rsd = calibration.get("response_factor_rsd_pct")
        text = f"fit: y = RF·x, RF = {_number(float(rf) if _finite(rf) else b[1])}"
        return text + (f" (RSD {float(rsd):.1f} %)" if _finite(rsd) else "")
    text = f"y = {_number(b[1])}·x"
    if len(b) > 2 and b[2] != 0.0:
        text = f"y = {_number(b[2])}·x² {_signed(b[1])}·x"
    if model != "linear_through_zero" and b[0] != 0.0:
        text += f" {_signed(b[0])}"
    return f"fit: {text}"


def _signed(value: float) -> str:
    return f"− {_number(abs(value))}" if value < 0 else f"+ {_number(value)}"


def _r_squared(value: float) -> str:
    """r² with enough decimals to show how close to 1 it is (0.99996, not 1.000)."""
    gap = 1.0 - value
    # Two digits of the gap, so 0.9949 never shows as a passing 0.995.
    decimals = min(8, max(3, math.ceil(-math.log10(gap)) + 1)) if gap > 0 else 6
    whole, _, fraction = f"{value:.{decimals}f}".partition(".")
    if gap > 0 and whole == "1":
        return "> 0.99999999"  # not 1: the fit is not perfect
    return f"{whole}.{fraction[:3]}{fraction[3:].rstrip('0')}"  # 0.999960 → 0.99996


_MODEL_NAMES = {
    "linear": "linear",
    "linear_through_zero": "linear through zero",
    "quadratic": "quadratic",
    "average_rf": "average response factor",
}


def _calibration_subtitle(calibration: CalibrationEntry, unit: str | None) -> str:
    model = _MODEL_NAMES.get(str(calibration.get("model")), str(calibration.get("model")))
    weighting = calibration.get("weighting")
    weights = "unweighted" if weighting in (None, "none") else f"weighted {weighting}"
    weights = weights.replace("x2", "x²")
    parts = [f"{model}, {weights}"]
    r2 = calibration.get("r_squared")
    if _finite(r2):
        parts.append(f"r² = {_r_squared(float(r2))}")
    levels = calibration.get("levels")
    points = calibration.get("points")
    if isinstance(points, int):
        parts.append(
            f"{points} standards" + (f" at {levels} levels" if levels and levels != points else "")
        )
    bounds = calibration.get("range") or [None, None]
    if _finite(bounds[0]) and _finite(bounds[1]):
        parts.append(f"calibrated {bounds[0]:g}–{bounds[1]:g}" + (f" {unit}" if unit else ""))
    return " · ".join(parts)
