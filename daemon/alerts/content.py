"""What an alert says: its summary (stored in the outbox), its e-mail, its webhook JSON.

An alert is stored as a small JSON *summary* made when the file is judged, in
the same transaction as the evaluation. The e-mail is composed from it when it
is sent, so that a message can always be composed again, identically, after a
crash: the Message-ID and the Date come from the stored alert, not the clock.

Everything here that came from a file (sample ids, run and instrument names,
paths) is untrusted. It goes into a header only through :func:`header_text`,
which drops control characters (CR and LF included) and caps the length, and
into the HTML part only escaped.
"""

from __future__ import annotations

import hashlib
import html
import json
import re
import unicodedata
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from email.message import EmailMessage
from email.policy import SMTP, EmailPolicy
from email.utils import format_datetime
from typing import Any

from calwarden.daemon.control_log.log import series_name
from calwarden.daemon.outputs.printable import printable_strings
from calwarden.daemon.outputs.verdict_json import CAUTION
from calwarden.daemon.outputs.verdict_model import FindingEntry, VerdictDocument
from calwarden.daemon.stores.records import SeriesKey

#: How much of one piece of file text may go into a header.
HEADER_PIECE_LIMIT = 80
#: The whole subject's cap (RFC 5322 recommends lines under 78 characters; a subject
#: is folded, but a very long one helps nobody).
SUBJECT_LIMIT = 200
#: Findings and re-runs listed in one message; the verdict attached has them all.
LISTED_LIMIT = 40
#: A verdict larger than this is not attached (mail servers commonly refuse messages
#: over 10–25 MB, and base64 adds a third); the message says where it is instead.
ATTACHMENT_LIMIT_BYTES = 4_000_000

_WORDS = {
    "fail": "FAIL",
    "error": "ERROR",
    "control": "CONTROL",
    "daemon": "DAEMON",
    "digest": "DIGEST",
    "summary": "DAILY",
    "test": "TEST",
}


def header_text(value: object, limit: int = HEADER_PIECE_LIMIT) -> str:
    """File text made safe for a header: no control characters, one line, capped."""
    text = "" if value is None else str(value)
    # Cc covers CR, LF, TAB and NUL; Zl and Zp are the Unicode line and paragraph
    # separators, which some mail readers also break lines at.
    cleaned = "".join(
        " " if unicodedata.category(c) in ("Cc", "Zl", "Zp") else c
        for c in text
        if unicodedata.category(c) != "Cf"
    )
    cleaned = re.sub(r"\s+", " ", cleaned).strip()
    if len(cleaned) > limit:
        cleaned = cleaned[: limit - 1].rstrip() + "…"
    return cleaned


class _UnfoldedSubject(EmailPolicy):
    """SMTP's policy, except that an ASCII subject is written on one line, never folded.

    Python's folder breaks a subject of about 70 to 78 characters right after
    ``Subject:``, leaving its first line empty, which some mail programs show as a
    blank subject. A subject is at most ``SUBJECT_LIMIT`` characters, well inside
    the 998 a line may hold (RFC 5322 §2.1.1); a non-ASCII one is folded as usual,
    into encoded words of at most 75 characters (RFC 2047 §2).
    """

    def fold(self, name: str, value: str) -> str:
        if name.lower() == "subject" and value.isascii():
            wide: EmailPolicy = self.clone(max_line_length=998)
            return str(EmailPolicy.fold(wide, name, value))
        return str(super().fold(name, value))

    def fold_binary(self, name: str, value: str) -> bytes:
        if name.lower() == "subject" and value.isascii():
            wider: EmailPolicy = self.clone(max_line_length=998)
            return bytes(EmailPolicy.fold_binary(wider, name, value))
        return super().fold_binary(name, value)


_MESSAGE_POLICY = _UnfoldedSubject() + SMTP


def _plural(count: int, word: str) -> str:
    return f"{count} {word}" if count == 1 else f"{count} {word}s"


# --------------------------------------------------------------------------- summaries


def _finding_summary(finding: FindingEntry) -> dict[str, Any]:
    return {
        "rule": finding.get("rule"),
        "severity": finding.get("severity"),
        "analyte": finding.get("analyte"),
        "sample_id": finding.get("sample_id"),
        "seq": finding.get("seq"),
        "value": finding.get("value"),
        "limit": finding.get("limit"),
        "message": finding.get("message"),
    }


