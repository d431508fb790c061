"""The native-format reader: good files read into the expected run, bad ones fail clearly."""

from __future__ import annotations

import codecs
import hashlib
from datetime import UTC, datetime
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from calwarden.daemon.parsing.decode import MAX_FILE_BYTES
from calwarden.daemon.parsing.native import (
    NATIVE_FIELDS,
    REQUIRED_FIELDS,
    decode_table,
    normalise,
    read_native,
)
from calwarden.daemon.parsing.table import RawRow, RawTable
from calwarden.rules.errors import ConfigError, InputError
from calwarden.rules.model import Kind, Reading, Run

# A good run, written with its columns out of the native order, an extra column,
# mixed-case header names and kinds, and empty optional cells.
GOOD = (
    "Analyte, SEQ ,Sample_ID,Kind,Response,Nominal,Comment,Dilution,Parent,Added,Acquired\n"
    "Cu,1,BLK,Blank,12,,first,,,,2024-05-01T08:00:00Z\n"
    "Cu,2,STD1,CAL,1012.5,10,,1,,,2024-05-01T08:05:00\n"
    "Cu,3,S-001,sample,505,,needs review,2,,,\n"
    "Cu,4,S-001-MS,MS,1010,,,,S-001,5,\n"
)

EXPECTED = (
    Reading(
        line=2,
        seq=1,
        sample_id="BLK",
        kind=Kind.BLANK,
        analyte="Cu",
        response=12.0,
        acquired=datetime(2024, 5, 1, 8, 0, tzinfo=UTC),
    ),
    Reading(
        line=3,
        seq=2,
        sample_id="STD1",
        kind=Kind.CAL,
        analyte="Cu",
        response=1012.5,
        nominal=10.0,
        acquired=datetime(2024, 5, 1, 8, 5),
    ),
    Reading(
        line=4,
        seq=3,
        sample_id="S-001",
        kind=Kind.SAMPLE,
        analyte="Cu",
        response=505.0,
        dilution=2.0,
    ),
    Reading(
        line=5,
        seq=4,
        sample_id="S-001-MS",
        kind=Kind.MS,
        analyte="Cu",
        response=1010.0,
        parent="S-001",
        added=5.0,
    ),
)


def write(tmp_path: Path, content: str | bytes, name: str = "run.csv") -> Path:
    """Write a test file as given: text as UTF-8 without newline translation."""
    path = tmp_path / name
    path.write_bytes(content.encode("utf-8") if isinstance(content, str) else content)
    return path


# --------------------------------------------------------------------------- good files


def test_good_file_reads_into_expected_run(tmp_path: Path) -> None:
    """Columns in any order, mixed-case names and kinds, empty cells: the expected readings."""
    parsed = read_native(write(tmp_path, GOOD))
    assert parsed.run.readings == EXPECTED
    assert parsed.run.analytes == ("Cu",)


def test_run_named_after_file_stem_without_run_column(tmp_path: Path) -> None:
    """Without a run column the run takes the file's stem as its name."""
    assert read_native(write(tmp_path, GOOD, "2024-05-01_icpms.csv")).run.name == "2024-05-01_icpms"


def test_run_named_after_run_column(tmp_path: Path) -> None:
    """A run column names the run, and an instrument column its instrument."""
    text = "seq,sample_id,kind,analyte,response,run,instrument\n1,B,blank,Cu,3,R-17,ICP-2\n"
    run = read_native(write(tmp_path, text, "other.csv")).run
    assert (run.name, run.instrument) == ("R-17", "ICP-2")


def test_extra_column_kept_in_raw_table(tmp_path: Path) -> None:
    """A column the format does not know stays in the raw table, header and cells as written."""
    table = read_native(write(tmp_path, GOOD)).table
    assert table.header[6] == "Comment"
    assert table.header[1] == " SEQ "
    assert [row.fields[6] for row in table.rows] == ["first", "", "needs review", ""]
    assert [row.line for row in table.rows] == [2, 3, 4, 5]


def test_bom_accepted(tmp_path: Path) -> None:
    """A UTF-8 byte-order mark before the header is ignored."""
    parsed = read_native(write(tmp_path, codecs.BOM_UTF8 + GOOD.encode()))
    assert parsed.run.readings == EXPECTED
    assert parsed.table.header[0] == "Analyte"


