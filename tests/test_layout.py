"""The layout reader: instruments' own exports read into the native table and run."""

from __future__ import annotations

import codecs
import hashlib
from datetime import datetime
from pathlib import Path
from typing import Any

import openpyxl  # type: ignore[import-untyped]
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from calwarden.daemon.parsing.exports import Detected, export_table, read_export
from calwarden.daemon.parsing.native import decode_table, normalise, read_native
from calwarden.daemon.parsing.table import RawTable
from calwarden.daemon.settings.formats import ExportFormat
from calwarden.rules.errors import InputError
from calwarden.rules.model import Kind, Reading

# A small long-layout run in calwarden's own words, reused where only one aspect differs.
NATIVE = (
    "seq,sample_id,kind,analyte,response,nominal\n"
    "1,CAL-0,blank,Cu,12,\n"
    "2,CAL-1,cal,Cu,1012.5,10\n"
    "3,S-1,sample,Cu,505,\n"
)


def layout(**keys: Any) -> ExportFormat:
    """An ExportFormat from keyword arguments, validated as a config file's would be."""
    return ExportFormat.model_validate(keys)


def read(data: str | bytes, fmt: ExportFormat, suffix: str = ".csv") -> tuple[RawTable, Detected]:
    """Translate an export given inline (text as UTF-8)."""
    raw = data.encode("utf-8") if isinstance(data, str) else data
    return export_table(raw, fmt, source="test", suffix=suffix)


def readings(data: str | bytes, fmt: ExportFormat, suffix: str = ".csv") -> tuple[Reading, ...]:
    """The readings the export gives once the native rules have judged its table."""
    table, _ = read(data, fmt, suffix)
    return normalise(table, run_name="test").readings


def utf16(text: str) -> bytes:
    """Text as a Windows program writes UTF-16: little-endian with a byte-order mark."""
    return codecs.BOM_UTF16_LE + text.encode("utf-16-le")


# --------------------------------------------------------------------------- encodings


def test_utf16_semicolon_decimal_comma_with_a_preamble_found_by_name() -> None:
    """A UTF-16 LE export with ';', decimal commas and a 5-line preamble reads by header.find."""
    text = (
        "Result report;QX-7 trace unit\r\n"
        "Operator;A.B.\r\n"
        "Method;Metals in water;rev. 2\r\n"
        "Units;µg/L\r\n"
        "\r\n"
        "Injection;Sample Name;Type;Element;Intensity (cps);Expected\r\n"
        "1;CAL-0;blank;Zn;1194,1;\r\n"
        "2;CAL-1;cal;Zn;10644,6;1,5\r\n"
    )
    fmt = layout(
        decimal=",",
        header={"find": "sample name"},
        columns={
            "seq": "Injection",
            "sample_id": "Sample Name",
            "kind": "Type",
            "analyte": "Element",
            "response": "Intensity (cps)",
            "nominal": "Expected",
        },
    )
    table, detected = read(utf16(text), fmt)
    rows = normalise(table).readings
    assert (detected.encoding, detected.delimiter, detected.header_line) == (
        "utf-16-le (BOM)",
        ";",
        6,
    )
    assert detected.skipped_lines == tuple((line, "preamble") for line in range(1, 6))
    assert [(r.line, r.response, r.nominal) for r in rows] == [(7, 1194.1, None), (8, 10644.6, 1.5)]


def test_cp1252_export_keeps_the_micro_sign_of_its_unit() -> None:
    """Bytes that are not UTF-8 are read as Windows-1252, so 'µg/L' arrives intact."""
    data = "seq,sample_id,kind,analyte,response,unit\n1,S-1,sample,Cu,5,µg/L\n".encode("cp1252")
    table, detected = read(data, layout())
    assert detected.encoding == "cp1252"
    assert normalise(table).readings[0].unit == "µg/L"


