"""Another layout: an instrument's own export, read through an :class:`ExportFormat`.

:func:`export_table` turns the bytes of a CSV or XLSX export into a
:class:`~table.RawTable` in native columns: the header holds the native
fields it produced (in the native order), then the export's other columns under
their own names, so that a flagged copy still carries them. Every row keeps the
export's own line number (for XLSX: the sheet's row number), so that
:func:`~native.normalise` applies every strict native rule unchanged and
its messages name lines the user can find in the export.

A CSV export goes through the same stages as a native file: ``decode`` (with
the format's ``encoding``), then ``table.split_rows`` once this module has found
the header line and the delimiter. A workbook's cells become the same strings.

The layout only translates; it never judges a value. A cell it cannot
translate is left as written for ``normalise`` to refuse with its precise
message, except where leaving it could let a wrong value through (a number whose
separators contradict the format) or where the format explains the problem
better (a time none of its formats fits, a kind none of its rules covers): those
raise :class:`~rules.errors.InputError` here, naming the line and column.

Choices the format leaves open, made here once:

* Every regular expression of the format (column patterns, footer rules, kind
  patterns, wide columns) is applied with :func:`re.search`, ignoring case;
  anchor it (``^...$``) to match a whole cell.
* Names (header names, kind codes, sample ids, levels and analytes in the
  nominal tables) are matched ignoring case and surrounding spaces.
* Lines before the header are recorded as ``preamble``; blank rows, rows matched
  by ``footer.skip_matching``, and the ``footer.stop_at`` row with every
  non-blank line after it are recorded too, each with its reason.
* Empty header cells after the last named column are ignored (spreadsheet
  programs write trailing delimiters), and so are empty cells under them.
* Wide layouts: an empty response cell means the analyte was not measured in
  that injection, so that analyte gets no reading for that row; a row with no
  response at all is recorded as skipped. The per-analyte response, nominal and
  internal-standard columns are consumed (the rows carry them as ``response``,
  ``nominal``, ``istd_response``); every other column passes through.
* XLSX cells become text: empty cells ``""``; whole numbers (int, or a float
  with no fraction) their integer digits, so that a seq stored as 3.0 still
  reads; other floats ``repr``; dates and times ISO 8601; booleans
  ``TRUE``/``FALSE``. The decimal and thousands separators describe text, so
  they are never applied to a cell the workbook stored as a number.
  Merged cells and formulas without a stored value are refused: read-only mode
  would see them as empty cells.
"""

from __future__ import annotations

import hashlib
import io
import re
import warnings
import zipfile
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from datetime import date, datetime, time
from itertools import islice
from operator import itemgetter
from pathlib import Path
from typing import Any
from xml.etree import ElementTree

import openpyxl  # type: ignore[import-untyped]

from calwarden.daemon.parsing.decode import MAX_FILE_BYTES, check_bytes, decode, read_file_bytes
from calwarden.daemon.parsing.native import (
    ALLOWED_KINDS,
    KIND_WORDS,
    NATIVE_FIELDS,
    NUMBER_FIELDS,
    REQUIRED_FIELDS,
    ParsedFile,
    normalise,
    parse_iso_time,
)
from calwarden.daemon.parsing.table import (
    RawRow,
    RawTable,
    Record,
    check_header,
    closest_column,
    header_key,
    is_blank,
    physical_lines,
    split_line,
    split_rows,
)
from calwarden.daemon.settings.formats import (
    ColumnByPattern,
    ColumnRef,
    ExportFormat,
    KindSection,
    NominalSection,
)
from calwarden.rules.errors import InputError
from calwarden.rules.model import NEEDS_NOMINAL

__all__ = ["Detected", "export_table", "read_export"]

#: How many lines (after ``header.skip_lines``) ``header.find`` searches for the header.
HEADER_SEARCH_LINES = 100
#: Delimiters ``delimiter: auto`` chooses from, in the order that breaks a final tie.
_DELIMITERS: tuple[str, ...] = (",", ";", "\t", "|")
#: Lines after the header that break a tie between delimiters splitting it equally.
_CONSISTENCY_LINES = 5
_ZIP_MAGIC = b"PK\x03\x04"
_NEEDS_NOMINAL = frozenset(kind.value for kind in NEEDS_NOMINAL)


