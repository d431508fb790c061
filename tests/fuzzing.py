"""Seeded mutation fuzzing of run files: the mutators and the invariant checker.

Shared by ``tests/test_fuzz.py`` (a few hundred cases in the suite),
``tests/test_corpus.py`` (the invariants of ``check --json``) and
``tests/benchmarks/fuzz.py`` (the long run). A case is a seed file with one to
three mutations, made by a ``random.Random(seed)`` only, so a case number always
gives the same bytes. The invariants, whatever the bytes:

- no traceback and no internal error; no hang (each case has a deadline);
- ``--json`` prints one valid JSON document (no ``NaN`` or ``Infinity`` tokens);
- the exit code matches the status (0 pass, 1 fail, 2 error);
- no silently missing result and no failing run that says nothing to do
  (``tests/verdict_invariants.py``);
- no pass with a row that could not be used: every data row of the file is a
  reading of the run, and a passing run has a concentration for every result
  (but those only below the range) and no calibration problem.
"""

from __future__ import annotations

import contextlib
import csv
import gc
import io
import json
import random
import re
import signal
import threading
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from verdict_invariants import LEGITIMATE_GAP_FLAGS, problems

PROJECT = Path(__file__).resolve().parent.parent
FIXTURES = PROJECT / "fixtures"
#: The runs mutated (small ones first: most cases start from a short run), each with the
#: configuration that reads it (None: the native format): native files and three exports.
SEEDS: dict[str, str | None] = {
    "bwl-addition.csv": None,
    "bwl-metals-pass.csv": None,
    "bwl-lc-istd.csv": None,
    "bwl-quadratic.csv": None,
    "exports/bwl-oes-cations.tsv": "config/export-oes-tab.yaml",
    "exports/bwl-lcms-herbicides.csv": "config/export-lcms-wide.yaml",
    "exports/bwl-icpms-metals-fail.xlsx": "config/export-icpms-xlsx.yaml",
}
SEED_WEIGHTS = (6, 2, 1, 1, 1, 1, 1)
EXIT_OF_STATUS = {"pass": 0, "fail": 1, "error": 2}
#: Numbers a careless or hostile file may hold in one cell.
EXTREMES = (
    "1e308", "-1e308", "1.7976931348623157e308", "1e300", "1e200", "1e-308", "5e-324",
    "1e-320", "-0", "0", "nan", "inf", "-inf", "1e400", "9007199254740992", "18446744073709551616",
    "", "  ", "0x1p3", "1_0", "１", "1,5", "+1", "-1", ".5", "5.", "1e", "--1",
)  # fmt: skip
JUNK = (
    "\x00", "\x1b[2J", "\r", "\n", '"', "'", ",", ";", "\t", "\ufeff", "\u202e", "\u200b",
    "=cmd|' /C calc'!A0", "@SUM(1)", "µ", "空白", "\udcff", "\x7f", "..", "../x", "Ω" * 50,
)  # fmt: skip
KIND_WORDS = (
    "blank", "cal", "icv", "ccv", "ccb", "mb", "lcs", "sample", "dup", "ms", "msd", "addition",
    "standard", "", "CAL", "Sample ",
)  # fmt: skip


def seed_bytes() -> dict[str, bytes]:
    return {name: (FIXTURES / name).read_bytes() for name in SEEDS}


def seed_configs() -> dict[str, Any]:
    """Each seed's configuration, loaded once."""
    from calwarden.daemon.settings.config import load_config

    loaded = {path: load_config(PROJECT / path if path else None) for path in set(SEEDS.values())}
    return {name: loaded[path] for name, path in SEEDS.items()}


# --------------------------------------------------------------------------- mutators

Mutator = Callable[[random.Random, bytes], bytes]


def _lines(data: bytes) -> list[bytes]:
    return data.split(b"\n")


def _join(lines: Sequence[bytes]) -> bytes:
    return b"\n".join(lines)


def _delimiter(data: bytes) -> bytes:
    first = data.split(b"\n", 1)[0]
    return b"\t" if b"\t" in first else b","


