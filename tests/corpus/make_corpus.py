"""Write the hostile-input corpus: one small file per class of bad or careless input.

    python tests/corpus/make_corpus.py

Deterministic: it rewrites ``tests/corpus/files/`` (not kept in git) and
``tests/corpus/index.yaml`` (kept) from the classes below, byte for byte the same each
time; ``tests/test_corpus.py`` writes the files afresh into a temporary folder and
checks that the committed index is what this script writes. Every class is a small
variation of one passing run (``BASE``: a Zn calibration with its blank, six standards
at 1-50 µg/L, an ICV, two samples and a closing CCV), or of the invented laboratory's
exports in ``fixtures/exports/``, with what ``calwarden check --json`` must give:

- ``exit``: 0 pass, 1 fail, 2 error; ``status`` follows from it;
- ``message``: a text the error (for ``error``) or one finding's message must hold;
- ``rule``: a rule id one finding must carry (with ``severity``, when given);
- ``special``: a path the test makes itself (a FIFO, a directory, a link), since git
  does not keep such things;
- ``out``: also write the outputs (``--out``), and ``flagged``: a text the flagged copy
  must hold.

To add a class, add one ``case(...)`` line below (name it after what it catches) and
rerun the script; see DEVELOPERS.md.
"""

from __future__ import annotations

import io
import shutil
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

HERE = Path(__file__).resolve().parent
PROJECT = HERE.parent.parent
FILES = HERE / "files"
CONFIGS = HERE / "configs"

HEADER = "seq,sample_id,kind,analyte,response,nominal,dilution,unit"
#: A passing run, response = 100 + 1000·c (blank subtracted, a perfect line).
BASE_ROWS = [
    "1,CAL-BLK,blank,Zn,100,,,µg/L",
    "2,CAL-1,cal,Zn,1104,1,,µg/L",
    "3,CAL-2,cal,Zn,2094,2,,µg/L",
    "4,CAL-3,cal,Zn,5110,5,,µg/L",
    "5,CAL-4,cal,Zn,10080,10,,µg/L",
    "6,CAL-5,cal,Zn,20120,20,,µg/L",
    "7,CAL-6,cal,Zn,50075,50,,µg/L",
    "8,ICV,icv,Zn,10110,10,,µg/L",
    "9,S-1,sample,Zn,3100,,,µg/L",
    "10,S-2,sample,Zn,7100,,2,µg/L",
    "11,CCV-1,ccv,Zn,20050,20,,µg/L",
]
COLUMNS = HEADER.split(",")


@dataclass
class Case:
    name: str
    data: bytes | None
    exit: int
    message: str | None = None
    rule: str | None = None
    severity: str | None = None
    config: str | None = None
    suffix: str = ".csv"
    special: str | None = None
    out: bool = False
    flagged: str | None = None
    file_name: str | None = None
    extra: dict[str, Any] = field(default_factory=dict)


CASES: list[Case] = []


def case(name: str, data: bytes | str | None, exit: int, **kw: Any) -> None:
    if isinstance(data, str):
        data = data.encode("utf-8")
    CASES.append(Case(name, data, exit, **kw))


def text(rows: list[str], header: str = HEADER, end: str = "\n") -> str:
    return end.join([header, *rows]) + end


def base() -> str:
    return text(BASE_ROWS)


def with_cell(row: int, column: str, value: str, rows: list[str] | None = None) -> str:
    """BASE with one cell changed: ``row`` indexes BASE_ROWS, ``column`` names the field."""
    rows = list(rows or BASE_ROWS)
    cells = rows[row].split(",")
    cells[COLUMNS.index(column)] = value
    rows[row] = ",".join(cells)
    return text(rows)


def without_column(column: str) -> str:
    index = COLUMNS.index(column)
    header = ",".join(c for i, c in enumerate(COLUMNS) if i != index)
    rows = [",".join(c for i, c in enumerate(r.split(",")) if i != index) for r in BASE_ROWS]
    return text(rows, header)


def add_rows(*extra: str) -> str:
    return text([*BASE_ROWS[:-1], *extra, BASE_ROWS[-1]])


# Row indexes into BASE_ROWS.
BLANK, CAL1, CAL6, ICV, S1, S2, CCV = 0, 1, 6, 7, 8, 9, 10

