"""The drawing module: control charts and calibration pictures, as PNG bytes."""

from __future__ import annotations

import io
import os
import subprocess
import sys
import threading
from collections.abc import Mapping
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import matplotlib.image
import numpy
import pytest
from matplotlib.figure import Figure
from matplotlib.text import Text

from calwarden.daemon.outputs.drawing import (
    AcceptanceWindow,
    ChartPoint,
    ControlChart,
    calibration_figure,
    calibration_png,
    control_chart_figure,
    control_chart_png,
)
from calwarden.daemon.pipeline import judge_file
from calwarden.daemon.settings.config import AppConfig, build_config

PROJECT = Path(__file__).resolve().parent.parent
FIXTURES = PROJECT / "fixtures"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
START = datetime(2026, 10, 1, 7, 30, tzinfo=UTC)


def _points(count: int, *, timed: bool = True) -> tuple[ChartPoint, ...]:
    """Invented CCV recoveries around 100 %: the first 20 the baseline, one 1-3s at the 30th."""
    points = []
    for i in range(count):
        value = 100.0 + ((i * 37) % 11 - 5) * 0.4
        status, rules = ("baseline" if i < 20 else "in control"), ()
        if i == 29:
            value, status, rules = 107.9, "rejection", ("1-3s",)
        when = START + timedelta(hours=13 * i) if timed else None
        points.append(ChartPoint(when, value, f"BWL-ICPMS-2-{i:03d}", status, rules))
    return tuple(points)


def _chart(count: int = 40, **changes: Any) -> ControlChart:
    fields: dict[str, Any] = {
        "title": "BWL-ICPMS-2 · Cu · CCV 20 µg/L",
        "unit_label": "recovery (%)",
        "points": _points(count),
        "centre": 100.1,
        "sd": 2.0,
        "limits_note": "limits from the first 20 points, set 2026-10-11",
    }
    fields.update(changes)
    return ControlChart(**fields)


def _texts(figure: Figure) -> str:
    return "\n".join(t.get_text() for t in figure.findobj(Text))


def _decoded_shape(png: bytes) -> tuple[int, ...]:
    return tuple(matplotlib.image.imread(io.BytesIO(png), format="png").shape)


@pytest.fixture(scope="module")
def metals() -> Mapping[str, Any]:
    """The calibrations of the passing trace-metals fixture's verdict."""
    verdict = judge_file(FIXTURES / "bwl-metals-pass.csv", AppConfig())
    calibrations: Mapping[str, Any] = verdict.document["calibrations"]
    return calibrations


@pytest.fixture(scope="module")
def control_png() -> bytes:
    """The PNG of the 40-point invented chart, drawn once for the tests that only read it."""
    return control_chart_png(_chart())


def _problem_calibration() -> dict[str, Any]:
    """Two invented standards under a quadratic: no fit, so no coefficients."""
    return {
        "model": None,
        "weighting": None,
        "coefficients": None,
        "r_squared": None,
        "points": 2,
        "range": [1.0, 5.0],
        "unit": "µg/L",
        "blank_response_subtracted": 100.0,
        "internal_standard": False,
        "problem": "quadratic needs at least 3 points, got 2",
        "standards": [
            {"sample_id": "CAL-1", "seq": 2, "nominal": 1.0, "response": 1004.0, "error_pct": None},
            {"sample_id": "CAL-2", "seq": 3, "nominal": 5.0, "response": 5010.0, "error_pct": None},
        ],
    }


# --- PNGs -------------------------------------------------------------------------------


def test_control_chart_is_a_png_of_1000_by_600_pixels(control_png: bytes) -> None:
    """A control chart renders to PNG bytes of under 150 KB that decode to 1000 × 600."""
    assert control_png.startswith(PNG_SIGNATURE) and len(control_png) < 150_000
    assert _decoded_shape(control_png)[:2] == (600, 1000)


