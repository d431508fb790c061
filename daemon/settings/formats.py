"""How an instrument's own export is laid out: the ``format`` section of a configuration.

A :class:`ExportFormat` describes a layout in YAML so that a lab can point
calwarden at the files its instrument already writes. The layout reader
(``daemon/layout.py``) turns such a file into the native table, which the strict
native rules then judge; nothing in ``rules/`` knows about layouts.
"""

from __future__ import annotations

import codecs
import difflib
import re
from encodings.aliases import aliases
from typing import Literal

from pydantic import Field, field_validator, model_validator

from calwarden.daemon.settings.section import Section
from calwarden.rules.model import Kind

#: Native fields a layout may fill (the columns of the native format).
MAPPABLE_FIELDS = (
    "seq", "sample_id", "kind", "analyte", "response", "nominal", "istd", "istd_response",
    "dilution", "unit", "acquired", "parent", "added", "run", "instrument", "batch",
    "reporting_limit", "source",
    # chromatography and mass spectrometry (rt.window, ion.ratio)
    "retention_time", "istd_retention_time", "qualifier_response",
)  # fmt: skip


def _valid_regex(pattern: str) -> str:
    try:
        re.compile(pattern)
    except re.error as error:
        raise ValueError(f"not a valid regular expression ({error})") from None
    return pattern


class ColumnByPattern(Section):
    """A column found by a regular expression searched in the header name, ignoring case."""

    regex: str

    _check = field_validator("regex")(_valid_regex)


#: A column given by its header name (matched ignoring case and surrounding spaces) or a regex.
ColumnRef = str | ColumnByPattern


class HeaderSection(Section):
    """Where the header row is."""

    skip_lines: int = Field(default=0, ge=0, description="lines before the header row")
    find: str | None = Field(
        default=None,
        description="or: the header is the first line with a cell of this name "
        "(ignoring case and surrounding spaces); lines before it are a preamble",
    )


