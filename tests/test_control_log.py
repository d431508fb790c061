"""The rolling control-chart log: points picked from judged runs, baselines, Westgard findings.

Runs are copies of the demo's 2026-11-30 metals run, each under its own ``run``
name, with some check standards' responses scaled to move their recoveries. They
go through the daemon's real intake and a real SQLite ledger on ``tmp_path`` (one
test through a real watcher). Responses scale one check standard at a time, so
the calibration, and every other series, stays exactly as in the fixture: series
nobody varied never vary, and so never get baseline limits (SD 0).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import sqlite3
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from structlog.testing import capture_logs
from waiting import wait_for

from calwarden.daemon.cli.main import main
from calwarden.daemon.control_log.log import EXPORT_COLUMNS, stored_to_limits
from calwarden.daemon.intake.accept import Intake, Outcome
from calwarden.daemon.intake.watcher import Watcher
from calwarden.daemon.pipeline import judge_file
from calwarden.daemon.settings.config import AppConfig, build_config, plan_watch
from calwarden.daemon.stores.database import LEDGER_NAME, SCHEMA_VERSION
from calwarden.daemon.stores.ledger import Ledger
from calwarden.daemon.stores.records import SeriesKey
from calwarden.rules.control_points import ControlObservation, control_observations
from calwarden.rules.errors import ConfigError

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
METALS_FILE = FIXTURES / "demo" / "bwl-demo-1130-metals.csv"
METALS = METALS_FILE.read_text(encoding="utf-8")
FAILING_CU_FILE = FIXTURES / "demo" / "bwl-demo-1202-metals.csv"  # CCV-2 Cu at 83.1 %
ISTD_FILE = FIXTURES / "bwl-lc-istd.csv"  # fails: BW-1125-08's atrazine-d5 at 54.2 %
HERBICIDES_FILE = FIXTURES / "demo" / "bwl-demo-1203-herbicides.csv"  # passes, ISTD atrazine-d5
INSTRUMENT = "BWL-ICPMS-2"
ZN_CCV = SeriesKey(INSTRUMENT, "Zn", "CCV", "25 µg/L")
CCV_1, CCV_2 = "CCV-1", "CCV-2"  # seq 19 and 28 of the metals run
ANALYTES = ("Zn", "Cu", "Pb", "Cd")
SETTLE = 0.1
DEADLINE = 15.0
BASELINE_RUNS = 20  # the default baseline_runs

Scale = dict[tuple[str, str], float]  # (sample_id, analyte) -> factor on its response


# --------------------------------------------------------------------------- helpers


def metals_run(name: str, scale: Scale | None = None) -> bytes:
    """The 11-30 metals run renamed ``name``, with the given responses multiplied."""
    rows = list(csv.reader(io.StringIO(METALS)))
    header = rows[0]
    run, sample, analyte, response = (
        header.index(column) for column in ("run", "sample_id", "analyte", "response")
    )
    for row in rows[1:]:
        row[run] = name
        factor = (scale or {}).get((row[sample], row[analyte]))
        if factor is not None:
            row[response] = repr(float(row[response]) * float(factor))
    text = io.StringIO()
    csv.writer(text, lineterminator="\n").writerows(rows)
    return text.getvalue().encode("utf-8")


def zn_ccv(factor_1: float, factor_2: float) -> Scale:
    """Scale the Zn responses of CCV-1 and CCV-2."""
    return {(CCV_1, "Zn"): factor_1, (CCV_2, "Zn"): factor_2}


def observe(data: bytes) -> tuple[ControlObservation, ...]:
    """The control observations of a run judged with the default criteria (no ledger)."""
    judgement = judge_file(Path("run.csv"), AppConfig(), data=data)
    assert judgement.run is not None and judgement.verdict is not None
    return control_observations(judgement.run, judgement.verdict)


def zn_ccv_values(data: bytes) -> list[float]:
    """This run's Zn CCV recoveries, CCV-1 then CCV-2."""
    return [o.value for o in observe(data) if (o.analyte, o.kind) == ("Zn", "CCV")]


def sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def control_findings(document: dict[str, Any]) -> list[dict[str, Any]]:
    return [f for f in document["findings"] if f["rule"].startswith("control.")]


def point_count(ledger_path: Path) -> int:
    with sqlite3.connect(ledger_path) as db:
        (count,) = db.execute("SELECT COUNT(*) FROM control_points").fetchone()
    return int(count)


class Lab:
    """One inbox judged through the real intake into a real ledger."""

    def __init__(self, root: Path, control: dict[str, Any] | None) -> None:
        (root / "inbox").mkdir(parents=True)
        config = build_config({"control": control} if control is not None else {}, "test")
        self.plan = plan_watch(config, inbox=root / "inbox", out=root / "out", settle_seconds=0.1)
        self.inbox = self.plan.inboxes[0]
        self.ledger_path = self.plan.state_dir / LEDGER_NAME
        self.ledger = Ledger.open(self.ledger_path)
        self.intake = Intake(self.ledger, self.plan.inboxes)

    def judge(self, name: str, data: bytes) -> Outcome:
        """Write ``data`` as ``name`` in the inbox and pass it to the intake, settled."""
        path = self.inbox.path / name
        path.write_bytes(data)
        stat = path.stat()
        return self.intake.process(
            self.inbox, path, data, sha256(data), stat.st_size, stat.st_mtime_ns
        )

    def judge_runs(self, runs: list[bytes], prefix: str = "run") -> list[Outcome]:
        return [self.judge(f"{prefix}-{i:02d}.csv", data) for i, data in enumerate(runs)]

    def reopen(self) -> None:
        """A new intake on the same ledger (as after a restart)."""
        self.intake = Intake(self.ledger, self.plan.inboxes)


