"""What an alert says: safe headers, subjects, the MIME message, the text body, the webhook JSON."""

from __future__ import annotations

import json
import re
import struct
import unicodedata
import zlib
from datetime import datetime
from email import message_from_bytes
from email.message import EmailMessage
from email.policy import default as default_policy
from email.utils import parsedate_to_datetime
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from calwarden.daemon.alerts.content import (
    HEADER_PIECE_LIMIT,
    SUBJECT_LIMIT,
    daemon_alert,
    digest_alert,
    email_message,
    file_alert,
    header_text,
    subject,
    text_body,
    webhook_payload,
)
from calwarden.daemon.outputs.verdict_json import CAUTION
from calwarden.daemon.pipeline import judge_file
from calwarden.daemon.settings.config import AppConfig

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
SENDER = "calwarden@brindlewick.example"
TO = ("qc-lead@brindlewick.example",)
CREATED = "2021-03-04T05:06:07.000+00:00"  # long past: a Date from the clock would differ
HOSTILE = "x\r\nBcc: a@example.org"
SCRIPT = "<script>alert(1)</script>"


def _tiny_png() -> bytes:
    """A valid 1x1 grey PNG, made here so the test needs no picture file."""

    def chunk(kind: bytes, data: bytes) -> bytes:
        body = kind + data
        return struct.pack(">I", len(data)) + body + struct.pack(">I", zlib.crc32(body))

    header = struct.pack(">IIBBBBB", 1, 1, 8, 0, 0, 0, 0)
    return (
        b"\x89PNG\r\n\x1a\n"
        + chunk(b"IHDR", header)
        + chunk(b"IDAT", zlib.compress(b"\x00\x80"))
        + chunk(b"IEND", b"")
    )


def _fail_alert(**overrides: Any) -> dict[str, Any]:
    """A hand-made summary of a failing run, as file_alert would store it."""
    alert: dict[str, Any] = {
        "kind": "fail",
        "inbox": "metals",
        "path": "2026/run-1204.csv",
        "version": 1,
        "run": "run-1204",
        "instrument": "ICP-2",
        "status": "fail",
        "error": None,
        "failures": 3,
        "warnings": 0,
        "findings": [
            {
                "rule": "check.recovery",
                "severity": "fail",
                "analyte": "Zn",
                "sample_id": "CCV-2",
                "seq": 27,
                "value": 82.6,
                "limit": [90.0, 110.0],
                "message": "CCV-2 Zn recovered 82.6 %, limit 90-110 %",
            }
        ],
        "more_findings": 0,
        "reruns": [],
        "more_reruns": 0,
        "control_series": [],
        "evaluated_at": CREATED,
        "verdict": "/srv/out/run-1204.verdict.json",
        "report": "/srv/out/run-1204.report.txt",
        "flagged": None,
    }
    alert.update(overrides)
    return alert


def _compose(alert: dict[str, Any], **overrides: Any) -> EmailMessage:
    arguments: dict[str, Any] = {
        "dedupe_key": "fail:metals:2026/run-1204.csv:v1:abc123",
        "created_at": CREATED,
        "sender": SENDER,
        "recipients": TO,
    }
    arguments.update(overrides)
    return email_message(alert, **arguments)


def _parsed(message: EmailMessage) -> EmailMessage:
    """The message as a receiver sees it: serialised to bytes and parsed back."""
    parsed = message_from_bytes(message.as_bytes(), policy=default_policy)
    assert isinstance(parsed, EmailMessage)
    return parsed


def _part(message: EmailMessage, content_type: str) -> EmailMessage:
    found = [p for p in message.walk() if p.get_content_type() == content_type]
    assert len(found) == 1, f"expected one {content_type} part, found {len(found)}"
    part = found[0]
    assert isinstance(part, EmailMessage)
    return part


