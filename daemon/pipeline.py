"""One file through the whole flow: read, normalise, evaluate, describe.

The watcher (later) and ``calwarden check`` both call :func:`judge_file`, so
a file is judged the same way whichever way it arrives.
"""

from __future__ import annotations

import dataclasses
import hashlib
import stat
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from calwarden.daemon.outputs.verdict_json import verdict_to_json
from calwarden.daemon.outputs.verdict_model import VerdictDocument
from calwarden.daemon.parsing.native import read_native
from calwarden.daemon.parsing.table import RawTable
from calwarden.daemon.settings.config import AppConfig
from calwarden.rules.errors import InputError
from calwarden.rules.evaluate import evaluate
from calwarden.rules.model import Run
from calwarden.rules.verdict import Status, Verdict


@dataclass(frozen=True, slots=True)
class Judgement:
    """The verdict document of one file, and what the flagged copy needs."""

    document: VerdictDocument
    table: RawTable | None
    verdict: Verdict | None
    run: Run | None = None

    @property
    def status(self) -> Status:
        return Status(self.document["status"])


def _file_sha256(path: Path) -> str | None:
    """The file's SHA-256, or None for what is not a regular file (a FIFO or a device would
    never end, or block for ever) or cannot be read."""
    try:
        if not stat.S_ISREG(path.stat().st_mode):
            return None
        with path.open("rb") as stream:
            return hashlib.file_digest(stream, "sha256").hexdigest()
    except OSError:
        return None


def error_document(
    path: Path,
    message: str,
    criteria_sha256: str | None,
    *,
    data: bytes | None = None,
    instrument: str | None = None,
) -> VerdictDocument:
    """The verdict JSON of a file that could not be evaluated."""
    verdict = Verdict(Status.ERROR, path.stem, instrument, (), (), (), error=message)
    sha256 = hashlib.sha256(data).hexdigest() if data is not None else _file_sha256(path)
    return verdict_to_json(
        verdict, source_path=str(path), sha256=sha256, criteria_sha256=criteria_sha256
    )


def judge_file(
    path: Path,
    config: AppConfig,
    *,
    summary_only: bool = False,
    data: bytes | None = None,
    instrument: str | None = None,
    refine: Callable[[Run, Verdict], Verdict] | None = None,
) -> Judgement:
    """Judge one file; broken input gives an ``error`` verdict, never an exception.

    ``summary_only`` leaves the document's ``results`` empty (for the terminal summary).
    ``data`` is the file's bytes when the caller has read them already (so the
    hash recorded is of exactly what was judged). ``instrument`` names the
    instrument of a run whose file does not. ``refine`` (the daemon's control
    log) turns the run's verdict into the final one before it is serialised.

    A ConfigError (e.g. a disabled rule id that does not exist) propagates:
    it is the configuration's fault, not the file's.
    """
    criteria_sha256 = config.criteria.digest()
    try:
        # The size limit is the readers' (decode.check_bytes), for given bytes too.
        if config.format is None:
            parsed = read_native(path, data=data)
        else:
            from calwarden.daemon.parsing.exports import (
                read_export,  # only configurations with a layout need it
            )

            parsed, _ = read_export(path, config.format, data=data)
    except InputError as error:
        document = error_document(
            path, str(error), criteria_sha256, data=data, instrument=instrument
        )
        return Judgement(document, None, None)
    if instrument is not None and parsed.run.instrument is None:
        parsed = dataclasses.replace(
            parsed, run=dataclasses.replace(parsed.run, instrument=instrument)
        )
    verdict = evaluate(parsed.run, config.criteria)
    if refine is not None:
        verdict = refine(parsed.run, verdict)
    document = verdict_to_json(
        verdict,
        source_path=str(path),
        sha256=parsed.sha256,
        criteria_sha256=criteria_sha256,
        with_results=not summary_only,
    )
    return Judgement(document, parsed.table, verdict, parsed.run)