def verdict(outcome: Outcome) -> dict[str, Any]:
    assert outcome.verdict_path is not None
    document: dict[str, Any] = json.loads(outcome.verdict_path.read_text(encoding="utf-8"))
    return document


@pytest.fixture(autouse=True)
def quiet_logs() -> Iterator[list[dict[str, Any]]]:
    """The intake's events, captured instead of printed."""
    with capture_logs() as captured:
        yield captured


@pytest.fixture
def lab(tmp_path: Path) -> Iterator[Callable[..., Lab]]:
    """Make labs with a given ``control:`` section; their ledgers are closed at the end."""
    made: list[Lab] = []

    def _lab(control: dict[str, Any] | None = None, name: str = "lab") -> Lab:
        made.append(Lab(tmp_path / name, control))
        return made[-1]

    yield _lab
    for each in made:
        each.ledger.close()


def varied_runs(count: int, seed: int, sd: float = 0.004) -> list[bytes]:
    """``count`` runs whose Zn CCV-1 and CCV-2 vary by a relative ``sd``, fixed seed."""
    rng = np.random.default_rng(seed)
    factors = 1.0 + rng.normal(0.0, sd, size=(count, 2))
    return [metals_run(f"RUN-{seed}-{i:02d}", zn_ccv(*factors[i])) for i in range(count)]


def fixed_zn_ccv(z_of_run: float, **control: Any) -> dict[str, Any]:
    """Fixed Zn CCV limits: CCV-1 at the centre, the unmodified run's mean at ``z_of_run``.

    Without ``sd_within`` a run's mean is judged by the fixed SD itself.
    """
    first, second = zn_ccv_values(metals_run("probe"))
    assert second > first  # 101.2 % and 100.4 % in the fixture
    fixed = {
        "analyte": "Zn",
        "kind": "CCV",
        "level": "25 µg/L",
        "centre": first,
        "sd": ((first + second) / 2 - first) / z_of_run,
    }
    return {"fixed": [fixed], **control}


def one_way(runs: list[list[float]]) -> tuple[float, float, float]:
    """Grand mean, within-run and between-run SD by the one-way ANOVA formulas, in numpy.

    MSW = Σ(x − run mean)²/(N − k), MSB = Σ nᵢ(run mean − mean)²/(k − 1),
    s_b² = (MSB − MSW)/n₀ (ISO 5725-2 [memory]).
    """
    values = np.concatenate([np.array(r) for r in runs])
    sizes = np.array([len(r) for r in runs])
    means = np.array([np.mean(r) for r in runs])
    k, total = len(runs), len(values)
    msw = sum(np.sum((np.array(r) - m) ** 2) for r, m in zip(runs, means, strict=True))
    msw /= total - k
    msb = np.sum(sizes * (means - values.mean()) ** 2) / (k - 1)
    n0 = (total - np.sum(sizes**2) / total) / (k - 1)
    return float(values.mean()), float(np.sqrt(msw)), float(np.sqrt(max(0.0, (msb - msw) / n0)))


# --------------------------------------------------------------------------- the observations


def test_recoveries_equal_found_concentration_over_nominal_in_the_verdict(
    lab: Callable[..., Lab],
) -> None:
    """Each logged ICV, CCV and LCS point is 100 × the verdict's concentration / the nominal."""
    one = lab()
    outcome = one.judge("run.csv", metals_run("RUN-A"))
    document = verdict(outcome)
    rows = list(csv.DictReader(io.StringIO(METALS)))
    nominal = {(r["analyte"], int(r["seq"])): float(r["nominal"]) for r in rows if r["nominal"]}
    checked = 0
    for result in document["results"]:
        if result["kind"] not in ("icv", "ccv", "lcs"):
            continue
        key = SeriesKey(
            INSTRUMENT,
            result["analyte"],
            result["kind"].upper(),
            f"{nominal[(result['analyte'], result['seq'])]:g} µg/L",
        )
        (point,) = [p for p in one.ledger.control.series_points(key) if p.seq == result["seq"]]
        expected = 100.0 * result["concentration"] / nominal[(result["analyte"], result["seq"])]
        assert point.value == pytest.approx(expected, rel=1e-12)
        assert point.sample_id == result["sample_id"] and point.unit == "%"
        checked += 1
    assert checked == 16  # 4 analytes × (ICV, LCS, CCV-1, CCV-2)


def test_every_icv_ccv_and_lcs_reading_gives_one_point() -> None:
    """A metals run gives one recovery point per ICV, CCV and LCS reading, in its series."""
    found = {
        (o.analyte, o.kind, o.level, o.seq, o.sample_id)
        for o in observe(metals_run("RUN-A"))
        if o.kind != "slope"
    }
    rows = list(csv.DictReader(io.StringIO(METALS)))
    expected = {
        (
            r["analyte"],
            r["kind"].upper(),
            f"{float(r['nominal']):g} µg/L",
            int(r["seq"]),
            r["sample_id"],
        )
        for r in rows
        if r["kind"] in ("icv", "ccv", "lcs")
    }
    assert found == expected and len(found) == 16