@dataclass(frozen=True, slots=True)
class Detected:
    """How a file was read, for ``calwarden inspect`` and for error messages."""

    file_type: str  # "csv" | "xlsx"
    encoding: str | None  # e.g. "utf-8", "utf-8 (with BOM)", "utf-16-le (BOM)", "cp1252"
    delimiter: str | None  # None for xlsx
    header_line: int  # 1-based line (xlsx: sheet row) of the header
    sheet: str | None
    columns: dict[str, str]  # native field -> the export's header name it was read from
    analytes: tuple[str, ...]  # wide layouts: analytes found from wide.response; else ()
    skipped_lines: tuple[tuple[int, str], ...]  # (line, why) for rows left out


class _CellNumber(str):
    """Text of an XLSX cell stored as a number: already in native form, so never re-separated."""

    __slots__ = ()


@dataclass(frozen=True, slots=True)
class _Grid:
    """The export split into cells, before any column is interpreted."""

    header: tuple[str, ...]
    header_line: int
    records: Iterator[Record]  # the rows after the header, lazily for CSV
    rest: Callable[[int], Iterator[int]]  # non-blank lines after a line, once the footer starts
    skipped: list[tuple[int, str]]  # the preamble
    file_type: str
    encoding: str | None = None
    delimiter: str | None = None
    sheet: str | None = None


# --------------------------------------------------------------------------- CSV


def _has_cell(cells: Iterable[str], key: str) -> bool:
    return any(header_key(cell) == key for cell in cells)


def _csv_grid(text: str, encoding: str, fmt: ExportFormat) -> _Grid:
    if fmt.delimiter != "auto":
        candidates: tuple[str, ...] = (fmt.delimiter,)
    else:
        # With a decimal comma, a comma inside every number makes "," look like the best split.
        candidates = tuple(d for d in _DELIMITERS if not (d == "," and fmt.decimal == ","))
    skip = fmt.header.skip_lines
    find = fmt.header.find
    lines = physical_lines(text)
    skipped: list[tuple[int, str]] = [(number, "preamble") for number, _, _ in islice(lines, skip)]
    header_at: tuple[int, int, str] | None = None
    fitting = candidates
    key = header_key(find) if find is not None else ""
    for number, offset, content in lines:
        if find is None:
            if content.strip():
                header_at = (number, offset, content)
                break
        else:
            fitting = tuple(d for d in candidates if _has_cell(split_line(content, d), key))
            if fitting:
                header_at = (number, offset, content)
                break
            if number - skip >= HEADER_SEARCH_LINES:
                break
        skipped.append((number, "preamble"))
    if header_at is None:
        if find is not None:
            raise InputError(
                f"no header line with a column '{find.strip()}' in the first "
                f"{HEADER_SEARCH_LINES} lines" + (f" after the {skip} skipped" if skip else "")
            )
        after = f" after the {skip} lines header.skip_lines skips" if skip else ""
        raise InputError(f"the file has no header row{after}: only blank lines")
    number, offset, content = header_at
    following = [c for _, _, c in islice((ln for ln in lines if ln[2].strip()), _CONSISTENCY_LINES)]
    delimiter = _choose_delimiter(content, following, fitting)

    records = split_rows(text[offset:], delimiter, number, name_late_notice=False)
    header_start, _, header = next(records)

    def rest(end: int) -> Iterator[int]:
        tail = islice(physical_lines(text[offset:]), end - number + 1, None)
        return (number - 1 + n for n, _, c in tail if c.strip())

    return _Grid(
        tuple(header), header_start, records, rest, skipped, "csv", encoding, delimiter, None
    )


def _choose_delimiter(header: str, following: list[str], candidates: Sequence[str]) -> str:
    """The delimiter splitting the header into most cells; ties: the one the next lines agree on."""

    def score(delimiter: str) -> tuple[int, int]:
        width = len(split_line(header, delimiter))
        agree = sum(len(split_line(line, delimiter)) == width for line in following)
        return width, agree

    return max(candidates, key=score)  # max keeps the first of equals: _DELIMITERS order


# --------------------------------------------------------------------------- XLSX


def _cell_text(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, str):
        return value
    if isinstance(value, bool):  # before int: bool is an int
        return "TRUE" if value else "FALSE"
    if isinstance(value, int):
        return _CellNumber(value)
    if isinstance(value, float):
        whole = value.is_integer() and abs(value) < 2**63
        return _CellNumber(int(value) if whole else repr(value))
    if isinstance(value, datetime | date | time):
        return value.isoformat()
    return str(value)