def _fired_series(
    document: VerdictDocument, findings: Sequence[FindingEntry]
) -> list[dict[str, str]]:
    """The series a control rule fired on, in the order the findings name them."""
    messages = [
        str(f.get("message", "")) for f in findings if str(f.get("rule", "")).startswith("control.")
    ]
    named = []
    for entry in document.get("control_charts", []):
        key = {
            "instrument": entry.get("instrument") or "",
            "analyte": entry.get("analyte") or "",
            "kind": entry.get("kind") or "",
            "level": entry.get("level") or "",
        }
        name = series_name(SeriesKey(**key))
        # A series' name is followed by a sample label in the rules' messages.
        first = min((m.find(f"{name} ") for m in messages if f"{name} " in m), default=-1)
        if first >= 0:
            position = next(i for i, m in enumerate(messages) if f"{name} " in m)
            named.append(((position, first), key))
    return [key for _, key in sorted(named, key=lambda item: item[0])]


def file_alert(
    kind: str,
    document: VerdictDocument,
    *,
    inbox: str,
    path: str,
    version: int,
    evaluated_at: str,
    verdict_path: str,
    report_path: str,
    flagged_path: str | None,
) -> dict[str, Any]:
    """The stored summary of an alert about one judged file."""
    findings = [f for f in document.get("findings", []) if f.get("severity") in ("fail", "warn")]
    # Failures first, then the control-chart warnings that made this a control alert.
    findings.sort(key=lambda f: 0 if f.get("severity") == "fail" else 1)
    return {
        "kind": kind,
        "inbox": inbox,
        "path": path,
        "version": version,
        "run": document.get("run"),
        "instrument": document.get("instrument"),
        "status": document.get("status"),
        "error": document.get("error"),
        "failures": sum(1 for f in findings if f.get("severity") == "fail"),
        "warnings": sum(1 for f in findings if f.get("severity") == "warn"),
        "findings": [_finding_summary(f) for f in findings[:LISTED_LIMIT]],
        "more_findings": max(0, len(findings) - LISTED_LIMIT),
        "reruns": list(document.get("reruns", []))[:LISTED_LIMIT],
        "more_reruns": max(0, len(document.get("reruns", [])) - LISTED_LIMIT),
        "repeat": [repeat_line(r) for r in document.get("repeat", [])],
        "control_series": _fired_series(document, findings),
        "evaluated_at": evaluated_at,
        "verdict": verdict_path,
        "report": report_path,
        "flagged": flagged_path,
    }


def daemon_alert(event: str, message: str, when: str, **details: object) -> dict[str, Any]:
    """The stored summary of an alert about the daemon itself."""
    return {
        "kind": "daemon",
        "event": event,
        "message": message,
        "evaluated_at": when,
        "details": {k: str(v) for k, v in details.items()},
    }


def digest_alert(gathered: Sequence[Mapping[str, Any]], when: str) -> dict[str, Any]:
    """One message standing for alerts the throttle held back."""
    return {
        "kind": "digest",
        "evaluated_at": when,
        "alerts": [
            {
                k: alert.get(k)
                for k in (
                    "kind",
                    "inbox",
                    "path",
                    "run",
                    "instrument",
                    "failures",
                    "error",
                    "message",
                    "verdict",
                    "evaluated_at",
                )
            }
            | {"first": (alert.get("findings") or [{}])[0].get("message")}
            for alert in gathered
        ],
    }


# --------------------------------------------------------------------------- subject