def _without_boundaries(raw: bytes) -> bytes:
    """The message bytes with each random MIME boundary replaced by a numbered placeholder."""
    boundaries = list(dict.fromkeys(re.findall(rb'boundary="([^"]+)"', raw)))
    for index, boundary in enumerate(boundaries):
        raw = raw.replace(boundary, b"BOUNDARY-%d" % index)
    return raw


@pytest.fixture(scope="module")
def failing_document() -> dict[str, Any]:
    """The verdict document of the failing fixture, judged in-process."""
    return judge_file(FIXTURES / "bwl-metals-fail.csv", AppConfig()).document


@pytest.fixture(scope="module")
def failing_alert(failing_document: dict[str, Any]) -> dict[str, Any]:
    """The stored summary a fail alert about the failing fixture would have."""
    return file_alert(
        "fail",
        failing_document,
        inbox="metals",
        path="2026/bwl-metals-fail.csv",
        version=1,
        evaluated_at=CREATED,
        verdict_path="/srv/out/bwl-metals-fail.verdict.json",
        report_path="/srv/out/bwl-metals-fail.report.txt",
        flagged_path="/srv/out/bwl-metals-fail.flagged.csv",
    )


# --------------------------------------------------------------------------- header_text


@pytest.mark.parametrize(
    "bad",
    ["\r", "\n", "\r\n", "\x00", "\t", "\u2028", "\u2029", "\x1b", "\x7f", "\x85", "\x0b", "\x0c"],
    ids=["CR", "LF", "CRLF", "NUL", "TAB", "LS", "PS", "ESC", "DEL", "NEL", "VT", "FF"],
)
def test_header_text_drops_control_characters(bad: str) -> None:
    """A control or line-separator character never survives header_text."""
    cleaned = header_text(f"run{bad}Bcc: a@example.org")
    assert bad not in cleaned
    assert cleaned == "run Bcc: a@example.org"


def test_header_text_drops_invisible_format_characters() -> None:
    """Format characters (a right-to-left override, a zero-width space) are removed."""
    assert header_text("run\u202e-1204\u200b") == "run-1204"


def test_header_text_collapses_whitespace() -> None:
    """Runs of whitespace become one space and the ends are trimmed."""
    assert header_text("  ICP-2 \t\r\n   run-1204  ") == "ICP-2 run-1204"


def test_header_text_caps_length_with_an_ellipsis() -> None:
    """Text over the limit is cut to exactly the limit, ending in an ellipsis."""
    cleaned = header_text("x" * 500)
    assert len(cleaned) == HEADER_PIECE_LIMIT
    assert cleaned.endswith("…")
    assert header_text("abcdefghij", limit=5) == "abcd…"


def test_header_text_of_none_is_empty() -> None:
    """A missing value gives an empty string, not 'None'."""
    assert header_text(None) == ""


_HEADER_CHARACTERS = st.one_of(
    st.characters(),
    st.sampled_from("\r\n\t\x00\x0b\x0c\x1b\x7f\x85\u2028\u2029\u202e\u200b "),
)


@settings(derandomize=True, max_examples=200, deadline=None, database=None)
@given(text=st.text(alphabet=_HEADER_CHARACTERS, max_size=300), limit=st.integers(1, 250))
def test_header_text_property_no_control_characters_and_capped(text: str, limit: int) -> None:
    """For any text, the output has no Cc, Zl or Zp character and is at most the limit long."""
    cleaned = header_text(text, limit)
    assert len(cleaned) <= limit
    assert not [c for c in cleaned if unicodedata.category(c) in ("Cc", "Zl", "Zp")]


# --------------------------------------------------------------------------- subject


def test_fail_subject_format() -> None:
    """A fail subject reads '[calwarden] FAIL <instrument> <run>: <root cause> (N failures)'."""
    assert subject(_fail_alert()) == (
        "[calwarden] FAIL ICP-2 run-1204: CCV-2 Zn recovered 82.6 %, limit 90-110 % (3 failures)"
    )


