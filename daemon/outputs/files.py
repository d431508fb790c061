"""Writing the files of a verdict: JSON, flagged copy of the input, reports, re-run worklist.

Every file is written atomically (a temporary file in the same folder,
fsync, ``os.replace``), so a reader never sees half a verdict. The input
file is never written to.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
import tempfile
import time
from pathlib import Path

from calwarden.daemon.outputs.html_report import Extras, render_html
from calwarden.daemon.outputs.report import render
from calwarden.daemon.outputs.verdict_json import dump_verdict, reported_as
from calwarden.daemon.outputs.verdict_model import VerdictDocument
from calwarden.daemon.parsing.table import RawTable, header_key
from calwarden.daemon.settings.worklist import WorklistSettings
from calwarden.rules.model import Kind
from calwarden.rules.verdict import Result, Verdict

#: Columns the flagged copy adds after the input's own.
ADDED_COLUMNS = (
    "concentration",
    "uncertainty",
    "result_unit",
    "flags",
    "reported_as",  # "< 10" below the reporting limit (dilution applied)
    "reporting_limit",
    "qualifiers",
)
_REPLACE_ATTEMPTS = 5  # Windows refuses os.replace while another process holds the target open


#: Bytes an output stem's own name may take. File systems allow 255 bytes a name, and
#: an output adds up to about 95 to its stem: ``@v<version>``, the longest suffix
#: (``.calibration-<analyte>.png``, the analyte part capped at :data:`PART_LIMIT`) and the
#: temporary name's ``.`` prefix and ``.<8 random>.tmp``.
STEM_LIMIT = 160
#: Bytes of an analyte, level or instrument name inside an output's file name.
PART_LIMIT = 48


def shortened(name: str, limit: int) -> str:
    """``name`` when it fits in ``limit`` UTF-8 bytes, else a cut of it plus a digest.

    The digest is of the whole name, so two long names that share their first bytes
    still get two outputs; the cut never splits a character.
    """
    encoded = name.encode("utf-8")
    if len(encoded) <= limit:
        return name
    digest = hashlib.sha256(encoded).hexdigest()[:12]
    head = encoded[: limit - len(digest) - 1].decode("utf-8", errors="ignore")
    return f"{head}~{digest}"


def fitting_stem(stem: str) -> str:
    """An output stem (``folder/name``) whose files' names fit the file system.

    Only the last part can be too long: the folders are the inbox's own, which exist.
    The original name stays in the verdict (``source``) and the ledger (``path``).
    """
    folder, _, name = stem.rpartition("/")
    fitted = shortened(name, STEM_LIMIT)
    return f"{folder}/{fitted}" if folder else fitted


def _current_umask() -> int:
    mask = os.umask(0)  # the only way to read it is to set it; put it straight back
    os.umask(mask)
    return mask


# mkstemp makes files 0600; outputs get the mode any new file would (0644 under umask 022).
_FILE_MODE = 0o666 & ~_current_umask()


def atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that ``path`` holds either the old or the new content."""
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        if hasattr(os, "fchmod"):  # not on Windows, where the mode bits mean little
            os.fchmod(handle, _FILE_MODE)
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
            stream.flush()
            os.fsync(stream.fileno())
        for attempt in range(_REPLACE_ATTEMPTS):
            try:
                os.replace(temporary, path)
                break
            except PermissionError:
                if attempt == _REPLACE_ATTEMPTS - 1:
                    raise
                time.sleep(0.05 * 2**attempt)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


#: A text cell starting with one of these is read as a formula by spreadsheet programs
#: (OWASP, "CSV Injection": =, +, -, @, tab and carriage return).
_FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def neutralised(cell: str) -> str:
    """A cell a spreadsheet shows as text: formula-like text gets a leading ``'``.

    Numbers (``-0.5``, ``+1e-3``) are left alone, so the copy stays machine-readable.
    """
    if not cell.startswith(_FORMULA_STARTS):
        return cell
    try:
        float(cell)
    except ValueError:
        return "'" + cell
    return cell


def _cell(value: float | None) -> str:
    return "" if value is None else repr(float(value))


