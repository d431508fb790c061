"""Stage 3 of reading a file: a table in native columns → a :class:`~rules.model.Run`.

The native format is simply the default layout (``table.split_table``) of a
UTF-8 CSV file (a byte-order mark is accepted): a header row and one row per
reading of one analyte in one injection. Columns may come in any order; header
names are matched case-insensitively after stripping surrounding spaces;
columns the format does not know are kept in the :class:`~table.RawTable` so
that a flagged copy of the file can carry them through.

:func:`decode_table` is the native file's first two stages (``decode``, then
``table.split_table``); :func:`normalise` is the last stage for every layout:
it maps native fields to header columns, converts the types and builds the
validated :class:`~rules.model.Reading` and :class:`~rules.model.Run`
objects. An instrument export (``exports.py``) is translated into a table in
native columns, and ``normalise`` then judges it by the same rules.

:func:`read_native` does it all for a file on disk. Every problem with the
input raises :class:`~rules.errors.InputError` naming the line (and the column
where one applies); no other exception escapes for bad input.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from operator import itemgetter
from pathlib import Path

from calwarden.daemon.parsing.decode import MAX_FILE_BYTES, decode, excerpt, read_file_bytes
from calwarden.daemon.parsing.table import RawTable, closest_column, header_key, split_table
from calwarden.rules.errors import ConfigError, InputError
from calwarden.rules.model import CHROMATOGRAPHY_COLUMNS, Kind, Reading, Run

__all__ = [
    "ALLOWED_KINDS",
    "KIND_WORDS",
    "MAX_SEQ",
    "NATIVE_FIELDS",
    "NUMBER_FIELDS",
    "OPTIONAL_FIELDS",
    "REQUIRED_FIELDS",
    "ParsedFile",
    "decode_table",
    "normalise",
    "parse_iso_time",
    "read_native",
]

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
    # issue 15, reporting limits and standards' sources
    "reporting_limit",
    "source",
)
#: Chromatography and mass-spectrometry columns (rt.window, ion.ratio): read by a block of
#: their own, only when a file has them, so the common path stays as fast as before.
CHROMATOGRAPHY_FIELDS: tuple[str, ...] = CHROMATOGRAPHY_COLUMNS
#: The columns the main row path unpacks, in this order.
_CORE_FIELDS: tuple[str, ...] = REQUIRED_FIELDS + OPTIONAL_FIELDS
#: Every column the native format knows, required first.
NATIVE_FIELDS: tuple[str, ...] = _CORE_FIELDS + CHROMATOGRAPHY_FIELDS
#: Native fields whose cells are decimal numbers (``seq`` is a whole one).
NUMBER_FIELDS = frozenset(
    {
        "response",
        "nominal",
        "istd_response",
        "dilution",
        "added",
        "reporting_limit",
        *CHROMATOGRAPHY_FIELDS,
    }
)

#: The largest seq: every JSON reader holds it exactly (a double's whole numbers end at
#: 2^53 - 1) and so does the ledger's 64-bit INTEGER (a larger one stopped the daemon).
MAX_SEQ = 2**53 - 1

#: The native kind words (lower case) and the kinds they name.
KIND_WORDS: dict[str, Kind] = {kind.value: kind for kind in Kind}
#: The kind words, for messages.
ALLOWED_KINDS = ", ".join(kind.value for kind in Kind)


@dataclass(frozen=True, slots=True)
class ParsedFile:
    """A file read from disk: its bytes' hash, the table in native columns and the run."""

    path: Path
    sha256: str
    table: RawTable
    run: Run


def decode_table(
    data: bytes, *, source: str = "<data>", max_bytes: int = MAX_FILE_BYTES
) -> RawTable:
    """A native file's bytes as a :class:`RawTable`, refusing anything that is not a CSV table."""
    return split_table(decode(data, max_bytes=max_bytes).text, source=source)


def parse_iso_time(text: str) -> datetime:
    """An ISO 8601 date and time, a trailing Z read as UTC; ValueError if it is not one."""
    return datetime.fromisoformat(text[:-1] + "+00:00" if text[-1:] in ("Z", "z") else text)


# --------------------------------------------------------------------------- cells


def _number(text: str, line: int, column: str) -> float:
    if not text:
        raise InputError(f"{column} is empty", line, column)
    try:
        value = float(text)
    except ValueError:
        hint = " (use a point as the decimal separator)" if "," in text else ""
        raise InputError(
            f"{column} must be a number, got '{excerpt(text)}'{hint}", line, column
        ) from None
    if "_" in text or not text.isascii():
        raise InputError(f"{column} must be a plain number, got '{excerpt(text)}'", line, column)
    if not math.isfinite(value):
        raise InputError(f"{column} must be a finite number, got '{excerpt(text)}'", line, column)
    return value