def test_undefined_cp1252_byte_is_an_error_on_its_line() -> None:
    """A byte Windows-1252 leaves undefined (0x81) fails the read, naming its line."""
    data = b"seq,sample_id,kind,analyte,response\n1,S-1,sample,Cu,5\n2,S\x81,sample,Cu,6\n"
    with pytest.raises(InputError, match="cp1252") as caught:
        read(data, layout())
    assert caught.value.line == 3


def test_utf8_byte_order_mark_is_reported_and_dropped() -> None:
    """A UTF-8 byte-order mark is noted in the detection and kept out of the first header name."""
    table, detected = read(codecs.BOM_UTF8 + NATIVE.encode("utf-8"), layout())
    assert detected.encoding == "utf-8 (with BOM)"
    assert table.header[0] == "seq"


def test_explicit_encoding_is_honoured() -> None:
    """encoding: utf-8 refuses Windows-1252 bytes instead of falling back, naming the line."""
    data = "seq,sample_id,kind,analyte,response,unit\n1,S-1,sample,Cu,5,µg/L\n".encode("cp1252")
    with pytest.raises(InputError, match="not valid utf-8 text") as caught:
        read(data, layout(encoding="utf-8"))
    assert caught.value.line == 2


def test_control_characters_in_utf16_text_are_refused() -> None:
    """UTF-16 passes the binary check by its text, so a NUL character inside is still refused."""
    with pytest.raises(InputError, match="looks binary") as caught:
        read(utf16(NATIVE.replace("S-1", "S\x00-1")), layout())
    assert caught.value.line == 4


def test_utf16_without_byte_order_mark_gets_a_hint() -> None:
    """UTF-16 text without a mark is refused with a hint to set the encoding."""
    with pytest.raises(InputError, match=r"set format\.encoding: utf-16"):
        read(NATIVE.encode("utf-16-le"), layout())


def test_utf16_without_byte_order_mark_reads_when_configured() -> None:
    """encoding: utf-16 reads little-endian text that has no byte-order mark."""
    table, detected = read(NATIVE.encode("utf-16-le"), layout(encoding="utf-16"))
    assert detected.encoding == "utf-16-le"
    assert len(normalise(table).readings) == 3


@pytest.mark.parametrize("mark", [codecs.BOM_UTF32_LE, codecs.BOM_UTF32_BE], ids=["le", "be"])
@pytest.mark.parametrize("encoding", [None, "auto", "utf-16"])
def test_utf32_text_is_called_utf32(mark: bytes, encoding: str | None) -> None:
    """A UTF-32 file (its mark starts like UTF-16's) is refused as UTF-32, natively or as export."""
    codec = "utf-32-le" if mark == codecs.BOM_UTF32_LE else "utf-32-be"
    data = mark + NATIVE.encode(codec)
    with pytest.raises(InputError, match="the file is UTF-32 text") as caught:
        if encoding is None:
            decode_table(data)
        else:
            read(data, layout(encoding=encoding))
    assert caught.value.line == 1


# --------------------------------------------------------------------------- numbers


@pytest.mark.parametrize(
    ("thousands", "decimal", "cell", "value"),
    [
        (".", ",", '"1.234,5"', 1234.5),
        (",", ".", '"1,234,567.25"', 1234567.25),
        (" ", ",", '"12 345,5"', 12345.5),
        ("'", ".", "12'345", 12345.0),
    ],
)
def test_thousands_separators_are_removed(
    thousands: str, decimal: str, cell: str, value: float
) -> None:
    """Numbers written with thousands separators read as their value."""
    delimiter = ";" if decimal == "," else ","
    text = f"seq{delimiter}sample_id{delimiter}kind{delimiter}analyte{delimiter}response\n"
    text += delimiter.join(["1", "S-1", "sample", "Cu", cell]) + "\n"
    fmt = layout(thousands=thousands, decimal=decimal)
    assert readings(text, fmt)[0].response == value


def test_thousands_separator_out_of_place_is_an_error() -> None:
    """'1,5' under thousands ',' is refused, not read as 15."""
    text = 'seq,sample_id,kind,analyte,response\n1,S-1,sample,Cu,"1,5"\n'
    with pytest.raises(InputError, match="groups of three") as caught:
        read(text, layout(thousands=","))
    assert (caught.value.line, caught.value.column) == (2, "response")


