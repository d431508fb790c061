"""Stage 2 of reading a file: text → a table of strings.

A :class:`RawTable` is a header and rows of cells exactly as written, each row
with the physical line it starts on, so that every later message can name a
line the user finds in the file. This is the one module that splits CSV:
:func:`split_rows` for a table's rows, :func:`split_line` for one line while a
layout looks for its header.

:func:`split_table` is the default layout, the native format's: comma-separated,
the first non-blank row is the header, every other row has one cell per header
column. An instrument export (``exports.py``) finds its header and delimiter by
its format, then uses the same splitter.
"""

from __future__ import annotations

import csv
import difflib
import io
import re
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass

from calwarden.daemon.parsing.decode import excerpt
from calwarden.rules.errors import InputError

__all__ = [
    "RawRow",
    "RawTable",
    "Record",
    "check_header",
    "closest_column",
    "header_key",
    "is_blank",
    "physical_lines",
    "split_line",
    "split_rows",
    "split_table",
]


@dataclass(frozen=True, slots=True)
class RawRow:
    """One data row as split from the file, before any type conversion."""

    line: int  # 1-based physical line of the file where the row starts
    fields: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class RawTable:
    """The file split into a header and rows of strings, exactly as written."""

    header: tuple[str, ...]
    rows: tuple[RawRow, ...]
    header_line: int = 1  # 1-based line of the header row (blank lines may precede it)
    source: str = "<data>"  # where the bytes came from, for people reading messages


#: One CSV row: the first and last physical line it spans, and its cells.
Record = tuple[int, int, Sequence[str]]


def header_key(name: str) -> str:
    """The form header names are matched in: surrounding spaces stripped, case folded."""
    return name.strip().casefold()


_NOT_WORD = re.compile(r"[\W_]+")


def _bare(name: str) -> str:
    """A header name without case, spaces or punctuation: "Sample ID" → "sampleid"."""
    return _NOT_WORD.sub("", header_key(name))


def closest_column(wanted: str, names: Iterable[str]) -> str | None:
    """The header name ``wanted`` probably means, for a did-you-mean hint; None if none is close.

    Equal but for case, spaces and punctuation ("Pos" for "Pos.", "sample_id" for
    "Sample ID") wins; otherwise the most similar name at a ratio of 0.8 or more
    (difflib's, on the bare forms), so that a hint is rarely wrong.
    """
    shown = [name.strip() for name in names if name.strip()]
    bare = _bare(wanted)
    if not bare:
        return None
    same = next((name for name in shown if _bare(name) == bare), None)
    if same is not None:
        return same
    forms = {_bare(name): name for name in reversed(shown) if _bare(name)}
    close = difflib.get_close_matches(bare, list(forms), n=1, cutoff=0.8)
    return forms[close[0]] if close else None


def is_blank(cells: Iterable[str]) -> bool:
    """Whether a row is blank: no cell holds anything but spaces."""
    return not "".join(cells).strip()


def check_header(header: Sequence[str], line: int) -> None:
    """Refuse a header with a nameless column or a name given twice (ignoring case)."""
    seen: dict[str, int] = {}
    for position, name in enumerate(header, start=1):
        key = header_key(name)
        if not key:
            raise InputError(f"header column {position} has no name", line)
        if key in seen:
            shown = excerpt(name.strip())
            raise InputError(
                f"header name '{shown}' is given twice (columns {seen[key]} and {position})",
                line,
                shown,
            )
        seen[key] = position


def split_rows(
    text: str, delimiter: str = ",", first_line: int = 1, *, name_late_notice: bool = True
) -> Iterator[Record]:
    """Each CSV row of ``text`` with the physical lines it spans, counted from ``first_line``.

    A quoted cell may span lines. A row the CSV rules cannot split raises
    InputError on the line the row starts on; ``name_late_notice`` adds the
    line where the csv module noticed it, when that is a later one.
    """
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    before = first_line - 1
    end = before  # physical line on which the previous row ended
    try:
        for fields in reader:
            start = end + 1
            end = before + reader.line_num
            yield start, end, fields
    except csv.Error as exc:
        if str(exc) == "unexpected end of data":
            reason = "a quote opened on this row is never closed: the file ends inside it"
        else:
            noticed = before + reader.line_num
            seen = (
                f" (noticed on line {noticed})" if name_late_notice and noticed != end + 1 else ""
            )
            reason = f"the row cannot be split as CSV: {exc}{seen}; is a quote left unclosed?"
        raise InputError(reason, end + 1) from None


def physical_lines(text: str) -> Iterator[tuple[int, int, str]]:
    """(line number, offset, content without its line end) of each physical line.

    Lines end where :func:`~decode.count_line_ends` counts an end: LF, CRLF, a lone CR.
    """
    offset = 0
    for number, line in enumerate(io.StringIO(text, newline=""), start=1):
        yield number, offset, line.rstrip("\r\n")
        offset += len(line)


def split_line(line: str, delimiter: str) -> list[str]:
    """One physical line's cells; a line the CSV rules cannot split is split plainly.

    For looking at lines one by one (finding a header, choosing a delimiter),
    where a quote that opens a multi-line cell must not stop the search.
    """
    try:
        return next(csv.reader((line,), delimiter=delimiter), [])
    except csv.Error:
        return line.split(delimiter)


def split_table(text: str, *, source: str = "<data>") -> RawTable:
    """The default layout: a comma-separated table whose first non-blank row is the header.

    Blank rows (every field empty) are skipped. Every other row must have
    exactly one field per header column.
    """
    header: tuple[str, ...] | None = None
    header_line = 0
    width = 0
    rows: list[RawRow] = []
    append = rows.append
    for start, _, fields in split_rows(text):
        if not "".join(fields).strip():
            continue  # a blank line, or a row of empty cells
        if header is None:
            header = tuple(fields)
            header_line = start
            width = len(header)
            check_header(header, header_line)
            continue
        if len(fields) != width:
            raise InputError(
                f"expected {width} fields, one per header column, but found {len(fields)}", start
            )
        append(RawRow(start, tuple(fields)))
    if header is None:
        raise InputError("the file has no header row: it holds only blank lines")
    return RawTable(header, tuple(rows), header_line, source)
