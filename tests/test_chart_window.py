"""Charts from a real ledger: the acceptance window before a baseline, the run or time axis.

Two copies of the demo's 2026-11-30 metals run (each under its own run name) go
through the real intake into a real SQLite ledger; two runs are far from a
baseline, so every series has no limits yet and its chart shows the runs' own
acceptance window. The PNGs are drawn by real matplotlib on its Agg canvas.
"""

from __future__ import annotations

import csv
import hashlib
import io
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from structlog.testing import capture_logs

from calwarden.daemon.cli.main import main
from calwarden.daemon.intake.accept import Intake
from calwarden.daemon.outputs.pictures import ChartCriteria, build_chart
from calwarden.daemon.settings.config import build_config, plan_watch
from calwarden.daemon.stores.ledger import Ledger
from calwarden.daemon.stores.records import SeriesKey
from calwarden.rules.errors import ConfigError

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
METALS = (FIXTURES / "demo" / "bwl-demo-1130-metals.csv").read_text(encoding="utf-8")
ZN_CCV = SeriesKey("BWL-ICPMS-2", "Zn", "CCV", "25 µg/L")


def _renamed(name: str) -> bytes:
    rows = list(csv.reader(io.StringIO(METALS)))
    run = rows[0].index("run")
    for row in rows[1:]:
        row[run] = name
    text = io.StringIO()
    csv.writer(text, lineterminator="\n").writerows(rows)
    return text.getvalue().encode("utf-8")


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Path, Ledger]]:
    """A ledger holding two judged metals runs; yields the output folder and the ledger."""
    root = tmp_path_factory.mktemp("two-runs")
    (root / "inbox").mkdir()
    plan = plan_watch(build_config({}, "test"), inbox=root / "inbox", out=root / "out")
    ledger = Ledger.open(plan.state_dir / "ledger.sqlite3")
    intake = Intake(ledger, plan.inboxes)
    with capture_logs():
        for index in range(2):
            data = _renamed(f"RUN-W-{index}")
            path = plan.inboxes[0].path / f"run-{index}.csv"
            path.write_bytes(data)
            stat = path.stat()
            sha = hashlib.sha256(data).hexdigest()
            intake.process(plan.inboxes[0], path, data, sha, stat.st_size, stat.st_mtime_ns)
    try:
        yield plan.out, ledger
    finally:
        ledger.close()


def _criteria(data: dict[str, Any]) -> ChartCriteria:
    return ChartCriteria.of(build_config({"criteria": data}, "test").criteria, [])


def test_a_series_without_limits_carries_its_runs_acceptance_window(
    two_runs: tuple[Path, Ledger],
) -> None:
    """Zn CCV 25 µg/L, no baseline: the configured 85–115 % window, also as µg/L at the edges."""
    _, ledger = two_runs
    config = build_config({}, "test")
    criteria = _criteria({"defaults": {"ccv_recovery_pct": [85, 115]}})
    chart = build_chart(ledger.control, config.control, ZN_CCV, criteria)
    assert chart.centre is None and chart.window is not None
    assert (chart.window.low, chart.window.high) == (85.0, 115.0)
    assert chart.window.high_label == "115 % = 28.75 µg/L"
    assert chart.window.what == "CCV recovery 85–115 %"


def test_an_analytes_own_window_and_an_instruments_criteria_are_used(
    two_runs: tuple[Path, Ledger],
) -> None:
    """Per-analyte criteria win for the analyte; an inbox bound to the instrument wins over both."""
    _, ledger = two_runs
    settings = build_config({}, "test").control
    per_analyte = _criteria({"analytes": {"Zn": {"ccv_recovery_pct": [80, 120]}}})
    window = build_chart(ledger.control, settings, ZN_CCV, per_analyte).window
    assert window is not None and (window.low, window.high) == (80.0, 120.0)
    bound = ChartCriteria.of(
        build_config({}, "test").criteria,
        [("BWL-ICPMS-2", _criteria({"defaults": {"ccv_recovery_pct": [95, 105]}}).default)],
    )
    window = build_chart(ledger.control, settings, ZN_CCV, bound).window
    assert window is not None and (window.low, window.high) == (95.0, 105.0)