def test_every_calibration_of_a_real_verdict_is_a_png_of_900_by_800(
    metals: Mapping[str, Any],
) -> None:
    """Each analyte of the passing metals verdict gives a 900 × 800 PNG of under 150 KB."""
    for analyte, calibration in metals.items():
        png = calibration_png(analyte, calibration)
        assert png.startswith(PNG_SIGNATURE) and len(png) < 150_000, analyte
        assert _decoded_shape(png)[:2] == (800, 900), analyte


def test_control_chart_bytes_are_the_same_for_the_same_input(control_png: bytes) -> None:
    """Rendering one chart again gives identical bytes."""
    assert control_chart_png(_chart()) == control_png


def test_calibration_bytes_are_the_same_for_the_same_input(metals: Mapping[str, Any]) -> None:
    """Rendering one calibration twice gives identical bytes."""
    assert calibration_png("Cu", metals["Cu"]) == calibration_png("Cu", metals["Cu"])


def test_two_threads_drawing_at_once_get_the_bytes_of_one() -> None:
    """Charts drawn in two threads at once equal the same charts drawn alone."""
    charts = [_chart(12, centre=None, sd=None)]
    alone = [control_chart_png(chart) for chart in charts]
    results: list[list[bytes]] = [[], []]

    def draw(slot: int) -> None:
        results[slot] = [control_chart_png(chart) for chart in charts]

    threads = [threading.Thread(target=draw, args=(slot,)) for slot in (0, 1)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=30)
    assert results == [alone, alone]


def test_png_carries_no_software_or_time_stamp(control_png: bytes) -> None:
    """The PNG holds neither matplotlib's Software text nor a tIME chunk."""
    assert b"Software" not in control_png and b"matplotlib" not in control_png
    assert b"tIME" not in control_png


