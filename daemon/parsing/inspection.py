"""``calwarden inspect``: how a file is read, for setting up a new instrument.

It shows what the reader detected (type, encoding, delimiter, header line),
which export column fills each native field, the first rows as calwarden sees
them, and every row that would be rejected and why, instead of stopping at the
first problem as ``check`` must: every unknown kind code is listed at once.

When the columns are not found (or the file cannot be read past its header),
it shows the file's first lines as they are (numbered, control characters
escaped) and a guess of the header line, the line with the most cells that are
text rather than numbers, with the ``format:`` keys that would read it.
"""

from __future__ import annotations

import json
import re
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path

from calwarden.daemon.parsing.decode import decode, excerpt, read_file_bytes
from calwarden.daemon.parsing.exports import Detected, export_table
from calwarden.daemon.parsing.native import ALLOWED_KINDS, NATIVE_FIELDS, REQUIRED_FIELDS, normalise
from calwarden.daemon.parsing.table import (
    RawTable,
    closest_column,
    header_key,
    physical_lines,
    split_line,
    split_table,
)
from calwarden.daemon.settings.config import AppConfig
from calwarden.rules.errors import InputError
from calwarden.rules.model import Reading

#: Rows shown normalised, and problems listed at most.
SHOWN_ROWS = 8
SHOWN_PROBLEMS = 20
#: Raw lines shown when the columns are not found; lines searched for a header.
RAW_LINES = 12
_GUESS_LINES = 40
_DELIMITERS = (",", ";", "\t", "|")
#: Plain words a column of each required field is often called (matched ignoring case,
#: spaces and punctuation, as a whole name or a part of one), for the suggested keys.
_SYNONYMS = {
    "seq": ("seq", "injection", "position", "pos", "order", "run order", "no"),
    "sample_id": ("sample_id", "sample id", "sample name", "sample", "name"),
    "kind": ("kind", "sample kind", "sample type", "type", "role"),
    "analyte": ("analyte", "element", "compound", "component", "substance", "mass"),
    "response": ("response", "intensity", "area", "counts", "signal", "height"),
}
_UNKNOWN_KIND = re.compile(r"^unknown kind '(.*?)'")


@dataclass(frozen=True, slots=True)
class HeaderGuess:
    """The line that looks most like a header: most cells that are text, not numbers."""

    line: int
    delimiter: str
    cells: tuple[str, ...]
    before: int  # lines above it (a preamble, blank lines too)


@dataclass(frozen=True, slots=True)
class Inspection:
    path: Path
    detected: Detected | None
    table: RawTable | None
    readings: tuple[Reading, ...]
    problems: tuple[str, ...]  # each "line N, column 'x': why"
    fatal: str | None  # the file cannot be read at all
    raw_lines: tuple[tuple[int, str], ...] = ()  # shown when the columns are not found
    guess: HeaderGuess | None = None
    unknown_kinds: tuple[tuple[str, tuple[int, ...]], ...] = ()  # code, its lines
    export: bool = False  # read with a format: section


def inspect_file(path: Path, config: AppConfig) -> Inspection:
    """Read ``path`` as ``check`` would and collect every problem, not only the first."""
    fmt = config.format
    data = b""
    collected: list[InputError] = []
    try:
        data = read_file_bytes(path)
        if fmt is None:
            table, detected = _native_table(data, str(path))
        else:
            table, detected = export_table(
                data, fmt, source=str(path), suffix=path.suffix, collect=collected
            )
    except InputError as error:
        raw, guess = _raw_view(data, config)
        return Inspection(path, None, None, (), (), str(error), raw, guess, export=fmt is not None)

    readings: list[Reading] = []
    errors: list[InputError] = list(collected)
    header_problem = False
    for row in table.rows:
        try:
            readings.extend(normalise(replace(table, rows=(row,))).readings)
        except InputError as error:
            errors.append(error)
            if error.line == table.header_line:
                header_problem = True  # the columns, not the row: once is enough
                break
    if not errors:
        try:
            normalise(table)  # what only the whole file shows: repeated (seq, analyte)
        except InputError as error:
            errors.append(error)
    errors.sort(key=lambda e: e.line or 0)
    raw, guess = _raw_view(data, config) if header_problem else ((), None)
    return Inspection(
        path,
        detected,
        table,
        tuple(readings),
        tuple(str(e) for e in errors),
        None,
        raw,
        guess,
        _unknown_kinds(errors),
        fmt is not None,
    )


def _unknown_kinds(errors: Sequence[InputError]) -> tuple[tuple[str, tuple[int, ...]], ...]:
    """Every kind code no rule knows, with the lines holding it, in order of first use."""
    found: dict[str, list[int]] = {}
    for error in errors:
        if error.column != "kind":
            continue
        code = _UNKNOWN_KIND.match(error.reason)
        found.setdefault(code.group(1) if code else "", []).append(error.line or 0)
    return tuple((code, tuple(lines)) for code, lines in found.items())