def test_point_in_a_decimal_comma_export_is_an_error() -> None:
    """'1.234' where the decimal separator is ',' is refused, not read as 1.234 or 1234."""
    text = "seq;sample_id;kind;analyte;response\n1;S-1;sample;Cu;1.234\n"
    with pytest.raises(InputError, match="decimal separator is ','") as caught:
        read(text, layout(decimal=","))
    assert (caught.value.line, caught.value.column) == (2, "response")


# --------------------------------------------------------------------------- delimiters


@pytest.mark.parametrize("delimiter", [",", ";", "\t", "|"])
def test_delimiter_is_detected(delimiter: str) -> None:
    """Each of the four delimiters is found from the header line."""
    text = NATIVE.replace(",", delimiter)
    table, detected = read(text, layout())
    assert detected.delimiter == delimiter
    assert [r.response for r in normalise(table).readings] == [12.0, 1012.5, 505.0]


def test_delimiter_ties_are_broken_by_the_lines_below() -> None:
    """A header that ';' and ',' split alike takes the delimiter the data rows agree with."""
    text = "sample_id;Cu Area, net\nS-1;5\nS-2;6\n"
    fmt = layout(order="rows", kinds={"default": "sample"}, wide={"response": "^(.+) Area, net$"})
    table, detected = read(text, fmt)
    assert detected.delimiter == ";"
    assert [r.response for r in normalise(table).readings] == [5.0, 6.0]


def test_decimal_comma_never_detects_a_comma_delimiter() -> None:
    """With decimal ',', a header holding more commas than semicolons is still split on ';'."""
    text = "seq;sample_id;kind;analyte;response;note a,b,c,d,e,f,g\n1;S-1;sample;Cu;2,5;x\n"
    table, detected = read(text, layout(decimal=","))
    assert detected.delimiter == ";"
    assert normalise(table).readings[0].response == 2.5


# --------------------------------------------------------------------------- header and footer


def test_header_not_found_names_the_column_looked_for() -> None:
    """header.find with no such cell fails naming the column and how far it looked."""
    with pytest.raises(InputError, match="no header line with a column 'Sample Name' in the first"):
        read(NATIVE, layout(header={"find": "Sample Name"}))


def test_skip_lines_skips_title_lines_before_the_header() -> None:
    """header.skip_lines leaves out that many lines, recorded as the preamble."""
    table, detected = read(
        "Run 12, by A.B.\nPrinted today\n" + NATIVE, layout(header={"skip_lines": 2})
    )
    assert detected.header_line == 3
    assert [r.line for r in normalise(table).readings] == [4, 5, 6]


def test_footer_rows_are_left_out_and_recorded() -> None:
    """stop_at ends the data, skip_matching and blank rows are skipped; each is recorded."""
    text = (
        "No.,Sample,Kind,Element,Intensity\n"  # 1
        "1,CAL-0,blank,Na,100\n"  # 2
        "Running mean,,,Na,100\n"  # 3
        "\n"  # 4
        "2,S-1,sample,Na,50\n"  # 5
        "Summary,2 injections\n"  # 6
        "\n"  # 7
        'Signed,"A.B., analyst\n'  # 8: an unclosed quote after the footer is not read
    )
    fmt = layout(
        columns={
            "seq": "No.",
            "sample_id": "Sample",
            "analyte": "Element",
            "response": "Intensity",
        },
        footer={"stop_at": "^summary$", "skip_matching": ["^Running mean$"]},
    )
    table, detected = read(text, fmt)
    assert [row.line for row in table.rows] == [2, 5]
    assert detected.skipped_lines == (
        (3, "matches skip_matching '^Running mean$'"),
        (4, "blank"),
        (6, "footer: matches stop_at '^summary$'"),
        (8, "after the footer"),
    )


# --------------------------------------------------------------------------- columns