# --------------------------------------------------------------------------- the base itself
case("base_run_passes", base(), 0)
case("crlf_line_ends", text(BASE_ROWS, end="\r\n"), 0)
case("lone_cr_line_ends", text(BASE_ROWS, end="\r"), 0)
case("mixed_line_ends", base().replace("\n", "\r\n", 4), 0)
case("no_final_line_end", base().rstrip("\n"), 0)
case("blank_lines_between_rows", base().replace("\n9,", "\n\n\n9,"), 0)
case(
    "columns_in_another_order",
    text([",".join(reversed(r.split(","))) for r in BASE_ROWS], ",".join(reversed(COLUMNS))),
    0,
)
case(
    "header_names_in_capitals_and_spaces",
    text(BASE_ROWS, " SEQ , Sample_ID,KIND,analyte,Response,nominal,dilution,unit"),
    0,
)
case("unknown_extra_column_is_kept", text([r + ",x" for r in BASE_ROWS], HEADER + ",comment"), 0)
case("cells_padded_with_spaces", text([r.replace(",", " , ") for r in BASE_ROWS]), 0)
case("quoted_cells", text(['"' + r.replace(",", '","') + '"' for r in BASE_ROWS]), 0)
case("rows_out_of_seq_order", text([*reversed(BASE_ROWS)]), 0)

# --------------------------------------------------------------------------- encodings and BOMs
case("utf8_bom", b"\xef\xbb\xbf" + base().encode(), 0)
case("utf8_bom_only", b"\xef\xbb\xbf", 2, message="empty")
case("two_utf8_boms", b"\xef\xbb\xbf\xef\xbb\xbf" + base().encode(), 2, message="seq")
case("utf16_le_with_bom", b"\xff\xfe" + base().encode("utf-16-le"), 2, message="UTF-16")
case("utf16_be_with_bom", b"\xfe\xff" + base().encode("utf-16-be"), 2, message="UTF-16")
case("utf16_le_without_bom", base().encode("utf-16-le"), 2)
case("utf32_le_with_bom", base().encode("utf-32"), 2, message="UTF-32")
case("latin1_micro_sign", base().encode("latin-1"), 2, message="not valid UTF-8")
case(
    "cp1252_sample_id",
    with_cell(S1, "sample_id", "Probe-Müll").encode("cp1252", "replace"),
    2,
    message="not valid UTF-8",
)
case(
    "gb18030_native_file",
    with_cell(S1, "sample_id", "空白样").encode("gb18030"),
    2,
    message="not valid UTF-8",
)
case(
    "shift_jis_native_file",
    with_cell(S1, "sample_id", "試料").replace("µ", "u").encode("shift_jis"),
    2,
    message="not valid UTF-8",
)
case(
    "overlong_utf8_slash",
    base().encode().replace(b"S-1", b"S\xc0\xaf1"),
    2,
    message="not valid UTF-8",
)
case(
    "utf8_encoded_surrogate",
    base().encode().replace(b"S-1", b"S\xed\xa0\x801"),
    2,
    message="not valid UTF-8",
)
case("utf8_cut_inside_a_character", base().encode()[:-3], 2)
case("lone_continuation_byte", base().encode().replace(b"S-2", b"S\x80-2"), 2, message="line 11")
case("nul_byte_in_a_cell", base().encode().replace(b"S-1", b"S\x001"), 2)
case("binary_noise", bytes(range(256)) * 8, 2)
case("png_signature", b"\x89PNG\r\n\x1a\n" + b"\x00" * 64, 2)
case(
    "zero_width_space_in_analyte",
    with_cell(S1, "analyte", "Zn\u200b"),
    1,
    rule="calibration.present",
)
case("bom_character_inside_a_cell", with_cell(S1, "sample_id", "S\ufeff-1"), 0)
case("cyrillic_a_in_kind", with_cell(S1, "kind", "s\u0430mple"), 2, message="unknown kind")
case(
    "fullwidth_digits_in_response", with_cell(S1, "response", "３１００"), 2, message="plain number"
)
case("arabic_indic_digits_in_seq", with_cell(S1, "seq", "٩"), 2, message="seq")