def test_crlf_line_endings(tmp_path: Path) -> None:
    """CRLF line endings read the same as LF, with the same line numbers."""
    parsed = read_native(write(tmp_path, GOOD.replace("\n", "\r\n")))
    assert parsed.run.readings == EXPECTED
    assert parsed.table.rows[0].fields[-1] == "2024-05-01T08:00:00Z"


def test_sha256_of_file_bytes(tmp_path: Path) -> None:
    """The hash is the SHA-256 of the file's bytes exactly."""
    path = write(tmp_path, codecs.BOM_UTF8 + GOOD.encode())
    assert read_native(path).sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def test_blank_lines_skipped_with_physical_line_numbers() -> None:
    """Blank lines and rows of empty cells are skipped; rows keep their physical line."""
    data = b"\n\nseq,sample_id,kind,analyte,response\n\n1,B,blank,Cu,3\n,,,,\n2,C,ccb,Cu,4\n\n"
    table = decode_table(data)
    assert table.header_line == 3
    assert table.rows == (
        RawRow(5, ("1", "B", "blank", "Cu", "3")),
        RawRow(7, ("2", "C", "ccb", "Cu", "4")),
    )


def test_quoted_newlines_keep_line_numbers() -> None:
    """A quoted field spanning lines counts its lines; the next row starts after them."""
    data = b'seq,sample_id,kind,analyte,response\n1,"two\nline id",blank,Cu,3\n2,C,ccb,Cu,4\n'
    table = decode_table(data)
    assert [row.line for row in table.rows] == [2, 4]
    assert table.rows[0].fields[1] == "two\nline id"


def test_cells_stripped_and_empty_dilution_is_one() -> None:
    """Cells lose surrounding spaces; an empty dilution means 1 and empty optionals None."""
    data = (
        b"seq,sample_id,kind,analyte,response,dilution,unit,istd\n"
        b" 7 , S1 , Sample , Zn , 2.5e3 , , ,\n"
    )
    (reading,) = normalise(decode_table(data)).readings
    assert (reading.seq, reading.sample_id, reading.analyte) == (7, "S1", "Zn")
    assert (reading.response, reading.dilution, reading.unit, reading.istd) == (
        2500.0,
        1.0,
        None,
        None,
    )


def test_internal_standard_columns() -> None:
    """istd and istd_response are read, and the signal is their ratio."""
    data = b"seq,sample_id,kind,analyte,response,istd,istd_response\n1,S,sample,Pb,50,Bi,200\n"
    (reading,) = normalise(decode_table(data)).readings
    assert (reading.istd, reading.istd_response, reading.signal) == ("Bi", 200.0, 0.25)


def test_mapping_reads_other_layout() -> None:
    """A mapping from native fields to other header names reads a foreign layout."""
    data = b"Pos,Name,Type,Element,Counts\n1,B,blank,Cu,3\n2,CCB,ccb,Cu,100\n"
    mapping = {
        "seq": "pos",
        "sample_id": "Name",
        "kind": "TYPE",
        "analyte": "element",
        "response": "Counts",
    }
    run = normalise(decode_table(data), mapping, run_name="foreign")
    assert run.name == "foreign"
    assert [(r.seq, r.kind, r.response) for r in run.readings] == [
        (1, Kind.BLANK, 3.0),
        (2, Kind.CCB, 100.0),
    ]


def test_normalise_checks_row_width_of_hand_built_table() -> None:
    """normalise refuses a row that does not match the header, whoever built the table."""
    table = RawTable(("seq", "sample_id", "kind", "analyte", "response"), (RawRow(2, ("1",)),))
    with pytest.raises(InputError, match="expected 5 fields, found 1") as caught:
        normalise(table)
    assert caught.value.line == 2


def test_mapping_with_unknown_field_is_config_error() -> None:
    """A mapping naming a field the format does not have is the configuration's fault."""
    with pytest.raises(ConfigError, match="unknown fields: colour"):
        normalise(decode_table(b"seq\n1\n"), {"colour": "seq"})