def test_columns_are_mapped_by_header_name() -> None:
    """A mapped header name fills its native field; unmapped columns pass through."""
    text = " SEQ NO ,Name,Type,Element,Area,Comment\n1,S-1,sample,Cu,5,ok\n"
    fmt = layout(
        columns={
            "seq": "seq no",
            "sample_id": "name",
            "kind": "type",
            "analyte": "element",
            "response": "area",
        }
    )
    table, detected = read(text, fmt)
    assert table.header == ("seq", "sample_id", "kind", "analyte", "response", "Comment")
    assert table.rows[0].fields == ("1", "S-1", "sample", "Cu", "5", "ok")
    assert detected.columns["seq"] == "SEQ NO"


def test_columns_are_mapped_by_regex() -> None:
    """A {regex: ...} column is the one header name the pattern finds, ignoring case."""
    text = "seq,sample_id,kind,analyte,Intensity (cps),RSD\n1,S-1,sample,Cu,5,2\n"
    fmt = layout(columns={"response": {"regex": r"^intensity\b"}})
    table, detected = read(text, fmt)
    assert detected.columns["response"] == "Intensity (cps)"
    assert normalise(table).readings[0].response == 5.0


def test_a_regex_matching_two_columns_is_an_error_naming_both() -> None:
    """A column pattern that two header names match fails, naming both."""
    text = "seq,sample_id,kind,analyte,Area 1,Area 2\n1,S-1,sample,Cu,5,6\n"
    with pytest.raises(InputError, match="'Area 1', 'Area 2' all match"):
        read(text, layout(columns={"response": {"regex": "^area"}}))


def test_a_missing_mapped_column_names_what_was_expected_and_found() -> None:
    """A mapped column absent from the header fails naming it, its field and the header."""
    text = "Preamble\nTitle\n\nseq,sample_id,kind,analyte,Height\n1,S-1,sample,Cu,5\n"
    with pytest.raises(InputError) as caught:
        read(text, layout(header={"skip_lines": 2}, columns={"response": "Area"}))
    assert str(caught.value) == (
        "line 4, column 'Area': the format expects column 'Area' (for response); "
        "the header on line 4 has: seq, sample_id, kind, analyte, Height"
    )


def test_export_column_named_like_a_produced_field_is_renamed() -> None:
    """An export column 'Seq' that order: rows replaces passes through as 'Seq (export)'."""
    text = "Seq,sample_id,kind,analyte,response\n7,S-1,sample,Cu,5\n"
    table, _ = read(text, layout(order="rows"))
    assert table.header == ("seq", "sample_id", "kind", "analyte", "response", "Seq (export)")
    assert table.rows[0].fields[0] == "1"


# --------------------------------------------------------------------------- kinds


def test_kind_codes_map_the_exports_words() -> None:
    """The kind column's codes, matched ignoring case, become native kinds."""
    text = "seq,sample_id,kind,analyte,response,nominal\n1,B,blk,Cu,1,\n2,C,Std,Cu,9,2\n"
    fmt = layout(kinds={"codes": {"BLK": "blank", "STD": "cal"}})
    assert [r.kind for r in readings(text, fmt)] == [Kind.BLANK, Kind.CAL]


def test_native_kind_words_are_kept_beside_codes() -> None:
    """A kind cell already in calwarden's words needs no code."""
    text = "seq,sample_id,kind,analyte,response\n1,B,BLK,Cu,1\n2,S,Sample,Cu,9\n"
    fmt = layout(kinds={"codes": {"BLK": "blank"}})
    assert [r.kind for r in readings(text, fmt)] == [Kind.BLANK, Kind.SAMPLE]


def test_kind_patterns_on_sample_ids_in_order() -> None:
    """Without a kind column, the first sample-id pattern that matches decides."""
    text = "seq,sample_id,analyte,response,nominal\n1,cal-blk,Cu,1,\n2,CAL-1,Cu,9,2\n"
    fmt = layout(
        kinds={
            "patterns": [
                {"match": "^CAL-BLK$", "kind": "blank"},
                {"match": "^CAL-", "kind": "cal"},
            ]
        }
    )
    assert [r.kind for r in readings(text, fmt)] == [Kind.BLANK, Kind.CAL]