def _xlsx_grid(data: bytes, fmt: ExportFormat, max_bytes: int) -> _Grid:
    rows: list[tuple[str, ...]] = []
    try:
        with warnings.catch_warnings():
            # openpyxl warns about styles, data validation and the like it cannot keep:
            # nothing of that matters for reading values.
            warnings.filterwarnings("ignore", category=UserWarning, module="openpyxl")
            book = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=True)
            try:
                sheet = _sheet(book, fmt.sheet)
                _refuse_hidden_values(data, getattr(sheet, "_worksheet_path", None))
                # The stored dimensions may be wrong or huge; read only the cells present.
                sheet.reset_dimensions()
                used = 0
                for values in sheet.iter_rows(min_row=1, min_col=1, values_only=True):
                    cells = tuple(map(_cell_text, values))
                    # A workbook may hold no more cell text than a CSV file may hold bytes.
                    used += 1 + len(cells) + sum(map(len, cells))
                    if used > max_bytes:
                        raise InputError(
                            f"the workbook holds more than {max_bytes} characters of cells, "
                            "too many to be a run",
                            len(rows) + 1,
                        )
                    rows.append(cells)
                title = str(sheet.title)
            finally:
                book.close()
    except InputError:
        raise
    except Exception as exc:  # openpyxl raises anything at all on a damaged workbook
        raise InputError(f"not a readable XLSX workbook ({type(exc).__name__}: {exc})") from None
    return _grid_of_rows(rows, fmt, title)


def _refuse_hidden_values(data: bytes, sheet_path: str | None) -> None:
    """Refuse a sheet whose values read-only mode cannot see: merged cells, uncomputed formulas.

    Read-only mode returns a merged range's value in its first cell only, and a
    formula's value only when the program that saved the workbook stored one;
    either would silently read as an empty cell (an empty dilution means 1). The
    sheet's XML is scanned for both. ``sheet_path`` is openpyxl's own record of
    where the sheet lives in the archive (a private attribute: without it the
    scan is skipped rather than guessed).
    """
    if sheet_path is None:
        return
    with zipfile.ZipFile(io.BytesIO(data)) as archive, archive.open(sheet_path) as stream:
        for _, element in ElementTree.iterparse(stream):
            tag = element.tag.rpartition("}")[2]
            if tag == "mergeCell":
                raise InputError(
                    f"the sheet has merged cells ({element.get('ref')}): only their first "
                    "cell holds the value; unmerge them (fill every cell) and export again"
                )
            if tag == "c":
                children = {child.tag.rpartition("}")[2]: child for child in element}
                value = children.get("v")
                if "f" in children and (value is None or not (value.text or "").strip()):
                    raise InputError(
                        f"cell {element.get('r')} holds a formula whose value was never "
                        "computed; open and save the workbook in a spreadsheet program, or "
                        "export values"
                    )
                element.clear()


def _sheet(book: Any, name: str | None) -> Any:
    sheets = list(book.worksheets)
    if name is None:
        if not sheets:
            raise InputError("the workbook has no worksheet")
        return sheets[0]
    for sheet in sheets:
        if sheet.title == name:
            return sheet
    for sheet in sheets:
        if header_key(sheet.title) == header_key(name):
            return sheet
    names = ", ".join(f"'{sheet.title}'" for sheet in sheets)
    raise InputError(f"the workbook has no sheet '{name}'; its sheets are {names}")


def _grid_of_rows(rows: list[tuple[str, ...]], fmt: ExportFormat, sheet: str) -> _Grid:
    skip = fmt.header.skip_lines
    find = fmt.header.find
    key = header_key(find) if find is not None else ""
    index: int | None = None
    for i in range(skip, len(rows)):
        if find is None:
            if not is_blank(rows[i]):
                index = i
                break
        elif _has_cell(rows[i], key):
            index = i
            break
        elif i + 1 - skip >= HEADER_SEARCH_LINES:
            break
    if index is None:
        where = f"sheet '{sheet}'"
        if find is not None:
            raise InputError(
                f"no header row with a column '{find.strip()}' in the first "
                f"{HEADER_SEARCH_LINES} rows of {where}"
                + (f" after the {skip} skipped" if skip else "")
            )
        raise InputError(
            f"{where} has no header row" + (f" after the {skip} skipped" if skip else "")
        )

    def records() -> Iterator[Record]:
        for i in range(index + 1, len(rows)):
            yield i + 1, i + 1, rows[i]

    def rest(end: int) -> Iterator[int]:
        return (i + 1 for i in range(end, len(rows)) if not is_blank(rows[i]))

    preamble = [(i + 1, "preamble") for i in range(index)]
    return _Grid(rows[index], index + 1, records(), rest, preamble, "xlsx", sheet=sheet)


# --------------------------------------------------------------------------- columns