def test_exported_constants() -> None:
    """The limits and field lists are exported for the shell and future layouts."""
    assert MAX_FILE_BYTES == 200 * 1024 * 1024
    assert REQUIRED_FIELDS == ("seq", "sample_id", "kind", "analyte", "response")
    assert NATIVE_FIELDS[:5] == REQUIRED_FIELDS
    assert len(NATIVE_FIELDS) == 21  # issue 15: reporting_limit, source; 3 chromatography


# --------------------------------------------------------------------------- bad files

H = "seq,sample_id,kind,analyte,response,nominal,parent,added,dilution,acquired\n"
OK = "1,S1,sample,Cu,5,,,,,\n"  # a good row to put before a bad one

# (name, file content, expected line, expected column, phrase in the message)
BAD_INPUTS: list[tuple[str, str | bytes, int | None, str | None, str]] = [
    ("empty file", "", None, None, "empty"),
    ("only a BOM", codecs.BOM_UTF8, None, None, "empty"),
    ("only blank lines", "\n  \n\r\n\n", None, None, "no header row"),
    ("header only", H, 1, None, "holds no readings"),
    ("header and blank lines", H + "\n,,,,,,,,,\n", 1, None, "holds no readings"),
    ("missing required column", "seq,sample_id,kind,analyte\n1,A,sample,Cu\n", 1, "response",
     "'response' missing; the header has: seq, sample_id, kind, analyte"),
    ("several missing", "seq,sample_id,analyte\n1,A,Cu\n", 1, "kind", "columns 'kind', 'response'"),
    ("no header, data first", "1,A,sample,Cu,5\n", 1, "seq", "is the header row missing"),
    ("duplicated header", "seq,sample_id,kind,analyte,response,SEQ \n", 1, "SEQ", "given twice"),
    ("header column without name", "seq,,kind,analyte,response\n", 1, None, "column 2"),
    ("unknown kind", H + OK + "2,S2,spike,Cu,5,,,,,\n", 3, "kind",
     "unknown kind 'spike'; allowed kinds: blank, cal, icv, ccv, ccb, mb, lcs, sample, dup"),
    ("empty kind", H + "1,S1,,Cu,5,,,,,\n", 2, "kind", "kind is empty"),
    ("too few fields", H + OK + "2,S2,sample,Cu,5\n", 3, None, "expected 10 fields"),
    ("too many fields", H + "1,S1,sample,Cu,5,,,,,,\n", 2, None, "but found 11"),
    ("response not a number", H + "1,S1,sample,Cu,five,,,,,\n", 2, "response", "got 'five'"),
    ("decimal comma", H + '1,S1,sample,Cu,"1,2",,,,,\n', 2, "response", "decimal separator"),
    ("response nan", H + "1,S1,sample,Cu,nan,,,,,\n", 2, "response", "finite"),
    ("response inf", H + "1,S1,sample,Cu,-Infinity,,,,,\n", 2, "response", "finite"),
    ("response overflows", H + "1,S1,sample,Cu,1e999,,,,,\n", 2, "response", "got '1e999'"),
    ("response empty", H + "1,S1,sample,Cu, ,,,,,\n", 2, "response", "response is empty"),
    ("underscore in number", H + "1,S1,lcs,Cu,5,1_0,,,,\n", 2, "nominal", "plain number"),
    ("added nan", H + "1,S1,ms,Cu,5,,S0,NaN,,\n", 2, "added", "finite"),
    ("seq fractional", H + "1.5,S1,sample,Cu,5,,,,,\n", 2, "seq", "whole number, got '1.5'"),
    ("seq text", H + "x1,S1,sample,Cu,5,,,,,\n", 2, "seq", "whole number"),
    ("seq negative", H + "-1,S1,sample,Cu,5,,,,,\n", 2, "seq", "not be negative"),
    ("seq empty", H + ",S1,sample,Cu,5,,,,,\n", 2, "seq", "seq is empty"),
    ("dilution zero", H + "1,S1,sample,Cu,5,,,,0,\n", 2, "dilution", "greater than zero"),
    ("dilution negative", H + "1,S1,sample,Cu,5,,,,-2,\n", 2, "dilution", "greater than zero"),
    ("duplicate seq and analyte", H + OK + "1,S1b,sample,Cu,6,,,,,\n", 3, "seq",
     "already given on line 2"),
    ("cal without nominal", H + "1,STD,cal,Cu,5,,,,,\n", 2, "nominal", "needs a nominal"),
    ("ccv without nominal", H + OK + "2,CCV,ccv,Cu,5, ,,,,\n", 3, "nominal", "needs a nominal"),
    ("dup without parent", H + "1,S1D,dup,Cu,5,,,,,\n", 2, "parent", "needs the parent"),
    ("msd without added", H + "1,S1MSD,msd,Cu,5,,S1,,,\n", 2, "added", "amount added"),
    ("spike of zero", H + "1,S1MS,ms,Cu,5,,S1,0,,\n", 2, "added", "greater than zero"),
    (
        "two units for one analyte",
        "seq,sample_id,kind,analyte,response,unit\n1,A,sample,Cu,5,ug/L\n2,B,sample,Cu,6,mg/L\n",
        3,
        "unit",
        "one analyte needs one unit",
    ),
    ("addition without added", H + "1,A1,addition,Cu,5,,S1,,,\n", 2, "added", "amount added"),
    ("sample_id empty", H + "1, ,sample,Cu,5,,,,,\n", 2, "sample_id", "sample_id is empty"),
    ("bad timestamp", H + "1,S1,sample,Cu,5,,,,,01/05/2024 08:00\n", 2, "acquired", "ISO 8601"),
    ("unclosed quote", H + OK + '2,"S2,sample,Cu,5,,,,,\n3,S3,sample,Cu,5,,,,,\n', 3, None,
     "never closed"),
    ("text after closing quote", H + '1,"S1"x,sample,Cu,5,,,,,\n', 2, None, "cannot be split"),
    ("line after quoted newline", H + '1,"S\n1",sample,Cu,5,,,,,\n2,S2,bad,Cu,5,,,,,\n', 4,
     "kind", "unknown kind"),
    ("line after skipped blanks, CRLF", (H + "\n" + OK + "\n2,S2,bad,Cu,5,,,,,\n").replace(
     "\n", "\r\n"), 5, "kind", "unknown kind"),
    ("latin-1 text", (H + OK).encode() + "2,Mü,sample,Cu,5,,,,,\n".encode("latin-1"), 3, None,
     "not valid UTF-8"),
    ("NUL byte", (H + OK).encode() + b"2,S\x002,sample,Cu,5,,,,,\n", 3, None, "binary"),
    ("control characters", bytes(range(1, 9)) * 50 + b"\n", 1, None, "binary"),
    ("UTF-16", (H + OK).encode("utf-16"), 1, None, "UTF-16"),
]  # fmt: skip