def test_a_slope_series_has_no_window(two_runs: tuple[Path, Ledger]) -> None:
    """A calibration slope has no recovery window: nothing is drawn in its place."""
    _, ledger = two_runs
    chart = build_chart(
        ledger.control,
        build_config({}, "test").control,
        SeriesKey("BWL-ICPMS-2", "Zn", "slope", ""),
        _criteria({}),
    )
    assert chart.window is None


def test_fixed_limits_leave_out_the_window(two_runs: tuple[Path, Ledger]) -> None:
    """With fixed limits configured, the chart has its limits and no acceptance window."""
    _, ledger = two_runs
    fixed = {"fixed": [{"analyte": "Zn", "kind": "CCV", "centre": 100.0, "sd": 2.0}]}
    settings = build_config({"control": fixed}, "test").control
    chart = build_chart(ledger.control, settings, ZN_CCV, _criteria({}))
    assert chart.centre == 100.0 and chart.window is None


def test_the_chart_axis_setting_reaches_the_chart(two_runs: tuple[Path, Ledger]) -> None:
    """Default run axis; control.chart_axis: time gives a time axis; the argument wins."""
    _, ledger = two_runs
    default = build_config({}, "test").control
    timed = build_config({"control": {"chart_axis": "time"}}, "test").control
    assert build_chart(ledger.control, default, ZN_CCV).axis == "run"
    assert build_chart(ledger.control, timed, ZN_CCV).axis == "time"
    assert build_chart(ledger.control, timed, ZN_CCV, axis="run").axis == "run"


def test_an_unknown_chart_axis_is_a_configuration_error() -> None:
    """control.chart_axis: sideways is refused, naming the key and the two choices."""
    with pytest.raises(ConfigError, match=r"control\.chart_axis.*'run' or 'time'"):
        build_config({"control": {"chart_axis": "sideways"}}, "test")


def test_chart_command_draws_with_the_configured_window_and_either_axis(
    two_runs: tuple[Path, Ledger], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``calwarden chart``: --config's window and --axis each change the PNG drawn."""
    out, _ = two_runs
    config = tmp_path / "calwarden.yaml"
    config.write_text(
        f"watch: {{out: {out}}}\ncriteria: {{defaults: {{ccv_recovery_pct: [85, 115]}}}}\n",
        encoding="utf-8",
    )
    chosen = ["--analyte", "Zn", "--kind", "CCV"]

    def drawn(*argv: str) -> bytes:
        assert main(["chart", *argv, *chosen]) == 0
        (path,) = (out / "charts").rglob("Zn--CCV--*.png")
        return path.read_bytes()

    default = drawn("--out", str(out))
    configured = drawn("--config", str(config))
    timed = drawn("--config", str(config), "--axis", "time")
    assert default.startswith(b"\x89PNG\r\n\x1a\n")
    assert len({default, configured, timed}) == 3
    assert "1 chart(s)" in capsys.readouterr().out


def test_the_daemon_hands_its_criteria_to_the_alert_charts(tmp_path: Path) -> None:
    """A watcher's alert sender draws its inline charts with the inbox's acceptance window."""
    from calwarden.daemon.intake.watcher import Watcher

    (tmp_path / "inbox").mkdir()
    config = build_config({"criteria": {"defaults": {"ccv_recovery_pct": [85, 115]}}}, "test")
    plan = plan_watch(config, inbox=tmp_path / "inbox", out=tmp_path / "out", settle_seconds=0.1)
    with capture_logs():
        watcher = Watcher(plan)
        watcher.start()
        try:
            assert watcher.sender is not None and watcher.sender.criteria is not None
            chosen = watcher.sender.criteria.for_series(ZN_CCV)
            assert chosen.ccv_recovery_pct == (85.0, 115.0)
        finally:
            watcher.stop()
            assert watcher.wait(10.0)