def test_kind_default_covers_rows_nothing_else_matches() -> None:
    """kinds.default is the kind of a row no code or pattern names."""
    text = "seq,sample_id,analyte,response\n1,BW-001,Cu,5\n"
    fmt = layout(kinds={"patterns": [{"match": "^MB-", "kind": "mb"}], "default": "sample"})
    assert readings(text, fmt)[0].kind is Kind.SAMPLE


def test_unmapped_kind_is_an_error_on_its_line() -> None:
    """A kind no code, word or pattern covers fails on its line, listing the codes."""
    text = "seq,sample_id,kind,analyte,response\n1,B,BLK,Cu,1\n2,X,QCX,Cu,9\n"
    with pytest.raises(InputError, match=r"unknown kind 'QCX'.*codes \(BLK\)") as caught:
        read(text, layout(kinds={"codes": {"BLK": "blank"}}))
    assert (caught.value.line, caught.value.column) == (3, "kind")


# --------------------------------------------------------------------------- nominals

NO_NOMINAL = (
    "seq,sample_id,kind,analyte,response,Level\n"
    "1,CAL-1,cal,Cu,100,L1\n"
    "1,CAL-1,cal,Zn,300,L1\n"
    "2,S-1,sample,Cu,50,L1\n"
)


def test_nominals_by_sample_id() -> None:
    """A standard without a nominal takes it from nominals.by_sample_id; samples get none."""
    fmt = layout(nominals={"by_sample_id": {"cal-1": 2.5}})
    assert [r.nominal for r in readings(NO_NOMINAL, fmt)] == [2.5, 2.5, None]


def test_nominals_by_level() -> None:
    """A standard's level, from nominals.level_column, looks its nominal up in by_level."""
    fmt = layout(nominals={"level_column": "level", "by_level": {"L1": 4}})
    table, _ = read(NO_NOMINAL, fmt)
    assert [r.nominal for r in normalise(table).readings] == [4.0, 4.0, None]
    assert "Level" in table.header  # the level column also passes through


def test_nominals_by_analyte() -> None:
    """nominals.by_analyte gives each analyte of one standard its own nominal."""
    fmt = layout(nominals={"by_analyte": {"Cu": {"CAL-1": 1}, "zn": {"CAL-1": 3}}})
    assert [r.nominal for r in readings(NO_NOMINAL, fmt)] == [1.0, 3.0, None]


def test_nominal_in_the_file_is_never_overwritten() -> None:
    """A nominal the export gives wins over the format's tables."""
    fmt = layout(nominals={"by_sample_id": {"CAL-1": 2.5}})
    assert readings(NATIVE, fmt)[1].nominal == 10.0


# --------------------------------------------------------------------------- wide

WIDE = (
    "Sample,Type,Cu Area,Zn Area,Cu ISTD Area,Zn ISTD Area,ISTD Area,Cu Expected\n"
    "CAL-1,cal,100,200,50,40,45,2\n"
    "S-1,sample,10,,51,41,46,\n"
)


def test_wide_layout_with_per_analyte_istd() -> None:
    """Each '<analyte> Area' column is an analyte; its ISTD and nominal columns go with it."""
    fmt = layout(
        order="rows",
        columns={"sample_id": "Sample", "kind": "Type"},
        wide={
            "response": "^(?!ISTD )(.+) Area$",  # the shared "ISTD Area" is no analyte
            "istd_response": "^(.+) ISTD Area$",
            "nominal": "^(.+) Expected$",
        },
        nominals={"by_analyte": {"Zn": {"CAL-1": 5}}},
    )
    table, detected = read(WIDE, fmt)
    got = [
        (r.line, r.seq, r.analyte, r.response, r.istd_response, r.nominal)
        for r in normalise(table).readings
    ]
    assert detected.analytes == ("Cu", "Zn")
    assert got == [
        (2, 1, "Cu", 100.0, 50.0, 2.0),
        (2, 1, "Zn", 200.0, 40.0, 5.0),
        (3, 2, "Cu", 10.0, 51.0, None),  # Zn empty: not measured in S-1
    ]