def test_one_slope_per_analyte_equal_to_the_fits_linear_coefficient(
    lab: Callable[..., Lab],
) -> None:
    """Each analyte's calibration gives one slope point: the fit's linear coefficient."""
    one = lab()
    document = verdict(one.judge("run.csv", metals_run("RUN-A")))
    for analyte in ANALYTES:
        (point,) = one.ledger.control.series_points(SeriesKey(INSTRUMENT, analyte, "slope", ""))
        coefficients = document["calibrations"][analyte]["coefficients"]
        assert point.value == pytest.approx(coefficients[1], rel=1e-12)
        assert point.unit == "response per µg/L"
    slopes = [k for k in one.ledger.control.series_keys() if k.kind == "slope"]
    assert sorted(k.analyte for k in slopes) == sorted(ANALYTES)


def test_istd_points_one_per_injection_per_internal_standard() -> None:
    """The internal standard gives one point per injection: its response over the standards'."""
    rows = list(csv.DictReader(io.StringIO(ISTD_FILE.read_text(encoding="utf-8"))))
    by_seq = {int(r["seq"]): float(r["istd_response"]) for r in rows}
    reference = np.mean(
        [
            float(r["istd_response"])
            for r in rows
            if r["kind"] == "cal" and r["analyte"] == "atrazine"
        ]
    )
    istd = [o for o in observe(ISTD_FILE.read_bytes()) if o.kind == "ISTD"]
    assert sorted(o.seq for o in istd) == sorted(by_seq)  # each injection once, not per analyte
    assert {(o.analyte, o.level) for o in istd} == {("atrazine-d5", "atrazine-d5")}
    for point in istd:
        assert point.seq is not None
        assert point.value == pytest.approx(100.0 * by_seq[point.seq] / reference, rel=1e-12)


def test_istd_point_of_a_failing_injection_is_not_accepted() -> None:
    """The injection whose internal standard failed istd.recovery gives the one unaccepted point."""
    istd = [o for o in observe(ISTD_FILE.read_bytes()) if o.kind == "ISTD"]
    rejected = [(o.sample_id, round(o.value, 1)) for o in istd if not o.accepted]
    assert rejected == [("BW-1125-08", 54.2)]


def test_ccv_that_fails_its_own_run_is_not_accepted() -> None:
    """The 12-02 run's failing CCV-2 Cu is the one point not accepted; its other checks are."""
    points = observe(FAILING_CU_FILE.read_bytes())
    rejected = [(o.sample_id, o.analyte) for o in points if not o.accepted]
    assert rejected == [(CCV_2, "Cu")]
    (cu_ccv_2,) = [o for o in points if (o.sample_id, o.analyte) == (CCV_2, "Cu")]
    assert cu_ccv_2.value == pytest.approx(83.1, abs=0.05)


# --------------------------------------------------------------------------- idempotence


def test_same_content_under_another_name_adds_no_points(lab: Callable[..., Lab]) -> None:
    """A copy of a judged file under another name is a duplicate and logs nothing more."""
    one = lab()
    data = metals_run("RUN-A")
    one.judge("first.csv", data)
    before = point_count(one.ledger_path)
    one.reopen()
    assert one.judge("copy.csv", data).status == "duplicate"
    assert point_count(one.ledger_path) == before == 20  # 4 analytes × (ICV, LCS, 2 CCV, slope)


def test_same_file_seen_again_adds_no_points(lab: Callable[..., Lab]) -> None:
    """The same bytes at the same path, seen again by a new intake, are unchanged: no new points."""
    one = lab()
    data = metals_run("RUN-A")
    one.judge("run.csv", data)
    before = point_count(one.ledger_path)
    one.reopen()
    assert one.judge("run.csv", data).status == "unchanged"
    assert point_count(one.ledger_path) == before == 20
    assert len(one.ledger.control.series_points(ZN_CCV)) == 2


def test_new_version_supersedes_the_earlier_versions_points(lab: Callable[..., Lab]) -> None:
    """A new version of a file replaces its earlier version's points in every series."""
    one = lab()
    first, second = metals_run("RUN-A", zn_ccv(0.99, 0.99)), metals_run("RUN-A", zn_ccv(1.01, 1.01))
    one.judge("run.csv", first)
    outcome = one.judge("run.csv", second)
    assert outcome.version == 2
    values = [p.value for p in one.ledger.control.series_points(ZN_CCV)]
    assert values == pytest.approx(zn_ccv_values(second), rel=1e-12)
    assert (
        sum(len(one.ledger.control.series_points(k)) for k in one.ledger.control.series_keys())
        == 20
    )


def test_version_reverted_to_earlier_content_has_its_points(lab: Callable[..., Lab]) -> None:
    """A file given back its first content, judged as version 3, has that content's points."""
    one = lab()
    first, second = metals_run("RUN-A", zn_ccv(0.99, 0.99)), metals_run("RUN-A", zn_ccv(1.01, 1.01))
    one.judge("run.csv", first)
    one.judge("run.csv", second)
    assert one.judge("run.csv", first).version == 3
    values = [p.value for p in one.ledger.control.series_points(ZN_CCV)]
    assert values == pytest.approx(zn_ccv_values(first), rel=1e-12)


# --------------------------------------------------------------------------- baselines


def test_no_limits_before_baseline_points(lab: Callable[..., Lab]) -> None:
    """A series gets no limits until it has ``baseline_points`` points."""
    one = lab({"baseline_points": 6, "baseline_runs": 2})
    runs = varied_runs(3, seed=1)
    one.judge("a.csv", runs[0])
    assert one.ledger.control.active_limits(ZN_CCV) is None
    one.judge("b.csv", runs[1])
    assert one.ledger.control.active_limits(ZN_CCV) is None  # 4 points
    one.judge("c.csv", runs[2])
    limits = one.ledger.control.active_limits(ZN_CCV)
    assert limits is not None and limits.n == 6