# --------------------------------------------------------------------------- empty and short
case("empty_file", b"", 2, message="empty")
case("only_spaces", b"   ", 2)
case("only_line_ends", b"\n\n\r\n\n", 2)
case("only_the_header", text([]), 2, message="no readings")
case("only_the_header_no_line_end", HEADER, 2, message="no readings")
case("header_and_blank_lines", HEADER + "\n\n\n", 2, message="no readings")
case("no_header_row", "\n".join(BASE_ROWS) + "\n", 2, message="line 1")
case("one_cell", "x", 2, message="missing")
case("cut_after_the_icv", text(BASE_ROWS[: ICV + 1]), 1, rule="run.required_qc")
case("cut_after_the_calibration", text(BASE_ROWS[: CAL6 + 1]), 1, rule="run.required_qc")
case("cut_mid_row", base()[: base().index("\n11,") + 8], 2, message="line 12")
case("cut_mid_header", HEADER[:17], 2, message="missing")
case("cut_inside_a_quoted_cell", base() + '12,"S-3', 2)
case(
    "only_blanks_and_standards",
    text([*BASE_ROWS[: CAL6 + 1], BASE_ROWS[ICV], BASE_ROWS[CCV]]),
    0,
    rule="run.field_samples",
    severity="warn",
)

# --------------------------------------------------------------------------- columns
for column in ("seq", "sample_id", "kind", "analyte", "response"):
    case(f"missing_column_{column}", without_column(column), 2, message=f"'{column}'")
case("missing_column_nominal", without_column("nominal"), 2, message="nominal")
case(
    "column_given_twice",
    text([r + ",5" for r in BASE_ROWS], HEADER + ",seq"),
    2,
    message="given twice",
)
case(
    "column_given_twice_other_case",
    text([r + ",5" for r in BASE_ROWS], HEADER + ",Response"),
    2,
    message="given twice",
)
case(
    "nameless_header_column",
    text([r + ",x" for r in BASE_ROWS], HEADER + ","),
    2,
    message="no name",
)
case(
    "row_with_an_extra_field",
    base().replace("\n9,S-1,sample,Zn,3100,,,µg/L", "\n9,S-1,sample,Zn,3100,,,µg/L,extra"),
    2,
    message="line 10",
)
case(
    "row_with_a_field_missing",
    base().replace("\n9,S-1,sample,Zn,3100,,,µg/L", "\n9,S-1,sample,Zn,3100,,"),
    2,
    message="line 10",
)
case("semicolon_separated_native", base().replace(",", ";"), 2, message="missing")
case("tab_separated_native", base().replace(",", "\t"), 2, message="missing")
case("unterminated_quote", base().replace("S-1", '"S-1'), 2)
case("quote_inside_a_cell_is_text", base().replace("S-1", 'S"1'), 0)
case("quoted_cell_spanning_lines", base().replace("S-1", '"S\n1"'), 0)
case(
    "ten_thousand_extra_columns",
    text([r + ",0" * 10000 for r in BASE_ROWS], HEADER + "".join(f",x{i}" for i in range(10000))),
    0,
)

# --------------------------------------------------------------------------- seq
case("seq_empty", with_cell(S1, "seq", ""), 2, message="seq is empty")
case("seq_negative", with_cell(S1, "seq", "-9"), 2, message="negative")
case("seq_decimal", with_cell(S1, "seq", "9.5"), 2, message="whole number")
case("seq_exponent", with_cell(S1, "seq", "9e0"), 2, message="whole number")
case("seq_with_underscore", with_cell(S1, "seq", "1_9"), 2, message="plain whole number")
case("seq_2_53_minus_1_is_accepted", with_cell(CCV, "seq", str(2**53 - 1)), 0)
case("seq_2_53_stopped_the_daemon", with_cell(CCV, "seq", str(2**53)), 2, message="2^53")
case("seq_2_64_on_a_ccv", with_cell(CCV, "seq", str(2**64)), 2, message="2^53")
case("seq_of_4300_digits", with_cell(S1, "seq", "9" * 4300), 2, message="seq")
case("duplicate_seq_and_analyte", with_cell(S2, "seq", "9"), 2, message="line 11")
case(
    "duplicate_seq_other_analyte",
    add_rows("9,S-1,sample,Cu,3100,,,µg/L"),
    1,
    rule="calibration.present",
)
case("seq_zero", with_cell(BLANK, "seq", "0"), 0)