def test_wide_layout_with_a_shared_istd() -> None:
    """A mapped ISTD column serves every analyte and is not taken for an analyte itself."""
    fmt = layout(
        order="rows",
        columns={"sample_id": "Sample", "kind": "Type", "istd_response": "ISTD Area"},
        wide={"response": "^(\\w+) Area$", "nominal": "^(.+) Expected$"},
        nominals={"by_sample_id": {"CAL-1": 7}},
    )
    rows = readings(WIDE, fmt)
    assert [(r.analyte, r.istd_response, r.nominal) for r in rows] == [
        ("Cu", 45.0, 2.0),
        ("Zn", 45.0, 7.0),
        ("Cu", 46.0, None),
    ]


def test_wide_row_without_any_response_is_recorded_as_skipped() -> None:
    """A wide row whose analyte columns are all empty gives no reading and says so."""
    text = "sample_id,kind,Cu Area\nS-1,sample,5\nS-2,sample,\nS-3,sample,7\n"
    fmt = layout(order="rows", wide={"response": "^(.+) Area$"})
    table, _ = read(text, fmt)
    assert [(r.line, r.seq) for r in normalise(table).readings] == [(2, 1), (4, 2)]


# --------------------------------------------------------------------------- order


def test_order_rows_long_numbers_injections_where_the_sample_changes() -> None:
    """order: rows gives one seq to consecutive rows of the same sample id."""
    text = (
        "sample_id,kind,analyte,response\n"
        "B,blank,Cu,1\nB,blank,Zn,2\nS-1,sample,Cu,3\nS-1,sample,Zn,4\nB,blank,Cu,5\n"
    )
    assert [r.seq for r in readings(text, layout(order="rows"))] == [1, 1, 2, 2, 3]


def test_order_rows_wide_numbers_every_row() -> None:
    """order: rows in a wide layout makes each row a new injection, even for one sample id."""
    text = "sample_id,kind,Cu Area,Zn Area\nS-1,sample,1,2\nS-1,sample,3,4\n"
    fmt = layout(order="rows", wide={"response": "^(.+) Area$"})
    assert [(r.seq, r.analyte) for r in readings(text, fmt)] == [
        (1, "Cu"),
        (1, "Zn"),
        (2, "Cu"),
        (2, "Zn"),
    ]


# --------------------------------------------------------------------------- fills and times


def test_unit_run_and_instrument_fill_rows_lacking_them() -> None:
    """fmt.unit, run and instrument fill empty cells and never replace a given one."""
    text = "seq,sample_id,kind,analyte,response,unit\n1,S-1,sample,Cu,5,\n2,S-2,sample,Zn,6,mg/L\n"
    fmt = layout(unit="µg/L", run="R-7", instrument="QX-7")
    table, _ = read(text, fmt)
    run = normalise(table)
    assert [r.unit for r in run.readings] == ["µg/L", "mg/L"]
    assert (run.name, run.instrument) == ("R-7", "QX-7")


def test_timestamps_in_a_configured_format_become_iso() -> None:
    """acquired in a strptime format of timestamp_formats reads; ISO 8601 still does."""
    text = (
        "seq,sample_id,kind,analyte,response,acquired\n"
        "1,S-1,sample,Cu,5,23.11.2026 08:06\n"
        "2,S-2,sample,Cu,6,2026-11-23T08:09:00\n"
        "3,S-3,sample,Cu,7,2026-11-23 08h12\n"
    )
    fmt = layout(timestamp_formats=["%d.%m.%Y %H:%M", "%Y-%m-%d %Hh%M"])
    assert [r.acquired for r in readings(text, fmt)] == [
        datetime(2026, 11, 23, 8, 6),
        datetime(2026, 11, 23, 8, 9),
        datetime(2026, 11, 23, 8, 12),
    ]