def test_fail_subject_singular_failure() -> None:
    """One failure is 'failure', not 'failures'."""
    assert subject(_fail_alert(failures=1)).endswith(" (1 failure)")


def test_fail_subject_without_listed_findings_gives_the_count() -> None:
    """A fail summary listing no finding says only how many failures there are."""
    assert subject(_fail_alert(findings=[])) == "[calwarden] FAIL ICP-2 run-1204: 3 failures"


def test_fail_subject_does_not_repeat_an_instrument_named_in_the_run() -> None:
    """A run whose name contains the instrument's is not preceded by the instrument again."""
    alert = _fail_alert(run="ICP-2-20261124-A", failures=5, findings=[])
    assert subject(alert) == "[calwarden] FAIL ICP-2-20261124-A: 5 failures"


def test_fail_subject_of_the_failing_fixture(failing_alert: dict[str, Any]) -> None:
    """The failing fixture's subject names its run once, the failed CCV, and 5 failures."""
    assert subject(failing_alert) == (
        "[calwarden] FAIL BWL-ICPMS-2-20261124-A: CCV-2 Zn recovered 82.6 %, limit 90–110 % "
        "(5 failures)"
    )


def test_error_subject_names_inbox_and_path() -> None:
    """An error subject names the inbox and the file's path and says it was not judged."""
    alert = {"kind": "error", "inbox": "metals", "path": "2026/broken.csv", "error": "no nominal"}
    assert subject(alert) == "[calwarden] ERROR metals/2026/broken.csv: not judged"


def test_control_subject_names_the_rules() -> None:
    """A control subject lists the control-chart rules that fired, sorted, without prefix."""
    findings = [
        {"rule": "control.2-2s", "severity": "warn", "message": "two over 2 SD"},
        {"rule": "control.1-3s", "severity": "warn", "message": "one over 3 SD"},
        {"rule": "range.under", "severity": "warn", "message": "estimated value"},
    ]
    alert = _fail_alert(kind="control", failures=0, findings=findings)
    assert subject(alert) == "[calwarden] CONTROL ICP-2 run-1204: control chart 1-3s, 2-2s"


def test_digest_subject_counts_alerts_by_kind() -> None:
    """A digest subject counts the held-back alerts, in total and by kind."""
    gathered = [
        _fail_alert(run="run-1"),
        _fail_alert(run="run-2"),
        {"kind": "error", "inbox": "metals", "path": "bad.csv", "error": "unreadable"},
    ]
    alert = digest_alert(gathered, CREATED)
    assert subject(alert) == "[calwarden] DIGEST 3 alerts held back (1 ERROR, 2 FAIL)"


def test_daemon_subject_carries_the_message() -> None:
    """A daemon alert's subject is its message, sanitised."""
    alert = daemon_alert("inbox_unreachable", "inbox metals\nis unreachable", CREATED)
    assert subject(alert) == "[calwarden] DAEMON inbox metals is unreachable"


def test_subject_is_capped() -> None:
    """A subject built from very long names stays within the subject limit."""
    alert = _fail_alert(run="r" * 1000, instrument="i" * 1000)
    assert len(subject(alert)) <= SUBJECT_LIMIT


def test_hostile_names_give_a_one_line_subject() -> None:
    """Run and instrument names carrying CR/LF and a Bcc header give a one-line subject."""
    text = subject(_fail_alert(run=HOSTILE, instrument=HOSTILE))
    assert "\r" not in text and "\n" not in text
    assert text.startswith("[calwarden] FAIL ")


def test_hostile_names_inject_no_bcc_header() -> None:
    """The message built from hostile names, serialised and parsed back, has no Bcc header."""
    alert = _fail_alert(run=HOSTILE, instrument=HOSTILE, path=HOSTILE, inbox=HOSTILE)
    message = _compose(alert)
    headers = message.as_bytes().split(b"\r\n\r\n", 1)[0]
    parsed = _parsed(message)
    assert parsed["Bcc"] is None
    assert not re.search(rb"(?im)^bcc:", headers)
    assert str(parsed["Subject"]) == subject(alert)