# --------------------------------------------------------------------------- numbers
for label, value in (
    ("text", "abc"),
    ("empty", ""),
    ("nan", "nan"),
    ("NaN", "NaN"),
    ("inf", "inf"),
    ("minus_inf", "-inf"),
    ("Infinity", "Infinity"),
    ("1e400", "1e400"),
    ("hex", "0x10"),
    ("underscore", "3_100"),
    ("two_points", "3.1.0"),
    ("trailing_unit", "3100cps"),
):
    case(f"response_{label}", with_cell(S1, "response", value), 2, message="line 10")
case(
    "response_decimal_comma", with_cell(S1, "response", '"3100,5"'), 2, message="decimal separator"
)
case("response_plus_sign", with_cell(S1, "response", "+3100"), 0)
case("response_leading_zeros", with_cell(S1, "response", "0003100"), 0)
case("response_minus_zero", with_cell(S1, "response", "-0"), 0, rule="range.under", severity="warn")
case(
    "response_subnormal_1e_320",
    with_cell(S1, "response", "1e-320"),
    0,
    rule="range.under",
    severity="warn",
)
case("response_1e308_sample", with_cell(S1, "response", "1e308"), 1, rule="range.over")
case("response_max_double_sample", with_cell(S1, "response", "1.7976931348623157e308"), 1)
case(
    "response_minus_1e308_sample", with_cell(S1, "response", "-1e308"), 1, rule="result.computable"
)
case(
    "response_1e200_standard",
    with_cell(CAL6, "response", "1e200"),
    1,
    rule="calibration.present",
    message="cannot be fitted",
)
case("response_1e308_standard", with_cell(CAL6, "response", "1e308"), 1, rule="calibration.present")
case(
    "response_minus_1e308_standard",
    with_cell(CAL6, "response", "-1e308"),
    1,
    rule="calibration.present",
)
case("response_1e308_blank", with_cell(BLANK, "response", "1e308"), 1, rule="calibration.present")
case("response_1e_320_standard", with_cell(CAL1, "response", "1e-320"), 1)
case("response_1e200_ccv", with_cell(CCV, "response", "1e200"), 1, rule="check.recovery")
case(
    "all_standards_one_response",
    text(
        [
            r if i not in range(CAL1, CAL6 + 1) else r.replace(r.split(",")[4], "5000", 1)
            for i, r in enumerate(BASE_ROWS)
        ]
    ),
    1,
)
case("nominal_text", with_cell(CAL1, "nominal", "one"), 2, message="line 3")
case("nominal_nan", with_cell(CAL1, "nominal", "nan"), 2, message="finite")
case("nominal_missing_on_a_standard", with_cell(CAL1, "nominal", ""), 2, message="nominal")
case("nominal_zero_on_a_standard_is_a_zero_point", with_cell(CAL1, "nominal", "0"), 0)
case("nominal_negative", with_cell(CAL1, "nominal", "-1"), 2, message="negative")
case(
    "nominal_1e300",
    with_cell(CAL1, "nominal", "1e300"),
    1,
    rule="calibration.present",
    message="line 3",
)
case("nominal_5e_324", with_cell(CAL1, "nominal", "5e-324"), 1, rule="calibration.present")
case(
    "nominal_max_double",
    with_cell(CAL6, "nominal", "1.7976931348623157e308"),
    1,
    rule="calibration.present",
)
case(
    "all_standards_one_nominal",
    text(
        [
            r
            if i not in range(CAL1, CAL6 + 1)
            else ",".join([*r.split(",")[:5], "5", *r.split(",")[6:]])
            for i, r in enumerate(BASE_ROWS)
        ]
    ),
    1,
    rule="calibration.present",
)
case("icv_nominal_zero", with_cell(ICV, "nominal", "0"), 1)
case("dilution_zero", with_cell(S1, "dilution", "0"), 2, message="dilution")
case("dilution_negative", with_cell(S1, "dilution", "-2"), 2, message="dilution")
case("dilution_nan", with_cell(S1, "dilution", "nan"), 2, message="dilution")
case("dilution_1e308", with_cell(S1, "dilution", "1e308"), 1, rule="result.computable")
case("dilution_1e_320", with_cell(S1, "dilution", "1e-320"), 0)
case("dilution_minus_zero", with_cell(S1, "dilution", "-0"), 2, message="dilution")

