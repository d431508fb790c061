"""The HTML report of one run, ``<stem>.report.html``, rendered from the verdict JSON.

One self-contained file: the style is inline, pictures are embedded as ``data:``
URIs, and a Content-Security-Policy forbids the page to fetch anything, so it
opens the same from a file share, a mail attachment or a phone, with no
network and no script. Layout and colours are calwarden's own. A status is
always written in words and a symbol, never carried by colour alone. Every
piece of file text is HTML-escaped (after control characters are made visible
by ``printable``), so a sample id cannot inject markup.

The daemon writes the report with the other outputs (pictures named but not
yet drawn), then writes it again once the run's calibration pictures and the
control charts it added to are drawn (:func:`rewrite_with_pictures`).
"""

from __future__ import annotations

import base64
import html
import io
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from calwarden.daemon.outputs.printable import printable_strings
from calwarden.daemon.outputs.report import FLAG_WORDS, SEVERITY_ORDER, status_line
from calwarden.daemon.outputs.verdict_model import (
    ControlChartEntry,
    FindingEntry,
    VerdictDocument,
)
from calwarden.daemon.stores.records import SeriesKey

#: Symbol beside each status and severity word (colour is never the only carrier).
SYMBOLS = {"pass": "✓", "fail": "✗", "error": "⚠", "warn": "▲", "info": "ℹ"}
_THUMBNAIL = (560, 340)  # pixels at most of a control-chart thumbnail
_PICTURE = (720, 640)  # and of a calibration picture

_STYLE = """
:root{--ink:#1d2430;--muted:#5b6473;--line:#d5d9e0;--paper:#fff;--band:#f3f5f8;
--pass:#1c6b4f;--fail:#9d2235;--error:#5a2d82;--warn:#7a5200;--info:#2f5d8a}
*{box-sizing:border-box}
body{margin:0 auto;max-width:64rem;padding:0.75rem;font:15px/1.45 system-ui,sans-serif;
color:var(--ink);background:var(--paper)}
h1{font-size:1.15rem;margin:0}h2{font-size:1.05rem;margin:1.4rem 0 0.4rem;
border-bottom:2px solid var(--line);padding-bottom:0.2rem}
h3{font-size:0.95rem;margin:0.9rem 0 0.3rem}
.verdict{border-left:0.6rem solid var(--muted);background:var(--band);padding:0.6rem 0.8rem;
margin:0.5rem 0}
.verdict p{margin:0.2rem 0}.headline{font-size:1.1rem;font-weight:600}
.s-pass{border-color:var(--pass)}.s-fail{border-color:var(--fail)}.s-error{border-color:var(--error)}
.word{display:inline-block;font-weight:700;padding:0 0.35rem;border:1.5px solid currentColor;
border-radius:0.25rem;margin-right:0.3rem;white-space:nowrap}
.w-pass{color:var(--pass)}.w-fail{color:var(--fail)}.w-error{color:var(--error)}
.w-warn{color:var(--warn)}.w-info{color:var(--info)}
.meta{color:var(--muted);font-size:0.9rem;overflow-wrap:anywhere}
.scroll{overflow-x:auto;-webkit-overflow-scrolling:touch}
table{border-collapse:collapse;width:100%;font-size:0.88rem;margin:0.3rem 0}
th,td{text-align:left;padding:0.25rem 0.45rem;border-bottom:1px solid var(--line);
vertical-align:top}
th{background:var(--band)}td.n{text-align:right;font-variant-numeric:tabular-nums;
white-space:nowrap}
ul.findings{list-style:none;padding:0;margin:0}ul.findings li{padding:0.2rem 0;
border-bottom:1px dotted var(--line)}
.rule{color:var(--muted);font-size:0.8rem;white-space:nowrap}
figure{margin:0.4rem 0}figure img{max-width:100%;height:auto;border:1px solid var(--line)}
figcaption{color:var(--muted);font-size:0.85rem}
.thumbs{display:grid;grid-template-columns:repeat(auto-fill,minmax(15rem,1fr));gap:0.6rem}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:0.15rem 0.8rem;margin:0.3rem 0}
dl.facts dt{color:var(--muted)}dl.facts dd{margin:0;overflow-wrap:anywhere}
.caution{margin-top:1.5rem;padding:0.6rem 0.8rem;border:1px solid var(--line);
background:var(--band);font-size:0.9rem}
ol.reruns{padding-left:1.6rem;margin:0.3rem 0}ol.reruns li{padding:0.25rem 0;
border-bottom:1px dotted var(--line)}.id{font-weight:600;white-space:nowrap}
.pending{color:var(--muted);font-style:italic}
@media (max-width:40rem){body{font-size:14px;padding:0.5rem}dl.facts{grid-template-columns:1fr}
dl.facts dd{margin-bottom:0.3rem}}
@media print{body{max-width:none;font-size:10pt;padding:0}.verdict,th,.caution{background:none}
.scroll{overflow:visible}table{font-size:8.5pt}section,figure,tr{break-inside:avoid}
h2{break-after:avoid}a{color:inherit;text-decoration:none}.thumbs{grid-template-columns:1fr 1fr}}
"""