@dataclass(frozen=True, slots=True)
class _WideAnalyte:
    name: str
    response: int
    nominal: int | None
    istd_response: int | None


@dataclass(frozen=True, slots=True)
class _Columns:
    """Which export column feeds which native field."""

    index: dict[str, int]  # native field -> export column (long fields, shared in wide)
    wide: tuple[_WideAnalyte, ...]
    level: int | None
    passthrough: tuple[int, ...]  # export columns kept under their own names


def _find_column(ref: ColumnRef, purpose: str, names: Sequence[str], header_line: int) -> int:
    """The one export column ``ref`` names; InputError naming what was expected otherwise."""
    if isinstance(ref, ColumnByPattern):
        pattern = re.compile(ref.regex, re.IGNORECASE)
        hits = [i for i, name in enumerate(names) if pattern.search(name)]
        wanted = f"a column matching '{ref.regex}'"
        if len(hits) > 1:
            found = ", ".join(f"'{names[i]}'" for i in hits)
            raise InputError(
                f"the format expects one column matching '{ref.regex}' (for {purpose}); "
                f"{found} all match",
                header_line,
                names[hits[0]],
            )
    else:
        hits = [i for i, name in enumerate(names) if header_key(name) == header_key(ref)]
        wanted = f"column '{ref.strip()}'"
    if not hits:
        hint = closest_column(ref, names) if isinstance(ref, str) else None
        meant = f" (did you mean '{hint}'?)" if hint is not None else ""
        raise InputError(
            f"the format expects {wanted} (for {purpose}){meant}; the header on line "
            f"{header_line} has: {', '.join(names)}",
            header_line,
            ref.strip() if isinstance(ref, str) else None,
        )
    return hits[0]


def _resolve(names: Sequence[str], header_line: int, fmt: ExportFormat) -> _Columns:
    index: dict[str, int] = {}
    rows_order = fmt.order == "rows"
    for field, ref in fmt.columns.items():
        if rows_order and field == "seq":
            continue  # the rows' order numbers the injections; that column passes through
        index[field] = _find_column(ref, field, names, header_line)
    level = None
    if fmt.nominals.level_column is not None:
        level = _find_column(fmt.nominals.level_column, "nominals.level_column", names, header_line)
    claimed = set(index.values())
    if level is not None:
        claimed.add(level)

    wide: tuple[_WideAnalyte, ...] = ()
    if fmt.wide is not None:
        wide = _wide_columns(names, header_line, fmt, claimed)
        for analyte in wide:
            claimed.update(
                i
                for i in (analyte.response, analyte.nominal, analyte.istd_response)
                if i is not None
            )

    own = {header_key(name): i for i, name in enumerate(names)}
    for field in NATIVE_FIELDS:
        if field in index or (rows_order and field == "seq"):
            continue
        if fmt.wide is not None and field in ("analyte", "response"):
            continue
        i = own.get(field)
        if i is not None and i not in claimed:
            index[field] = i
            claimed.add(i)

    # Required native fields the layout can make up itself need no column.
    made_up = {"seq"} if rows_order else set()
    if fmt.wide is not None:
        made_up |= {"analyte", "response"}
    if fmt.kinds.patterns or fmt.kinds.default:
        made_up.add("kind")
    required = [field for field in REQUIRED_FIELDS if field not in made_up]
    for field in required:
        if field not in index:
            hint = {
                "seq": " (or order: rows to number injections in file order)",
                "kind": " (or kinds.patterns or kinds.default to tell kinds from sample ids)",
            }.get(field, "")
            close = closest_column(field, (n for i, n in enumerate(names) if i not in claimed))
            meant = f" (did you mean columns.{field}: {close}?)" if close else ""
            raise InputError(
                f"no column for {field}: the header has no column '{field}' and the format "
                f"maps none (set columns.{field}{hint}){meant}; the header on line "
                f"{header_line} has: {', '.join(names)}",
                header_line,
                field,
            )
    passthrough = tuple(i for i in range(len(names)) if i not in claimed or i == level)
    return _Columns(index, wide, level, passthrough)