# --------------------------------------------------------------------------- kinds and links
case("unknown_kind", with_cell(S1, "kind", "standard"), 2, message="unknown kind")
case("kind_empty", with_cell(S1, "kind", ""), 2, message="kind is empty")
case("kind_in_capitals", with_cell(S1, "kind", "SAMPLE"), 0)
case("kind_with_escape_sequence", with_cell(S1, "kind", "\x1b[31msample"), 2, message="\\x1b")
HEADER_LINKS = HEADER + ",parent,added"
LINK_ROWS = [r + ",," for r in BASE_ROWS]


def links(*extra: str) -> str:
    return text([*LINK_ROWS[:-1], *extra, LINK_ROWS[-1]], HEADER_LINKS)


case("dup_without_parent", links("12,S-1-D,dup,Zn,3120,,,µg/L,,"), 2, message="parent")
case("ms_without_added", links("12,S-1-MS,ms,Zn,8100,,,µg/L,S-1,"), 2, message="added")
case("ms_added_zero", links("12,S-1-MS,ms,Zn,8100,,,µg/L,S-1,0"), 2, message="zero")
case("ms_added_1e308", links("12,S-1-MS,ms,Zn,8100,,,µg/L,S-1,1e308"), 1, rule="spike.recovery")
case("addition_without_parent", links("12,S-1-A1,addition,Zn,8100,,,µg/L,,5"), 2, message="parent")
case("dup_of_a_missing_parent", links("12,S-9-D,dup,Zn,3120,,,µg/L,S-9,"), 1)
case("two_units_for_one_analyte", with_cell(S1, "unit", "mg/L"), 2, message="unit")
HEADER_TIME = HEADER + ",acquired"
case(
    "acquired_not_a_time",
    text(
        [r + "," for r in BASE_ROWS[:S1]]
        + [BASE_ROWS[S1] + ",yesterday"]
        + [r + "," for r in BASE_ROWS[S1 + 1 :]],
        HEADER_TIME,
    ),
    2,
    message="ISO 8601",
)
case(
    "acquired_mixes_zoned_and_naive_times",
    text(
        [
            r + f",2026-12-01T08:{i:02d}:00" + ("Z" if i % 2 else "")
            for i, r in enumerate(BASE_ROWS)
        ],
        HEADER_TIME,
    ),
    0,
)
case("acquired_year_9999", text([r + ",9999-12-31T23:59:59" for r in BASE_ROWS], HEADER_TIME), 0)

# --------------------------------------------------------------------------- names
HEADER_NAMES = HEADER + ",run,instrument"


def named(run: str, instrument: str = "ICP-1") -> str:
    return text([r + f",{run},{instrument}" for r in BASE_ROWS], HEADER_NAMES)


case(
    "formula_in_a_sample_id",
    with_cell(S1, "sample_id", "=cmd|' /C calc'!A0"),
    0,
    out=True,
    flagged="'=cmd",
)
case(
    "plus_formula_in_a_sample_id", with_cell(S1, "sample_id", "+1+1"), 0, out=True, flagged="'+1+1"
)
case(
    "at_formula_in_a_sample_id",
    with_cell(S1, "sample_id", "@SUM(A1:A9)"),
    0,
    out=True,
    flagged="'@SUM",
)
case("tab_led_sample_id", with_cell(S1, "sample_id", '"\t=1"'), 0, out=True)
case("escape_sequences_in_the_run_name", named("\x1b[2J\x1b[31mRUN"), 0, out=True)
case("carriage_return_in_the_run_name", named('"RUN\r\nSubject: x"'), 0, out=True)
case(
    "right_to_left_override_in_a_sample_id",
    with_cell(S1, "sample_id", "S-1\u202egnp.exe"),
    0,
    out=True,
)
case("instrument_named_dot_dot", named("RUN", ".."), 0, out=True)
case("instrument_named_a_path", named("RUN", "../../etc/passwd"), 0, out=True)
case("sample_id_of_10000_characters", with_cell(S1, "sample_id", "S" * 10000), 0, out=True)
case(
    "analyte_of_1000_characters",
    text([r.replace(",Zn,", ",Z" + "n" * 1000 + ",") for r in BASE_ROWS]),
    0,
    out=True,
)
case("run_name_of_5000_characters", named("R" * 5000), 0, out=True)
case("a_line_of_a_megabyte", with_cell(S1, "sample_id", "S" * 1_000_000), 2, message="field limit")
case(
    "a_cell_of_200000_characters_in_quotes",
    with_cell(S1, "sample_id", '"' + "S," * 100_000 + '"'),
    2,
    message="line 10",
)
case("a_cell_of_100000_characters", with_cell(S1, "sample_id", "S" * 100_000), 0)
case("empty_sample_id", with_cell(S1, "sample_id", ""), 2, message="sample_id")
case("empty_analyte", with_cell(S1, "analyte", ""), 2, message="analyte")
case("yaml_tag_in_a_sample_id", with_cell(S1, "sample_id", "!!python/object:os.system"), 0)
case("html_in_a_sample_id", with_cell(S1, "sample_id", "<script>alert(1)</script>"), 0, out=True)
case("file_name_of_240_characters", base(), 0, out=True, file_name="r" * 236 + ".csv")
case("file_name_of_78_three_byte_characters", base(), 0, out=True, file_name="試" * 78 + ".csv")
case("file_name_with_a_carriage_return", base(), 0, out=True, file_name="run\rname.csv")
case("file_name_with_a_leading_dash", base(), 0, out=True, file_name="-run.csv")
case("file_name_of_only_dots_and_a_suffix", base(), 0, out=True, file_name="..csv")
case(
    "many_analytes_without_standards",
    add_rows(*(f"12,S-3,sample,X{i},100,,,µg/L" for i in range(300))),
    1,
    rule="calibration.present",
)