#: No fetch of any kind: pictures are data: URIs, the style is inline, there is no script.
_POLICY = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"


@dataclass(frozen=True, slots=True)
class Chart:
    """One control series the run added to, as the report shows it."""

    title: str
    png: bytes | None  # the thumbnail, or None when not drawn
    link: str | None  # the full chart, relative to the report


@dataclass(frozen=True, slots=True)
class Extras:
    """What the report shows beside the verdict: provenance the ledger holds, pictures."""

    config_sha256: str | None = None
    evaluated_at: str | None = None
    calibration_pictures: Mapping[str, bytes] = field(default_factory=dict)  # by analyte
    charts: Sequence[Chart] = ()
    pictures_pending: bool = False  # named in the verdict, not drawn yet


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def _number(value: float | None, digits: int = 4) -> str:
    if value is None:
        return "–"
    if value == 0:
        return "0"
    if 1e-3 <= abs(value) < 1e6:
        return f"{value:.{digits}g}"
    return f"{value:.{digits - 1}e}"


def _word(status: str) -> str:
    """A status or severity as a bordered word with its symbol (readable without colour)."""
    return (
        f'<span class="word w-{_e(status)}">{SYMBOLS.get(status, "")} {_e(status.upper())}</span>'
    )


def _png(data: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _table(header: Sequence[str], rows: Sequence[Sequence[str]], numeric: set[int]) -> str:
    """A table of already-escaped cells; columns in ``numeric`` are right-aligned."""
    head = "".join(f"<th>{cell}</th>" for cell in header)
    body = "".join(
        "<tr>"
        + "".join(
            f'<td class="n">{cell}</td>' if i in numeric else f"<td>{cell}</td>"
            for i, cell in enumerate(row)
        )
        + "</tr>"
        for row in rows
    )
    table = f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"
    return f'<div class="scroll">{table}</div>'


def root_cause(document: VerdictDocument) -> str:
    """The first failure (the headline of log and alert), or what the status says."""
    if document["status"] == "error":
        return str(document.get("error") or "the file could not be evaluated")
    fails = [f for f in document.get("findings", []) if f["severity"] == "fail"]
    if not fails:
        return status_line(document).split(": ", 1)[1]
    more = len(fails) - 1
    return fails[0]["message"] + (
        f" (and {more} more failing finding{'s' * (more != 1)})" if more else ""
    )


def _header(document: VerdictDocument) -> str:
    status = document["status"]
    source = document.get("source", {})
    facts = [
        ("run", document.get("run") or "–"),
        ("instrument", document.get("instrument") or "–"),
        ("file", source.get("path")),
    ]
    meta = " · ".join(f"{name} {_e(value)}" for name, value in facts)
    return (
        f'<header class="verdict s-{_e(status)}" id="status"><h1>calwarden QC report</h1>'
        f'<p class="headline">{_word(status)} {_e(root_cause(document))}</p>'
        f'<p class="meta">{_e(status_line(document))}</p><p class="meta">{meta}</p></header>'
    )


def _why(entry: Mapping[str, object]) -> str:
    by_analyte = entry.get("by_analyte")
    assert isinstance(by_analyte, dict)
    return "; ".join(
        f"{analyte}: " + ", ".join(FLAG_WORDS.get(f, f) for f in flags)
        for analyte, flags in by_analyte.items()
    )


def _reruns(document: VerdictDocument) -> str:
    reruns = document.get("reruns", [])
    parts = [f'<section id="reruns"><h2>Samples to re-run ({len(reruns)})</h2>']
    if not reruns:
        parts.append("<p>none</p>")
    else:
        parts.append('<ol class="reruns">')
        for entry in reruns:
            dilution = entry.get("suggested_dilution")
            seq = "" if entry["seq"] is None else f" (seq {_e(entry['seq'])})"
            dilute = (
                f"; <strong>dilute to {_e(_number(dilution))}× in total</strong>"
                if dilution
                else ""
            )
            reasons = "<br>".join(_e(reason) for reason in entry.get("reasons", []))
            parts.append(
                f'<li><span class="id">{_e(entry["sample_id"])}</span>{seq}: '
                f"{_e(_why(dict(entry)))}{dilute}"
                f'<div class="meta">{reasons}</div></li>'
            )
        parts.append("</ol>")
    repeat = document.get("repeat") or []
    if repeat:
        parts.append(f"<h3>To repeat ({len(repeat)})</h3><ul>")
        for item in repeat:
            what = "calibration" if item["what"] == "calibration" else "run"
            scope = f" of {item['analyte']}" if item.get("analyte") else " (whole run)"
            reasons = "; ".join(item.get("reasons", []))
            parts.append(f"<li><strong>{_e(what + scope)}</strong>: {_e(reasons)}</li>")
        parts.append("</ul>")
    parts.append("</section>")
    return "".join(parts)


def _findings(document: VerdictDocument) -> str:
    findings = document.get("findings", [])
    parts = ['<section id="findings"><h2>Findings by analyte</h2>']
    if not findings:
        parts.append("<p>none</p>")
    groups: dict[str, list[FindingEntry]] = {}
    for finding in findings:
        groups.setdefault(finding.get("analyte") or "(whole run)", []).append(finding)
    for analyte, items in groups.items():
        parts.append(f'<h3>{_e(analyte)}</h3><ul class="findings">')
        for finding in sorted(items, key=lambda f: SEVERITY_ORDER[f["severity"]]):
            parts.append(
                f"<li>{_word(finding['severity'])} {_e(finding['message'])} "
                f'<span class="rule">[{_e(finding["rule"])}]</span></li>'
            )
        parts.append("</ul>")
    parts.append("</section>")
    return "".join(parts)


def _calibrations(document: VerdictDocument, extras: Extras) -> str:
    calibrations = document.get("calibrations", {})
    parts = ['<section id="calibrations"><h2>Calibrations</h2>']
    if not calibrations:
        parts.append("<p>none (standard addition only, or no standards)</p>")
    for analyte, c in calibrations.items():
        low, high = c.get("range") or (None, None)
        r2 = c.get("r_squared")
        facts: list[tuple[str, object]] = [
            ("model", c.get("model") or "none"),
            ("weighting", c.get("weighting") or "–"),
            ("levels", c.get("levels", "–")),
            ("r²", "–" if r2 is None else f"{r2:.5f}"),
            ("s(y/x)", _number(c.get("residual_sd"))),
            ("range", f"{_number(low)}–{_number(high)} {c.get('unit') or ''}".rstrip()),
            ("LOD / LOQ", f"{_number(c.get('lod'))} / {_number(c.get('loq'))}"),
        ]
        if c.get("problem"):
            facts.append(("problem", c.get("problem")))
        parts.append(f'<section class="calibration"><h3>{_e(analyte)}</h3><dl class="facts">')
        parts += [f"<dt>{_e(name)}</dt><dd>{_e(value)}</dd>" for name, value in facts]
        parts.append("</dl>")
        picture = extras.calibration_pictures.get(analyte)
        if picture is not None:
            parts.append(
                f'<figure><img src="{_png(picture)}" alt="calibration curve and residuals of '
                f'{_e(analyte)}"><figcaption>{_e(analyte)}: the fitted curve over its standards, '
                "and the residuals</figcaption></figure>"
            )
        elif extras.pictures_pending:
            parts.append(
                '<p class="pending">picture being drawn; this page is written again '
                "when it is ready</p>"
            )
        rows = []
        for point in c.get("standards", []):
            error = point.get("error_pct")
            rows.append(
                (
                    _e(point["sample_id"]),
                    _e(point["seq"]),
                    _e(_number(point["nominal"])),
                    _e(_number(point.get("back_calculated"))),
                    "–" if error is None else _e(f"{error:+.1f}"),
                )
            )
        if rows:
            parts.append(
                _table(("standard", "seq", "nominal", "read back", "error %"), rows, {1, 2, 3, 4})
            )
        parts.append("</section>")
    parts.append("</section>")
    return "".join(parts)


def _results(document: VerdictDocument) -> str:
    results = document.get("results", [])
    rows = [
        (
            _e("–" if r["seq"] is None else r["seq"]),
            _e(r["sample_id"]),
            _e(r["kind"]),
            _e(r["analyte"]),
            _e(_number(r["concentration"])),
            _e(_number(r["uncertainty"], 2)),
            _e(r.get("unit") or ""),
            _e(", ".join(FLAG_WORDS.get(f, f) for f in r["flags"])) if r["flags"] else "",
        )
        for r in results
    ]
    table = _table(
        ("seq", "sample", "kind", "analyte", "concentration", "± u", "unit", "flags"),
        rows,
        {0, 4, 5},
    )
    return f'<section id="results"><h2>Results ({len(results)})</h2>{table}</section>'


def chart_title(entry: ControlChartEntry) -> str:
    name = " ".join(part for part in (entry["analyte"], entry["kind"], entry["level"]) if part)
    return f"{entry['instrument']} · {name}"


def _charts(document: VerdictDocument, extras: Extras) -> str:
    series = document.get("control_charts") or []
    if not series:
        return ""
    parts = [
        '<section id="charts"><h2>Control charts this run added to</h2>',
        _table(
            ("series", "points", "centre", "SD", "limits"),
            [
                (
                    _e(chart_title(entry)),
                    _e(entry["points"]),
                    _e(_number(entry.get("centre"))),
                    _e(_number(entry.get("sd"), 3)),
                    _e(entry.get("limits") or "not yet"),
                )
                for entry in series
            ],
            {1, 2, 3},
        ),
    ]
    if extras.charts:
        parts.append('<div class="thumbs">')
        for chart in extras.charts:
            caption = _e(chart.title)
            if chart.link:
                caption = f'<a href="{_e(chart.link)}">{caption}</a>'
            if chart.png is not None:
                parts.append(
                    f'<figure><img src="{_png(chart.png)}" alt="control chart {_e(chart.title)}">'
                    f"<figcaption>{caption}</figcaption></figure>"
                )
            else:
                parts.append(f'<p class="pending">{caption}: chart not drawn yet</p>')
        parts.append("</div>")
    elif extras.pictures_pending:
        parts.append(
            '<p class="pending">charts being drawn; this page is written again when '
            "they are ready</p>"
        )
    parts.append("</section>")
    return "".join(parts)


def _provenance(document: VerdictDocument, extras: Extras) -> str:
    source = document.get("source", {})
    facts = [
        ("input file", source.get("path")),
        ("input SHA-256", source.get("sha256") or "– (not read)"),
        ("criteria SHA-256", document.get("criteria_sha256") or "–"),
        ("configuration SHA-256", extras.config_sha256 or "– (calwarden check)"),
        ("calwarden version", document.get("calwarden_version")),
        ("judged at", extras.evaluated_at or "–"),
        ("verdict schema", document.get("schema_version")),
    ]
    items = "".join(f"<dt>{_e(name)}</dt><dd>{_e(value)}</dd>" for name, value in facts)
    return f'<section id="provenance"><h2>Provenance</h2><dl class="facts">{items}</dl></section>'


def render_html(document: VerdictDocument, extras: Extras | None = None) -> str:
    """The report as one HTML page (escaped, self-contained, no script)."""
    extras = extras or Extras()
    document = printable_strings(document)
    title = f"{SYMBOLS.get(document['status'], '')} {document['status'].upper()} · " + str(
        document.get("run") or document.get("source", {}).get("path") or "run"
    )
    body = [_header(document)]
    if document["status"] != "error":
        body += [
            _reruns(document),
            _findings(document),
            _calibrations(document, extras),
            _results(document),
            _charts(document, extras),
        ]
    body += [
        _provenance(document, extras),
        f'<footer class="caution"><strong>Caution.</strong> {_e(document.get("caution", ""))}'
        "</footer>",
    ]
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f'<meta http-equiv="Content-Security-Policy" content="{_POLICY}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(title)}</title><style>{_STYLE}</style></head>\n<body>\n"
        + "\n".join(part for part in body if part)
        + "\n</body></html>\n"
    )


