"""The HTML report, the overview page, the re-run worklist and ``status --json``."""

from __future__ import annotations

import csv
import hashlib
import io
import json
import shutil
import subprocess
import threading
from html.parser import HTMLParser
from http.server import BaseHTTPRequestHandler, HTTPServer
from pathlib import Path

import pytest

from calwarden.daemon.cli.main import main
from calwarden.daemon.cli.status import status_document
from calwarden.daemon.outputs.html_report import Extras, picture_extras, render_html
from calwarden.daemon.outputs.overview import InboxPlace, gather, render_overview
from calwarden.daemon.outputs.pictures import draw_calibration
from calwarden.daemon.outputs.verdict_model import VerdictDocument
from calwarden.daemon.outputs.worklist import worklist_csv
from calwarden.daemon.pipeline import judge_file
from calwarden.daemon.settings.config import build_config, load_config
from calwarden.daemon.stores.files import FileStore
from calwarden.daemon.stores.ledger import Ledger

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
FAILING = FIXTURES / "bwl-metals-fail.csv"
CHROMIUM = shutil.which("chromium")
_VOID = {"meta", "br", "img", "link", "hr", "input", "wbr"}


class _Checker(HTMLParser):
    """Every element closed in order (the pages write no optional end tags)."""

    def __init__(self) -> None:
        super().__init__()
        self.stack: list[str] = []
        self.problems: list[str] = []
        self.images: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "img":
            self.images.append(dict(attrs).get("src") or "")
        if tag not in _VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack.pop() != tag:
            self.problems.append(f"unexpected </{tag}>")


def _checked(page: str) -> _Checker:
    checker = _Checker()
    checker.feed(page)
    checker.close()
    assert not checker.problems and not checker.stack, (checker.problems, checker.stack)
    return checker


def _failing() -> VerdictDocument:
    return judge_file(FAILING, load_config(None)).document


def test_report_is_valid_html_with_status_and_reruns() -> None:
    """The report parses with every element closed, and opens with the status and root cause."""
    page = render_html(_failing())
    _checked(page)
    assert "✗ FAIL</span> CCV-2 Zn recovered 82.6 %, limit 90–110 %" in page
    assert "Samples to re-run (14)" in page and "dilute to 5× in total" in page
    assert "does not replace, the analyst&#x27;s review" in page


def test_file_text_is_escaped_in_the_report() -> None:
    """A sample id holding markup is shown as text, never as an element."""
    document = _failing()
    document["reruns"][0]["sample_id"] = '<img src="x" onerror="alert(1)">'
    page = render_html(document)
    assert '<img src="x"' not in page and "&lt;img src=&quot;x&quot;" in page


def test_worklist_brackets_the_samples_in_run_order() -> None:
    """The worklist opens and closes with a CCV and CCB, brackets every 10 samples, in seq order."""
    data = worklist_csv(_failing(), load_config(None).worklist, 10)
    assert data is not None
    rows = list(csv.DictReader(io.StringIO(data.decode("utf-8"))))
    kinds = [row["kind"] for row in rows]
    assert kinds[:2] == ["ccv", "ccb"] and kinds[-2:] == ["ccv", "ccb"]
    samples = [row for row in rows if row["kind"] == "sample"]
    assert len(samples) == 14 and kinds.count("ccv") == 3  # 10 samples, a check, 4 more
    assert [int(r["seq"]) for r in samples] == sorted(int(r["seq"]) for r in samples)
    over = next(row for row in samples if row["sample_id"] == "BW-1124-18")
    assert over["dilution"] == "5" and "over range" in over["why"]


def test_worklist_section_maps_columns_and_kinds() -> None:
    """worklist: columns and kinds give the instrument's own headers and words, in that order."""
    config = build_config(
        {
            "worklist": {
                "columns": {"position": "Vial", "sample_id": "Name", "kind": "Type"},
                "kinds": {"sample": "Unknown", "ccv": "QC"},
                "fixed": {"Method": "MET-A"},
                "delimiter": ";",
            }
        },
        "test",
    )
    data = worklist_csv(_failing(), config.worklist, 10)
    assert data is not None
    lines = data.decode("utf-8").splitlines()
    assert lines[0] == "Vial;Name;Type;Method"
    assert lines[1] == "1;CCV-1;QC;MET-A" and lines[3].endswith(";Unknown;MET-A")


def test_passing_run_has_no_worklist() -> None:
    """A passing run writes no re-run worklist."""
    document = judge_file(FIXTURES / "bwl-metals-pass.csv", load_config(None)).document
    assert worklist_csv(document, load_config(None).worklist, 10) is None