# --------------------------------------------------------------------------- careless exports
case("header_repeated_mid_file", add_rows(HEADER), 2, message="line 12")
case("two_runs_pasted_together", base() + base(), 2, message="line 13")
case("spreadsheet_sep_line_first", "sep=,\n" + base(), 2, message="line 1")
case("a_title_line_before_the_header", "Run export\n" + base(), 2)
case("totals_row_at_the_end", base() + ",,,Total,98214,,,\n", 2, message="line 13")
case("excel_error_value_in_a_response", with_cell(S1, "response", "#VALUE!"), 2, message="line 10")
case("excel_date_in_a_nominal", with_cell(CAL1, "nominal", "01.01.2026"), 2, message="line 3")
case("percent_sign_in_a_response", with_cell(S1, "response", "31%"), 2, message="line 10")
case("nbsp_inside_a_number", with_cell(S1, "response", "3\u00a0100"), 2, message="line 10")
case("ccv_nominal_missing", with_cell(CCV, "nominal", ""), 2, message="nominal")
case("icv_missing_entirely", text([r for i, r in enumerate(BASE_ROWS) if i != ICV]), 1)
case("closing_ccv_missing", text(BASE_ROWS[:CCV]), 1, rule="bracket.closing")
case("ccv_recovering_80_percent", with_cell(CCV, "response", "16100"), 1, rule="check.recovery")
case("sample_above_the_top_standard", with_cell(S1, "response", "90100"), 1, rule="range.over")
case("a_standard_reading_twice_its_nominal", with_cell(CAL6 - 1, "response", "40100"), 1)

# --------------------------------------------------------------------------- not regular files
case("a_directory", None, 2, special="directory", message="directory")
case("a_fifo", None, 2, special="fifo", message="not a regular file")
case("a_link_to_a_fifo", None, 2, special="link_to_fifo", message="not a regular file")
case("a_link_to_dev_zero", None, 2, special="link_to_dev_zero", message="not a regular file")
case("dev_null", None, 2, special="dev_null", message="not a regular file")
case("a_dangling_link", None, 2, special="dangling_link", message="cannot read")
case("a_missing_file", None, 2, special="missing", message="cannot read")
case("a_link_to_a_run", base(), 0, special="link_to_file")
case("a_link_loop", None, 2, special="link_loop", message="cannot read")

# --------------------------------------------------------------------------- instrument exports
EXPORT_HEADER = "Pos;Name;Type;Elem;Signal;Conc;Dil"
EXPORT_KINDS = {"blank": "BLK", "cal": "STD", "icv": "ICV", "ccv": "CCV", "sample": "SMP"}