def _wide_columns(
    names: Sequence[str], header_line: int, fmt: ExportFormat, claimed: set[int]
) -> tuple[_WideAnalyte, ...]:
    assert fmt.wide is not None
    # The more specific per-analyte columns first: "Cu ISTD Area" is an ISTD column even
    # though "(.+) Area" would also take it for the response of an analyte "Cu ISTD".
    roles = (
        ("istd_response", fmt.wide.istd_response),
        ("nominal", fmt.wide.nominal),
        ("response", fmt.wide.response),
    )
    found: dict[str, dict[str, tuple[str, int]]] = {role: {} for role, _ in roles}
    for i, name in enumerate(names):
        if i in claimed:
            continue
        for role, regex in roles:
            if regex is None:
                continue
            hit = re.search(regex, name, re.IGNORECASE)
            if hit is None:
                continue
            analyte = (hit.group(1) or "").strip()
            if not analyte:
                raise InputError(
                    f"column '{name}' matches wide.{role} '{regex}' but names no analyte",
                    header_line,
                    name,
                )
            key = header_key(analyte)
            if key in found[role]:
                other = names[found[role][key][1]]
                raise InputError(
                    f"columns '{other}' and '{name}' both give wide.{role} of analyte '{analyte}'",
                    header_line,
                    name,
                )
            found[role][key] = (analyte, i)
            break
    responses = found["response"]
    if not responses:
        raise InputError(
            f"no column matches wide.response '{fmt.wide.response}'; the header on line "
            f"{header_line} has: {', '.join(names)}",
            header_line,
        )
    for role in ("nominal", "istd_response"):
        for key, (analyte, i) in found[role].items():
            if key not in responses:
                raise InputError(
                    f"column '{names[i]}' gives wide.{role} of analyte '{analyte}', which has "
                    "no response column",
                    header_line,
                    names[i],
                )

    def column(role: str, key: str) -> int | None:
        hit = found[role].get(key)
        return None if hit is None else hit[1]

    return tuple(
        _WideAnalyte(analyte, i, column("nominal", key), column("istd_response", key))
        for key, (analyte, i) in sorted(responses.items(), key=lambda item: item[1][1])
    )


# --------------------------------------------------------------------------- cells


def _number_cleaner(fmt: ExportFormat) -> Callable[[str, int, str], str] | None:
    """Rewrite numbers with the format's separators into native ones; None: nothing to do."""
    decimal, thousands = fmt.decimal, fmt.thousands
    if thousands is None and decimal == ".":
        return None
    # A space as thousands separator is as often a no-break or narrow no-break space.
    seps = (" ", "\u00a0", "\u202f") if thousands == " " else (thousands,) if thousands else ()
    group = "[" + re.escape("".join(seps)) + "]" if seps else ""
    has_sep = re.compile(group).search if seps else None
    grouped = re.compile(
        rf"[+-]?\d{{1,3}}(?:{group}\d{{3}})+(?:{re.escape(decimal)}\d*)?(?:[eE][+-]?\d+)?"
    )
    digit = re.compile(r"\d")
    stray_point = decimal == "," and thousands != "."

    def clean(text: str, line: int, field: str) -> str:
        if type(text) is _CellNumber:
            return text
        cell = text.strip()
        if has_sep is not None and has_sep(cell):
            if not grouped.fullmatch(cell):
                if digit.search(cell):
                    raise InputError(
                        f"{field} '{cell}' holds the thousands separator '{thousands}' but not "
                        "between groups of three digits; is the separator set right?",
                        line,
                        field,
                    )
                return cell  # not a number at all: normalise says so
            for sep in seps:
                cell = cell.replace(sep, "")
        if decimal == ",":
            if stray_point and "." in cell and digit.search(cell):
                # Read as a decimal point it would be off by a factor of a thousand if the
                # export meant a thousands separator; refuse rather than guess.
                raise InputError(
                    f"{field} '{cell}' holds a '.', but the format's decimal separator is ',' "
                    "and it has no thousands separator '.'",
                    line,
                    field,
                )
            cell = cell.replace(",", ".")
        return cell

    return clean


def _kind_resolver(kinds: KindSection) -> Callable[[str, str, int], str]:
    """A row's native kind word from its kind cell and sample id, per ``kinds``."""
    codes = {header_key(code): kind.value for code, kind in kinds.codes.items()}
    patterns = [(re.compile(p.match, re.IGNORECASE), p.kind.value) for p in kinds.patterns]
    default = kinds.default.value if kinds.default is not None else None
    cache: dict[tuple[str, str], str] = {}

    def resolve(text: str, sample_id: str, line: int) -> str:
        key = (text, sample_id)
        kind = cache.get(key)
        if kind is not None:
            return kind
        word = text.strip()
        kind = codes.get(header_key(word)) if word else None
        if kind is None and word and word.lower() in KIND_WORDS:
            kind = KIND_WORDS[word.lower()].value
        if kind is None:
            kind = next((k for pattern, k in patterns if pattern.search(sample_id)), default)
        if kind is None:
            raise InputError(_no_kind(word, sample_id, kinds), line, "kind")
        cache[key] = kind
        return kind

    return resolve