def subject(alert: Mapping[str, Any]) -> str:
    """``[calwarden] FAIL ICP-2 run-1204: CCV-2 Cu recovered 83.0 %, … (3 failures)``: one line.

    File text is sanitised; a fail subject names the root cause, the first failure.
    """
    kind = str(alert.get("kind"))
    word = _WORDS.get(kind, kind.upper())
    # Cleaned first, so that a name of only control characters falls back to the path.
    run = header_text(alert.get("run")) or header_text(alert.get("path"))
    instrument = header_text(alert.get("instrument"))
    # A run named after its instrument (the usual case) is not worth the instrument twice.
    pieces = (run,) if instrument and instrument in run else (instrument, run)
    where = " ".join(piece for piece in pieces if piece)
    if kind == "fail":
        # The root cause leads (findings are listed cause first, failures first), the
        # count follows; a long message is cut, never the count.
        count = _plural(int(alert.get("failures") or 0), "failure")
        cause = next(
            (f.get("message") for f in alert.get("findings", []) if f.get("severity") == "fail"),
            None,
        )
        what = f"{where}: {header_text(cause)} ({count})" if cause else f"{where}: {count}"
    elif kind == "error":
        what = f"{header_text(alert.get('inbox'))}/{header_text(alert.get('path'))}: not judged"
    elif kind == "control":
        rules = sorted(
            {
                str(f.get("rule", "")).removeprefix("control.")
                for f in alert.get("findings", [])
                if str(f.get("rule", "")).startswith("control.")
            }
        )
        what = f"{where}: control chart {', '.join(rules)}"
    elif kind == "daemon":
        what = header_text(alert.get("message"))
    elif kind == "digest":
        alerts = alert.get("alerts", [])
        counts: dict[str, int] = {}
        for item in alerts:
            counts[str(item.get("kind"))] = counts.get(str(item.get("kind")), 0) + 1
        parts = ", ".join(f"{n} {_WORDS.get(k, k)}" for k, n in sorted(counts.items()))
        what = f"{_plural(len(alerts), 'alert')} held back ({parts})"
    elif kind == "summary":
        what = f"{alert.get('day')}: {_plural(int(alert.get('judged') or 0), 'file')} judged"
    else:
        what = header_text(alert.get("message") or "calwarden test message")
    return header_text(f"[calwarden] {word} {what}", SUBJECT_LIMIT)


# --------------------------------------------------------------------------- bodies


def _finding_line(finding: Mapping[str, Any]) -> str:
    return f"[{finding.get('rule')}] {finding.get('message')}"


#: Why a sample is re-run, in the words of the message (the findings above give details).
_WHY = {
    "over_range": "over the calibrated range",
    "calibration_failed": "its calibration failed",
    "no_calibration": "no usable calibration",
    "check_failed": "a bracketing check standard failed",
    "not_bracketed": "no check standard brackets it",
    "istd_out": "its internal standard is out of limits",
    "replicates_disagree": "its replicate injections disagree",
    "not_quantifiable": "no concentration gives its response",
    "blank_failed": "a calibration blank next to it failed",
    "blank_contaminated": "below the multiple of a contaminated method blank",
    "lcs_failed": "the LCS of its batch failed",
    "beyond_interval": "run after more samples than allowed since a check standard",
    "not_computable": "its result cannot be computed",
    "matrix_effect": "its serial dilution or post-digestion spike shows a matrix effect",
    "identity_unconfirmed": "its retention time or ion ratio does not confirm the analyte",
    "qc_failed": "its QC comparison failed (measure it again)",
    "low_check_failed": "a low-level check next to it failed",
    "carryover": "right after a result above the top standard (carry-over)",
}


def repeat_line(entry: Mapping[str, Any]) -> str:
    """``Repeat the calibration of Zn: <first reason>`` (or the run, of the whole run)."""
    what = "the calibration" if entry.get("what") == "calibration" else "the run"
    scope = f" of {entry['analyte']}" if entry.get("analyte") else ""
    reasons = list(entry.get("reasons") or [])
    why = f": {reasons[0]}" if reasons else ""
    more = f" (and {len(reasons) - 1} more)" if len(reasons) > 1 else ""
    return f"Repeat {what}{scope}{why}{more}"


def _rerun_line(rerun: Mapping[str, Any]) -> str:
    seq = f" (seq {rerun['seq']})" if rerun.get("seq") is not None else ""
    text = f"{rerun.get('sample_id')}{seq}: {', '.join(rerun.get('analytes', []))}"
    reasons = [_WHY.get(str(flag), str(flag)) for flag in rerun.get("flags") or []]
    if reasons:
        text += f": {'; '.join(reasons)}"
    if rerun.get("suggested_dilution"):
        text += f"; dilute to {rerun['suggested_dilution']:g}× in total"
    return text


@dataclass(frozen=True, slots=True)
class _Section:
    title: str
    lines: tuple[str, ...]