class FooterSection(Section):
    """Lines after the data that are not data (summaries, signatures)."""

    stop_at: str | None = Field(
        default=None,
        description="regex (searched, ignoring case): the first row whose first cell "
        "matches it, and every line after it, are not data",
    )
    skip_matching: tuple[str, ...] = Field(
        default=(),
        description="regexes (searched, ignoring case): rows whose first cell matches one "
        "are not data",
    )

    @field_validator("stop_at")
    @classmethod
    def _stop_regex(cls, value: str | None) -> str | None:
        return None if value is None else _valid_regex(value)

    @field_validator("skip_matching")
    @classmethod
    def _skip_regexes(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        return tuple(_valid_regex(pattern) for pattern in value)


class KindPattern(Section):
    """Sample ids in which the regex ``match`` is found (ignoring case) are of kind ``kind``."""

    match: str
    kind: Kind

    _check = field_validator("match")(_valid_regex)


class KindSection(Section):
    """How each row's kind is found when the export does not use calwarden's words."""

    codes: dict[str, Kind] = Field(
        default_factory=dict,
        description="the kind column's own codes (matched ignoring case), e.g. STD: cal",
    )
    patterns: tuple[KindPattern, ...] = Field(
        default=(), description="sample-id patterns, tried in order; the first match wins"
    )
    default: Kind | None = Field(
        default=None,
        description="kind of a row nothing else matches; null: such a row is an input error",
    )


class NominalSection(Section):
    """Known concentrations when the export does not carry them."""

    by_sample_id: dict[str, float] = Field(
        default_factory=dict, description="nominal value per sample id (per analyte: see below)"
    )
    level_column: ColumnRef | None = Field(
        default=None, description="a column naming each standard's level"
    )
    by_level: dict[str, float] = Field(
        default_factory=dict, description="nominal value per level name of level_column"
    )
    by_analyte: dict[str, dict[str, float]] = Field(
        default_factory=dict,
        description="per analyte: nominal value per sample id or level name, "
        "when standards hold analytes at different levels",
    )

    @model_validator(mode="after")
    def _levels_need_a_column(self) -> NominalSection:
        if self.by_level and self.level_column is None:
            raise ValueError("by_level needs level_column: the column that names the level")
        return self


class WideSection(Section):
    """One row per injection, one response column per analyte."""

    response: str = Field(
        description="regex searched in each header name, ignoring case: its first group is "
        "the analyte, e.g. '(.+) Area$'; columns mapped under columns are never analytes"
    )
    nominal: str | None = Field(
        default=None, description="regex for per-analyte nominal columns, e.g. '(.+) Expected'"
    )
    istd_response: str | None = Field(
        default=None, description="regex for per-analyte internal-standard response columns"
    )

    @field_validator("response", "nominal", "istd_response")
    @classmethod
    def _one_group(cls, value: str | None) -> str | None:
        if value is None:
            return None
        if re.compile(_valid_regex(value)).groups < 1:
            raise ValueError(f"'{value}' needs a group, ( ), that captures the analyte name")
        return value


class ExportFormat(Section):
    """The layout of an instrument's export; every key has a default."""

    file_type: Literal["csv", "xlsx", "auto"] = Field(
        default="auto", description="file type; auto: by the file's extension and content"
    )
    encoding: str = Field(
        default="auto",
        description="auto, or any text encoding Python knows (utf-8, utf-16, cp1252, cp1250, "
        "shift_jis, gb18030, …); auto: a byte-order mark decides (UTF-8, UTF-16 LE/BE), else "
        "UTF-8 when the bytes are valid UTF-8, else Windows-1252 unless that reads as "
        "implausible text (then the file is refused, to be configured)",
    )
    delimiter: Literal["auto", ",", ";", "\t", "|"] = Field(
        default="auto", description="auto: the one of , ; tab | that splits the header best"
    )
    decimal: Literal[".", ","] = "."
    thousands: Literal[None, ".", ",", " ", "'"] = Field(
        default=None, description="thousands separator to remove from numbers"
    )
    sheet: str | None = Field(default=None, description="XLSX: the sheet (default: the first)")
    header: HeaderSection = HeaderSection()
    footer: FooterSection = FooterSection()
    columns: dict[str, ColumnRef] = Field(
        default_factory=dict,
        description="native field: the export's column (header name or {regex: ...}); "
        "fields not named are looked for under their own name",
    )
    order: Literal["column", "rows"] = Field(
        default="column",
        description="column: seq from the mapped column; rows: injections numbered in file "
        "order (a new injection where the sample id changes, or every row when wide)",
    )
    kinds: KindSection = KindSection()
    nominals: NominalSection = NominalSection()
    wide: WideSection | None = None
    analyte_names: dict[str, str] = Field(
        default_factory=dict,
        description="the export's analyte names (matched ignoring case and surrounding "
        "spaces) to the names calwarden reports and criteria use, e.g. '66Zn': Zn",
    )
    unit: str | None = Field(default=None, description="unit of every row without its own")
    timestamp_formats: tuple[str, ...] = Field(
        default=(),
        description="strptime formats for the acquired column, tried in order "
        "(ISO 8601 is always accepted)",
    )
    run: str | None = Field(default=None, description="run name when the file has none")
    instrument: str | None = Field(default=None, description="instrument name for every row")

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, value: str) -> str:
        if value == "auto":
            return value
        try:
            codecs.lookup(value)
            b"a".decode(value)  # a bytes-to-bytes codec (base64) is no text encoding
        except UnicodeError:
            pass  # a known text encoding that one byte does not make (utf-16)
        except LookupError:
            text_codecs = {  # base64_codec, zlib_codec, rot_13 turn bytes into bytes
                alias: name
                for alias, name in aliases.items()
                if not name.endswith(("_codec", "13"))
            }
            names = ["auto", *sorted(set(text_codecs.values()) | set(text_codecs))]
            close = difflib.get_close_matches(value.lower().replace("-", "_"), names, n=1)
            hint = f" (did you mean {close[0].replace('_', '-')}?)" if close else ""
            raise ValueError(f"'{value}' is not a text encoding Python knows{hint}") from None
        return value

    @field_validator("columns")
    @classmethod
    def _known_fields(cls, value: dict[str, ColumnRef]) -> dict[str, ColumnRef]:
        for name in value:
            if name not in MAPPABLE_FIELDS:
                raise ValueError(
                    f"'{name}' is not a native field; the fields are: {', '.join(MAPPABLE_FIELDS)}"
                )
        return value

    @model_validator(mode="after")
    def _consistent(self) -> ExportFormat:
        if self.thousands is not None and self.thousands == self.decimal:
            raise ValueError("thousands and decimal separators must differ")
        if self.delimiter == self.decimal:
            raise ValueError("the delimiter and the decimal separator must differ")
        if self.order == "rows" and "seq" in self.columns:
            raise ValueError("order: rows numbers the injections itself; do not map columns.seq")
        if self.wide is not None and ("analyte" in self.columns or "response" in self.columns):
            raise ValueError(
                "a wide layout takes analyte and response from wide.response; "
                "do not map them in columns"
            )
        return self
