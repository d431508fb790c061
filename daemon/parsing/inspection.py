"""``calwarden inspect``: how a file is read, for setting up a new instrument.

It shows what the reader detected (type, encoding, delimiter, header line),
which export column fills each native field, the first rows as calwarden sees
them, and every row that would be rejected and why, instead of stopping at the
first problem as ``check`` must.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, replace
from pathlib import Path

from calwarden.daemon.parsing.decode import decode, read_file_bytes
from calwarden.daemon.parsing.exports import Detected, export_table
from calwarden.daemon.parsing.native import NATIVE_FIELDS, normalise
from calwarden.daemon.parsing.table import RawTable, header_key, split_table
from calwarden.daemon.settings.config import AppConfig
from calwarden.rules.errors import InputError
from calwarden.rules.model import Reading

#: Rows shown normalised, and problems listed at most.
SHOWN_ROWS = 8
SHOWN_PROBLEMS = 20


@dataclass(frozen=True, slots=True)
class Inspection:
    path: Path
    detected: Detected | None
    table: RawTable | None
    readings: tuple[Reading, ...]
    problems: tuple[str, ...]  # each "line N, column 'x': why"
    fatal: str | None  # the file cannot be read at all


def inspect_file(path: Path, config: AppConfig) -> Inspection:
    """Read ``path`` as ``check`` would and collect every problem, not only the first."""
    try:
        data = read_file_bytes(path)
        if config.format is None:
            table, detected = _native_table(data, str(path))
        else:
            table, detected = export_table(
                data, config.format, source=str(path), suffix=path.suffix
            )
    except InputError as error:
        return Inspection(path, None, None, (), (), str(error))

    readings: list[Reading] = []
    problems: list[str] = []
    for row in table.rows:
        try:
            readings.extend(normalise(replace(table, rows=(row,))).readings)
        except InputError as error:
            problems.append(str(error))
    if not problems:
        try:
            normalise(table)  # what only the whole file shows: repeated (seq, analyte)
        except InputError as error:
            problems.append(str(error))
    return Inspection(path, detected, table, tuple(readings), tuple(problems), None)


def _native_table(data: bytes, source: str) -> tuple[RawTable, Detected]:
    """The native reader's table, described as the layout reader describes its own."""
    text = decode(data)
    table = split_table(text.text, source=source)
    keys = {header_key(name): name for name in table.header}
    columns = {field: keys[field] for field in NATIVE_FIELDS if field in keys}
    return table, Detected("csv", text.encoding, ",", table.header_line, None, columns, (), ())


def _describe_reading(reading: Reading) -> tuple[str, ...]:
    def text(value: object) -> str:
        return "" if value is None else f"{value:g}" if isinstance(value, float) else str(value)

    return (
        str(reading.seq),
        reading.sample_id,
        reading.kind.value,
        reading.analyte,
        text(reading.response),
        text(reading.nominal),
        text(reading.istd_response),
        text(reading.dilution),
        reading.unit or "",
        reading.acquired.isoformat() if reading.acquired else "",
        reading.parent or "",
        text(reading.added),
    )


def _table(rows: list[tuple[str, ...]], indent: str = "  ") -> list[str]:
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    return [
        indent + "  ".join(c.ljust(w) for c, w in zip(row, widths, strict=True)).rstrip()
        for row in rows
    ]


def _spans(skipped: tuple[tuple[int, str], ...]) -> list[tuple[int, int, str]]:
    """Consecutive lines left out for the same reason, as (first, last, why)."""
    spans: list[tuple[int, int, str]] = []
    for line, why in skipped:
        if spans and spans[-1][2] == why and spans[-1][1] == line - 1:
            spans[-1] = (spans[-1][0], line, why)
        else:
            spans.append((line, line, why))
    return spans


def render_inspection(inspection: Inspection) -> str:
    """The inspection in plain text."""
    lines = [f"file:     {inspection.path}"]
    if inspection.fatal:
        lines += [f"cannot be read: {inspection.fatal}"]
        return "\n".join(lines) + "\n"
    detected, table = inspection.detected, inspection.table
    assert detected is not None and table is not None
    how = [detected.file_type]
    if detected.encoding:
        how.append(f"encoding {detected.encoding}")
    if detected.delimiter:
        how.append("delimiter " + {"\t": "tab"}.get(detected.delimiter, repr(detected.delimiter)))
    if detected.sheet:
        how.append(f"sheet {detected.sheet!r}")
    how.append(f"header on line {detected.header_line}")
    lines.append("read as:  " + ", ".join(how))
    lines.append("columns:")
    for field, source in detected.columns.items():
        lines.append(f"  {field:<14} <- {source!r}")
    if detected.analytes:
        lines.append("analytes from wide columns: " + ", ".join(detected.analytes))
    filled = [n for n in table.header if n in NATIVE_FIELDS and n not in detected.columns]
    if filled:
        lines.append("filled in by the format: " + ", ".join(filled))
    passed = [name for name in table.header if name not in NATIVE_FIELDS]
    if passed:
        lines.append("passed through unchanged: " + ", ".join(passed))
    if detected.skipped_lines:
        spans = _spans(detected.skipped_lines)
        lines.append(f"left out: {len(detected.skipped_lines)} line(s)")
        for first, last, why in spans[:SHOWN_ROWS]:
            where = f"line {first}" if first == last else f"lines {first}–{last}"
            lines.append(f"  {where}: {why}")
        if len(spans) > SHOWN_ROWS:
            lines.append(f"  … and {len(spans) - SHOWN_ROWS} more")
    readings = inspection.readings
    kinds = Counter(r.kind.value for r in readings)
    analytes = list(dict.fromkeys(r.analyte for r in readings))
    injections = len({r.seq for r in readings})
    lines.append(
        f"readings: {len(readings)} in {injections} injections, {len(analytes)} analytes "
        f"({', '.join(analytes[:12])}{' …' if len(analytes) > 12 else ''})"
    )
    lines.append("kinds:    " + ", ".join(f"{k} {n}" for k, n in sorted(kinds.items())))
    if readings:
        header = ("seq", "sample_id", "kind", "analyte", "response", "nominal", "istd_resp",
                  "dilution", "unit", "acquired", "parent", "added")  # fmt: skip
        lines.append(f"first {min(SHOWN_ROWS, len(readings))} readings as calwarden sees them:")
        lines += _table([header, *(_describe_reading(r) for r in readings[:SHOWN_ROWS])])
    problems = inspection.problems
    if problems:
        lines.append(
            f"would be rejected ({len(problems)} problem(s); check judges the file error):"
        )
        lines += [f"  {p}" for p in problems[:SHOWN_PROBLEMS]]
        if len(problems) > SHOWN_PROBLEMS:
            lines.append(f"  … and {len(problems) - SHOWN_PROBLEMS} more")
    else:
        lines.append("problems: none; the file is read as shown")
    return "\n".join(lines) + "\n"