def flagged_csv(table: RawTable, verdict: Verdict) -> bytes:
    """The input's rows and columns, each row followed by its concentration and flags.

    Rows are matched to results by (analyte, seq), not by line: in a wide export
    every analyte of an injection comes from the same line.
    """
    results: dict[tuple[str, int], Result] = {}
    for result in verdict.results:
        if result.kind is not Kind.ADDITION and result.seq is not None:
            results[(result.analyte, result.seq)] = result
    by_seq_and_analyte = {(r.analyte, r.seq): r for r in verdict.results if r.kind is Kind.ADDITION}
    for series in verdict.additions:
        addition = by_seq_and_analyte.get((series.analyte, series.seqs[0]))
        if addition is not None:
            for seq in series.seqs:
                results[(series.analyte, seq)] = addition
    back_calculated = {
        (c.analyte, s.seq): s.back_calculated for c in verdict.calibrations for s in c.standards
    }
    header = list(table.header)
    added = [name if name not in header else f"{name}_calwarden" for name in ADDED_COLUMNS]
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([*(neutralised(name) for name in header), *added])
    keys = [header_key(name) for name in header]
    seq_column, analyte_column = keys.index("seq"), keys.index("analyte")
    for row in table.rows:
        try:
            key = (row.fields[analyte_column].strip(), int(row.fields[seq_column]))
        except (ValueError, IndexError):
            key = ("", -1)  # cannot happen for a table that was judged; write no result
        found = results.get(key)
        if found is not None:
            extra = [
                _cell(found.concentration),
                _cell(found.uncertainty),
                found.unit or "",
                " ".join(flag.value for flag in found.flags),
                reported_as(found) or "",
                _cell(found.reporting_limit),
                " ".join(found.qualifiers),
            ]
        elif key in back_calculated:
            extra = [_cell(back_calculated[key]), "", "", "", "", "", ""]
        else:
            extra = [""] * len(ADDED_COLUMNS)
        writer.writerow([*(neutralised(field) for field in row.fields), *extra])
    return buffer.getvalue().encode("utf-8")


#: The files of one evaluation, in the order they are written: the verdict last,
#: because its presence says the other files of the evaluation are complete.
OUTPUT_SUFFIXES = (".flagged.csv", ".report.txt", ".report.html", ".reruns.csv", ".verdict.json")
#: Files only some verdicts have: an earlier version's is removed when the new one has none.
_OPTIONAL_SUFFIXES = (".reruns.csv",)


def output_files(
    document: VerdictDocument,
    table: RawTable | None = None,
    verdict: Verdict | None = None,
    *,
    worklist: WorklistSettings | None = None,
    checks_every: int = 10,
    extras: Extras | None = None,
) -> dict[str, bytes]:
    """The bytes of each output file by suffix (no flagged copy for a file never read,
    a re-run worklist only for a failing run with samples to re-run)."""
    from calwarden.daemon.outputs.worklist import worklist_csv

    files: dict[str, bytes] = {}
    if table is not None and verdict is not None:
        files[".flagged.csv"] = flagged_csv(table, verdict)
    files[".report.txt"] = render(document).encode("utf-8")
    files[".report.html"] = render_html(document, extras).encode("utf-8")
    reruns = worklist_csv(document, worklist or WorklistSettings(), checks_every)
    if reruns is not None:
        files[".reruns.csv"] = reruns
    files[".verdict.json"] = (dump_verdict(document) + "\n").encode("utf-8")
    return files


def write_files(out_dir: Path, stem: str, files: dict[str, bytes]) -> list[Path]:
    """Write ``<stem><suffix>`` for each file, atomically, in :data:`OUTPUT_SUFFIXES` order."""
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for suffix in OUTPUT_SUFFIXES:
        path = out_dir / f"{stem}{suffix}"
        if suffix in files:
            atomic_write(path, files[suffix])
            written.append(path)
        elif suffix in _OPTIONAL_SUFFIXES:
            path.unlink(missing_ok=True)  # a passing new version: the old worklist is void
    return written


def write_outputs(
    out_dir: Path,
    stem: str,
    document: VerdictDocument,
    table: RawTable | None = None,
    verdict: Verdict | None = None,
    *,
    worklist: WorklistSettings | None = None,
    checks_every: int = 10,
) -> list[Path]:
    """Write the verdict JSON, the reports, the worklist and (when read) the flagged copy."""
    files = output_files(document, table, verdict, worklist=worklist, checks_every=checks_every)
    return write_files(out_dir, stem, files)


def is_leftover_temporary(name: str) -> bool:
    """A temporary file :func:`atomic_write` leaves behind only when the process is killed."""
    return (
        name.startswith(".")
        and name.endswith(".tmp")
        and any(f"{suffix}." in name for suffix in (*OUTPUT_SUFFIXES, ".png", "index.html"))
    )