def test_rendering_needs_no_display_and_no_pyplot() -> None:
    """Both pictures render with no display, a display backend configured, and no pyplot."""
    script = (
        "import sys\n"
        "from calwarden.daemon.outputs.drawing import (\n"
        "    ChartPoint, ControlChart, calibration_png, control_chart_png)\n"
        "chart = ControlChart('t', 'recovery (%)', (ChartPoint(None, 100.0, 'r'),))\n"
        "calibration = {'coefficients': [0.0, 2.0], 'range': [1.0, 5.0], 'standards': []}\n"
        "pngs = control_chart_png(chart), calibration_png('Cu', calibration)\n"
        "assert all(p.startswith(b'\\x89PNG') for p in pngs)\n"
        "print('pyplot' if 'matplotlib.pyplot' in sys.modules else 'no pyplot')\n"
    )
    env = {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY")}
    env["MPLBACKEND"] = "tkagg"  # a display backend: pyplot would need a display
    done = subprocess.run(
        [sys.executable, "-W", "error", "-c", script],
        cwd=PROJECT,
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "no pyplot"


def test_importing_charts_does_not_import_matplotlib() -> None:
    """The drawing module imports matplotlib only when it draws."""
    script = "import sys, calwarden.daemon.outputs.drawing; print('matplotlib' in sys.modules)"
    done = subprocess.run(
        [sys.executable, "-c", script], cwd=PROJECT, capture_output=True, text=True, check=True
    )
    assert done.stdout.strip() == "False"


def test_figures_are_drawn_on_an_agg_canvas(metals: Mapping[str, Any]) -> None:
    """Both figures sit on matplotlib's Agg canvas, never a display's."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    for figure in (control_chart_figure(_chart()), calibration_figure("Pb", metals["Pb"])):
        assert type(figure.canvas) is FigureCanvasAgg


# --- control charts ---------------------------------------------------------------------


def test_only_the_last_60_of_100_points_are_drawn() -> None:
    """A chart of 100 points draws the last 60 and says so."""
    chart = _chart(100)
    figure = control_chart_figure(chart)
    (series,) = [line for line in figure.axes[0].get_lines() if line.get_gid() == "series"]
    assert len(series.get_ydata()) == 60
    assert list(series.get_ydata()) == [p.value for p in chart.points[40:]]
    assert "60 of 100 points shown" in _texts(figure)


def test_a_smaller_last_n_is_honoured() -> None:
    """last_n=10 draws 10 markers in all."""
    figure = control_chart_figure(_chart(40, last_n=10))
    markers = [c for c in figure.axes[0].collections if str(c.get_gid()).startswith("status")]
    assert sum(len(c.get_offsets()) for c in markers) == 10


def test_without_limits_the_subtitle_counts_towards_a_baseline() -> None:
    """With no centre and SD the chart says "no limits yet: 7 of 20 points" and draws no lines."""
    figure = control_chart_figure(_chart(7, centre=None, sd=None, limits_note=""))
    texts = _texts(figure)
    assert "no limits yet: 7 of 20 points" in texts
    assert "+2s" not in texts and "centre" not in texts


def test_limit_lines_are_labelled_with_their_values() -> None:
    """The centre and the ±1s, ±2s, ±3s lines carry their values at the right edge."""
    texts = _texts(control_chart_figure(_chart()))
    for label in ("centre 100.1", "+1s 102.1", "−2s 96.1", "+3s 106.1", "−3s 94.1"):
        assert label in texts


def test_violations_are_labelled_with_their_rule_ids() -> None:
    """A 1-3s point carries the label "1-3s"."""
    assert "1-3s" in _texts(control_chart_figure(_chart()))


def test_legend_lists_only_the_statuses_present() -> None:
    """Baseline, in-control and rejection points give those three entries, no warning."""
    (legend,) = control_chart_figure(_chart()).legends
    entries = [t.get_text() for t in legend.get_texts()]
    assert entries == ["baseline (sets the limits)", "in control", "rejection"]


def test_only_the_latest_violations_are_labelled_and_the_rest_counted() -> None:
    """Ten separate 1-2s points: six labelled, "+4 more" in the subtitle."""
    points = list(_points(40))
    for i in range(21, 40, 2):
        points[i] = ChartPoint(points[i].when, 104.5, points[i].run, "warning", ("1-2s",))
    figure = control_chart_figure(_chart(points=tuple(points)))
    texts = _texts(figure).split("\n")
    assert texts.count("1-2s") == 6
    assert any("+4 more" in text for text in texts)


def test_a_pattern_over_consecutive_points_gets_one_label() -> None:
    """Eleven consecutive 10-x points give one label "10-x (11 points)"."""
    points = list(_points(40))
    for i in range(29, 40):
        points[i] = ChartPoint(points[i].when, 103.0, points[i].run, "rejection", ("10-x",))
    texts = _texts(control_chart_figure(_chart(points=tuple(points))))
    assert "10-x (11 points)" in texts
    assert texts.count("10-x") == 1


def test_a_far_outlier_is_drawn_at_the_edge_with_its_value() -> None:
    """A recovery of 12 % against 100 ± 2 stays within ±8 SD on the axis and shows its value."""
    points = list(_points(40))
    points[35] = ChartPoint(points[35].when, 12.0, points[35].run, "rejection", ("1-3s",))
    figure = control_chart_figure(_chart(points=tuple(points)))
    low, _high = figure.axes[0].get_ylim()
    assert low > 100.1 - 8 * 2.0
    assert "1-3s: 12.0, off scale" in _texts(figure)


def test_points_without_times_are_placed_by_their_order() -> None:
    """On a time axis, points with no acquisition time sit at 1, 2, 3 … by "point number"."""
    figure = control_chart_figure(_chart(30, points=_points(30, timed=False), axis="time"))
    ax = figure.axes[0]
    (series,) = [line for line in ax.get_lines() if line.get_gid() == "series"]
    assert list(series.get_xdata()) == [float(n) for n in range(1, 31)]
    assert ax.get_xlabel() == "point number in the series"


def test_a_chart_with_no_points_still_renders() -> None:
    """An empty series gives a PNG saying "no points yet"."""
    chart = _chart(0, points=(), centre=None, sd=None)
    assert "no points yet" in _texts(control_chart_figure(chart))
    assert control_chart_png(chart).startswith(PNG_SIGNATURE)


def test_a_chart_point_refuses_an_unknown_status() -> None:
    """A status outside the four known ones is refused when the point is built."""
    with pytest.raises(ValueError, match="unknown status"):
        ChartPoint(START, 100.0, "r", "suspicious")


def test_a_chart_refuses_a_centre_without_an_sd() -> None:
    """The centre and the SD come together or not at all."""
    with pytest.raises(ValueError, match="both the centre and the SD"):
        _chart(centre=100.0, sd=None)


def _two_per_run(runs: int) -> tuple[ChartPoint, ...]:
    """Invented CCV-1 and CCV-2 recoveries of ``runs`` runs, one run a day, two days apart at 5."""
    points = []
    for run in range(runs):
        day = START + timedelta(days=run + (2 if run >= 5 else 0))
        for j in range(2):
            value = 100.0 + ((run * 7 + j * 3) % 9 - 4) * 0.5
            points.append(ChartPoint(day + timedelta(hours=3 * j), value, f"RUN-{run:02d}"))
    return tuple(points)


CCV_WINDOW = AcceptanceWindow(90.0, 110.0, "CCV recovery 90–110 %", "90 % = 22.5 µg/L",
                              "110 % = 27.5 µg/L")  # fmt: skip


def test_without_limits_the_acceptance_window_is_drawn_and_named() -> None:
    """No baseline yet: the run's 90–110 % window is a band with its concentrations and a legend."""
    figure = control_chart_figure(_chart(7, centre=None, sd=None, window=CCV_WINDOW))
    ax = figure.axes[0]
    assert [p.get_gid() for p in ax.patches] == ["window"]
    texts = _texts(figure)
    assert "90 % = 22.5 µg/L" in texts and "110 % = 27.5 µg/L" in texts
    (legend,) = figure.legends
    assert "acceptance window of each run (CCV recovery 90–110 %); no baseline yet" in [
        t.get_text() for t in legend.get_texts()
    ]
    low, high = ax.get_ylim()
    assert low < 90.0 and high > 110.0


def test_limits_once_set_replace_the_acceptance_window() -> None:
    """With a centre and an SD the window is not drawn: the control limits are."""
    figure = control_chart_figure(_chart(window=CCV_WINDOW))
    assert not figure.axes[0].patches
    assert "no baseline yet" not in _texts(figure)


def test_run_axis_gives_each_run_one_evenly_spaced_slot() -> None:
    """Two points per run share its slot; a two-day gap leaves no wider space on a run axis."""
    chart = _chart(points=_two_per_run(10), centre=None, sd=None, axis="run")
    ax = control_chart_figure(chart).axes[0]
    (series,) = [line for line in ax.get_lines() if line.get_gid() == "series"]
    xs = list(series.get_xdata())
    assert xs[:4] == [0.75, 1.25, 1.75, 2.25]
    slots = [0.5 * (xs[i] + xs[i + 1]) for i in range(0, len(xs), 2)]
    assert slots == [float(n) for n in range(1, 11)]
    assert ax.get_xlabel().startswith("runs in order, evenly spaced")


def test_run_axis_names_a_few_runs_with_their_dates() -> None:
    """Thirty runs: at most eight ticks named, the first and the last run among them."""
    chart = _chart(points=_two_per_run(30), centre=None, sd=None, axis="run")
    ax = control_chart_figure(chart).axes[0]
    labels = [t.get_text() for t in ax.get_xticklabels()]
    assert 2 <= len(labels) <= 8
    assert labels[0] == "RUN-00\n2026-10-01"
    assert labels[-1].startswith("RUN-29\n")


def test_time_axis_keeps_the_gaps() -> None:
    """axis="time": the two-day gap is wider than a day between runs."""
    chart = _chart(points=_two_per_run(10), centre=None, sd=None, axis="time")
    ax = control_chart_figure(chart).axes[0]
    (series,) = [line for line in ax.get_lines() if line.get_gid() == "series"]
    xs = list(series.get_xdata())
    assert xs[10] - xs[8] == pytest.approx(3.0)  # days, matplotlib's date unit
    assert xs[8] - xs[6] == pytest.approx(1.0)


@pytest.mark.parametrize("axis", ["run", "time"])
def test_both_axes_render_to_a_1000_by_600_png(axis: str) -> None:
    """Run and time axes, with a window, both give a PNG decoding to 1000 × 600 through Agg."""
    chart = _chart(points=_two_per_run(12), centre=None, sd=None, axis=axis, window=CCV_WINDOW)
    png = control_chart_png(chart)
    assert png.startswith(PNG_SIGNATURE)
    assert _decoded_shape(png)[:2] == (600, 1000)


def test_a_chart_refuses_an_unknown_axis() -> None:
    """An axis other than run or time is refused when the chart is built."""
    with pytest.raises(ValueError, match="unknown axis"):
        _chart(axis="sideways")


# --- calibrations -----------------------------------------------------------------------


def test_calibration_curve_uses_ascending_coefficients() -> None:
    """The drawn curve is b0 + b1·x + b2·x² for coefficients [b0, b1, b2] (invented)."""
    calibration = {
        "model": "quadratic",
        "weighting": "none",
        "coefficients": [50.0, 9000.0, -45.0],
        "r_squared": 0.99998,
        "range": [2.0, 60.0],
        "unit": "mg/L",
        "standards": [
            {"nominal": x, "response": 50.0 + 9000.0 * x - 45.0 * x * x, "error_pct": 0.1}
            for x in (2.0, 5.0, 10.0, 20.0, 30.0, 45.0, 60.0)
        ],
    }
    figure = calibration_figure("Na", calibration)
    (curve,) = [line for line in figure.axes[0].get_lines() if line.get_gid() == "fit"]
    for x, y in zip(curve.get_xdata(), curve.get_ydata(), strict=True):
        assert y == pytest.approx(50.0 + 9000.0 * x - 45.0 * x * x)
    assert min(curve.get_xdata()) <= 2.0 and max(curve.get_xdata()) >= 60.0


def test_real_quadratic_curve_passes_through_its_standards() -> None:
    """A quadratic fit of the OES fixture, drawn, lies within 2 % of each standard."""
    config = build_config({"criteria": {"defaults": {"model": "quadratic"}}}, "test")
    document = judge_file(FIXTURES / "bwl-quadratic.csv", config).document
    calibration = document["calibrations"]["Na"]
    (curve,) = [
        line
        for line in calibration_figure("Na", calibration).axes[0].get_lines()
        if line.get_gid() == "fit"
    ]
    for standard in calibration["standards"]:
        drawn = numpy.interp(standard["nominal"], curve.get_xdata(), curve.get_ydata())
        assert drawn == pytest.approx(standard["response"], rel=0.02)


def test_calibration_title_gives_model_weighting_and_r_squared(
    metals: Mapping[str, Any],
) -> None:
    """The subtitle names the model, the weighting and r²."""
    texts = _texts(calibration_figure("Zn", metals["Zn"]))
    assert "linear, unweighted · r² = 0.99996" in texts


def test_calibration_with_a_problem_shows_it_and_no_curve() -> None:
    """No coefficients: the standards are drawn, the problem is in the title, no curve."""
    figure = calibration_figure("Cu", _problem_calibration())
    texts = _texts(figure)
    assert "no fit: quadratic needs at least 3 points, got 2" in texts
    assert "no back-calculated values" in texts
    assert not [line for line in figure.axes[0].get_lines() if line.get_gid() == "fit"]
    (standards,) = [c for c in figure.axes[0].collections if c.get_gid() == "standards"]
    assert len(standards.get_offsets()) == 2


def test_calibration_with_a_problem_still_renders_to_a_png() -> None:
    """A calibration without a fit gives a 900 × 800 PNG too."""
    png = calibration_png("Cu", _problem_calibration())
    assert png.startswith(PNG_SIGNATURE) and _decoded_shape(png)[:2] == (800, 900)


def test_a_problem_leaves_out_the_curve_even_with_coefficients(
    metals: Mapping[str, Any],
) -> None:
    """Coefficients beside a stated problem are not drawn: the problem is."""
    calibration = {**metals["Cd"], "problem": "the standards mix two bases"}
    figure = calibration_figure("Cd", calibration)
    assert not [line for line in figure.axes[0].get_lines() if line.get_gid() == "fit"]
    assert "no fit: the standards mix two bases" in _texts(figure)


def test_residual_guides_are_labelled_as_guides(metals: Mapping[str, Any]) -> None:
    """The ±15 % lines are called guides and the default limit, not the run's limit."""
    texts = _texts(calibration_figure("Zn", metals["Zn"]))
    assert "+15 % guide" in texts and "−15 % guide" in texts
    assert "default back-calculation limit" in texts and "may differ" in texts


def test_residuals_are_the_back_calculation_errors(metals: Mapping[str, Any]) -> None:
    """The lower panel plots each standard's error_pct against its nominal."""
    figure = calibration_figure("Zn", metals["Zn"])
    (errors,) = [c for c in figure.axes[1].collections if c.get_gid() == "errors"]
    expected = [[s["nominal"], s["error_pct"]] for s in metals["Zn"]["standards"]]
    assert numpy.allclose(errors.get_offsets(), expected)


def test_axis_labels_carry_units_and_blank_correction(metals: Mapping[str, Any]) -> None:
    """x is "nominal concentration (µg/L)"; y says the blank was subtracted."""
    figure = calibration_figure("Zn", metals["Zn"])
    assert figure.axes[1].get_xlabel() == "nominal concentration (µg/L)"
    assert figure.axes[0].get_ylabel() == "response, blank subtracted"


def test_response_axis_says_ratio_with_an_internal_standard() -> None:
    """A calibration against an internal standard plots the response ratio."""
    calibrations = judge_file(FIXTURES / "bwl-lc-istd.csv", AppConfig()).document["calibrations"]
    figure = calibration_figure("atrazine", calibrations["atrazine"])
    assert figure.axes[0].get_ylabel().startswith("response ratio (analyte/ISTD)")


def test_a_wide_range_is_drawn_on_log_axes() -> None:
    """Standards over three decades are drawn log-log, and the axis says so."""
    xs = [0.1, 0.5, 1.0, 5.0, 10.0, 50.0, 100.0]
    calibration = {
        "model": "linear",
        "weighting": "1/x2",
        "coefficients": [3.0, 2210.0],
        "range": [0.1, 100.0],
        "unit": "ng/mL",
        "standards": [{"nominal": x, "response": 3.0 + 2210.0 * x, "error_pct": 0.0} for x in xs],
    }
    figure = calibration_figure("metolachlor", calibration)
    assert figure.axes[0].get_xscale() == "log" and figure.axes[0].get_yscale() == "log"
    assert figure.axes[1].get_xlabel() == "nominal concentration (ng/mL), log scale"


@pytest.mark.parametrize("name", [".", "..", "...", "/..", " .. "])
def test_dot_names_never_leave_the_charts_folder(name: str, tmp_path: Path) -> None:
    """An instrument or analyte named `.` or `..` gets a folder of its own inside charts/."""
    from calwarden.daemon.outputs.pictures import chart_path
    from calwarden.daemon.stores.records import SeriesKey

    charts = tmp_path / "charts"
    path = chart_path(charts, SeriesKey(name, name, "CCV", "1"))
    assert path.resolve().is_relative_to(charts.resolve())
    assert ".." not in path.relative_to(charts).parts