def test_status_json_has_the_documented_keys(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """status --json prints the README's keys, with no ledger too (exit 2)."""
    assert main(["status", "--out", str(tmp_path), "--json"]) == 2
    document = json.loads(capsys.readouterr().out)
    assert list(document) == list(status_document(tmp_path / ".calwarden", tmp_path))
    assert document["schema"] == 1 and document["ledger"] is False and document["files"] is None


def _ledger_with_runs(tmp_path: Path) -> tuple[Path, Ledger]:
    from calwarden.daemon.intake.accept import Intake
    from calwarden.daemon.settings.config import plan_watch

    inbox = tmp_path / "inbox"
    inbox.mkdir()
    out = tmp_path / "out"
    plan = plan_watch(load_config(None), inbox=inbox, out=out)
    ledger = Ledger.open(tmp_path / "ledger.sqlite")
    intake = Intake(ledger, plan.inboxes)
    for name in ("bwl-metals-fail.csv", "bwl-metals-pass.csv"):
        data = (FIXTURES / name).read_bytes()
        (inbox / name).write_bytes(data)
        intake.process(
            plan.inboxes[0], inbox / name, data, hashlib.sha256(data).hexdigest(), len(data), 0
        )
    return out, ledger


def test_overview_lists_runs_and_unreviewed_failures(tmp_path: Path) -> None:
    """The overview links each run's report and lists the failing run as not reviewed."""
    from datetime import UTC, datetime

    out, ledger = _ledger_with_runs(tmp_path)
    try:
        overview = gather(
            FileStore(ledger.database),
            None,
            ledger.control,
            [InboxPlace("inbox", None, out)],
            out,
            days=7,
            silent_after_hours=72,
            now=datetime.now(UTC),
        )
    finally:
        ledger.close()
    page = render_overview(overview)
    _checked(page)
    assert "Failures not yet reviewed (1)" in page and "review: none recorded" in page
    assert 'href="bwl-metals-fail.report.html"' in page
    assert "SILENT" not in page


def _report_with_pictures(folder: Path) -> tuple[VerdictDocument, Extras]:
    """The failing fixture's report with its calibration pictures embedded, and a canary."""
    document = _failing()
    for analyte in document["calibrations"]:
        draw_calibration(document, folder, "run", analyte)
    extras = picture_extras(
        document, folder, "run", folder / "charts", config_sha256="0" * 64, evaluated_at="now"
    )
    return document, extras


@pytest.mark.slow
@pytest.mark.skipif(CHROMIUM is None, reason="Debian's chromium is not installed (CI installs it)")
def test_report_in_a_real_browser_fetches_nothing_and_fits_a_phone(tmp_path: Path) -> None:
    """Headless chromium shows status, re-runs and every picture; asks the network for nothing."""
    assert CHROMIUM is not None
    hits: list[str] = []

    class Canary(BaseHTTPRequestHandler):
        def do_GET(self) -> None:
            hits.append(self.path)
            self.send_response(404)
            self.end_headers()

        def log_message(self, format: str, *args: object) -> None:
            pass

    server = HTTPServer(("127.0.0.1", 0), Canary)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        document, extras = _report_with_pictures(tmp_path)
        port = server.server_address[1]
        # File text that would fetch from the canary if it were ever not escaped.
        document["reruns"][0]["sample_id"] = f'<img src="http://127.0.0.1:{port}/leak">'
        page_path = tmp_path / "run.report.html"
        page_path.write_text(render_html(document, extras), encoding="utf-8")
        url = page_path.as_uri()
        base = [
            CHROMIUM,
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            f"--user-data-dir={tmp_path / 'profile'}",
        ]
        dom = subprocess.run(
            [*base, "--dump-dom", url], capture_output=True, text=True, timeout=60, check=True
        ).stdout
        shot = tmp_path / "phone.png"
        pdf = tmp_path / "print.pdf"
        subprocess.run(
            [*base, f"--screenshot={shot}", "--window-size=390,2400", url],
            capture_output=True,
            timeout=60,
            check=True,
        )
        subprocess.run(
            [*base, f"--print-to-pdf={pdf}", "--no-pdf-header-footer", url],
            capture_output=True,
            timeout=60,
            check=True,
        )
    finally:
        server.shutdown()
        server.server_close()
        thread.join(5)
    checker = _checked(dom.split("\n", 1)[1] if dom.startswith("<!DOCTYPE") else dom)
    assert "FAIL" in dom and "Samples to re-run (14)" in dom
    assert len(checker.images) == len(document["calibrations"]) == 4
    assert all(src.startswith("data:image/png;base64,") for src in checker.images)
    assert hits == []
    assert shot.stat().st_size > 10_000 and pdf.read_bytes().startswith(b"%PDF")
    # Phone width: nothing wider than the screen but the scrolling tables.
    from PIL import Image

    with Image.open(shot) as image:
        assert image.size[0] == 390


@pytest.mark.slow
@pytest.mark.skipif(CHROMIUM is None, reason="Debian's chromium is not installed (CI installs it)")
def test_overview_in_a_real_browser(tmp_path: Path) -> None:
    """Headless chromium opens the overview from file:// and shows the failing run and its link."""
    from datetime import UTC, datetime

    from calwarden.daemon.outputs.overview import write_overview

    assert CHROMIUM is not None
    out, ledger = _ledger_with_runs(tmp_path)
    try:
        overview = gather(
            FileStore(ledger.database),
            None,
            ledger.control,
            [InboxPlace("inbox", None, out)],
            out,
            days=7,
            silent_after_hours=72,
            now=datetime.now(UTC),
        )
    finally:
        ledger.close()
    page = write_overview(out, overview)
    base = [
        CHROMIUM,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        f"--user-data-dir={tmp_path / 'profile'}",
    ]
    dom = subprocess.run(
        [*base, "--dump-dom", page.as_uri()], capture_output=True, text=True, timeout=60, check=True
    ).stdout
    shot = tmp_path / "overview-phone.png"
    subprocess.run(
        [*base, f"--screenshot={shot}", "--window-size=390,1600", page.as_uri()],
        capture_output=True,
        timeout=60,
        check=True,
    )
    assert "Failures not yet reviewed (1)" in dom and "bwl-metals-fail.report.html" in dom
    assert (out / "bwl-metals-fail.report.html").exists()  # the link leads somewhere
    assert shot.stat().st_size > 5_000


def test_fail_verdicts_are_logged_at_warning_level(tmp_path: Path) -> None:
    """file_evaluated is a warning for a failing run and info for a passing one."""
    from structlog.testing import capture_logs

    with capture_logs() as logs:
        _, ledger = _ledger_with_runs(tmp_path)
        ledger.close()
    levels = {e["path"]: e["log_level"] for e in logs if e["event"] == "file_evaluated"}
    assert levels == {"bwl-metals-fail.csv": "warning", "bwl-metals-pass.csv": "info"}