def _no_kind(word: str, sample_id: str, kinds: KindSection) -> str:
    parts = [f"unknown kind '{word}'" if word else "no kind given"]
    if kinds.codes:
        parts.append(f"not one of the format's codes ({', '.join(kinds.codes)})")
    if kinds.patterns:
        listed = ", ".join(f"'{p.match}'" for p in kinds.patterns)
        parts.append(f"sample id '{sample_id}' matches none of the kind patterns ({listed})")
    parts.append("and kinds.default is not set")
    return f"{'; '.join(parts)}; allowed kinds: {ALLOWED_KINDS}"


def _nominal_finder(nominals: NominalSection) -> Callable[[str, str, str], str | None] | None:
    """The configured nominal of a standard by analyte, sample id and level; None: no tables."""
    by_analyte = {
        header_key(analyte): {header_key(k): v for k, v in table.items()}
        for analyte, table in nominals.by_analyte.items()
    }
    by_sample_id = {header_key(k): v for k, v in nominals.by_sample_id.items()}
    by_level = {header_key(k): v for k, v in nominals.by_level.items()}
    if not (by_analyte or by_sample_id or by_level):
        return None

    def find(analyte: str, sample_id: str, level: str) -> str | None:
        sid, lvl = header_key(sample_id), header_key(level)
        value: float | None = None
        table = by_analyte.get(header_key(analyte))
        if table is not None:
            value = table.get(sid)
            if value is None and lvl:
                value = table.get(lvl)
        if value is None:
            value = by_sample_id.get(sid)
        if value is None and lvl:
            value = by_level.get(lvl)
        return None if value is None else repr(float(value))

    return find


def _time_parser(formats: Sequence[str]) -> Callable[[str, int], str]:
    """Rewrite an ``acquired`` cell in one of ``formats`` as ISO 8601."""
    order = list(formats)
    # The analytes of one injection share its time: each distinct text is parsed once.
    done: dict[str, str] = {}

    def parse(text: str, line: int) -> str:
        cell = text.strip()
        if not cell:
            return cell
        known = done.get(cell)
        if known is not None:
            return known
        try:
            # ISO 8601 first, read as normalise reads it (a trailing Z is UTC).
            parse_iso_time(cell)
            done[cell] = cell
            return cell
        except ValueError:
            pass
        for position, form in enumerate(order):
            try:
                value = datetime.strptime(cell, form)
            except ValueError:
                continue
            if position:  # rows share one format: try the one that fitted first next time
                order.insert(0, order.pop(position))
            done[cell] = value.isoformat()
            return done[cell]
        listed = ", ".join(f"'{form}'" for form in formats)
        raise InputError(
            f"acquired '{cell}' is neither ISO 8601 nor in any of the timestamp formats ({listed})",
            line,
            "acquired",
        )

    return parse


# --------------------------------------------------------------------------- rows