def test_timestamp_no_format_fits_is_an_error_naming_the_formats() -> None:
    """A time no format fits fails on its line and column, listing the formats tried."""
    text = "seq,sample_id,kind,analyte,response,acquired\n1,S-1,sample,Cu,5,23/11/2026\n"
    with pytest.raises(InputError, match=r"'%d\.%m\.%Y'") as caught:
        read(text, layout(timestamp_formats=["%d.%m.%Y"]))
    assert (caught.value.line, caught.value.column) == (2, "acquired")


# --------------------------------------------------------------------------- xlsx


def test_xlsx_reads_the_same_as_its_csv_equivalent(tmp_path: Path) -> None:
    """A workbook with numbers and times as cells gives the run of the same data as CSV."""
    fmt = layout(
        sheet="Results",
        header={"skip_lines": 2},
        decimal=",",
        thousands=".",  # for text; cells stored as numbers are left alone
        columns={"seq": "Order", "sample_id": "Sample", "response": "Net signal"},
        kinds={"codes": {"Standard": "cal", "Field sample": "sample"}},
    )
    book = openpyxl.Workbook()
    book.active.title = "Run info"
    sheet = book.create_sheet("Results")
    sheet.append(["Results of run 12"])
    sheet.append(["Printed 2026-11-24"])
    sheet.append(
        ["Order", "Sample", "Kind", "Analyte", "Net signal", "Nominal", "Acquired", "Note"]
    )
    sheet.append([1, "CAL-1", "Standard", "Cu", 1234.5, 2, datetime(2026, 11, 24, 8, 6), None])
    sheet.append([2.0, 1001, "Field sample", "Cu", 505, None, datetime(2026, 11, 24, 8, 9), "late"])
    path = tmp_path / "run.xlsx"
    book.save(path)
    csv_text = (
        "Results of run 12\n"
        "Printed 2026-11-24\n"
        "Order;Sample;Kind;Analyte;Net signal;Nominal;Acquired;Note\n"
        "1;CAL-1;Standard;Cu;1.234,5;2;2026-11-24T08:06:00;\n"
        "2;1001;Field sample;Cu;505;;2026-11-24T08:09:00;late\n"
    )
    parsed, detected = read_export(path, fmt)
    assert (detected.file_type, detected.sheet, detected.header_line) == ("xlsx", "Results", 3)
    assert parsed.run.readings == readings(csv_text, fmt)
    assert parsed.table.rows == read(csv_text, fmt)[0].rows


def test_corrupt_xlsx_is_an_input_error() -> None:
    """Bytes that start like a workbook but are none fail as an unreadable workbook."""
    with pytest.raises(InputError, match="not a readable XLSX workbook"):
        read(b"PK\x03\x04" + b"\x00garbage" * 20, layout(), suffix=".xlsx")


def test_missing_sheet_names_the_sheets_there_are(tmp_path: Path) -> None:
    """A sheet the workbook lacks fails, listing the sheets it has."""
    book = openpyxl.Workbook()
    book.active.title = "Data"
    path = tmp_path / "run.xlsx"
    book.save(path)
    with pytest.raises(InputError, match="no sheet 'Results'; its sheets are 'Data'"):
        read_export(path, layout(sheet="Results"))


# --------------------------------------------------------------------------- the whole read


def test_native_file_through_the_default_format_reads_as_read_native(tmp_path: Path) -> None:
    """A native file read through ExportFormat() gives read_native's run, table rows and hash."""
    text = (
        "Analyte, SEQ ,Sample_ID,Kind,Response,Nominal,Comment,Dilution,Parent,Added,Acquired\n"
        "Cu,1,BLK,Blank,12,,first,,,,2024-05-01T08:00:00Z\n"
        "\n"
        "Cu,2,STD1,CAL,1012.5,10,,1,,,2024-05-01T08:05:00\n"
        "Cu,3,S-001,sample,505,,needs review,2,,,\n"
        "Cu,4,S-001-MS,MS,1010,,,,S-001,5,\n"
    )
    path = tmp_path / "run-7.csv"
    path.write_bytes(text.encode("utf-8"))
    parsed, _ = read_export(path, ExportFormat())
    native = read_native(path)
    assert parsed.run == native.run
    assert parsed.sha256 == native.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert [row.line for row in parsed.table.rows] == [row.line for row in native.table.rows]