def export_rows(rows: list[str] = BASE_ROWS) -> list[str]:
    out = []
    for row in rows:
        seq, sample, kind, analyte, response, nominal, dilution, _ = row.split(",")
        cells = [
            seq,
            sample,
            EXPORT_KINDS[kind],
            analyte,
            response.replace(".", ","),
            nominal,
            dilution,
        ]
        out.append(";".join(cells))
    return out


def export(rows: list[str] | None = None, preamble: str = "Report;ICP-1\nOperator;A.B.\n\n") -> str:
    return (
        preamble + "\n".join([EXPORT_HEADER, *(rows if rows is not None else export_rows())]) + "\n"
    )


SEMI = "semicolon.yaml"
case("export_passes", export(), 0, config=SEMI, suffix=".txt")
case(
    "export_in_cp1250",
    export().replace("Operator;A.B.", "Operátor;Řeka").encode("cp1250"),
    0,
    config="semicolon-cp1250.yaml",
    suffix=".txt",
)
case(
    "export_in_gb18030_read_as_auto",
    export().replace("Operator;A.B.", "操作员;空白样品").encode("gb18030"),
    2,
    config=SEMI,
    suffix=".txt",
    message="format.encoding",
)
case(
    "export_in_utf16_with_bom_read_as_auto",
    b"\xff\xfe" + export().encode("utf-16-le"),
    0,
    config=SEMI,
    suffix=".txt",
)
case(
    "export_without_its_header",
    export(export_rows()).replace(EXPORT_HEADER + "\n", ""),
    2,
    config=SEMI,
    suffix=".txt",
    message="Name",
)
case("export_with_commas_not_semicolons", export().replace(";", ","), 2, config=SEMI, suffix=".txt")
case(
    "export_with_a_column_renamed",
    export().replace("Signal", "Intensity"),
    2,
    config=SEMI,
    suffix=".txt",
    message="Signal",
)
case(
    "export_with_an_unknown_type_code",
    export().replace(";SMP;", ";XYZ;", 1),
    2,
    config=SEMI,
    suffix=".txt",
    message="XYZ",
)
case(
    "export_with_a_point_decimal",
    export().replace("Operator;A.B.", "x").replace(";20050;", ";20050.5;"),
    2,
    config=SEMI,
    suffix=".txt",
)
case(
    "export_row_too_long",
    export().replace(";SMP;Zn;3100;;", ";SMP;Zn;3100;;;x;"),
    2,
    config=SEMI,
    suffix=".txt",
    message="fields",
)
case("export_only_the_preamble", "Report;ICP-1\nOperator;A.B.\n", 2, config=SEMI, suffix=".txt")
case("export_empty", b"", 2, config=SEMI, suffix=".txt", message="empty")
case(
    "export_nan_signal",
    export().replace(";3100;", ";NaN;"),
    2,
    config=SEMI,
    suffix=".txt",
    message="finite",
)
case(
    "export_signal_1e308_standard",
    export().replace(";50075;", ";1e308;"),
    1,
    config=SEMI,
    suffix=".txt",
    rule="calibration.present",
)
case(
    "export_seq_2_64",
    export().replace("\n9;S-1", f"\n{2**64};S-1"),
    2,
    config=SEMI,
    suffix=".txt",
    message="2^53",
)

XLSX_FIXTURE = (PROJECT / "fixtures/exports/bwl-icpms-metals-fail.xlsx").read_bytes()
XLSX_CONFIG = "config/export-icpms-xlsx.yaml"


def zipped(members: dict[str, bytes]) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, content in members.items():
            info = zipfile.ZipInfo(name, date_time=(2026, 12, 1, 0, 0, 0))  # reproducible bytes
            archive.writestr(info, content)
    return buffer.getvalue()


#: A billion-laughs style entity expansion, small enough to be harmless if it expanded.
ENTITY_BOMB = (
    b'<?xml version="1.0"?><!DOCTYPE x [<!ENTITY a "aaaaaaaaaa">'
    b'<!ENTITY b "&a;&a;&a;&a;&a;&a;&a;&a;&a;&a;"><!ENTITY c "&b;&b;&b;&b;&b;&b;&b;&b;&b;&b;">]>'
    b'<worksheet><sheetData><row r="1"><c r="A1" t="inlineStr"><is><t>&c;</t></is></c></row>'
    b"</sheetData></worksheet>"
)