def _sections(alert: Mapping[str, Any]) -> tuple[str, list[_Section]]:
    """The message's opening sentence and its sections, as plain strings."""
    kind = alert.get("kind")
    where = f"{alert.get('inbox')}/{alert.get('path')}"
    run = alert.get("run") or "(no run name)"
    instrument = alert.get("instrument") or "(no instrument named)"
    sections: list[_Section] = []
    if kind in ("fail", "control"):
        if kind == "fail":
            opening = (
                f"Run {run} on {instrument} FAILED its acceptance criteria: "
                f"{_plural(int(alert.get('failures') or 0), 'failure')}, "
                f"{_plural(int(alert.get('warnings') or 0), 'warning')}."
            )
        else:
            opening = (
                f"Run {run} on {instrument} passed its own criteria, but a control-chart "
                "rule fired across runs: look at the trend before reporting."
            )
        listed = alert.get("findings", [])
        if kind == "fail":
            failed = [_finding_line(f) for f in listed if f.get("severity") == "fail"]
            warned = [_finding_line(f) for f in listed if f.get("severity") != "fail"]
        else:
            failed, warned = [_finding_line(f) for f in listed], []
        warnings = len(warned)
        if alert.get("more_findings"):
            (warned or failed).append(f"… and {alert['more_findings']} more (see the verdict)")
        title = "What failed" if kind == "fail" else "What fired"
        sections.append(_Section(title, tuple(failed)))
        if warned:
            sections.append(_Section(f"Warnings ({warnings})", tuple(warned)))
        reruns = [_rerun_line(r) for r in alert.get("reruns", [])]
        if alert.get("more_reruns"):
            reruns.append(f"… and {alert['more_reruns']} more (see the report)")
        if reruns:
            sections.append(_Section(f"Samples to re-run ({len(reruns)})", tuple(reruns)))
        repeat = [str(line) for line in alert.get("repeat") or []]
        if repeat:
            sections.append(_Section(f"To repeat ({len(repeat)})", tuple(repeat)))
    elif kind == "error":
        opening = (
            f"The file {where} could not be judged, so none of its results has been "
            "screened. Nothing in it may be reported until it is fixed and judged."
        )
        sections.append(_Section("Why", (str(alert.get("error") or "unknown"),)))
    elif kind == "daemon":
        opening = f"calwarden needs attention: {alert.get('message')}"
        details = [f"{k}: {v}" for k, v in (alert.get("details") or {}).items()]
        if details:
            sections.append(_Section("Details", tuple(details)))
    elif kind == "digest":
        items = alert.get("alerts", [])
        opening = (
            f"{_plural(len(items), 'alert')} arrived faster than the throttle allows; "
            "they are listed here instead of one message each."
        )
        lines = []
        for item in items:
            label = _WORDS.get(str(item.get("kind")), str(item.get("kind")))
            name = item.get("run") or f"{item.get('inbox')}/{item.get('path')}"
            reason = item.get("first") or item.get("error") or item.get("message") or ""
            lines.append(f"{label} {name}: {reason}".strip())
        sections.append(_Section("Alerts", tuple(lines)))
    elif kind == "summary":
        judged = _plural(int(alert.get("judged") or 0), "file")
        opening = (
            f"In the 24 hours to {alert.get('until')}: {judged} judged, "
            f"{alert.get('pass', 0)} passed, {alert.get('fail', 0)} failed, "
            f"{alert.get('error', 0)} could not be judged."
        )
        lines = [str(line) for line in alert.get("not_passed", [])]
        if lines:
            sections.append(_Section("Not passed", tuple(lines)))
    else:
        opening = str(alert.get("message") or "This is a test message from calwarden.")
    if kind in ("fail", "control", "error"):
        files = [f"file:    {where} (version {alert.get('version')})"]
        files.append(f"verdict: {alert.get('verdict')}")
        files.append(f"report:  {alert.get('report')}")
        if alert.get("flagged"):
            files.append(f"flagged: {alert.get('flagged')}")
        files.append(f"judged:  {alert.get('evaluated_at')}")
        if alert.get("verdict_not_attached"):
            size = int(alert["verdict_not_attached"]) / 1e6
            files.append(f"the verdict ({size:.1f} MB) is too large to attach: open it there")
        sections.append(_Section("Where", tuple(files)))
    return opening, sections


def text_body(alert: Mapping[str, Any]) -> str:
    """The plain-text part; file text in it has its control characters escaped."""
    opening, sections = _sections(printable_strings(dict(alert)))
    parts = [opening, ""]
    for section in sections:
        parts.append(section.title)
        parts.extend(f"  - {line}" for line in section.lines)
        parts.append("")
    parts.append(CAUTION)
    return "\n".join(parts) + "\n"