def test_read_export_of_a_directory_is_an_input_error(tmp_path: Path) -> None:
    """A path that is not a regular file fails as input, not with an OSError."""
    with pytest.raises(InputError, match="it is a directory"):
        read_export(tmp_path, ExportFormat())


FUZZ_FORMATS = (
    ExportFormat(),
    layout(decimal=",", thousands=".", header={"find": "Name"}, footer={"stop_at": "^End"}),
    layout(order="rows", kinds={"default": "sample"}, wide={"response": "^(.+) Area$"}),
)


@settings(max_examples=60, deadline=None)
@given(
    data=st.one_of(
        st.binary(max_size=200),
        st.text(alphabet='Name;,Area\t|"\r\n 1.5-xkind', max_size=200).map(str.encode),
    ),
    which=st.integers(0, len(FUZZ_FORMATS) - 1),
)
def test_arbitrary_bytes_fail_only_as_input_errors(data: bytes, which: int) -> None:
    """Whatever the bytes, reading them raises nothing but InputError."""
    try:
        table, _ = export_table(data, FUZZ_FORMATS[which])
        normalise(table)
    except InputError:
        pass


# --------------------------------------------------------------------------- analyte names


def test_analyte_names_rename_a_long_export() -> None:
    """analyte_names turns the export's isotope-style names into the lab's names."""
    text = "seq,sample_id,kind,analyte,response,nominal\n1,CAL-1,cal, 66zn ,1000,1\n"
    (reading,) = readings(text, layout(analyte_names={"66Zn": "Zn"}))
    assert reading.analyte == "Zn"


def test_analyte_names_rename_wide_columns() -> None:
    """analyte_names also renames the analytes a wide layout finds in its headers."""
    text = "sample_id,66Zn Area,63Cu Area\nS-1,100,200\n"
    fmt = layout(
        order="rows",
        kinds={"default": "sample"},
        wide={"response": "^(.+) Area$"},
        analyte_names={"66Zn": "Zn"},
    )
    assert [r.analyte for r in readings(text, fmt)] == ["Zn", "63Cu"]


# --------------------------------------------------------------------------- hidden xlsx values


def _workbook(tmp_path: Path, rows: list[list[object]], merge: str | None = None) -> bytes:
    book = openpyxl.Workbook()
    sheet = book.active
    for row in rows:
        sheet.append(row)
    if merge:
        sheet.merge_cells(merge)
    path = tmp_path / "run.xlsx"
    book.save(path)
    return path.read_bytes()


XLSX_ROWS: list[list[object]] = [
    ["seq", "sample_id", "kind", "analyte", "response", "dilution"],
    [1, "S-1", "sample", "Zn", 100, 10],
    [1, "S-1", "sample", "Cu", 200, None],
]


def test_merged_cells_are_refused_not_read_as_empty(tmp_path: Path) -> None:
    """A merged dilution cell would read as empty (dilution 1) on all but its first row: refused."""
    data = _workbook(tmp_path, XLSX_ROWS, merge="F2:F3")
    with pytest.raises(InputError, match=r"merged cells \(F2:F3\)"):
        read(data, layout(), suffix=".xlsx")


def test_formula_without_a_stored_value_is_refused(tmp_path: Path) -> None:
    """A formula the saving program never computed would read as empty: refused, naming the cell."""
    rows = [XLSX_ROWS[0], [1, "S-1", "sample", "Zn", 100, "=2*5"]]
    with pytest.raises(InputError, match="cell F2 holds a formula"):
        read(_workbook(tmp_path, rows), layout(), suffix=".xlsx")