def _seq(text: str, line: int) -> int:
    if not text:
        raise InputError("seq is empty", line, "seq")
    try:
        value = int(text)
    except ValueError:
        raise InputError(
            f"seq must be a whole number, got '{excerpt(text)}'", line, "seq"
        ) from None
    if "_" in text or not text.isascii():
        raise InputError(f"seq must be a plain whole number, got '{excerpt(text)}'", line, "seq")
    if value < 0:
        raise InputError(f"seq must not be negative, got {value}", line, "seq")
    if value > MAX_SEQ:
        raise InputError(
            f"seq must be at most {MAX_SEQ} (2^53 - 1), got '{excerpt(text)}'", line, "seq"
        )
    return value


def _kind(text: str, line: int) -> Kind:
    kind = KIND_WORDS.get(text.lower())
    if kind is None:
        shown = f"unknown kind '{excerpt(text)}'" if text else "kind is empty"
        raise InputError(f"{shown}; allowed kinds: {ALLOWED_KINDS}", line, "kind")
    return kind


def _timestamp(text: str, line: int) -> datetime:
    try:
        return parse_iso_time(text)
    except ValueError:
        raise InputError(
            "acquired must be an ISO 8601 date and time such as 2024-05-01T14:30:00, "
            f"got '{excerpt(text)}'",
            line,
            "acquired",
        ) from None


# --------------------------------------------------------------------------- rows


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
        taken = {table.header[i].strip() for i in found.values()}
        hints = [
            f"'{excerpt(hint)}' for {wanted[f]}"
            for f in missing
            if (hint := closest_column(wanted[f], table.header)) is not None and hint not in taken
        ]
        meant = f" (did you mean {', '.join(hints)}?)" if hints else ""
        header = ", ".join(name.strip() for name in table.header)
        if any(field in found for field in NATIVE_FIELDS):
            shown = f"the header has: {excerpt(header, 200)}"
        else:
            # Perhaps not a run at all (a link to a system file): quote only its start.
            shown = f"the first row begins '{excerpt(header, 12)}'; is the header row missing?"
        raise InputError(
            f"required column{plural} {names} missing{meant}; {shown}",
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
    pick = itemgetter(*(col.get(field, width) for field in _CORE_FIELDS))
    chromatography = [(field, col[field]) for field in CHROMATOGRAPHY_FIELDS if field in col]
    pad = ("",)
    strip = str.strip
    kinds = KIND_WORDS
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
            reporting_limit, source,
        ) = cells  # fmt: skip
        # Fast path: plain conversions. Anything odd goes to _check_cells, which
        # applies the strict rules one cell at a time and raises the precise error.
        # nan and inf convert here; Reading refuses them, and the handler below
        # then names the cell the way _check_cells words it.
        numbers = seq + response + nominal + istd_response + dilution + added + reporting_limit
        try:
            v_seq = int(seq)
            v_response = float(response)
            v_nominal = float(nominal) if nominal else None
            v_istd_response = float(istd_response) if istd_response else None
            v_dilution = float(dilution) if dilution else 1.0
            v_added = float(added) if added else None
            v_reporting_limit = float(reporting_limit) if reporting_limit else None
            v_kind = kinds[kind.lower()]
        except (ValueError, KeyError):
            _check_cells(cells, line)
            raise InputError("the row cannot be read", line) from None  # pragma: no cover
        if v_seq < 0 or v_seq > MAX_SEQ or "_" in numbers or not numbers.isascii():
            _check_cells(cells, line)
        timing = _chromatography(row.fields, chromatography, line) if chromatography else _NONE3
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
                reporting_limit=v_reporting_limit,
                source=source or None,
                retention_time=timing[0],
                istd_retention_time=timing[1],
                qualifier_response=timing[2],
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


_Three = tuple[float | None, float | None, float | None]
_NONE3: _Three = (None, None, None)


def _chromatography(fields: Sequence[str], columns: Sequence[tuple[str, int]], line: int) -> _Three:
    """The row's retention time, ISTD retention time and qualifier response, read strictly."""
    values: dict[str, float | None] = {}
    for field, index in columns:
        text = fields[index].strip()
        values[field] = _number(text, line, field) if text else None
    return (
        values.get("retention_time"),
        values.get("istd_retention_time"),
        values.get("qualifier_response"),
    )


def _check_cells(cells: tuple[str, ...], line: int) -> None:
    """Apply the strict cell rules one by one, raising InputError for the first broken cell."""
    for field, text in zip(_CORE_FIELDS, cells, strict=True):
        if field == "seq":
            _seq(text, line)
        elif field == "kind":
            _kind(text, line)
        elif field in NUMBER_FIELDS and (text or field == "response"):
            _number(text, line, field)


# --------------------------------------------------------------------------- a file


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