def test_no_limits_before_baseline_runs(lab: Callable[..., Lab]) -> None:
    """Enough points from too few runs give no limits; the first point of the next run sets them."""
    one = lab({"baseline_points": 2, "baseline_runs": 3})
    runs = varied_runs(3, seed=2)
    one.judge("a.csv", runs[0])
    one.judge("b.csv", runs[1])
    assert one.ledger.control.active_limits(ZN_CCV) is None
    one.judge("c.csv", runs[2])
    limits = one.ledger.control.active_limits(ZN_CCV)
    assert limits is not None
    assert limits.n == 6 and limits.runs == 3  # whole runs: 2 + 2 + 2


def test_runs_sharing_a_name_read_the_series_for_a_baseline_once_per_new_run(
    lab: Callable[..., Lab], monkeypatch: pytest.MonkeyPatch
) -> None:
    """Files of one run name do not re-read a series too few runs keep without limits."""
    one = lab({"baseline_points": 2, "baseline_runs": 3})
    searches: list[SeriesKey] = []
    read = one.ledger.control.series_points

    def counted(key: SeriesKey, **kwargs: Any) -> list[Any]:
        if kwargs.get("first") is not None:
            searches.append(key)
        return read(key, **kwargs)

    monkeypatch.setattr(one.ledger.control, "series_points", counted)
    rng = np.random.default_rng(7)
    names = ["METHOD-A"] * 5 + ["METHOD-B"] * 3 + ["METHOD-C"]
    for i, name in enumerate(names):
        one.judge(f"f-{i}.csv", metals_run(name, zn_ccv(*(1.0 + rng.normal(0, 0.004, 2)))))
    assert searches.count(ZN_CCV) == 3  # the first file of each run name
    limits = one.ledger.control.active_limits(ZN_CCV)
    assert limits is not None and limits.runs == 3 and limits.n == 18


def test_baseline_is_the_one_way_decomposition_of_its_points(lab: Callable[..., Lab]) -> None:
    """The limits set are the one-way ANOVA (numpy) of exactly the first runs' points."""
    one = lab({"baseline_points": 4, "baseline_runs": 4})
    runs = varied_runs(4, seed=3)
    by_run = [zn_ccv_values(data) for data in runs]
    centre, within, between = one_way(by_run)
    sd = np.hypot(within, between)
    values = np.concatenate(by_run)
    assert np.all(np.abs(values - centre) <= 3 * sd)  # none excluded
    outcomes = one.judge_runs(runs)
    limits = one.ledger.control.active_limits(ZN_CCV)
    assert limits is not None
    assert (limits.source, limits.n, limits.runs) == ("baseline", 8, 4)
    assert limits.centre == pytest.approx(centre, rel=1e-12)
    assert limits.sd_within == pytest.approx(within, rel=1e-9)
    assert limits.sd_between == pytest.approx(between, rel=1e-9, abs=1e-12)
    assert limits.sd == pytest.approx(sd, rel=1e-9)
    (summary,) = [
        s
        for s in verdict(outcomes[-1])["control_charts"]
        if (s["analyte"], s["kind"]) == ("Zn", "CCV")
    ]
    assert (summary["limits"], summary["points"], summary["runs"]) == ("baseline", 8, 4)
    assert summary["centre"] == pytest.approx(limits.centre, rel=1e-12)


def test_baseline_leaves_out_a_point_beyond_3_sd_once(lab: Callable[..., Lab]) -> None:
    """A baseline point beyond 3 SD of the first estimate is left out and the limits recomputed."""
    one = lab({"baseline_points": 24, "baseline_runs": 12})
    rng = np.random.default_rng(4)
    factors = 1.0 + rng.normal(0.0, 0.002, size=(12, 2))
    factors[3, 1] = 1.06  # run 4's CCV-2 Zn reads about 107 %: in its run's limits, an outlier here
    runs = [metals_run(f"RUN-X-{i}", zn_ccv(*factors[i])) for i in range(12)]
    by_run = [zn_ccv_values(data) for data in runs]
    values = np.concatenate(by_run)
    centre, within, between = one_way(by_run)
    first_z = np.abs(values - centre) / np.hypot(within, between)
    assert list(np.flatnonzero(first_z > 3.0)) == [7]  # exactly the outlier
    kept = [r if i != 3 else r[:1] for i, r in enumerate(by_run)]
    outcomes = one.judge_runs(runs)
    assert outcomes[3].status == "pass"  # the outlier met its own run's criteria
    limits = one.ledger.control.active_limits(ZN_CCV)
    assert limits is not None and limits.n == 23
    centre, within, between = one_way(kept)
    assert limits.centre == pytest.approx(centre, rel=1e-12)
    assert limits.sd == pytest.approx(np.hypot(within, between), rel=1e-9)


def test_baseline_is_locked_once_set(lab: Callable[..., Lab]) -> None:
    """Points logged after the baseline was set leave its limits as they were."""
    one = lab({"baseline_points": 4, "baseline_runs": 2})
    one.judge_runs(varied_runs(2, seed=5))
    set_first = one.ledger.control.active_limits(ZN_CCV)
    assert set_first is not None
    shifted = [metals_run(f"LATER-{i}", zn_ccv(1.01 + i / 500, 1.02)) for i in range(3)]
    one.judge_runs(shifted, prefix="later")
    assert one.ledger.control.limits_history(ZN_CCV) == [set_first]
    assert len(one.ledger.control.series_points(ZN_CCV)) == 10


