"""Read the native input format into a :class:`~rules.model.Run`.

The native format is a UTF-8 CSV file (a byte-order mark is accepted) with a
header row and one row per reading of one analyte in one injection. Columns may
come in any order; header names are matched case-insensitively after stripping
surrounding spaces; columns the format does not know are kept in the
:class:`RawTable` so that a flagged copy of the file can carry them through.

Reading happens in two stages, so that other instrument layouts can later be
plugged in as a mapping of column names without touching the rules:

1. :func:`decode_table` turns bytes into a :class:`RawTable` of strings: size
   check, binary check, UTF-8 decoding, CSV splitting, field-count check.
2. :func:`normalise` maps native fields to header columns, converts the types
   and builds the validated :class:`~rules.model.Reading` and
   :class:`~rules.model.Run` objects.

:func:`read_native` does both for a file on disk. Every problem with the input
raises :class:`~rules.errors.InputError` naming the line (and the column where
one applies); no other exception escapes for bad input.
"""

from __future__ import annotations

import codecs
import csv
import hashlib
import io
import math
import stat
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from operator import itemgetter
from pathlib import Path

from calwarden.rules.errors import ConfigError, InputError
from calwarden.rules.model import Kind, Reading, Run

__all__ = [
    "MAX_FILE_BYTES",
    "NATIVE_FIELDS",
    "OPTIONAL_FIELDS",
    "REQUIRED_FIELDS",
    "ParsedFile",
    "RawRow",
    "RawTable",
    "decode_table",
    "header_key",
    "normalise",
    "read_native",
]

#: Files larger than this are refused without being read: no run is that big.
MAX_FILE_BYTES = 200 * 1024 * 1024

#: Columns every native file must have.
REQUIRED_FIELDS: tuple[str, ...] = ("seq", "sample_id", "kind", "analyte", "response")
#: Columns a native file may have; an empty cell means "not given".
OPTIONAL_FIELDS: tuple[str, ...] = (
    "nominal",
    "istd",
    "istd_response",
    "dilution",
    "unit",
    "acquired",
    "parent",
    "added",
    "run",
    "instrument",
    "batch",
)
#: Every column the native format knows, required first.
NATIVE_FIELDS: tuple[str, ...] = REQUIRED_FIELDS + OPTIONAL_FIELDS

#: Share of control bytes above which a file is taken for binary data.
_CONTROL_SHARE = 0.05
#: Control bytes that never belong in a text file (tab, LF and CR do).
_CONTROL_BYTES = bytes([*range(0x00, 0x09), 0x0B, 0x0C, *range(0x0E, 0x20), 0x7F])

_KINDS: dict[str, Kind] = {kind.value: kind for kind in Kind}
_ALLOWED_KINDS = ", ".join(kind.value for kind in Kind)


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


@dataclass(frozen=True, slots=True)
class ParsedFile:
    """A native file read from disk: its bytes' hash, the raw table and the run."""

    path: Path
    sha256: str
    table: RawTable
    run: Run


def header_key(name: str) -> str:
    """The form header names are matched in: surrounding spaces stripped, case folded."""
    return name.strip().casefold()


# --------------------------------------------------------------------------- stage 1


def _line_at(data: bytes, offset: int) -> int:
    """The 1-based physical line holding byte ``offset`` (LF, CRLF and lone CR end lines)."""
    head = data[:offset]
    return head.count(b"\n") + head.count(b"\r") - head.count(b"\r\n") + 1


def _check_binary(data: bytes) -> None:
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        raise InputError("the file is UTF-16 text, which reads as binary here; save it as UTF-8", 1)
    nul = data.find(b"\0")
    if nul >= 0:
        raise InputError(
            "the file looks binary, not text: it holds a NUL byte", _line_at(data, nul)
        )
    controls = len(data) - len(data.translate(None, _CONTROL_BYTES))
    if controls and controls > _CONTROL_SHARE * len(data):
        first = min(i for i in (data.find(bytes([b])) for b in _CONTROL_BYTES) if i >= 0)
        raise InputError(
            f"the file looks binary, not text: {controls} of its {len(data)} bytes "
            f"are control characters (the first is on this line)",
            _line_at(data, first),
        )


def _decode(data: bytes) -> str:
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        bad = data[exc.start : exc.start + 1].hex()
        raise InputError(
            f"the file is not valid UTF-8 text: byte 0x{bad} cannot be decoded "
            f"(was it saved as Latin-1 or Windows-1252? save it as UTF-8)",
            _line_at(data, exc.start),
        ) from None


