"""The overview page, ``<out>/index.html``: the whole lab at a glance, from the ledger.

Per inbox and instrument the last file and how long ago (silent past
``watch.silent_after_hours``: a warning), the runs of the last
``watch.overview_days`` with their status, the failing runs not yet reviewed,
the alert outbox's problems, and links to every report and control chart.
The links are relative, so the page works from a file share with no server;
like the HTML report it is one file with no script and fetches nothing. The
daemon writes it atomically after each file (once nothing is due) and every
``watch.overview_seconds``.

:func:`gather` reads the stores; :func:`render_overview` is plain data to text.
"""

from __future__ import annotations

import html
import os
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path, PurePosixPath
from urllib.parse import quote

from calwarden.daemon.outputs.html_report import SYMBOLS
from calwarden.daemon.outputs.printable import printable
from calwarden.daemon.outputs.verdict_json import CAUTION
from calwarden.daemon.stores.control import ControlHistory
from calwarden.daemon.stores.files import FileStore
from calwarden.daemon.stores.outbox import Outbox, OutboxCounts
from calwarden.daemon.stores.records import Evaluation, timestamp

OVERVIEW_NAME = "index.html"
_RUNS_LISTED = 500  # at most, however many days are asked for


@dataclass(frozen=True, slots=True)
class InboxPlace:
    """Where an inbox's outputs are, for the links."""

    name: str
    instrument: str | None
    out_dir: Path


@dataclass(frozen=True, slots=True)
class SourceState:
    """One inbox and instrument: its last file and whether it has gone quiet."""

    inbox: str
    instrument: str | None
    last: Evaluation | None
    seconds_ago: float | None
    silent: bool


@dataclass(frozen=True, slots=True)
class Overview:
    """Everything the page shows, read from the stores at one moment."""

    generated_at: datetime
    days: int
    silent_after_hours: float | None
    sources: tuple[SourceState, ...]
    runs: tuple[Evaluation, ...]
    unreviewed: tuple[Evaluation, ...]
    outbox: OutboxCounts | None
    problems: tuple[tuple[str, str, str, str, int], ...]
    reports: dict[int, str]  # evaluation id -> link to its HTML report
    charts: tuple[tuple[str, str], ...]  # (series title, link)


def _when(text: str) -> datetime | None:
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        return None
    return moment if moment.tzinfo else moment.replace(tzinfo=UTC)


def _link(out: Path, target: Path) -> str:
    """A relative, URL-quoted link from ``<out>/index.html`` to ``target``."""
    relative = PurePosixPath(Path(os.path.relpath(target, out)).as_posix())
    return quote(str(relative), safe="/@~-._")


def gather(
    files: FileStore,
    outbox: Outbox | None,
    control: ControlHistory | None,
    inboxes: Sequence[InboxPlace],
    out: Path,
    *,
    days: int,
    silent_after_hours: float | None,
    now: datetime,
) -> Overview:
    """Read what the page shows from the stores."""
    from calwarden.daemon.outputs.pictures import CHARTS_FOLDER, chart_path

    places = {place.name: place for place in inboxes}
    last = files.last_by_source()
    sources: list[SourceState] = []
    for evaluation in last:
        moment = _when(evaluation.evaluated_at)
        ago = None if moment is None else (now - moment).total_seconds()
        silent = (
            silent_after_hours is not None and ago is not None and ago > silent_after_hours * 3600
        )
        sources.append(
            SourceState(evaluation.inbox, evaluation.instrument, evaluation, ago, silent)
        )
    heard = {evaluation.inbox for evaluation in last}
    for place in inboxes:
        if place.name not in heard:
            sources.append(SourceState(place.name, place.instrument, None, None, False))
    runs = files.since(timestamp(now - timedelta(days=days)), limit=_RUNS_LISTED)
    current: set[tuple[str, str]] = set()
    unreviewed = []
    for evaluation in runs:  # newest first: the first of a path is its current version
        if evaluation.outcome == "duplicate" or (evaluation.inbox, evaluation.path) in current:
            continue
        current.add((evaluation.inbox, evaluation.path))
        if evaluation.outcome in ("fail", "error"):
            unreviewed.append(evaluation)  # no review store yet: every failure is unreviewed
    reports = {}
    for evaluation in runs:
        found = places.get(evaluation.inbox)
        if found is not None and evaluation.output_stem:
            report = found.out_dir / f"{evaluation.output_stem}.report.html"
            reports[evaluation.id] = _link(out, report)
    counts = problems = None
    if outbox is not None:
        counts = outbox.outbox_counts()
        problems = outbox.problems(limit=20)
    charts = []
    if control is not None:
        for key in control.series_keys():
            path = chart_path(out / CHARTS_FOLDER, key)
            if path.exists():
                level = f" {key.level}" if key.level else ""
                charts.append(
                    (f"{key.instrument} · {key.analyte} · {key.kind}{level}", _link(out, path))
                )
    return Overview(
        generated_at=now,
        days=days,
        silent_after_hours=silent_after_hours,
        sources=tuple(sources),
        runs=tuple(runs),
        unreviewed=tuple(unreviewed),
        outbox=counts,
        problems=tuple(problems or ()),
        reports=reports,
        charts=tuple(charts),
    )