def test_hostile_error_path_injects_no_bcc_header() -> None:
    """An error alert about a file whose path carries CR/LF has no Bcc header either."""
    alert = {"kind": "error", "inbox": HOSTILE, "path": HOSTILE, "error": HOSTILE}
    parsed = _parsed(_compose(alert))
    assert parsed["Bcc"] is None
    assert "\n" not in str(parsed["Subject"])


@pytest.mark.parametrize("length", range(0, 64, 3))
def test_a_run_name_with_cr_lf_gives_one_clean_subject_line(length: int) -> None:
    """A run named ``…\\r\\n…`` of any length: the raw Subject header is one line, never empty."""
    alert = _fail_alert(run="R" * length + "\r\n" + "S" * 14, instrument="ICP-2")
    raw = _compose(alert).as_bytes().split(b"\r\n\r\n", 1)[0]
    line = next(line for line in raw.split(b"\r\n") if line.startswith(b"Subject:"))
    assert line == b"Subject: " + subject(alert).encode("ascii")


def test_a_run_name_of_only_control_characters_falls_back_to_the_path() -> None:
    """A run named CR LF is no name: the subject names the file instead of an empty place."""
    assert subject(_fail_alert(run="\r\n", instrument="")).startswith(
        "[calwarden] FAIL 2026/run-1204.csv: "
    )


def test_text_body_escapes_terminal_control_characters() -> None:
    """A run and a path carrying ESC sequences and CR appear escaped in the text body."""
    alert = _fail_alert(run="R\x1b[2J-1", path="a\rb.csv")
    body = text_body(alert)
    assert "\x1b" not in body and "\r" not in body
    assert "R\\x1b[2J-1" in body and "a\\rb.csv" in body


# --------------------------------------------------------------------------- the message


def test_message_has_plain_text_and_html_alternatives() -> None:
    """The message is multipart/alternative with a text/plain and a text/html part."""
    parsed = _parsed(_compose(_fail_alert()))
    assert parsed.get_content_type() == "multipart/alternative"
    kinds = [part.get_content_type() for part in parsed.iter_parts()]
    assert kinds == ["text/plain", "text/html"]


def test_message_headers() -> None:
    """From, To, the alert kind and Auto-Submitted are set as given."""
    parsed = _parsed(_compose(_fail_alert()))
    assert parsed["From"] == SENDER
    assert parsed["To"] == TO[0]
    assert parsed["X-Calwarden-Alert"] == "fail"
    assert parsed["Auto-Submitted"] == "auto-generated"


def test_html_escapes_file_text() -> None:
    """A sample id carrying a script tag appears escaped in the HTML part, never raw."""
    finding = {
        "rule": "range.over",
        "severity": "fail",
        "sample_id": SCRIPT,
        "message": f"{SCRIPT} Cu over range",
    }
    rerun = {"sample_id": SCRIPT, "seq": 3, "analytes": ["Cu"], "suggested_dilution": 5.0}
    alert = _fail_alert(run=SCRIPT, findings=[finding], reruns=[rerun])
    html_text = _part(_parsed(_compose(alert)), "text/html").get_content()
    assert "<script>" not in html_text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html_text


def test_verdict_is_attached_as_json() -> None:
    """The verdict bytes are attached, unchanged, as application/json named as on disk."""
    verdict = json.dumps({"status": "fail", "run": "run-1204"}).encode()
    parsed = _parsed(_compose(_fail_alert(), verdict=verdict))
    assert parsed.get_content_type() == "multipart/mixed"
    attachment = _part(parsed, "application/json")
    assert attachment.get_filename() == "run-1204.verdict.json"
    assert attachment.get_content() == verdict