def decode_table(
    data: bytes, *, source: str = "<data>", max_bytes: int = MAX_FILE_BYTES
) -> RawTable:
    """Split a file's bytes into a :class:`RawTable`, refusing anything that is not a CSV table.

    The first non-blank row is the header; blank rows (every field empty) are
    skipped. Every other row must have exactly one field per header column.
    """
    if len(data) > max_bytes:
        raise InputError(
            f"the file is too large to be a run: {len(data)} bytes, the limit is {max_bytes}"
        )
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8) :]
    if not data:
        raise InputError("the file is empty")
    _check_binary(data)
    text = _decode(data)

    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    header: tuple[str, ...] | None = None
    header_line = 0
    width = 0
    rows: list[RawRow] = []
    append = rows.append
    end = 0  # physical line on which the previous row ended
    try:
        for fields in reader:
            start = end + 1
            end = reader.line_num
            if not "".join(fields).strip():
                continue  # a blank line, or a row of empty cells
            if header is None:
                header = tuple(fields)
                header_line = start
                width = len(header)
                _check_header(header, header_line)
                continue
            if len(fields) != width:
                raise InputError(
                    f"expected {width} fields, one per header column, but found {len(fields)}",
                    start,
                )
            append(RawRow(start, tuple(fields)))
    except csv.Error as exc:
        if str(exc) == "unexpected end of data":
            reason = "a quote opened on this row is never closed: the file ends inside it"
        else:
            seen = "" if reader.line_num == end + 1 else f" (noticed on line {reader.line_num})"
            reason = f"the row cannot be split as CSV: {exc}{seen}; is a quote left unclosed?"
        raise InputError(reason, end + 1) from None
    if header is None:
        raise InputError("the file has no header row: it holds only blank lines")
    return RawTable(header, tuple(rows), header_line, source)


def _check_header(header: tuple[str, ...], line: int) -> None:
    seen: dict[str, int] = {}
    for position, name in enumerate(header, start=1):
        key = header_key(name)
        if not key:
            raise InputError(f"header column {position} has no name", line)
        if key in seen:
            raise InputError(
                f"header name '{name.strip()}' is given twice (columns {seen[key]} and {position})",
                line,
                name.strip(),
            )
        seen[key] = position


# --------------------------------------------------------------------------- stage 2


def _number(text: str, line: int, column: str) -> float:
    if not text:
        raise InputError(f"{column} is empty", line, column)
    try:
        value = float(text)
    except ValueError:
        hint = " (use a point as the decimal separator)" if "," in text else ""
        raise InputError(f"{column} must be a number, got '{text}'{hint}", line, column) from None
    if "_" in text or not text.isascii():
        raise InputError(f"{column} must be a plain number, got '{text}'", line, column)
    if not math.isfinite(value):
        raise InputError(f"{column} must be a finite number, got '{text}'", line, column)
    return value


def _seq(text: str, line: int) -> int:
    if not text:
        raise InputError("seq is empty", line, "seq")
    try:
        value = int(text)
    except ValueError:
        raise InputError(f"seq must be a whole number, got '{text}'", line, "seq") from None
    if "_" in text or not text.isascii():
        raise InputError(f"seq must be a plain whole number, got '{text}'", line, "seq")
    if value < 0:
        raise InputError(f"seq must not be negative, got {value}", line, "seq")
    return value


def _kind(text: str, line: int) -> Kind:
    kind = _KINDS.get(text.lower())
    if kind is None:
        shown = f"unknown kind '{text}'" if text else "kind is empty"
        raise InputError(f"{shown}; allowed kinds: {_ALLOWED_KINDS}", line, "kind")
    return kind


def _timestamp(text: str, line: int) -> datetime:
    iso = text[:-1] + "+00:00" if text[-1:] in ("Z", "z") else text
    try:
        return datetime.fromisoformat(iso)
    except ValueError:
        raise InputError(
            f"acquired must be an ISO 8601 date and time such as 2024-05-01T14:30:00, got '{text}'",
            line,
            "acquired",
        ) from None


def _resolve_columns(table: RawTable, mapping: Mapping[str, str] | None) -> dict[str, int]:
    """Map every native field found in the header to its column index."""
    wanted: dict[str, str] = {field: field for field in NATIVE_FIELDS}
    if mapping:
        unknown = sorted(set(mapping) - set(NATIVE_FIELDS))
        if unknown:
            raise ConfigError(
                f"the column mapping names unknown fields: {', '.join(unknown)}; "
                f"known fields: {', '.join(NATIVE_FIELDS)}"
            )
        wanted.update(mapping)
    index = {header_key(name): i for i, name in enumerate(table.header)}
    found = {
        field: index[header_key(col)] for field, col in wanted.items() if header_key(col) in index
    }
    missing = [field for field in REQUIRED_FIELDS if field not in found]
    if missing:
        names = ", ".join(
            f"'{wanted[f]}'" if wanted[f] == f else f"'{wanted[f]}' (for {f})" for f in missing
        )
        plural = "s" if len(missing) > 1 else ""
        hint = (
            "; is the header row missing?"
            if not any(field in found for field in NATIVE_FIELDS)
            else ""
        )
        raise InputError(
            f"required column{plural} {names} missing; the header has: "
            f"{', '.join(name.strip() for name in table.header)}{hint}",
            table.header_line,
            missing[0],
        )
    return found