def _raw_view(
    data: bytes, config: AppConfig
) -> tuple[tuple[tuple[int, str], ...], HeaderGuess | None]:
    """The first lines of the text, and a guess of its header line; nothing if undecodable."""
    fmt = config.format
    if not data or (fmt is not None and fmt.file_type == "xlsx") or data.startswith(b"PK\x03\x04"):
        return (), None  # a workbook has no lines to show
    try:
        text = decode(data, fmt.encoding) if fmt is not None else decode(data)
    except InputError:
        return (), None
    lines = [(number, content) for number, _, content in physical_lines(text.text)]
    raw = tuple((number, content.rstrip("\r\n")) for number, content in lines[:RAW_LINES])
    return raw, _guess_header(lines[:_GUESS_LINES])


def _is_number(cell: str) -> bool:
    try:
        float(cell.strip().replace(",", "."))
    except ValueError:
        return False
    return True


def _guess_header(lines: Sequence[tuple[int, str]]) -> HeaderGuess | None:
    """The first line with the most text cells (split by the delimiter giving most)."""
    best: tuple[int, HeaderGuess] | None = None
    for number, content in lines:
        content = content.rstrip("\r\n")
        if not content.strip():
            continue
        for delimiter in _DELIMITERS:
            cells = tuple(c.strip() for c in split_line(content, delimiter))
            score = sum(1 for c in cells if c and not _is_number(c))
            if score >= 2 and (best is None or score > best[0]):
                best = (score, HeaderGuess(number, delimiter, cells, number - 1))
    return None if best is None else best[1]


def _suggest_column(field: str, cells: Sequence[str]) -> str | None:
    direct = closest_column(field, cells)
    if direct is not None:
        return direct
    for synonym in _SYNONYMS.get(field, ()):
        bare = re.sub(r"[\W_]+", "", synonym)
        for cell in cells:
            words = re.sub(r"[\W_]+", " ", cell.casefold()).split()
            if bare == "".join(words) or (len(bare) > 3 and bare in words):
                return cell
    return None


def _suggested_keys(guess: HeaderGuess) -> list[str]:
    """``format:`` keys that would read the guessed header, as YAML to copy and check."""
    lines = ["  format:"]
    lines.append(f"    delimiter: {json.dumps(guess.delimiter)}")
    chosen: dict[str, str] = {}
    for field in REQUIRED_FIELDS:
        cell = _suggest_column(field, [c for c in guess.cells if c not in chosen.values()])
        if cell is not None:
            chosen[field] = cell
    anchor = chosen.get("sample_id") or next(c for c in guess.cells if c)
    if guess.before:
        lines.append(
            f"    header: {{find: {json.dumps(anchor)}}}   # or skip_lines: {guess.before}"
        )
    lines.append("    columns:")
    for field in REQUIRED_FIELDS:
        if field in chosen:
            lines.append(f"      {field}: {json.dumps(chosen[field])}")
        else:
            lines.append(f"      {field}: ?   # which column? (or see kinds / order in the README)")
    return lines


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


def _render_raw(inspection: Inspection) -> list[str]:
    """The first lines as written, and the guessed header with keys to read it."""
    if not inspection.raw_lines:
        return []
    width = len(str(inspection.raw_lines[-1][0]))
    lines = [f"the first {len(inspection.raw_lines)} lines as written (escaped):"]
    lines += [f"  {n:>{width}} | {excerpt(text, 160)}" for n, text in inspection.raw_lines]
    guess = inspection.guess
    if guess is None:
        lines.append("no line looks like a header (none has two or more text cells)")
        return lines
    split = {"\t": "tab"}.get(guess.delimiter, repr(guess.delimiter))
    cells = ", ".join(f"'{excerpt(c, 30)}'" for c in guess.cells[:12] if c)
    lines.append(f"the header is probably line {guess.line} (split by {split}): {cells}")
    lines.append("suggested format: keys, to check and complete:")
    lines += _suggested_keys(guess)
    return lines


def _render_kinds(inspection: Inspection) -> list[str]:
    if not inspection.unknown_kinds:
        return []
    listed = []
    for code, at in inspection.unknown_kinds:
        where = ", ".join(str(n) for n in at[:5]) + (f" … ({len(at)} rows)" if len(at) > 5 else "")
        shown = f"'{excerpt(code)}'" if code else "(empty)"
        listed.append(f"{shown} on line{'s' if len(at) > 1 else ''} {where}")
    lines = [f"unknown kind codes ({len(listed)}), every one:"]
    lines += [f"  {entry}" for entry in listed]
    if inspection.export:
        example = next((code for code, _ in inspection.unknown_kinds if code), "CODE")
        lines.append(
            f"  map each under format.kinds.codes (e.g. {json.dumps(example)}: sample), or "
            f"set kinds.default; kinds: {ALLOWED_KINDS}"
        )
    else:
        lines.append(f"  the native format's kinds: {ALLOWED_KINDS}")
    return lines


def render_inspection(inspection: Inspection) -> str:
    """The inspection in plain text."""
    lines = [f"file:     {inspection.path}"]
    if inspection.fatal:
        lines += [f"cannot be read: {inspection.fatal}"]
        lines += _render_raw(inspection)
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
        lines += _render_kinds(inspection)
        lines += _render_raw(inspection)
    else:
        lines.append("problems: none; the file is read as shown")
    return "\n".join(lines) + "\n"