def _cell(rng: random.Random, data: bytes, value: bytes) -> bytes:
    """Replace one cell of one data row (not the header) with ``value``."""
    lines = _lines(data)
    rows = [i for i in range(1, len(lines)) if lines[i].strip()]
    if not rows:
        return data + value
    i = rng.choice(rows)
    delimiter = _delimiter(data)
    cells = lines[i].split(delimiter)
    cells[rng.randrange(len(cells))] = value
    lines[i] = delimiter.join(cells)
    return _join(lines)


def flip_byte(rng: random.Random, data: bytes) -> bytes:
    if not data:
        return bytes([rng.randrange(256)])
    i = rng.randrange(len(data))
    return data[:i] + bytes([data[i] ^ (1 << rng.randrange(8))]) + data[i + 1 :]


def insert_byte(rng: random.Random, data: bytes) -> bytes:
    i = rng.randrange(len(data) + 1)
    return data[:i] + bytes([rng.randrange(256)]) + data[i:]


def delete_span(rng: random.Random, data: bytes) -> bytes:
    if not data:
        return data
    i = rng.randrange(len(data))
    return data[:i] + data[i + rng.randrange(1, 40) :]


def truncate(rng: random.Random, data: bytes) -> bytes:
    return data[: rng.randrange(len(data) + 1)]


def duplicate_line(rng: random.Random, data: bytes) -> bytes:
    lines = _lines(data)
    i = rng.randrange(len(lines))
    return _join([*lines[: i + 1], lines[i], *lines[i + 1 :]])


def delete_line(rng: random.Random, data: bytes) -> bytes:
    lines = _lines(data)
    del lines[rng.randrange(len(lines))]
    return _join(lines)


def swap_lines(rng: random.Random, data: bytes) -> bytes:
    lines = _lines(data)
    i, j = rng.randrange(len(lines)), rng.randrange(len(lines))
    lines[i], lines[j] = lines[j], lines[i]
    return _join(lines)


def extreme_cell(rng: random.Random, data: bytes) -> bytes:
    return _cell(rng, data, rng.choice(EXTREMES).encode("utf-8", "surrogatepass"))


def junk_cell(rng: random.Random, data: bytes) -> bytes:
    return _cell(rng, data, rng.choice(JUNK).encode("utf-8", "surrogatepass"))


def kind_cell(rng: random.Random, data: bytes) -> bytes:
    """Another kind word in a row's kind column (the third one in every seed)."""
    lines, d = _lines(data), _delimiter(data)
    rows = [i for i in range(1, len(lines)) if lines[i].count(d) > 3]
    if not rows:
        return data
    i = rng.choice(rows)
    cells = lines[i].split(d)
    cells[2] = rng.choice(KIND_WORDS).encode()
    lines[i] = d.join(cells)
    return _join(lines)


def header_edit(rng: random.Random, data: bytes) -> bytes:
    """Drop, repeat, swap or misspell one header name."""
    lines, d = _lines(data), _delimiter(data)
    names = lines[0].split(d)
    i = rng.randrange(len(names))
    choice = rng.randrange(4)
    if choice == 0:
        del names[i]
    elif choice == 1:
        names.append(names[i])
    elif choice == 2:
        j = rng.randrange(len(names))
        names[i], names[j] = names[j], names[i]
    else:
        names[i] = names[i][:-1] + b"x"
    lines[0] = d.join(names)
    return _join(lines)


def line_ends(rng: random.Random, data: bytes) -> bytes:
    return data.replace(b"\n", rng.choice([b"\r\n", b"\r", b"\n\n", b"\x85", "\u2028".encode()]))


def add_bom(rng: random.Random, data: bytes) -> bytes:
    return rng.choice([b"\xef\xbb\xbf", b"\xff\xfe", b"\xfe\xff", b"\xef\xbb"]) + data


def reencode(rng: random.Random, data: bytes) -> bytes:
    text = data.decode("utf-8", "replace")
    codec = rng.choice(["utf-16", "utf-16-le", "cp1252", "latin-1", "utf-32", "gb18030"])
    return text.encode(codec, "replace")