def _e(value: object) -> str:
    return html.escape(printable(str(value)), quote=True)


def _short(text: str) -> str:
    """``2026-12-03T10:33:28.429+00:00`` as ``2026-12-03 10:33 UTC`` (stored times are UTC)."""
    moment = _when(text)
    return text if moment is None else moment.astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")


def _ago(seconds: float | None) -> str:
    if seconds is None:
        return "–"
    if seconds < 90:
        return "just now"
    minutes = seconds / 60
    if minutes < 90:
        return f"{minutes:.0f} min ago"
    hours = minutes / 60
    if hours < 48:
        return f"{hours:.0f} h ago"
    return f"{hours / 24:.0f} days ago"


def _status(outcome: str) -> str:
    symbol = SYMBOLS.get(outcome, "=" if outcome == "duplicate" else "")
    return f'<span class="word w-{_e(outcome)}">{symbol} {_e(outcome.upper())}</span>'


def _run_name(evaluation: Evaluation, overview: Overview) -> str:
    name = _e(f"{evaluation.inbox}/{evaluation.path}")
    link = overview.reports.get(evaluation.id)
    return f'<a href="{_e(link)}">{name}</a>' if link else name


def _table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    head = "".join(f"<th>{cell}</th>" for cell in header)
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in row) + "</tr>" for row in rows)
    return (
        f'<div class="scroll"><table><thead><tr>{head}</tr></thead>'
        f"<tbody>{body}</tbody></table></div>"
    )


_STYLE = """
:root{--ink:#1d2430;--muted:#5b6473;--line:#d5d9e0;--band:#f3f5f8;--pass:#1c6b4f;
--fail:#9d2235;--error:#5a2d82;--warn:#7a5200;--duplicate:#5b6473}
*{box-sizing:border-box}body{margin:0 auto;max-width:72rem;padding:0.75rem;
font:15px/1.45 system-ui,sans-serif;color:var(--ink)}
h1{font-size:1.2rem;margin:0}h2{font-size:1.05rem;margin:1.3rem 0 0.4rem;
border-bottom:2px solid var(--line);padding-bottom:0.2rem}
.meta{color:var(--muted);font-size:0.9rem}
.word{display:inline-block;font-weight:700;padding:0 0.35rem;border:1.5px solid currentColor;
border-radius:0.25rem;white-space:nowrap}
.w-pass{color:var(--pass)}.w-fail{color:var(--fail)}.w-error{color:var(--error)}
.w-warn{color:var(--warn)}.w-duplicate{color:var(--duplicate)}
.scroll{overflow-x:auto}table{border-collapse:collapse;width:100%;font-size:0.88rem}
th,td{text-align:left;padding:0.25rem 0.45rem;border-bottom:1px solid var(--line);
vertical-align:top}th{background:var(--band)}td{overflow-wrap:anywhere}
.alarm{border-left:0.5rem solid var(--warn);background:var(--band);padding:0.4rem 0.7rem;
margin:0.4rem 0}
ul{padding-left:1.2rem}.caution{margin-top:1.5rem;color:var(--muted);font-size:0.85rem}
@media (max-width:40rem){body{font-size:14px;padding:0.5rem}}
@media print{body{max-width:none;font-size:10pt}th,.alarm{background:none}
.scroll{overflow:visible}tr{break-inside:avoid}a{color:inherit;text-decoration:none}}
"""
_POLICY = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"