class _Converter:
    """Turns export rows into native rows: picks, rewrites and fills cells per the format."""

    def __init__(self, names: Sequence[str], columns: _Columns, fmt: ExportFormat) -> None:
        self.width = len(names)
        self.wide = columns.wide
        self.level = columns.level
        index = columns.index
        filled = {"seq", "sample_id", "kind", "analyte", "response"}
        self.nominal = _nominal_finder(fmt.nominals)
        if self.nominal is not None or any(a.nominal is not None for a in self.wide):
            filled.add("nominal")
        if any(a.istd_response is not None for a in self.wide):
            filled.add("istd_response")
        for field in ("unit", "run", "instrument"):
            if getattr(fmt, field):
                filled.add(field)
        self.fields = tuple(f for f in NATIVE_FIELDS if f in index or f in filled)
        at = {field: i for i, field in enumerate(self.fields)}
        self.at = at
        taken = {header_key(f) for f in self.fields}
        self.header = self.fields + tuple(_unique(names[i], taken) for i in columns.passthrough)
        sources = [index.get(field, self.width) for field in self.fields]
        # One C-level call per row; a field the export lacks points at the padding cell.
        self.pick = itemgetter(*sources, *columns.passthrough)

        self.clean = _number_cleaner(fmt)
        numbers = [f for f in self.fields if f in NUMBER_FIELDS and f in index]
        if "seq" in index:  # only with order: column; rows numbers injections itself
            numbers.append("seq")
        self.numbers = tuple((at[f], f) for f in numbers)
        has_kind_rules = bool(fmt.kinds.codes or fmt.kinds.patterns or fmt.kinds.default)
        self.kind = _kind_resolver(fmt.kinds) if has_kind_rules or "kind" not in index else None
        self.order_rows = fmt.order == "rows"
        self.fills = tuple(
            (at[field], value)
            for field in ("unit", "run", "instrument")
            if (value := getattr(fmt, field))
        )
        self.time = (
            _time_parser(fmt.timestamp_formats)
            if fmt.timestamp_formats and "acquired" in index
            else None
        )
        self.shared_istd = "istd_response" in index
        self.names = {header_key(name): new for name, new in fmt.analyte_names.items()}
        self.seq = 0
        self.previous: str | None = None

    def convert(self, line: int, fields: Sequence[str]) -> list[tuple[str, ...]]:
        """The native rows of one export row (one, or one per measured analyte when wide)."""
        at = self.at
        out = list(self.pick((*fields, "")))
        clean = self.clean
        if clean is not None:
            for position, field in self.numbers:
                out[position] = clean(out[position], line, field)
        sample_id = out[at["sample_id"]].strip()
        if self.kind is not None:
            out[at["kind"]] = self.kind(out[at["kind"]], sample_id, line)
        for position, value in self.fills:
            if not out[position].strip():
                out[position] = value
        if self.time is not None:
            out[at["acquired"]] = self.time(out[at["acquired"]], line)
        if self.wide:
            return self._wide(line, fields, out)
        if self.order_rows:  # a new injection where the sample id changes
            if sample_id != self.previous:
                self.seq += 1
                self.previous = sample_id
            out[at["seq"]] = str(self.seq)
        if self.names:
            out[at["analyte"]] = self._analyte(out[at["analyte"]])
        if self.nominal is not None:
            self._fill_nominal(out, fields, out[at["analyte"]], sample_id)
        return [tuple(out)]

    def _analyte(self, name: str) -> str:
        """The name calwarden reports for an export's analyte name."""
        return self.names.get(header_key(name), name)

    def _wide(self, line: int, fields: Sequence[str], shared: list[str]) -> list[tuple[str, ...]]:
        at = self.at
        sample_id = shared[at["sample_id"]].strip()
        if self.order_rows:  # every injection is a row: the next number, if it is used
            shared[at["seq"]] = str(self.seq + 1)
        rows: list[tuple[str, ...]] = []
        for analyte in self.wide:
            response = fields[analyte.response]
            if not response.strip():
                continue  # the analyte was not measured in this injection
            out = shared.copy()
            name = self._analyte(analyte.name)
            out[at["analyte"]] = name
            out[at["response"]] = self._number(response, line, "response")
            if analyte.nominal is not None:
                out[at["nominal"]] = self._number(fields[analyte.nominal], line, "nominal")
            if analyte.istd_response is not None:
                cell = self._number(fields[analyte.istd_response], line, "istd_response")
                if cell.strip() or not self.shared_istd:
                    out[at["istd_response"]] = cell
            if self.nominal is not None:
                self._fill_nominal(out, fields, name, sample_id)
            rows.append(tuple(out))
        if rows and self.order_rows:
            self.seq += 1
        return rows

    def _number(self, text: str, line: int, field: str) -> str:
        return text if self.clean is None else self.clean(text, line, field)

    def _fill_nominal(
        self, out: list[str], fields: Sequence[str], analyte: str, sample_id: str
    ) -> None:
        assert self.nominal is not None
        position = self.at["nominal"]
        if out[position].strip() or out[self.at["kind"]].strip().lower() not in _NEEDS_NOMINAL:
            return
        level = fields[self.level] if self.level is not None else ""
        value = self.nominal(analyte.strip(), sample_id, level)
        if value is not None:
            out[position] = value


def _unique(name: str, taken: set[str]) -> str:
    """``name`` stripped, renamed if a native field the table produces already has it."""
    shown = name.strip()
    candidate, n = shown, 1
    while header_key(candidate) in taken:
        # e.g. the export's own "Seq" when order: rows numbers the injections itself
        candidate = f"{shown} (export)" if n == 1 else f"{shown} (export {n})"
        n += 1
    taken.add(header_key(candidate))
    return candidate


# --------------------------------------------------------------------------- both


def _is_xlsx(data: bytes, fmt: ExportFormat, suffix: str) -> bool:
    if fmt.file_type != "auto":
        return fmt.file_type == "xlsx"
    return suffix.lower() == ".xlsx" or data.startswith(_ZIP_MAGIC)


