"""The re-run worklist of a failing run, ``<stem>.reruns.csv``, from the verdict JSON.

In run order: an opening check standard and blank (after a new calibration
when the run's calibration is to be repeated: the blank, the standards, an
ICV and a blank), then the samples to re-run with the dilution to use, a check
standard and a blank after every ``checks_every`` samples, and a closing
check standard and blank, as the bracketing rules ask (US EPA 6010D / 6020B,
200.8: a CCV and CCB every 10 samples and at the end [memory]). The columns
and kind words follow the ``worklist:`` settings, so the file imports into an
instrument's sequence table. Cells a spreadsheet would read as formulas are
neutralised as in the flagged copy.
"""

from __future__ import annotations

import csv
import io

from calwarden.daemon.outputs.files import neutralised
from calwarden.daemon.outputs.report import FLAG_WORDS
from calwarden.daemon.outputs.verdict_model import VerdictDocument
from calwarden.daemon.settings.worklist import FIELDS, WorklistSettings
from calwarden.rules.model import Kind

_Line = dict[str, str]


def _number(value: float) -> str:
    return f"{value:g}"


def worklist_rows(document: VerdictDocument, checks_every: int) -> list[_Line]:
    """The worklist's lines in run order, as calwarden's fields (kinds in calwarden's words)."""
    reruns = sorted(
        document.get("reruns", []),
        key=lambda entry: (entry["seq"] is None, entry["seq"] or 0),
    )
    if not reruns:
        return []
    analytes = sorted({a for entry in reruns for a in entry["analytes"]})
    all_analytes = " ".join(analytes)
    dilutions = {(r["seq"], r["analyte"]): r.get("dilution") for r in document.get("results", [])}
    counters: dict[Kind, int] = {}
    lines: list[_Line] = []

    def add(kind: Kind, sample_id: str | None, why: str, **fields: str) -> None:
        counters[kind] = counters.get(kind, 0) + 1
        name = sample_id or f"{kind.value.upper()}-{counters[kind]}"
        lines.append(
            {
                "position": str(len(lines) + 1),
                "sample_id": name,
                "kind": kind.value,
                "analytes": fields.get("analytes", all_analytes),
                "dilution": fields.get("dilution", "1"),
                "why": why,
                "seq": fields.get("seq", ""),
            }
        )

    def bracket(why: str) -> None:
        add(Kind.CCV, None, why)
        add(Kind.CCB, None, why)

    recalibrate = [
        entry for entry in document.get("repeat") or [] if entry["what"] == "calibration"
    ]
    if recalibrate:
        standards: dict[str, float | None] = {}
        for analyte, calibration in document.get("calibrations", {}).items():
            if any(entry["analyte"] in (None, analyte) for entry in recalibrate):
                for point in calibration.get("standards", []):
                    standards.setdefault(point["sample_id"], point["nominal"])
        add(Kind.BLANK, None, "new calibration")
        for sample_id, _ in sorted(standards.items(), key=lambda item: item[1] or 0.0):
            add(Kind.CAL, sample_id, "new calibration")
        add(Kind.ICV, None, "verifies the new calibration")
        add(Kind.CCB, None, "verifies the new calibration")
    else:
        bracket("opening check")
    for count, entry in enumerate(reruns, start=1):
        why = "; ".join(
            f"{analyte}: " + ", ".join(FLAG_WORDS.get(flag, flag) for flag in flags)
            for analyte, flags in entry["by_analyte"].items()
        )
        suggested = entry.get("suggested_dilution")
        if suggested:
            dilution = _number(suggested)
        else:
            # As measured before (the dilution is the sample's, the same for each analyte).
            known = [dilutions.get((entry["seq"], a)) for a in entry["analytes"]]
            dilution = _number(next((d for d in known if d), 1.0))
        add(
            Kind.SAMPLE,
            entry["sample_id"],
            why,
            analytes=" ".join(entry["analytes"]),
            dilution=dilution,
            seq="" if entry["seq"] is None else str(entry["seq"]),
        )
        if count % checks_every == 0 and count != len(reruns):
            bracket(f"check after {checks_every} samples")
    bracket("closing check")
    return lines


def worklist_csv(
    document: VerdictDocument, settings: WorklistSettings, default_every: int = 10
) -> bytes | None:
    """The worklist file's bytes, or None when there is nothing to re-run (or it is off)."""
    if not settings.enabled or document["status"] != "fail":
        return None
    lines = worklist_rows(document, settings.checks_every or default_every)
    if not lines:
        return None
    columns = dict(settings.columns) or {field: field for field in FIELDS}
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, delimiter=settings.delimiter, lineterminator="\r\n")
    writer.writerow([neutralised(name) for name in [*columns.values(), *settings.fixed]])
    kinds = {kind.value: word for kind, word in settings.kinds.items()}
    for line in lines:
        line = {**line, "kind": kinds.get(line["kind"], line["kind"])}
        writer.writerow(
            [neutralised(line[field]) for field in columns]
            + [neutralised(value) for value in settings.fixed.values()]
        )
    return buffer.getvalue().encode(settings.encoding, errors="replace")