def test_point_failing_its_own_run_is_never_in_a_baseline(lab: Callable[..., Lab]) -> None:
    """A CCV that failed its run's own recovery limits is logged but left out of the baseline."""
    one = lab({"baseline_points": 4, "baseline_runs": 2})
    rng = np.random.default_rng(6)
    factors = 1.0 + rng.normal(0.0, 0.004, size=(3, 2))
    factors[0, 1] = 0.85  # run 1's CCV-2 Zn near 86 %: fails check.recovery (90–110 %)
    runs = [metals_run(f"RUN-F-{i}", zn_ccv(*factors[i])) for i in range(3)]
    values = [zn_ccv_values(data) for data in runs]
    outcomes = one.judge_runs(runs)
    assert outcomes[0].status == "fail"
    logged = one.ledger.control.series_points(ZN_CCV)
    assert [p.accepted for p in logged] == [True, False, True, True, True, True]
    limits = one.ledger.control.active_limits(ZN_CCV)
    # Whole runs until 4 points: run 1's CCV-1, run 2's two, then run 3's two.
    assert limits is not None and (limits.n, limits.runs) == (5, 3)
    used = [[values[0][0]], [values[1][0], values[1][1]], [values[2][0], values[2][1]]]
    centre, within, between = one_way(used)
    assert limits.centre == pytest.approx(centre, rel=1e-12)
    assert limits.sd == pytest.approx(np.hypot(within, between), rel=1e-9)


def test_fixed_limits_are_used_instead_of_a_baseline(lab: Callable[..., Lab]) -> None:
    """A series with ``control.fixed`` limits is judged by them and never gets a baseline."""
    fixed = {"analyte": "zn", "kind": "CCV", "centre": 100.0, "sd": 2.5}
    one = lab({"baseline_points": 4, "baseline_runs": 2, "fixed": [fixed]})
    outcomes = one.judge_runs(varied_runs(3, seed=7))
    assert one.ledger.control.active_limits(ZN_CCV) is None
    assert len(one.ledger.control.series_points(ZN_CCV, accepted_only=True)) == 6
    (summary,) = [
        s
        for s in verdict(outcomes[-1])["control_charts"]
        if (s["analyte"], s["kind"]) == ("Zn", "CCV")
    ]
    assert (summary["limits"], summary["centre"], summary["sd"]) == ("fixed", 100.0, 2.5)


# --------------------------------------------------------------------------- Westgard findings


def beyond_limit_run(one: Lab) -> tuple[Outcome, float]:
    """Set a baseline from 20 runs, then judge a run whose Zn CCVs read 4 % high; its run z."""
    one.judge_runs(varied_runs(BASELINE_RUNS, seed=8))
    stored = one.ledger.control.active_limits(ZN_CCV)
    assert stored is not None and stored.runs == BASELINE_RUNS
    data = metals_run("RUN-HIGH", zn_ccv(1.04, 1.04))
    values = zn_ccv_values(data)
    assert max(values) < 110.0  # within its own run's limits: the chart alone sees it
    z = stored_to_limits(stored).run_z(float(np.mean(values)), len(values))
    assert z > 3.5
    return one.judge("high.csv", data), z


def test_run_beyond_3_5_sd_fails_the_run(lab: Callable[..., Lab]) -> None:
    """With a baseline set, a run whose CCV mean is beyond +3.5 SD fails by control.1-3.5s."""
    one = lab()
    outcome, z = beyond_limit_run(one)
    document = verdict(outcome)
    (finding,) = [f for f in control_findings(document) if f["analyte"] == "Zn"]
    assert (finding["rule"], finding["severity"]) == ("control.1-3.5s", "fail")
    assert (finding["sample_id"], finding["seq"]) == (CCV_2, 28)  # the run's last CCV
    assert finding["value"] == pytest.approx(z, abs=1e-4)
    assert document["status"] == "fail" and outcome.status == "fail"
    assert one.ledger.files.latest()[0].outcome == "fail"


def test_rejection_severity_warn_keeps_the_run_passing(lab: Callable[..., Lab]) -> None:
    """With ``rejection_severity: warn`` a 1-3.5s is a warning and the run still passes."""
    one = lab({"rejection_severity": "warn"})
    outcome, _ = beyond_limit_run(one)
    document = verdict(outcome)
    (finding,) = [f for f in control_findings(document) if f["rule"] == "control.1-3.5s"]
    assert finding["severity"] == "warn"
    assert document["status"] == "pass" and outcome.status == "pass"


def test_run_beyond_2_sd_is_a_warning(lab: Callable[..., Lab]) -> None:
    """A run whose CCV mean lies between 2 and 3 SD gives one control.1-2s warning; it passes."""
    one = lab(fixed_zn_ccv(2.5))
    outcome = one.judge("run.csv", metals_run("RUN-A"))
    document = verdict(outcome)
    (finding,) = control_findings(document)
    assert (finding["rule"], finding["severity"], finding["sample_id"]) == (
        "control.1-2s",
        "warn",
        CCV_2,
    )
    assert finding["value"] == pytest.approx(2.5, abs=1e-4)
    assert document["status"] == "pass"


