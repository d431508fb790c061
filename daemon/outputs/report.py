"""The human-readable report, rendered from the verdict JSON document.

Rendering from the JSON (not from the core's objects) keeps one source for
every output and lets an ``error`` verdict, which has no core objects, be
reported the same way.
"""

from __future__ import annotations

from collections.abc import Sequence

from calwarden.daemon.outputs.printable import printable_strings
from calwarden.daemon.outputs.verdict_model import FindingEntry, VerdictDocument

SEVERITY_ORDER = {"fail": 0, "warn": 1, "info": 2}
#: Flags in plain words, for the re-run list.
FLAG_WORDS = {
    "over_range": "over range",
    "calibration_failed": "calibration failed",
    "no_calibration": "no usable calibration",
    "check_failed": "a bracketing check standard failed",
    "not_bracketed": "not bracketed by check standards",
    "istd_out": "internal standard out of limits",
    "not_quantifiable": "no concentration on the curve gives this response",
    "replicates_disagree": "its replicate injections disagree",
    "blank_failed": "a calibration blank next to it failed",
    "blank_contaminated": "below the multiple of a contaminated method blank",
    "lcs_failed": "the LCS of its preparation batch failed",
    "beyond_interval": "more samples than allowed since the last check standard",
    "not_computable": "its result cannot be computed",
    "matrix_effect": "its serial dilution or post-digestion spike shows a matrix effect",
    "identity_unconfirmed": "its retention time or ion ratio does not confirm the analyte",
    "qc_failed": "its QC comparison failed (measure it again)",
    "low_check_failed": "a low-level check next to it failed",
    "carryover": "right after a result above the top standard (carry-over)",
}
_WORD = {"pass": "PASS", "fail": "FAIL", "error": "ERROR"}


def _number(value: float | None, digits: int = 4) -> str:
    if value is None:
        return "-"
    if value == 0:
        return "0"
    if 1e-3 <= abs(value) < 1e6:
        return f"{value:.{digits}g}"
    return f"{value:.{digits - 1}e}"


def _heading(text: str, underline: str = "-") -> list[str]:
    return ["", text, underline * len(text)]


def status_line(document: VerdictDocument) -> str:
    """``FAIL: 3 failing findings, 2 warnings`` (or the error), one line."""
    status = document["status"]
    if status == "error":
        return f"ERROR: {document.get('error') or 'the file could not be evaluated'}"
    findings = document.get("findings", [])
    fails = sum(1 for f in findings if f["severity"] == "fail")
    warns = sum(1 for f in findings if f["severity"] == "warn")
    parts = [f"{fails} failing finding{'s' * (fails != 1)}"] if fails else []
    if warns:
        parts.append(f"{warns} warning{'s' * (warns != 1)}")
    return f"{_WORD[status]}: " + (", ".join(parts) if parts else "every criterion met")


def _reruns(document: VerdictDocument) -> list[str]:
    reruns = document.get("reruns", [])
    lines = _heading(f"Samples to re-run ({len(reruns)})")
    if not reruns:
        lines.append("none")
    for entry in reruns:
        why = "; ".join(
            f"{analyte}: " + ", ".join(FLAG_WORDS[f] for f in flags if f in FLAG_WORDS)
            for analyte, flags in entry["by_analyte"].items()
        )
        line = f"{entry['sample_id']} (seq {entry['seq']}) — {why}"
        if entry.get("suggested_dilution"):
            line += f"; dilute to {_number(entry['suggested_dilution'])}x in total"
        lines.append(line)
    return lines


def _repeat(document: VerdictDocument) -> list[str]:
    """What to repeat beyond single samples (a calibration, a run); nothing when there is none."""
    repeat = document.get("repeat") or []
    if not repeat:
        return []
    lines = _heading(f"To repeat ({len(repeat)})")
    for entry in repeat:
        what = "calibration" if entry["what"] == "calibration" else "run"
        scope = f" of {entry['analyte']}" if entry.get("analyte") else " (whole run)"
        lines.append(f"{what}{scope}:")
        lines += [f"  {reason}" for reason in entry.get("reasons", [])]
    return lines


def _findings(document: VerdictDocument) -> list[str]:
    findings = document.get("findings", [])
    lines = _heading("Findings by analyte")
    if not findings:
        lines.append("none")
        return lines
    groups: dict[str, list[FindingEntry]] = {}
    for finding in findings:
        groups.setdefault(finding.get("analyte") or "(whole run)", []).append(finding)
    for analyte, items in groups.items():
        lines.append(f"{analyte}:")
        for finding in sorted(items, key=lambda f: SEVERITY_ORDER[f["severity"]]):
            lines.append(
                f"  {finding['severity'].upper():<4}  {finding['message']}  [{finding['rule']}]"
            )
    return lines