def test_verdict_attachment_filename_is_safe() -> None:
    """A hostile path gives an attachment filename of plain characters only."""
    alert = _fail_alert(path='../"evil\r\nname;<x>.csv', verdict='/o/"ev\r\nil;<x>.verdict.json')
    attachment = _part(_parsed(_compose(alert, verdict=b"{}")), "application/json")
    filename = attachment.get_filename()
    assert filename is not None
    assert re.fullmatch(r"[A-Za-z0-9._-]+", filename)
    assert filename.endswith(".verdict.json")


def test_no_verdict_no_attachment() -> None:
    """Without verdict bytes there is no attachment."""
    parsed = _parsed(_compose(_fail_alert()))
    assert not [p for p in parsed.walk() if p.get_content_type() == "application/json"]


def test_inline_charts_are_related_pngs_referenced_by_cid() -> None:
    """Each chart is an image/png part related to the HTML, which shows it by its Content-ID."""
    png = _tiny_png()
    parsed = _parsed(_compose(_fail_alert(), charts=[("Zn CCV", png), ("Cu CCV", png)]))
    related = _part(parsed, "multipart/related")
    html_text = _part(parsed, "text/html").get_content()
    images = [p for p in related.iter_parts() if p.get_content_type() == "image/png"]
    assert len(images) == 2
    for image in images:
        content_id = str(image["Content-ID"]).strip("<>")
        assert f'src="cid:{content_id}"' in html_text
        assert image.get_content() == png
    assert len({str(image["Content-ID"]) for image in images}) == 2


def test_message_id_is_deterministic_for_one_dedupe_key() -> None:
    """The same dedupe key gives the same Message-ID on the sender's domain."""
    first = _compose(_fail_alert())["Message-ID"]
    again = _compose(_fail_alert())["Message-ID"]
    assert first == again
    assert re.fullmatch(r"<calwarden\.[0-9a-f]{32}@brindlewick\.example>", str(first))


def test_message_id_differs_between_dedupe_keys() -> None:
    """Different dedupe keys give different Message-IDs."""
    first = _compose(_fail_alert(), dedupe_key="fail:metals:a.csv:v1:aa")["Message-ID"]
    other = _compose(_fail_alert(), dedupe_key="fail:metals:a.csv:v2:bb")["Message-ID"]
    assert first != other


def test_date_comes_from_created_at() -> None:
    """The Date header is the alert's creation time, not the clock's."""
    parsed = _parsed(_compose(_fail_alert()))
    assert parsedate_to_datetime(str(parsed["Date"])) == datetime.fromisoformat(CREATED)


def test_recomposing_gives_identical_bytes() -> None:
    """Composing the same alert twice gives the same bytes once MIME boundaries are set aside."""
    png = _tiny_png()

    def raw() -> bytes:
        message = _compose(_fail_alert(), verdict=b'{"status": "fail"}', charts=[("Zn", png)])
        return _without_boundaries(message.as_bytes())

    assert raw() == raw()


# --------------------------------------------------------------------------- the text body


def test_text_body_names_each_failure(
    failing_alert: dict[str, Any], failing_document: dict[str, Any]
) -> None:
    """The text body of the failing fixture names each failure's message."""
    body = text_body(failing_alert)
    failures = [f for f in failing_document["findings"] if f["severity"] == "fail"]
    assert len(failures) == 5
    for finding in failures:
        assert finding["message"] in body


def test_text_body_lists_the_reruns(
    failing_alert: dict[str, Any], failing_document: dict[str, Any]
) -> None:
    """The text body lists every sample to re-run under a counted heading."""
    body = text_body(failing_alert)
    reruns = failing_document["reruns"]
    assert f"Samples to re-run ({len(reruns)})" in body
    for rerun in reruns:
        assert f"  - {rerun['sample_id']} (seq {rerun['seq']}):" in body


def test_text_body_gives_the_suggested_dilution(failing_alert: dict[str, Any]) -> None:
    """An over-range sample's re-run line carries its suggested total dilution."""
    line = next(
        line for line in text_body(failing_alert).splitlines() if line.startswith("  - BW-1124-18")
    )
    assert "Cu: over the calibrated range; dilute to 5× in total" in line