def xlsx_without(member: str) -> bytes:
    with zipfile.ZipFile(io.BytesIO(XLSX_FIXTURE)) as archive:
        return zipped({n: archive.read(n) for n in archive.namelist() if n != member})


def xlsx_replacing(member: str, content: bytes) -> bytes:
    with zipfile.ZipFile(io.BytesIO(XLSX_FIXTURE)) as archive:
        return zipped({n: content if n == member else archive.read(n) for n in archive.namelist()})


case("xlsx_fixture_reads", XLSX_FIXTURE, 1, config=XLSX_CONFIG, suffix=".xlsx")
case(
    "xlsx_cut_in_half",
    XLSX_FIXTURE[: len(XLSX_FIXTURE) // 2],
    2,
    config=XLSX_CONFIG,
    suffix=".xlsx",
)
case("xlsx_first_kilobyte", XLSX_FIXTURE[:1024], 2, config=XLSX_CONFIG, suffix=".xlsx")
case("xlsx_empty", b"", 2, config=XLSX_CONFIG, suffix=".xlsx", message="empty")
case("xlsx_that_is_a_csv", base(), 2, config=XLSX_CONFIG, suffix=".xlsx")
case("xlsx_zip_of_nothing", zipped({}), 2, config=XLSX_CONFIG, suffix=".xlsx")
case(
    "xlsx_zip_of_a_text_file",
    zipped({"readme.txt": b"hello"}),
    2,
    config=XLSX_CONFIG,
    suffix=".xlsx",
)
case(
    "xlsx_without_its_workbook_part",
    xlsx_without("xl/workbook.xml"),
    2,
    config=XLSX_CONFIG,
    suffix=".xlsx",
)
case(
    "xlsx_without_its_results_sheet",
    xlsx_without("xl/worksheets/sheet2.xml"),
    2,
    config=XLSX_CONFIG,
    suffix=".xlsx",
)
case(
    "xlsx_sheet_of_broken_xml",
    xlsx_replacing("xl/worksheets/sheet2.xml", b"<worksheet><sheetData><row"),
    2,
    config=XLSX_CONFIG,
    suffix=".xlsx",
)
case(
    "xlsx_xml_with_an_entity_bomb",
    xlsx_replacing(
        "xl/worksheets/sheet2.xml",
        ENTITY_BOMB,
    ),
    2,
    config=XLSX_CONFIG,
    suffix=".xlsx",
)
case("xlsx_for_the_native_format", XLSX_FIXTURE, 2, suffix=".xlsx")


# --------------------------------------------------------------------------- writing


def file_name(c: Case) -> str:
    return c.file_name or f"{c.name}{c.suffix}"


def write(files: Path = FILES) -> list[dict[str, Any]]:
    """Write every class's file under ``files`` and return the index (written beside this
    script only when ``files`` is the default folder)."""
    if files.exists():
        shutil.rmtree(files)
    files.mkdir(parents=True)
    index: list[dict[str, Any]] = []
    names = [c.name for c in CASES]
    assert len(names) == len(set(names)), "two classes share a name"
    for c in CASES:
        entry: dict[str, Any] = {"name": c.name}
        if c.data is not None:
            folder = files / c.name  # one folder per class: the file keeps its own name
            folder.mkdir()
            (folder / file_name(c)).write_bytes(c.data)
            entry["file"] = f"files/{c.name}/{file_name(c)}"
        for key in ("special", "config"):
            if getattr(c, key) is not None:
                value = getattr(c, key)
                entry[key] = (
                    f"tests/corpus/configs/{value}"
                    if key == "config" and "/" not in value
                    else value
                )
        entry["exit"] = c.exit
        entry["status"] = {0: "pass", 1: "fail", 2: "error"}[c.exit]
        for key in ("message", "rule", "severity", "flagged"):
            if getattr(c, key) is not None:
                entry[key] = getattr(c, key)
        if c.out:
            entry["out"] = True
        index.append(entry)
    if files == FILES:
        (HERE / "index.yaml").write_text(index_text(index), encoding="utf-8")
    return index


def index_text(index: list[dict[str, Any]]) -> str:
    document = yaml.safe_dump(index, allow_unicode=True, sort_keys=False, width=100)
    return "# Written by make_corpus.py: edit the classes there and rerun it.\n" + document


if __name__ == "__main__":
    print(f"{len(write())} classes written to {HERE}")