def export_table(
    data: bytes,
    fmt: ExportFormat,
    *,
    source: str = "<data>",
    suffix: str = ".csv",
    max_bytes: int = MAX_FILE_BYTES,
    collect: list[InputError] | None = None,
) -> tuple[RawTable, Detected]:
    """Read an export's bytes as ``fmt`` describes into a native :class:`RawTable`.

    ``suffix`` is the file's extension, for ``file_type: auto``. Rows keep the
    export's line numbers (XLSX: sheet rows); a wide row gives one row per
    measured analyte, all on its line. Every problem raises InputError; with
    ``collect`` (``calwarden inspect``), a row's own problem (an unknown kind
    code, a bad number) is appended there and the row left out, so that every
    such row is listed at once.
    """
    check_bytes(data, max_bytes)  # a workbook too
    if _is_xlsx(data, fmt, suffix):
        grid = _xlsx_grid(data, fmt, max_bytes)
    else:
        text = decode(data, fmt.encoding, max_bytes=max_bytes)
        grid = _csv_grid(text.text, text.encoding, fmt)

    header = list(grid.header)
    while header and not header[-1].strip():
        header.pop()  # trailing delimiters or formatted empty columns
    header_line = grid.header_line
    check_header(tuple(header), header_line)
    names = [name.strip() for name in header]
    columns = _resolve(names, header_line, fmt)
    converter = _Converter(names, columns, fmt)
    width = len(names)

    skipped = grid.skipped
    stop = re.compile(fmt.footer.stop_at, re.IGNORECASE) if fmt.footer.stop_at else None
    skips = [(re.compile(p, re.IGNORECASE), p) for p in fmt.footer.skip_matching]
    is_xlsx = grid.file_type == "xlsx"
    rows: list[RawRow] = []
    append = rows.append
    for start, end, fields in grid.records:
        if is_blank(fields):
            skipped.append((start, "blank"))
            continue
        first = fields[0].strip()
        if stop is not None and stop.search(first):
            skipped.append((start, f"footer: matches stop_at '{fmt.footer.stop_at}'"))
            skipped.extend((line, "after the footer") for line in grid.rest(end))
            break
        matched = next((p for rx, p in skips if rx.search(first)), None)
        if matched is not None:
            skipped.append((start, f"matches skip_matching '{matched}'"))
            continue
        try:
            if len(fields) != width:
                fields = _fit(fields, width, start, is_xlsx)
            converted = converter.convert(start, fields)
        except InputError as error:
            if collect is None:
                raise
            collect.append(error)
            continue
        for cells in converted:
            append(RawRow(start, tuple(map(str, cells)) if is_xlsx else cells))

    detected = Detected(
        file_type=grid.file_type,
        encoding=grid.encoding,
        delimiter=grid.delimiter,
        header_line=header_line,
        sheet=grid.sheet,
        columns={field: names[i] for field, i in columns.index.items()},
        analytes=tuple(analyte.name for analyte in columns.wide),
        skipped_lines=tuple(skipped),
    )
    return RawTable(converter.header, tuple(rows), header_line, source), detected


def _fit(fields: Sequence[str], width: int, line: int, is_xlsx: bool) -> Sequence[str]:
    """A row cut or padded to the header's width, where that loses nothing."""
    if len(fields) > width:
        if is_blank(fields[width:]):
            return fields[:width]
        if is_xlsx:
            extra = next(cell for cell in fields[width:] if cell.strip())
            raise InputError(f"a cell right of the last header column holds '{extra}'", line)
    elif is_xlsx:
        return (*fields, *("",) * (width - len(fields)))  # a workbook does not store empty cells
    raise InputError(
        f"expected {width} fields, one per header column, but found {len(fields)}", line
    )


def read_export(
    path: Path, fmt: ExportFormat, *, max_bytes: int = MAX_FILE_BYTES, data: bytes | None = None
) -> tuple[ParsedFile, Detected]:
    """Read an export from disk: hash its bytes, translate it and build its run.

    The size is checked before anything is read and the file is read once; the
    hash is of exactly the bytes parsed. The run is named after the ``run``
    column, else ``fmt.run``, else the file's stem. ``data``: the bytes, already read.
    """
    if data is None:
        data = read_file_bytes(path, max_bytes)
    table, detected = export_table(
        data, fmt, source=str(path), suffix=path.suffix, max_bytes=max_bytes
    )
    run = normalise(table, run_name=fmt.run or path.stem)
    return ParsedFile(path, hashlib.sha256(data).hexdigest(), table, run), detected