def test_text_body_carries_the_caution(failing_alert: dict[str, Any]) -> None:
    """The text body ends with the screening caution sentence."""
    assert text_body(failing_alert).rstrip("\n").endswith(CAUTION)


def test_text_body_says_where_the_outputs_are(failing_alert: dict[str, Any]) -> None:
    """The text body names the file, its version and the verdict, report and flagged copy."""
    body = text_body(failing_alert)
    assert "file:    metals/2026/bwl-metals-fail.csv (version 1)" in body
    assert "verdict: /srv/out/bwl-metals-fail.verdict.json" in body
    assert "report:  /srv/out/bwl-metals-fail.report.txt" in body
    assert "flagged: /srv/out/bwl-metals-fail.flagged.csv" in body


def test_text_body_counts_findings_left_out() -> None:
    """Findings beyond the listed limit are counted, pointing at the verdict."""
    assert "… and 7 more (see the verdict)" in text_body(_fail_alert(more_findings=7))


def test_what_failed_lists_only_failures(
    failing_alert: dict[str, Any], failing_document: dict[str, Any]
) -> None:
    """In a FAIL alert the 'What failed' section lists the failures and no warning."""
    lines = text_body(failing_alert).splitlines()
    start = lines.index("What failed") + 1
    listed = []
    for line in lines[start:]:
        if not line.startswith("  - "):
            break
        listed.append(line)
    failures = [f for f in failing_document["findings"] if f["severity"] == "fail"]
    assert len(listed) == len(failures)


def test_error_body_gives_the_reason() -> None:
    """An error alert's text says nothing was screened and gives the reason."""
    alert = {"kind": "error", "inbox": "metals", "path": "bad.csv", "error": "no nominal column"}
    body = text_body(alert)
    assert "could not be judged" in body
    assert "  - no nominal column" in body


# --------------------------------------------------------------------------- webhook


def test_webhook_payload_is_json_serialisable() -> None:
    """The webhook payload survives a JSON round trip unchanged."""
    payload = webhook_payload(_fail_alert(), dedupe_key="fail:k", created_at=CREATED)
    assert json.loads(json.dumps(payload)) == payload


def test_webhook_text_is_the_subject() -> None:
    """The webhook payload's text is the e-mail subject."""
    alert = _fail_alert(run=HOSTILE)
    payload = webhook_payload(alert, dedupe_key="fail:k", created_at=CREATED)
    assert payload["text"] == subject(alert)


def test_webhook_payload_carries_id_and_time() -> None:
    """The webhook payload carries the dedupe key as id and the creation time."""
    payload = webhook_payload(_fail_alert(), dedupe_key="fail:k", created_at=CREATED)
    assert payload["id"] == "fail:k"
    assert payload["created_at"] == CREATED
    assert payload["body"] == text_body(_fail_alert())


def test_a_verdict_too_large_to_attach_is_named_instead() -> None:
    """A verdict over the attachment limit is left out and the text says where it is."""
    from calwarden.daemon.alerts.content import ATTACHMENT_LIMIT_BYTES

    message = email_message(
        _fail_alert(),
        dedupe_key="fail:icpms:run.csv:v1:abc",
        created_at="2026-12-01T08:00:00.000+00:00",
        sender="calwarden@brindlewick.example",
        recipients=["analyst@brindlewick.example"],
        verdict=b"{" + b" " * ATTACHMENT_LIMIT_BYTES + b"}",
    )
    assert not list(message.iter_attachments())
    assert "too large to attach" in message.get_body(("plain",)).get_content()  # type: ignore[union-attr]


def test_message_to_nobody_has_the_empty_group_as_to() -> None:
    """With no recipients (an .eml kept for later) To: is the RFC 5322 empty group."""
    parsed = _parsed(_compose(_fail_alert(), recipients=()))
    assert parsed["To"] == "undisclosed-recipients:;"