def _calibrations(document: VerdictDocument) -> list[str]:
    calibrations = document.get("calibrations", {})
    lines = _heading("Calibrations")
    if not calibrations:
        lines.append("none (standard addition only, or no standards)")
        return lines
    header = ("analyte", "model", "weight", "levels", "r²", "s(y/x)", "range", "LOD", "LOQ")
    rows = [header]
    for analyte, c in calibrations.items():
        low, high = c.get("range") or (None, None)
        rows.append(
            (
                analyte,
                str(c.get("model") or "none"),
                str(c.get("weighting") or "-"),
                str(c.get("levels", "-")),
                f"{c['r_squared']:.5f}" if c.get("r_squared") is not None else "-",
                _number(c.get("residual_sd")),
                f"{_number(low)}–{_number(high)} {c.get('unit') or ''}".rstrip(),
                _number(c.get("lod")),
                _number(c.get("loq")),
            )
        )
    lines.extend(_table(rows))
    lines += _heading("Calibration standards read back")
    standards = [("analyte", "standard", "nominal", "read back", "error %")]
    for analyte, c in calibrations.items():
        for point in c.get("standards", []):
            error = point.get("error_pct")
            standards.append(
                (
                    analyte,
                    point["sample_id"],
                    _number(point["nominal"]),
                    _number(point.get("back_calculated")),
                    "-" if error is None else f"{error:+.1f}",
                )
            )
    lines.extend(_table(standards))
    return lines


def _results(document: VerdictDocument) -> list[str]:
    results = document.get("results", [])
    lines = _heading(f"Results ({len(results)})")
    # The reporting-limit columns only when a result has a limit or a qualifier.
    limits = any(r.get("reporting_limit") is not None or r.get("qualifiers") for r in results)
    header = ("seq", "sample", "kind", "analyte", "concentration", "± u", "unit")
    more = ("RL", "qualifiers", "flags") if limits else ("flags",)
    rows = [header + more]
    for r in results:
        # Below the reporting limit the report shows "< RL", as the result is reported.
        shown = r.get("reported_as") or _number(r["concentration"])
        cells = (
            str(r["seq"]),
            r["sample_id"],
            r["kind"],
            r["analyte"],
            shown,
            _number(r["uncertainty"], 2),
            r.get("unit") or "",
        )
        flags = " ".join(r["flags"])
        if limits:
            qualifiers = " ".join(r.get("qualifiers") or [])
            rows.append((*cells, _number(r.get("reporting_limit")), qualifiers, flags))
        else:
            rows.append((*cells, flags))
    lines.extend(_table(rows))
    return lines


def _replicates(document: VerdictDocument) -> list[str]:
    """Replicate injections as the one result each sample reports (absent when there are none)."""
    groups = document.get("replicates") or []
    if not groups:
        return []
    lines = _heading(f"Replicate injections ({len(groups)})")
    rows = [("sample", "analyte", "n", "mean", "± u", "%RSD", "unit", "flags")]
    for g in groups:
        rows.append(
            (
                g["sample_id"],
                g["analyte"],
                str(len(g["seqs"])),
                _number(g["concentration"]),
                _number(g["uncertainty"], 2),
                "-" if g["rsd_pct"] is None else f"{g['rsd_pct']:.1f}",
                g.get("unit") or "",
                " ".join(g["flags"]),
            )
        )
    lines.extend(_table(rows))
    return lines


def _table(rows: Sequence[tuple[str, ...]]) -> list[str]:
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    return [
        "  ".join(cell.ljust(width) for cell, width in zip(row, widths, strict=True)).rstrip()
        for row in rows
    ]


def _charts(document: VerdictDocument) -> list[str]:
    """The control series the run added to, and the pictures next to this report."""
    lines: list[str] = []
    series = document.get("control_charts") or []
    if series:
        title = "Control charts"
        lines += [
            "",
            title,
            "-" * len(title),
            "This run's points joined these series (charts in the output folder's charts/):",
        ]
        rows = [("series", "points", "centre", "SD", "limits")]
        for entry in series:
            name = " ".join(
                part for part in (entry["kind"], entry["analyte"], entry["level"]) if part
            )
            centre, sd = entry.get("centre"), entry.get("sd")
            rows.append(
                (
                    f"{entry['instrument']} {name}",
                    str(entry["points"]),
                    "-" if centre is None else f"{centre:.4g}",
                    "-" if sd is None else f"{sd:.3g}",
                    entry.get("limits") or "not yet",
                )
            )
        lines += ["  " + line for line in _table(rows)]
    pictures = document.get("pictures") or []
    if pictures:
        title = "Pictures"
        lines += [
            "",
            title,
            "-" * len(title),
            "Each calibration's curve and residuals, beside this report:",
        ]
        lines += [f"  {name}" for name in pictures]
    return lines


def render(document: VerdictDocument, *, full: bool = True) -> str:
    """The report; ``full=False`` gives the terminal summary (no calibration or result tables).

    File text is shown with its control characters escaped (``printable``).
    """
    document = printable_strings(document)
    source = document.get("source", {})
    sha = source.get("sha256")
    lines = [
        "calwarden QC report",
        "===================",
        f"run:        {document.get('run') or '-'}",
        f"instrument: {document.get('instrument') or '-'}",
        f"source:     {source.get('path')}" + (f" (sha256 {sha[:12]}…)" if sha else ""),
        f"status:     {status_line(document)}",
    ]
    if full:
        lines.append(
            f"checked by: calwarden {document.get('calwarden_version')}, "
            f"criteria {str(document.get('criteria_sha256') or '-')[:12]}"
        )
    if document["status"] != "error":
        lines += _reruns(document) + _repeat(document) + _findings(document)
        if full:
            lines += _calibrations(document) + _replicates(document) + _results(document)
            lines += _charts(document)
    lines += ["", str(document.get("caution", ""))]
    return "\n".join(lines) + "\n"