def append_garbage(rng: random.Random, data: bytes) -> bytes:
    return data + bytes(rng.randrange(256) for _ in range(rng.randrange(1, 64)))


def long_cell(rng: random.Random, data: bytes) -> bytes:
    return _cell(rng, data, b"x" * rng.choice([300, 5000, 200_000]))


def scale_number(rng: random.Random, data: bytes) -> bytes:
    """A numeric cell multiplied by a random factor: a valid file with a wrong value."""
    lines, d = _lines(data), _delimiter(data)
    spots = [
        (i, j)
        for i in range(1, len(lines))
        for j, cell in enumerate(lines[i].split(d))
        if re.fullmatch(rb"\d+\.\d+", cell)
    ]
    if not spots:
        return data
    i, j = rng.choice(spots)
    cells = lines[i].split(d)
    factor = 10 ** rng.uniform(-6, 6) if rng.random() < 0.3 else rng.uniform(0.5, 1.5)
    cells[j] = f"{float(cells[j]) * factor:.6g}".encode()
    lines[i] = d.join(cells)
    return _join(lines)


def drop_kind(rng: random.Random, data: bytes) -> bytes:
    """Every row of one kind left out (a run missing its CCVs, blanks or standards)."""
    lines, d = _lines(data), _delimiter(data)
    kinds = sorted({line.split(d)[2] for line in lines[1:] if line.count(d) > 3})
    if not kinds:
        return data
    gone = rng.choice(kinds)
    return _join([lines[0], *(x for x in lines[1:] if x.count(d) <= 3 or x.split(d)[2] != gone)])


MUTATORS: tuple[Mutator, ...] = (
    scale_number,
    scale_number,
    drop_kind,
    flip_byte,
    insert_byte,
    delete_span,
    truncate,
    duplicate_line,
    delete_line,
    swap_lines,
    extreme_cell,
    extreme_cell,
    extreme_cell,
    junk_cell,
    kind_cell,
    header_edit,
    line_ends,
    add_bom,
    reencode,
    append_garbage,
    long_cell,
)


@dataclass(frozen=True)
class FuzzCase:
    number: int
    seed_name: str
    mutations: tuple[str, ...]
    data: bytes


def make_case(number: int, seeds: dict[str, bytes], seed: int = 0) -> FuzzCase:
    """Case ``number`` of the run ``seed``: always the same bytes."""
    rng = random.Random(f"{seed}:{number}")
    # Short runs most often, so that a case stays quick; the others keep their variety.
    name = rng.choices(list(SEEDS), weights=SEED_WEIGHTS)[0]
    data = seeds[name]
    applied = []
    for _ in range(rng.choice((1, 1, 2, 3))):
        mutator = rng.choice(MUTATORS)
        data = mutator(rng, data)
        applied.append(mutator.__name__)
    return FuzzCase(number, name, tuple(applied), data)


# --------------------------------------------------------------------------- deadlines


class Hang(Exception):
    """A case ran past its deadline."""


@contextlib.contextmanager
def deadline(seconds: float) -> Iterator[None]:
    """Raise Hang in the main thread when the block runs longer than ``seconds`` (POSIX)."""
    if (
        not hasattr(signal, "setitimer")
        or threading.current_thread() is not threading.main_thread()
    ):
        yield
        return

    def expire(signum: int, frame: object) -> None:
        raise Hang(f"no answer within {seconds} s")

    previous = signal.signal(signal.SIGALRM, expire)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


# --------------------------------------------------------------------------- the checks


def strict_json(text: str) -> Any:
    """The one JSON document ``text`` holds; NaN and Infinity tokens are not JSON."""

    def refuse(token: str) -> Any:
        raise ValueError(f"{token} is not valid JSON")

    return json.loads(text, parse_constant=refuse)