def render_overview(overview: Overview, refresh_seconds: float = 300) -> str:
    """The page as HTML text (every name from a file or a store escaped)."""
    written = overview.generated_at.astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")
    parts = [
        f'<header><h1>calwarden overview</h1><p class="meta">written {_e(written)}; '
        f"written again after each file and every {refresh_seconds / 60:.0f} min</p></header>"
    ]
    silent = [s for s in overview.sources if s.silent]
    for source in silent:
        parts.append(
            f'<p class="alarm"><span class="word w-warn">▲ SILENT</span> '
            f"{_e(source.instrument or source.inbox)} (inbox {_e(source.inbox)}): no file for "
            f"{_e(_ago(source.seconds_ago).removesuffix(' ago'))}, more than "
            f"{overview.silent_after_hours:g} h</p>"
        )
    rows = []
    for source in overview.sources:
        if source.last is None:
            rows.append((_e(source.inbox), _e(source.instrument or "–"), "no file yet", "–", ""))
            continue
        state = '<span class="word w-warn">▲ SILENT</span>' if source.silent else "✓ reporting"
        rows.append(
            (
                _e(source.inbox),
                _e(source.instrument or "–"),
                f"{_run_name(source.last, overview)} {_status(source.last.outcome)}",
                _e(_ago(source.seconds_ago))
                + f'<div class="meta">{_e(_short(source.last.evaluated_at))}</div>',
                state,
            )
        )
    parts.append('<section id="instruments"><h2>Instruments</h2>')
    parts.append(_table(("inbox", "instrument", "last file", "when", "state"), rows))
    parts.append("</section>")

    parts.append(
        f'<section id="unreviewed"><h2>Failures not yet reviewed ({len(overview.unreviewed)})</h2>'
    )
    if not overview.unreviewed:
        parts.append("<p>none</p>")
    else:
        parts.append("<ul>")
        for evaluation in overview.unreviewed:
            reason = f": {_e(evaluation.message)}" if evaluation.message else ""
            parts.append(
                f"<li>{_status(evaluation.outcome)} {_run_name(evaluation, overview)}"
                f'{reason} <span class="meta">({_e(_short(evaluation.evaluated_at))}; '
                "review: none recorded)</span></li>"
            )
        parts.append("</ul>")
    parts.append("</section>")

    parts.append('<section id="alerts"><h2>Alert outbox</h2>')
    counts = overview.outbox
    if counts is None:
        parts.append("<p>alerts are off</p>")
    else:
        dead = (
            f'<span class="word w-fail">✗ {counts.dead} dead letter(s)</span>'
            if counts.dead
            else "dead letters 0"
        )
        parts.append(
            f"<p>sent {counts.sent}, waiting {counts.waiting}, held for a digest "
            f"{counts.new + counts.gathered}, {dead}</p>"
        )
        if overview.problems:
            parts.append("<ul>")
            for state, name, channel, error, attempts in overview.problems:
                label = "✗ refused" if state == "dead" else f"▲ retrying ({attempts} attempt(s))"
                parts.append(f"<li>{_e(label)} by {_e(channel)}: {_e(name)}: {_e(error)}</li>")
            parts.append("</ul>")
    parts.append("</section>")

    run_rows: list[tuple[str, ...]] = [
        (
            _e(_short(evaluation.evaluated_at)),
            _status(evaluation.outcome),
            _run_name(evaluation, overview),
            _e(evaluation.run or "–"),
            _e(evaluation.instrument or "–"),
            _e(evaluation.message or ""),
        )
        for evaluation in overview.runs
    ]
    parts.append(
        f'<section id="runs"><h2>Runs of the last {overview.days} days ({len(run_rows)})</h2>'
    )
    parts.append(
        _table(
            ("judged", "status", "file (report)", "run", "instrument", "first failure"), run_rows
        )
        if run_rows
        else "<p>none</p>"
    )
    parts.append("</section>")

    parts.append(f'<section id="charts"><h2>Control charts ({len(overview.charts)})</h2>')
    if overview.charts:
        parts.append("<ul>")
        parts += [
            f'<li><a href="{_e(link)}">{_e(title)}</a></li>' for title, link in overview.charts
        ]
        parts.append("</ul>")
    else:
        parts.append("<p>none drawn yet</p>")
    parts.append("</section>")
    parts.append(f'<footer class="caution">{_e(CAUTION)}</footer>')
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f'<meta http-equiv="Content-Security-Policy" content="{_POLICY}">'
        f'<meta http-equiv="refresh" content="{max(60, round(refresh_seconds))}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>calwarden overview</title><style>{_STYLE}</style></head>\n<body>\n"
        + "\n".join(parts)
        + "\n</body></html>\n"
    )


def write_overview(out: Path, overview: Overview, refresh_seconds: float = 300) -> Path:
    """Write ``<out>/index.html`` atomically."""
    from calwarden.daemon.outputs.files import atomic_write

    out.mkdir(parents=True, exist_ok=True)
    path = out / OVERVIEW_NAME
    atomic_write(path, render_overview(overview, refresh_seconds).encode("utf-8"))
    return path