def html_body(alert: Mapping[str, Any], chart_ids: Sequence[tuple[str, str]] = ()) -> str:
    """The HTML alternative; ``chart_ids`` are (content id, caption) of inline charts."""
    opening, sections = _sections(alert)
    escape = html.escape
    parts = ["<html><body>", f"<p>{escape(opening)}</p>"]
    for section in sections:
        parts.append(f"<h3>{escape(section.title)}</h3><ul>")
        parts.extend(f"<li>{escape(line)}</li>" for line in section.lines)
        parts.append("</ul>")
    for content_id, caption in chart_ids:
        parts.append(
            f'<p>{escape(caption)}<br><img src="cid:{escape(content_id.strip("<>"))}" '
            f'alt="{escape(caption)}"></p>'
        )
    parts.append(f"<p><small>{escape(CAUTION)}</small></p></body></html>")
    return "\n".join(parts) + "\n"


# --------------------------------------------------------------------------- the message


def message_id(dedupe_key: str, sender: str) -> str:
    """The same alert always gets the same Message-ID, so a resend is recognisable."""
    digest = hashlib.sha256(dedupe_key.encode("utf-8")).hexdigest()[:32]
    domain = header_text(sender.rpartition("@")[2], 100) or "localhost"
    domain = re.sub(r"[^A-Za-z0-9.-]", "", domain) or "localhost"
    return f"<calwarden.{digest}@{domain}>"


def attachment_name(alert: Mapping[str, Any]) -> str:
    """The verdict attachment's name: the name of the verdict file on disk."""
    on_disk = str(alert.get("verdict") or "")
    name = re.split(r"[\\/]", on_disk)[-1] if on_disk else ""
    if not name.endswith(".verdict.json"):  # an alert stored before the path was kept
        stem = re.split(r"[\\/]", str(alert.get("path") or "verdict"))[-1].rpartition(".")
        name = f"{stem[0] or stem[2]}.verdict.json"
    safe = re.sub(r"[^A-Za-z0-9._@~-]", "_", header_text(name.removesuffix(".verdict.json"), 60))
    return f"{safe}.verdict.json"


def email_message(
    alert: Mapping[str, Any],
    *,
    dedupe_key: str,
    created_at: str,
    sender: str,
    recipients: Iterable[str],
    verdict: bytes | None = None,
    charts: Sequence[tuple[str, bytes]] = (),
) -> EmailMessage:
    """The RFC 5322 message of an alert: plain text, an HTML alternative, the verdict."""
    if verdict is not None and len(verdict) > ATTACHMENT_LIMIT_BYTES:
        alert = {**alert, "verdict_not_attached": len(verdict)}
        verdict = None
    message = EmailMessage(policy=_MESSAGE_POLICY)
    message["Subject"] = subject(alert)
    message["From"] = sender
    # With nobody configured (an .eml kept in the outbox folder) the empty group of
    # RFC 5322 §3.4 keeps the header that mail programs expect.
    message["To"] = ", ".join(recipients) or "undisclosed-recipients:;"
    message["Date"] = format_datetime(datetime.fromisoformat(created_at))
    message["Message-ID"] = message_id(dedupe_key, sender)
    message["X-Calwarden-Alert"] = header_text(alert.get("kind"))
    message["Auto-Submitted"] = "auto-generated"  # RFC 3834: no auto-replies to it
    message.set_content(text_body(alert))
    chart_ids = [
        (message_id(f"{dedupe_key}/chart/{index}", sender), caption)
        for index, (caption, _) in enumerate(charts)
    ]
    message.add_alternative(html_body(alert, chart_ids), subtype="html")
    if charts:
        html_part = message.get_payload()[1]  # type: ignore[index]
        assert isinstance(html_part, EmailMessage)
        for (content_id, caption), (_, png) in zip(chart_ids, charts, strict=True):
            html_part.add_related(
                png, maintype="image", subtype="png", cid=content_id, filename=f"{caption}.png"
            )
    if verdict is not None:
        message.add_attachment(
            verdict, maintype="application", subtype="json", filename=attachment_name(alert)
        )
    return message


def webhook_payload(
    alert: Mapping[str, Any], *, dedupe_key: str, created_at: str
) -> dict[str, Any]:
    """The JSON posted to a webhook: a one-line text for chat tools, and the details."""
    return {
        "text": subject(alert),
        "body": text_body(alert),
        "alert": dict(alert),
        "id": dedupe_key,
        "created_at": created_at,
    }


def payload_bytes(summary: Mapping[str, Any]) -> str:
    return json.dumps(summary, sort_keys=True, ensure_ascii=False)