def document_problems(document: dict[str, Any], exit_code: int | None = None) -> list[str]:
    """Every invariant a verdict document (and the exit code it came with) breaks."""
    found: list[str] = []
    status = document.get("status")
    if status not in EXIT_OF_STATUS:
        return [f"unknown status {status!r}"]
    if exit_code is not None and exit_code != EXIT_OF_STATUS[status]:
        found.append(f"exit code {exit_code} with status {status}")
    error = document.get("error") or ""
    if status == "error" and not error:
        found.append("an error verdict without a message")
    if "internal error" in error or "Traceback" in error:
        found.append(f"internal error: {error[:300]}")
    found.extend(problems(document))
    if status == "pass":
        for result in document["results"]:
            gap = result["concentration"] is None
            if gap and not LEGITIMATE_GAP_FLAGS.intersection(result["flags"]):
                found.append(f"passes with {result['sample_id']} {result['analyte']} unquantified")
        for analyte, calibration in document["calibrations"].items():
            if calibration.get("problem"):
                found.append(f"passes with a calibration problem for {analyte}")
    return found


def data_rows(text: str) -> int | None:
    """How many non-blank data rows the csv module finds after the header (None: not CSV)."""
    try:
        rows = [r for r in csv.reader(io.StringIO(text, newline=""), strict=True)]
    except csv.Error:
        return None
    rows = [r for r in rows if any(cell.strip() for cell in r)]
    return max(len(rows) - 1, 0)


def rows_problems(data: bytes, readings: int) -> list[str]:
    """A judged native file whose data rows are not each one reading of the run."""
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        return []
    expected = data_rows(text)
    if expected is not None and expected != readings:
        return [f"{expected} data rows but {readings} readings judged"]
    return []


@dataclass(frozen=True)
class Outcome:
    """What one ``calwarden check --json`` gave."""

    exit_code: int
    stdout: str
    stderr: str


def check_in_process(path: Path, *options: str, seconds: float = 20.0) -> Outcome:
    """``calwarden check PATH --json OPTIONS`` in this process, its output captured."""
    from calwarden.daemon.cli.main import main

    stdout, stderr = io.StringIO(), io.StringIO()
    enabled = gc.isenabled()
    try:
        with (
            deadline(seconds),
            contextlib.redirect_stdout(stdout),
            contextlib.redirect_stderr(stderr),
        ):
            code = main(["check", str(path), "--json", *options])
    finally:
        if enabled:
            gc.enable()  # check switches the collector off for its one short run
    return Outcome(code, stdout.getvalue(), stderr.getvalue())


def outcome_problems(outcome: Outcome) -> tuple[dict[str, Any] | None, list[str]]:
    """The document of a ``check --json`` and every invariant it breaks."""
    found = []
    if outcome.stderr.strip():
        found.append(f"stderr not empty: {outcome.stderr[:300]}")
    try:
        document = strict_json(outcome.stdout)
    except ValueError as error:
        return None, [*found, f"stdout is not one JSON document: {error}"]
    if not isinstance(document, dict):
        return None, [*found, "the JSON is not an object"]
    return document, [*found, *document_problems(document, outcome.exit_code)]


def judge_in_memory(case: FuzzCase, configs: dict[str, Any]) -> tuple[str, list[str]]:
    """One case through the pipeline and the report in memory: its status and problems.

    ``configs`` is :func:`seed_configs`: the configuration that reads the case's seed.
    """
    from calwarden.daemon.outputs.report import render
    from calwarden.daemon.outputs.verdict_json import dump_verdict
    from calwarden.daemon.pipeline import judge_file

    config = configs[case.seed_name]
    path = Path(f"fuzz-{case.number}{Path(case.seed_name).suffix}")
    try:
        judgement = judge_file(path, config, data=case.data)
        text = dump_verdict(judgement.document)
        render(judgement.document)
    except Hang:
        raise
    except Exception as error:  # the finding of the fuzz: anything raised is a bug
        return "crash", [f"{type(error).__name__}: {error}"]
    try:
        document = strict_json(text)
    except ValueError as error:
        return "crash", [f"the verdict is not valid JSON: {error}"]
    found = document_problems(document)
    if judgement.run is not None and SEEDS[case.seed_name] is None:
        found.extend(rows_problems(case.data, len(judgement.run.readings)))
    return document["status"], found