def compact(png: bytes, box: tuple[int, int]) -> bytes:
    """A smaller copy of a picture for the report: fitted into ``box``, 64 colours.

    A fifth to a tenth of the bytes, the lines and text still sharp (the charts have
    few colours). Pillow comes with matplotlib.
    """
    from PIL import Image

    with Image.open(io.BytesIO(png)) as image:
        image.thumbnail(box)
        reduced = image.convert("RGB").quantize(colors=64, method=Image.Quantize.MEDIANCUT)
        buffer = io.BytesIO()
        reduced.save(buffer, format="PNG", optimize=True)
    return buffer.getvalue()


def series_key(entry: ControlChartEntry) -> SeriesKey:
    return SeriesKey(entry["instrument"], entry["analyte"], entry["kind"], entry["level"])


def _read(path: Path) -> bytes | None:
    try:
        return path.read_bytes()
    except OSError:
        return None


def picture_extras(
    document: VerdictDocument,
    out_folder: Path,
    stem: str,
    charts_dir: Path,
    *,
    config_sha256: str | None,
    evaluated_at: str | None,
) -> Extras:
    """The pictures on disk for a run's report: its calibrations, its series' charts."""
    # Here, not at the top: files.py renders this report, and pictures.py imports files.py.
    from calwarden.daemon.outputs.pictures import calibration_picture_name, chart_path

    pictures: dict[str, bytes] = {}
    for analyte in document.get("calibrations") or {}:
        data = _read(out_folder / calibration_picture_name(stem, analyte))
        if data is not None:
            pictures[analyte] = compact(data, _PICTURE)
    charts = []
    for entry in document.get("control_charts") or []:
        path = chart_path(charts_dir, series_key(entry))
        data = _read(path)
        charts.append(
            Chart(
                chart_title(entry),
                None if data is None else compact(data, _THUMBNAIL),
                Path(os.path.relpath(path, out_folder)).as_posix() if data is not None else None,
            )
        )
    return Extras(config_sha256, evaluated_at, pictures, tuple(charts), pictures_pending=False)


def rewrite_with_pictures(
    document: VerdictDocument,
    out_folder: Path,
    stem: str,
    charts_dir: Path,
    *,
    config_sha256: str | None,
    evaluated_at: str | None,
) -> Path:
    """Write ``<stem>.report.html`` again, with the run's pictures embedded."""
    from calwarden.daemon.outputs.files import atomic_write

    extras = picture_extras(
        document,
        out_folder,
        stem,
        charts_dir,
        config_sha256=config_sha256,
        evaluated_at=evaluated_at,
    )
    path = out_folder / f"{stem}.report.html"
    atomic_write(path, render_html(document, extras).encode("utf-8"))
    return path