def test_run_beyond_4_sd_gives_the_strictest_rule_alone(lab: Callable[..., Lab]) -> None:
    """A run mean at +4 SD gives one control.1-3.5s, not also 1-3s and 1-2s at the same point."""
    one = lab(fixed_zn_ccv(4.0))
    document = verdict(one.judge("run.csv", metals_run("RUN-A")))
    assert [(f["rule"], f["sample_id"]) for f in control_findings(document)] == [
        ("control.1-3.5s", CCV_2)
    ]
    assert document["status"] == "fail"


def test_rules_not_listed_do_not_fire(lab: Callable[..., Lab]) -> None:
    """With the single-value rules left out of ``control.rules``, a run at +4 SD raises nothing."""
    one = lab(fixed_zn_ccv(4.0, rules=["2-2s", "R-4s", "4-1s", "10-x"]))
    document = verdict(one.judge("run.csv", metals_run("RUN-A")))
    assert control_findings(document) == []
    assert document["status"] == "pass"


def istd_fixed(**control: Any) -> dict[str, Any]:
    """Fixed ISTD limits that put every atrazine-d5 point near +50 SD."""
    limits = {"analyte": "atrazine-d5", "kind": "ISTD", "centre": 50.0, "sd": 1.0}
    return {"fixed": [limits], **control}


def test_istd_series_are_not_judged_by_default(lab: Callable[..., Lab]) -> None:
    """ISTD points far outside fixed limits raise nothing with the default ``kinds``."""
    one = lab(istd_fixed())
    outcome = one.judge("lc.csv", HERBICIDES_FILE.read_bytes())
    document = verdict(outcome)
    assert control_findings(document) == []
    assert document["status"] == "pass"
    istd = SeriesKey("BWL-LCMS-1", "atrazine-d5", "ISTD", "atrazine-d5")
    assert (
        len(one.ledger.control.series_points(istd)) == 37
    )  # logged all the same, one per injection


def test_istd_series_are_judged_when_kinds_lists_them(lab: Callable[..., Lab]) -> None:
    """With ISTD in ``kinds`` the same points give control.1-3.5s failures."""
    one = lab(istd_fixed(kinds=["ISTD"]))
    document = verdict(one.judge("lc.csv", HERBICIDES_FILE.read_bytes()))
    rules = {f["rule"] for f in control_findings(document)}
    assert "control.1-3.5s" in rules
    assert {f["analyte"] for f in control_findings(document)} == {"atrazine-d5"}
    assert document["status"] == "fail"


def test_violation_of_an_earlier_run_is_not_repeated(lab: Callable[..., Lab]) -> None:
    """A later in-control run's verdict does not repeat the 1-3.5s an earlier run completed."""
    one = lab(fixed_zn_ccv(1.0))  # the unmodified run's mean sits at +1 SD
    high = verdict(one.judge("high.csv", metals_run("RUN-HIGH", zn_ccv(1.0, 1.05))))
    assert "control.1-3.5s" in {f["rule"] for f in control_findings(high)}
    later = verdict(one.judge("later.csv", metals_run("RUN-LATER")))
    assert control_findings(later) == []
    assert later["status"] == "pass"


def test_control_finding_through_the_watcher(tmp_path: Path) -> None:
    """A run dropped into a watched inbox gets its control finding and its points logged."""
    (tmp_path / "inbox").mkdir()
    # Pictures off: drawn when the daemon is idle, they would only slow its stop here.
    config = build_config({"control": fixed_zn_ccv(4.0, charts=False)}, "test")
    plan = plan_watch(config, inbox=tmp_path / "inbox", out=tmp_path / "out", settle_seconds=SETTLE)
    outcomes: list[Outcome] = []
    watcher = Watcher(plan, on_outcome=outcomes.append)
    watcher.start()
    try:
        (tmp_path / "inbox" / "run.csv").write_bytes(metals_run("RUN-W"))
        wait_for(lambda: outcomes, what="the run judged")
    finally:
        watcher.stop()
        assert watcher.wait(10)
    assert watcher.fault is None
    (outcome,) = outcomes
    assert outcome.status == "fail" and ZN_CCV in outcome.series
    assert "control.1-3.5s" in {f["rule"] for f in control_findings(verdict(outcome))}
    ledger = Ledger.open(plan.state_dir / LEDGER_NAME, read_only=True)
    try:
        assert len(ledger.control.series_points(ZN_CCV)) == 2
    finally:
        ledger.close()


# --------------------------------------------------------------------------- switched off, config


def test_disabled_control_logs_nothing_and_adds_no_findings(lab: Callable[..., Lab]) -> None:
    """With ``control.enabled: false`` no point is logged and no control finding is made."""
    one = lab(fixed_zn_ccv(4.0, enabled=False))
    outcome = one.judge("run.csv", metals_run("RUN-A"))
    document = verdict(outcome)
    assert document["status"] == "pass" and control_findings(document) == []
    assert "control_charts" not in document
    assert outcome.series == ()
    assert point_count(one.ledger_path) == 0 and one.ledger.control.series_keys() == []


def test_unknown_rule_is_a_config_error_naming_it() -> None:
    """An unknown id in ``control.rules`` is refused as a ConfigError that names it."""
    with pytest.raises(ConfigError, match="3-1s"):
        build_config({"control": {"rules": ["1-3s", "3-1s"]}}, "test")


# --------------------------------------------------------------------------- the commands