@pytest.mark.parametrize(
    ("content", "line", "column", "phrase"),
    [pytest.param(*case[1:], id=case[0]) for case in BAD_INPUTS],
)
def test_bad_input_names_line_and_column(
    tmp_path: Path, content: str | bytes, line: int | None, column: str | None, phrase: str
) -> None:
    """Each kind of bad input raises InputError naming the line, the column and the problem."""
    with pytest.raises(InputError) as caught:
        read_native(write(tmp_path, content))
    error = caught.value
    assert phrase in error.reason
    assert (error.line, error.column) == (line, column)
    if line is not None:
        assert f"line {line}" in str(error)


def test_too_large_bytes_refused() -> None:
    """decode_table refuses more bytes than its limit."""
    data = b"seq,sample_id,kind,analyte,response\n1,B,blank,Cu,3\n"
    with pytest.raises(
        InputError, match=f"too large to be a run: {len(data)} bytes, the limit is 40"
    ):
        decode_table(data, max_bytes=40)


def test_too_large_file_refused_before_reading(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """read_native checks the size with stat and never opens a file over the limit."""
    path = write(tmp_path, GOOD)

    def no_open(*args: object, **kwargs: object) -> None:
        raise AssertionError("the file was opened")

    monkeypatch.setattr(Path, "open", no_open)
    with pytest.raises(InputError, match="too large to be a run"):
        read_native(path, max_bytes=len(GOOD) - 1)


def test_directory_refused(tmp_path: Path) -> None:
    """A directory is not a run file."""
    with pytest.raises(InputError, match="is a directory"):
        read_native(tmp_path)


def test_missing_file_refused(tmp_path: Path) -> None:
    """A file that does not exist cannot be read, and says so."""
    with pytest.raises(InputError, match=r"cannot read .*: No such file"):
        read_native(tmp_path / "gone.csv")


@settings(max_examples=300, deadline=None)
@given(st.one_of(st.binary(max_size=300), st.text(alphabet=',"\n\r 0123abcal.-eE', max_size=200)))
def test_arbitrary_input_raises_only_input_error(content: bytes | str) -> None:
    """Whatever the bytes, the reader returns a run or raises InputError, nothing else."""
    header = b"seq,sample_id,kind,analyte,response,nominal\n"
    data = content if isinstance(content, bytes) else header + content.encode()
    try:
        run = normalise(decode_table(data))
    except InputError:
        return
    assert isinstance(run, Run)


def test_batch_column_is_read() -> None:
    """The optional batch column gives each reading its preparation batch; empty means none."""
    text = (
        b"seq,sample_id,kind,analyte,response,batch\n1,S-1,sample,Zn,10,B-1\n2,S-2,sample,Zn,11,\n"
    )
    run = normalise(decode_table(text))
    assert [r.batch for r in run.readings] == ["B-1", None]


def test_a_file_that_is_no_run_is_quoted_only_by_a_short_excerpt() -> None:
    """A system file's first line is not echoed: the message quotes at most 12 characters."""
    data = b"root:x:0:0:root:/root:/bin/bash\ndaemon:x:1:1::/usr/sbin:/usr/sbin/nologin\n"
    with pytest.raises(InputError, match="header row missing") as caught:
        normalise(decode_table(data))
    assert "root:x:0:0:r…" in str(caught.value)
    assert "/bin/bash" not in str(caught.value)


def test_a_cell_quoted_in_a_message_is_short_and_escaped() -> None:
    """A bad cell is quoted with control characters escaped and cut at 40 characters."""
    cell = "\x1b[31m" + "x" * 100
    data = f"seq,sample_id,kind,analyte,response\n1,S,sample,Cu,{cell}\n".encode()
    with pytest.raises(InputError) as caught:
        normalise(decode_table(data))
    assert "\x1b" not in str(caught.value)
    assert "got '\\x1b[31m" + "x" * 35 + "…'" in str(caught.value)


def test_chromatography_columns_are_read() -> None:
    """Retention times and the qualifier response are read; an empty cell means not given."""
    text = (
        b"seq,sample_id,kind,analyte,response,retention_time,istd_retention_time,"
        b"qualifier_response\n1,S-1,sample,Atrazine,1000,6.21,5.10,520\n2,S-2,sample,Atrazine,9,,,\n"
    )
    first, second = normalise(decode_table(text)).readings
    assert (first.retention_time, first.istd_retention_time, first.qualifier_response) == (
        6.21,
        5.10,
        520.0,
    )
    assert (second.retention_time, second.qualifier_response) == (None, None)


@pytest.mark.parametrize(
    ("cell", "phrase"),
    [("six", "must be a number"), ("-0.5", "must not be negative"), ("nan", "finite")],
)
def test_a_bad_retention_time_names_its_line_and_column(cell: str, phrase: str) -> None:
    """A retention time that is no finite, non-negative number is refused, naming the cell."""
    text = f"seq,sample_id,kind,analyte,response,retention_time\n1,S-1,sample,Zn,10,{cell}\n"
    with pytest.raises(InputError, match=phrase) as caught:
        normalise(decode_table(text.encode()))
    assert (caught.value.line, caught.value.column) == (2, "retention_time")


def test_new_qc_kinds_need_their_parent_and_spike() -> None:
    """A serial dilution needs its parent, a post-digestion spike its parent and `added`."""
    header = "seq,sample_id,kind,analyte,response,parent,added\n"
    with pytest.raises(InputError, match="parent"):
        normalise(decode_table((header + "1,S-1-SD,serial_dilution,Zn,10,,\n").encode()))
    with pytest.raises(InputError, match="amount added"):
        normalise(decode_table((header + "1,S-1-PDS,pds,Zn,10,S-1,\n").encode()))
    run = normalise(decode_table((header + "1,ICS-A,ICS_A,Zn,10,,\n").encode()))
    assert run.readings[0].kind is Kind.ICS_A