def normalise(
    table: RawTable, mapping: Mapping[str, str] | None = None, *, run_name: str | None = None
) -> Run:
    """Turn a :class:`RawTable` into a validated :class:`~rules.model.Run`.

    ``mapping`` maps native field names to the header columns that hold them;
    a native field it does not name is looked for under its own name. Cells are
    stripped of surrounding spaces; an empty optional cell means "not given"
    (an empty ``dilution`` means 1). The run is named after the ``run`` column
    when a row gives one, else ``run_name``.
    """
    col = _resolve_columns(table, mapping)
    width = len(table.header)
    # One C-level call picks every native field of a row, in NATIVE_FIELDS order; a
    # field the file lacks points one past the row, at the empty padding cell.
    pick = itemgetter(*(col.get(field, width) for field in NATIVE_FIELDS))
    pad = ("",)
    strip = str.strip
    kinds = _KINDS
    readings: list[Reading] = []
    append = readings.append
    for row in table.rows:
        line = row.line
        if len(row.fields) != width:  # decode_table ensures it; a hand-built table may not
            raise InputError(f"expected {width} fields, found {len(row.fields)}", line)
        cells = tuple(map(strip, pick(row.fields + pad)))
        (
            seq, sample_id, kind, analyte, response,
            nominal, istd, istd_response, dilution, unit,
            acquired, parent, added, run, instrument, batch,
        ) = cells  # fmt: skip
        # Fast path: plain conversions. Anything odd goes to _check_cells, which
        # applies the strict rules one cell at a time and raises the precise error.
        # nan and inf convert here; Reading refuses them, and the handler below
        # then names the cell the way _check_cells words it.
        numbers = seq + response + nominal + istd_response + dilution + added
        try:
            v_seq = int(seq)
            v_response = float(response)
            v_nominal = float(nominal) if nominal else None
            v_istd_response = float(istd_response) if istd_response else None
            v_dilution = float(dilution) if dilution else 1.0
            v_added = float(added) if added else None
            v_kind = kinds[kind.lower()]
        except (ValueError, KeyError):
            _check_cells(cells, line)
            raise InputError("the row cannot be read", line) from None  # pragma: no cover
        if v_seq < 0 or "_" in numbers or not numbers.isascii():
            _check_cells(cells, line)
        try:
            reading = Reading(
                line=line,
                seq=v_seq,
                sample_id=sample_id,
                kind=v_kind,
                analyte=analyte,
                response=v_response,
                nominal=v_nominal,
                istd=istd or None,
                istd_response=v_istd_response,
                dilution=v_dilution,
                unit=unit or None,
                acquired=_timestamp(acquired, line) if acquired else None,
                parent=parent or None,
                added=v_added,
                run=run or None,
                instrument=instrument or None,
                batch=batch or None,
            )
        except InputError:
            # A number the fast path let through (nan, inf, 1e999) gets the precise message.
            _check_cells(cells, line)
            raise
        append(reading)
    if not readings:
        raise InputError("the file has a header but holds no readings", table.header_line)
    named = any(reading.run for reading in readings)
    return Run.of(readings, None if named else run_name)


_NUMERIC_FIELDS = frozenset({"response", "nominal", "istd_response", "dilution", "added"})


def _check_cells(cells: tuple[str, ...], line: int) -> None:
    """Apply the strict cell rules one by one, raising InputError for the first broken cell."""
    for field, text in zip(NATIVE_FIELDS, cells, strict=True):
        if field == "seq":
            _seq(text, line)
        elif field == "kind":
            _kind(text, line)
        elif field in _NUMERIC_FIELDS and (text or field == "response"):
            _number(text, line, field)


# --------------------------------------------------------------------------- both


def read_file_bytes(path: Path, max_bytes: int = MAX_FILE_BYTES) -> bytes:
    """A run file's bytes, read once; refuses what is not a regular file or is too large.

    The size is checked before anything is read, so a huge file is never loaded.
    """
    try:
        info = path.stat()
        if not stat.S_ISREG(info.st_mode):
            kind = "a directory" if stat.S_ISDIR(info.st_mode) else "not a regular file"
            raise InputError(f"cannot read {path}: it is {kind}")
        if info.st_size > max_bytes:
            raise InputError(
                f"the file is too large to be a run: {info.st_size} bytes, the limit is {max_bytes}"
            )
        with path.open("rb") as handle:
            return handle.read(max_bytes + 1)  # a file growing since stat still hits the limit
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror or exc}") from None


def read_native(
    path: Path, *, max_bytes: int = MAX_FILE_BYTES, data: bytes | None = None
) -> ParsedFile:
    """Read a native file from disk: hash its bytes, split it and build its run.

    The size is checked before anything is read, and the file is read once; the
    hash is of exactly the bytes parsed. The run is named after the ``run``
    column when the file has one, else after the file's stem. ``data``, when
    given, is the file's bytes already read (the watcher hashes what it judges).
    """
    if data is None:
        data = read_file_bytes(path, max_bytes)
    table = decode_table(data, source=str(path), max_bytes=max_bytes)
    run = normalise(table, run_name=path.stem)
    return ParsedFile(path, hashlib.sha256(data).hexdigest(), table, run)