def export(argv: list[str], capsys: pytest.CaptureFixture[str]) -> list[dict[str, str]]:
    """Run ``calwarden chart export`` to stdout; its rows, header checked."""
    capsys.readouterr()
    assert main(["chart", "export", *argv]) == 0
    lines = list(csv.reader(io.StringIO(capsys.readouterr().out)))
    assert tuple(lines[0]) == EXPORT_COLUMNS
    return [dict(zip(lines[0], line, strict=True)) for line in lines[1:]]


def test_export_writes_a_header_and_one_row_per_point(
    lab: Callable[..., Lab], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``chart export --file`` writes the header and one row per logged point."""
    one = lab({"baseline_points": 4, "baseline_runs": 2})
    one.judge_runs(varied_runs(2, seed=9))
    target = tmp_path / "log.csv"
    assert main(["chart", "export", "--out", str(one.plan.out), "--file", str(target)]) == 0
    lines = list(csv.reader(io.StringIO(target.read_text(encoding="utf-8"))))
    assert tuple(lines[0]) == EXPORT_COLUMNS
    assert len(lines) - 1 == point_count(one.ledger_path) == 40
    rows = [dict(zip(lines[0], line, strict=True)) for line in lines[1:]]
    zn = [r for r in rows if (r["analyte"], r["kind"]) == ("Zn", "CCV")]
    limits = one.ledger.control.active_limits(ZN_CCV)
    assert limits is not None
    for row, point in zip(zn, one.ledger.control.series_points(ZN_CCV), strict=True):
        assert float(row["value"]) == point.value
        assert float(row["z"]) == pytest.approx((point.value - limits.centre) / limits.sd, abs=1e-4)


def test_export_gives_fixed_limits_their_centre_sd_and_z(
    lab: Callable[..., Lab], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A series with ``control.fixed`` limits exports their centre, SD and each point's z."""
    fixed = {"analyte": "Zn", "kind": "CCV", "centre": 100.0, "sd": 2.5}
    one = lab({"fixed": [fixed]})
    one.judge("run.csv", metals_run("RUN-A"))
    config = tmp_path / "fixed.yaml"
    config.write_text(
        "control:\n  fixed:\n    - {analyte: Zn, kind: CCV, centre: 100.0, sd: 2.5}\n",
        encoding="utf-8",
    )
    rows = export(
        ["--out", str(one.plan.out), "--config", str(config), "--analyte", "Zn", "--kind", "CCV"],
        capsys,
    )
    assert len(rows) == 2
    for row in rows:
        assert (float(row["centre"]), float(row["sd"])) == (100.0, 2.5)
        assert float(row["z"]) == pytest.approx((float(row["value"]) - 100.0) / 2.5, abs=1e-4)


def test_export_filters_by_analyte_and_kind(
    lab: Callable[..., Lab], capsys: pytest.CaptureFixture[str]
) -> None:
    """``--analyte`` and ``--kind`` keep only the matching series' rows."""
    one = lab()
    one.judge_runs(varied_runs(2, seed=10))
    rows = export(["--out", str(one.plan.out), "--analyte", "zn", "--kind", "ccv"], capsys)
    assert len(rows) == 4
    assert {(r["instrument"], r["analyte"], r["kind"], r["level"]) for r in rows} == {
        (INSTRUMENT, "Zn", "CCV", "25 µg/L")
    }


def test_export_filters_by_instrument(
    lab: Callable[..., Lab], capsys: pytest.CaptureFixture[str]
) -> None:
    """``--instrument`` keeps only that instrument's rows."""
    one = lab()
    one.judge("metals.csv", metals_run("RUN-A"))
    one.judge("lc.csv", ISTD_FILE.read_bytes())
    rows = export(["--out", str(one.plan.out), "--instrument", "bwl-lcms-1"], capsys)
    assert rows and {r["instrument"] for r in rows} == {"BWL-LCMS-1"}
    everything = export(["--out", str(one.plan.out)], capsys)
    assert len(everything) == point_count(one.ledger_path) > len(rows)


def test_options_before_the_action_apply_to_it(
    lab: Callable[..., Lab],
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
) -> None:
    """``chart --out DIR --analyte Zn export`` exports Zn from DIR, as after the action."""
    one = lab()
    one.judge("metals.csv", metals_run("RUN-A"))
    monkeypatch.chdir(tmp_path)  # not a daemon's output folder
    capsys.readouterr()
    assert main(["chart", "--out", str(one.plan.out), "--analyte", "Zn", "export"]) == 0
    lines = list(csv.reader(io.StringIO(capsys.readouterr().out)))
    assert len(lines) > 1 and {line[1] for line in lines[1:]} == {"Zn"}


def test_baseline_command_sets_new_limits_and_keeps_the_old(
    lab: Callable[..., Lab], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """``chart baseline`` stores limits from the latest points; the earlier set stays, inactive."""
    control = {"baseline_points": 4, "baseline_runs": 2}
    one = lab(control)
    one.judge_runs(varied_runs(2, seed=11))
    earlier = one.ledger.control.active_limits(ZN_CCV)
    assert earlier is not None
    recent = varied_runs(2, seed=12, sd=0.01)
    one.judge_runs(recent, prefix="recent")
    config = tmp_path / "control.yaml"
    config.write_text("control:\n  baseline_points: 4\n  baseline_runs: 2\n", encoding="utf-8")
    argv = ["chart", "baseline", "--out", str(one.plan.out), "--config", str(config)]
    assert main([*argv, "--analyte", "Zn", "--kind", "CCV"]) == 0
    history = one.ledger.control.limits_history(ZN_CCV)
    assert len(history) == 2
    assert [h.active for h in history] == [False, True]
    assert (history[0].centre, history[0].sd) == (earlier.centre, earlier.sd)
    centre, within, between = one_way([zn_ccv_values(data) for data in recent])
    assert history[1].n == 4 and history[1].source == "baseline"
    assert history[1].centre == pytest.approx(centre, rel=1e-12)
    assert history[1].sd == pytest.approx(np.hypot(within, between), rel=1e-9)
    assert one.ledger.control.active_limits(ZN_CCV) == history[1]


def _drifting_lab(lab: Callable[..., Lab], ewma: bool) -> list[Outcome]:
    """Runs whose Zn CCV means all sit 1.7 SD above fixed limits: a drift no 1-3s sees."""
    first, _ = zn_ccv_values(metals_run("probe"))
    fixed = {"analyte": "Zn", "kind": "CCV", "centre": first - 3.0, "sd": 2.0}
    one = lab({"fixed": [fixed], "rules": ["1-3s"], "ewma": ewma}, name=f"ewma-{ewma}")
    return one.judge_runs([metals_run(f"DRIFT-{i}") for i in range(5)])


def test_ewma_reports_a_slow_drift_when_switched_on(lab: Callable[..., Lab]) -> None:
    """With control.ewma on, points steadily above the centre give ewma warnings."""
    findings = [f for o in _drifting_lab(lab, True) for f in control_findings(verdict(o))]
    assert findings and {f["rule"] for f in findings} == {"control.ewma"}
    assert {f["severity"] for f in findings} == {"warn"}


def test_ewma_is_off_by_default(lab: Callable[..., Lab]) -> None:
    """Without control.ewma the same drift raises nothing under 1-3s alone."""
    assert not [f for o in _drifting_lab(lab, False) for f in control_findings(verdict(o))]


def test_kept_series_counts_equal_the_points(lab: Callable[..., Lab]) -> None:
    """The counts kept per series match its points after new versions, reverts and duplicates."""
    one = lab()
    first, second = metals_run("RUN-A"), metals_run("RUN-B", zn_ccv(1.0, 0.8))
    one.judge("a.csv", first)
    one.judge("a.csv", second)  # a new version
    one.judge("a.csv", first)  # back to the first content
    one.judge("b.csv", second)  # a duplicate of a.csv's second version
    one.judge("c.csv", first)  # a duplicate of a.csv
    for key in one.ledger.control.series_keys():
        points = one.ledger.control.series_points(key)
        assert one.ledger.control.series_size(key) == (len(points), sum(p.accepted for p in points))


def test_chart_draws_the_chosen_series_as_png(
    lab: Callable[..., Lab], capsys: pytest.CaptureFixture[str]
) -> None:
    """``calwarden chart --analyte Zn --kind CCV`` writes that series' PNG under charts/."""
    one = lab()
    one.judge_runs(varied_runs(2, seed=11))
    capsys.readouterr()
    argv = ["chart", "--out", str(one.plan.out), "--analyte", "Zn", "--kind", "CCV"]
    assert main(argv) == 0
    (drawn,) = (one.plan.out / "charts").rglob("*.png")
    assert drawn.name == "Zn--CCV--25_ug_L.png"
    assert drawn.read_bytes().startswith(b"\x89PNG")
    assert str(drawn) in capsys.readouterr().out


def _version_2_ledger(tmp_path: Path) -> Path:
    """A ledger as schema 2 left it (no limits split), holding one set of Zn CCV limits."""
    path = tmp_path / LEDGER_NAME
    Ledger.open(path).close()
    with sqlite3.connect(path) as db:
        for column in ("sd_within", "sd_between", "runs"):
            db.execute(f"ALTER TABLE control_limits DROP COLUMN {column}")
        db.execute("UPDATE meta SET value = '2' WHERE key = 'schema_version'")
        db.execute(
            "INSERT INTO control_limits (instrument, analyte, kind, level, centre, sd, n, source, "
            "set_at) VALUES ('BWL-ICPMS-2', 'Zn', 'CCV', '25 µg/L', 100.0, 1.5, 20, 'baseline', "
            "'2026-11-01T00:00:00.000+00:00')"
        )
    return path


def test_a_version_2_ledger_gains_the_limits_split_and_keeps_its_limits(tmp_path: Path) -> None:
    """Opening a schema-2 ledger adds sd_within, sd_between and runs; old limits read as unsplit."""
    path = _version_2_ledger(tmp_path)
    upgraded = Ledger.open(path)
    try:
        assert upgraded.database.meta("schema_version") == str(SCHEMA_VERSION)
        limits = upgraded.control.active_limits(ZN_CCV)
        assert limits is not None
        assert (limits.centre, limits.sd, limits.sd_within, limits.runs) == (100.0, 1.5, None, 0)
        assert stored_to_limits(limits).run_sd(3) == 1.5  # judged as before: not split, not widened
    finally:
        upgraded.close()


def test_a_version_2_ledger_reads_its_limits_without_being_upgraded(tmp_path: Path) -> None:
    """A schema-2 ledger opened read-only (status, chart export) reads its limits as unsplit."""
    path = _version_2_ledger(tmp_path)
    reader = Ledger.open(path, read_only=True)
    try:
        limits = reader.control.active_limits(ZN_CCV)
        assert limits is not None and (limits.sd, limits.sd_within, limits.runs) == (1.5, None, 0)
    finally:
        reader.close()
