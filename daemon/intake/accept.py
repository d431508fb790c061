"""One settled file into the ledger and the output folder, exactly once.

The order of the steps is what makes a crash at any instant harmless:

1. the file's bytes are hashed; the same bytes at the same path are nothing new,
   and a new name with content already judged is recorded as a duplicate;
2. the file is judged from exactly those bytes, and its control observations are
   judged against the control-chart log (only read here);
3. when it is a new version of a known file, the earlier version's outputs are
   written under a suffixed name from the ledger's copy of them;
4. its outputs are written, each atomically, the verdict JSON last;
5. the evaluation, its control points, any limits they set and its alert (a
   failed run, a file that could not be judged, a control rule that fired) are
   recorded in the ledger in one durable transaction; the alert sender takes
   the alert from there.

A crash before step 5 leaves the file unrecorded, so the next start judges
it again (against the same history) and writes the same outputs over the old
ones; a crash after it leaves a complete record. Either way every file ends
with one current verdict. The input file is only ever read. Pictures are not
part of this: the watcher draws them later, from the ledger.
"""

from __future__ import annotations

import hashlib
import json
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

import structlog

from calwarden.daemon.alerts.content import file_alert, payload_bytes
from calwarden.daemon.alerts.settings import AlertSettings
from calwarden.daemon.control_log.log import NOTHING, Assessment, assess
from calwarden.daemon.outputs.files import fitting_stem, output_files, write_files
from calwarden.daemon.outputs.html_report import Extras, render_html
from calwarden.daemon.outputs.pictures import calibration_picture_name
from calwarden.daemon.outputs.report import render
from calwarden.daemon.outputs.verdict_json import calwarden_version
from calwarden.daemon.outputs.verdict_model import VerdictDocument
from calwarden.daemon.pipeline import Judgement, error_document, judge_file
from calwarden.daemon.settings.config import AppConfig, Inbox
from calwarden.daemon.stores.database import LedgerError
from calwarden.daemon.stores.ledger import Ledger
from calwarden.daemon.stores.records import (
    Evaluation,
    NewAlert,
    NewEvaluation,
    Seen,
    SeriesKey,
    timestamp,
)
from calwarden.rules.control_points import control_observations
from calwarden.rules.control_verdict import with_control
from calwarden.rules.model import Run
from calwarden.rules.verdict import Verdict

log = structlog.get_logger("calwarden")

#: Suffix of an earlier version's outputs: ``run-07@v1.verdict.json``.
VERSION_MARK = "@v"


def _archive_stem(out_folder: Path, name: str, version: int, verdict: bytes) -> str:
    """``<name>@v<version>``, or the next number free on disk: an archived verdict is never
    overwritten, even when a lost ledger starts the numbering again. The same verdict
    found in a slot is that slot (a repeat after a crash writes it once)."""
    while True:
        stem = f"{name}{VERSION_MARK}{version}"
        existing = out_folder / f"{stem}.verdict.json"
        try:
            if existing.read_bytes() == verdict:
                return stem
        except FileNotFoundError:
            return stem
        version += 1


class OutputError(Exception):
    """The output folder cannot be written (full, gone, no permission): a daemon fault."""


@dataclass(frozen=True, slots=True)
class Outcome:
    """What became of one settled file."""

    inbox: str
    path: str  # in the inbox, with '/' separators
    status: str  # pass | fail | error | duplicate | unchanged
    sha256: str
    run: str | None = None
    instrument: str | None = None
    failures: int = 0
    warnings: int = 0
    message: str | None = None
    verdict_path: Path | None = None
    version: int = 0
    duplicate_of: str | None = None
    reruns: int = 0
    series: tuple[SeriesKey, ...] = ()  # the control charts this file added points to


def config_digest(config: AppConfig) -> str:
    """SHA-256 of everything that decides a verdict: the criteria and the layout."""
    canonical = json.dumps(
        {
            "criteria": config.criteria.model_dump(mode="json"),
            "format": None if config.format is None else config.format.model_dump(mode="json"),
        },
        sort_keys=True,
        separators=(",", ":"),
    )
    return hashlib.sha256(canonical.encode("utf-8")).hexdigest()


def _first_failure(document: VerdictDocument) -> str | None:
    if document.get("error"):
        return str(document["error"])
    for finding in document.get("findings", []):
        if finding.get("severity") == "fail":
            return str(finding.get("message"))
    return None


def _count(document: VerdictDocument, severity: str) -> int:
    return sum(1 for finding in document.get("findings", []) if finding.get("severity") == severity)


class Intake:
    """Judges settled files of the watched inboxes into the worker's stores (its ledger)."""

    def __init__(
        self, ledger: Ledger, inboxes: tuple[Inbox, ...], alerts: AlertSettings | None = None
    ) -> None:
        self.ledger = ledger
        self.alerts = alerts if alerts is not None else AlertSettings()
        self._digests = {inbox.name: config_digest(inbox.config) for inbox in inboxes}
        self._failed_baselines: dict[SeriesKey, int] = {}
        self._few_runs: dict[SeriesKey, frozenset[str]] = {}

    def process(
        self,
        inbox: Inbox,
        path: Path,
        data: bytes | None,
        sha256: str,
        size: int,
        mtime_ns: int,
    ) -> Outcome:
        """Record one settled file: unchanged, duplicate, or judged and written.

        ``data`` is the file's bytes (None for a file too large to load, which
        is judged as too large), ``sha256`` their hash.
        """
        relative = path.relative_to(inbox.path).as_posix()
        seen = Seen(size, mtime_ns, sha256)
        previous_state = self.ledger.files.seen(inbox.name, relative)
        if previous_state is not None and previous_state.sha256 == sha256:
            self.ledger.files.touch(inbox.name, relative, seen)
            return Outcome(inbox.name, relative, "unchanged", sha256)

        # Only a path never judged can be a duplicate: a judged file given another
        # file's content is a new version of itself, and needs a current verdict.
        original = None
        if self.ledger.files.current(inbox.name, relative) is None:
            original = self.ledger.files.judged_content(inbox.name, sha256, elsewhere_than=relative)
        if original is not None:
            self.ledger.files.record_duplicate(
                inbox.name,
                relative,
                seen,
                original,
                calwarden_version=calwarden_version(),
                evaluated_at=timestamp(),
            )
            log.info(
                "file_duplicate",
                inbox=inbox.name,
                path=relative,
                sha256=sha256,
                duplicate_of=original.path,
            )
            return Outcome(
                inbox.name,
                relative,
                "duplicate",
                sha256,
                run=original.run,
                instrument=original.instrument,
                duplicate_of=original.path,
            )
        return self._judge(inbox, path, relative, data, seen)

    def _output_stem(self, inbox: Inbox, relative: str) -> str:
        """Where this file's outputs go, relative to the inbox's output folder."""
        pure = PurePosixPath(relative)
        stem = fitting_stem(pure.with_suffix("").as_posix())
        owner = self.ledger.files.stem_owner(inbox.name, stem)
        if VERSION_MARK in pure.name or (owner is not None and owner != relative):
            # ``run.csv`` and ``run.txt`` both judged, or a name that looks like an
            # earlier version's: keep the whole name so that no verdict overwrites another.
            stem = pure.as_posix()
        return fitting_stem(stem)

    def _judge(
        self, inbox: Inbox, path: Path, relative: str, data: bytes | None, seen: Seen
    ) -> Outcome:
        started = time.perf_counter()
        previous = self.ledger.files.current(inbox.name, relative)
        version = 1 if previous is None else previous.version + 1
        if previous is not None:
            # A new version supersedes points: the series' first points may change.
            self._few_runs.clear()
        assessed: list[Assessment] = []

        def refine(run: Run, verdict: Verdict) -> Verdict:
            """The run's verdict with its control findings, from the control log's history."""
            assessed.append(self._assess(inbox, relative, run, verdict))
            return with_control(verdict, assessed[-1].history, inbox.config.control.policy())

        judgement = self._judgement(inbox, path, data, refine)
        assessment = assessed[-1] if assessed and judgement.verdict is not None else NOTHING
        document = judgement.document
        stem = self._output_stem(inbox, relative) if previous is None else previous.output_stem
        assert stem is not None
        out_folder = inbox.out_dir / PurePosixPath(stem).parent
        name = PurePosixPath(stem).name
        if inbox.config.control.charts and document.get("calibrations"):
            # Drawn when the daemon is idle (see Watcher); the report names them now.
            document = {
                **document,
                "pictures": [
                    calibration_picture_name(name, analyte) for analyte in document["calibrations"]
                ],
            }
        evaluated_at = timestamp()  # before the outputs: the HTML report shows it
        try:
            if previous is not None:
                self._archive(inbox, previous, out_folder, name)
            files = output_files(
                document,
                judgement.table,
                judgement.verdict,
                worklist=inbox.config.worklist,
                checks_every=inbox.config.criteria.defaults.max_field_samples_between_checks,
                extras=Extras(
                    self._digests.get(inbox.name),
                    evaluated_at,
                    pictures_pending=bool(document.get("pictures")),
                ),
            )
            write_files(out_folder, name, files)
        except OSError as error:
            raise OutputError(f"cannot write the outputs in {out_folder}: {error}") from error
        status = str(document["status"])
        message = _first_failure(document)
        failures, warnings = _count(document, "fail"), _count(document, "warn")
        verdict_path = out_folder / f"{name}.verdict.json"
        alert = self._alert(
            inbox,
            relative,
            document,
            version=version,
            sha256=seen.sha256,
            evaluated_at=evaluated_at,
            out_folder=out_folder,
            name=name,
            flagged=".flagged.csv" in files,
        )
        self.ledger.record_evaluation(
            NewEvaluation(
                inbox=inbox.name,
                path=relative,
                sha256=seen.sha256,
                size=seen.size,
                mtime_ns=seen.mtime_ns,
                outcome=status,
                version=version,
                output_stem=stem,
                run=document.get("run"),
                instrument=document.get("instrument"),
                failures=failures,
                warnings=warnings,
                message=message,
                criteria_sha256=document.get("criteria_sha256"),
                config_sha256=self._digests.get(inbox.name),
                calwarden_version=str(document["calwarden_version"]),
                evaluated_at=evaluated_at,
                document=files[".verdict.json"],
                flagged=files.get(".flagged.csv"),
                control_points=assessment.points,
                control_limits=assessment.limits,
                alert=alert,
            )
        )
        # A monitoring system watching the log sees a failed run as a warning, an error as one.
        level = {"fail": "warning", "error": "error"}.get(status, "info")
        getattr(log, level)(
            "file_evaluated",
            inbox=inbox.name,
            path=relative,
            sha256=seen.sha256,
            status=status,
            run=document.get("run"),
            instrument=document.get("instrument"),
            version=version,
            failures=failures,
            warnings=warnings,
            reason=message,
            criteria_sha256=document.get("criteria_sha256"),
            config_sha256=self._digests.get(inbox.name),
            calwarden_version=document["calwarden_version"],
            verdict=str(verdict_path),
            alert=None if alert is None else alert.kind,
            seconds=round(time.perf_counter() - started, 4),  # settled file to recorded verdict
        )
        return Outcome(
            inbox.name,
            relative,
            status,
            seen.sha256,
            run=document.get("run"),
            instrument=document.get("instrument"),
            failures=failures,
            warnings=warnings,
            message=message,
            verdict_path=verdict_path,
            version=version,
            reruns=len(document.get("reruns", [])),
            series=tuple(dict.fromkeys(point.key for point in assessment.points)),
        )

    def _alert_kind(self, document: VerdictDocument) -> str | None:
        status = document.get("status")
        if status in ("fail", "error"):
            return str(status)
        fired = {
            str(f.get("rule", "")).removeprefix("control.")
            for f in document.get("findings", [])
            if str(f.get("rule", "")).startswith("control.") and f.get("severity") != "info"
        }
        return "control" if fired & set(self.alerts.control_rules) else None

    def _alert(
        self,
        inbox: Inbox,
        relative: str,
        document: VerdictDocument,
        *,
        version: int,
        sha256: str,
        evaluated_at: str,
        out_folder: Path,
        name: str,
        flagged: bool,
    ) -> NewAlert | None:
        """The alert this verdict raises, if any, for the outbox."""
        kind = self._alert_kind(document)
        if not self.alerts.enabled or kind is None or kind not in self.alerts.kinds:
            return None
        instrument = document.get("instrument") or inbox.instrument
        summary = file_alert(
            kind,
            {**document, "instrument": instrument},
            inbox=inbox.name,
            path=relative,
            version=version,
            evaluated_at=evaluated_at,
            verdict_path=str(out_folder / f"{name}.verdict.json"),
            report_path=str(out_folder / f"{name}.report.txt"),
            flagged_path=str(out_folder / f"{name}.flagged.csv") if flagged else None,
        )
        return NewAlert(
            # Judged again after a crash, the same version raises the same key: no second alert.
            dedupe_key=f"{kind}:{inbox.name}:{relative}:v{version}:{sha256}",
            kind=kind,
            inbox=inbox.name,
            instrument=None if instrument is None else str(instrument),
            created_at=evaluated_at,
            summary=payload_bytes(summary),
        )

    def _assess(self, inbox: Inbox, relative: str, run: Run, verdict: Verdict) -> Assessment:
        """This run's control points and the history of the series they join."""
        settings = inbox.config.control
        if not settings.enabled:
            return NOTHING
        instrument = verdict.instrument or inbox.instrument or inbox.name
        return assess(
            self.ledger.control,
            settings,
            str(instrument),
            str(verdict.run or relative),
            control_observations(run, verdict),
            timestamp(),
            replacing=(inbox.name, relative),
            failed_baselines=self._failed_baselines,
            few_runs=self._few_runs,
        )

    def _judgement(
        self,
        inbox: Inbox,
        path: Path,
        data: bytes | None,
        refine: Callable[[Run, Verdict], Verdict],
    ) -> Judgement:
        try:
            return judge_file(
                path, inbox.config, data=data, instrument=inbox.instrument, refine=refine
            )
        except LedgerError:
            raise  # the control log could not be read: a daemon fault, not the file's
        except Exception as error:  # a bug of ours still gives this file a verdict
            message = f"internal error while judging the file ({type(error).__name__}: {error})"
            log.error("judge_crashed", path=str(path), error=repr(error))
            document = error_document(
                path,
                message,
                inbox.config.criteria.digest(),
                data=data,
                instrument=inbox.instrument,
            )
            return Judgement(document, None, None)

    def _archive(self, inbox: Inbox, previous: Evaluation, out_folder: Path, name: str) -> None:
        """Write the previous version's outputs under ``<name>@v<version>``, from the ledger."""
        document_bytes, flagged = self.ledger.files.outputs_of(previous.id)
        document = json.loads(document_bytes)
        files = {
            ".report.txt": render(document).encode("utf-8"),
            ".report.html": render_html(document).encode("utf-8"),
            ".verdict.json": document_bytes,
        }
        if flagged is not None:
            files[".flagged.csv"] = flagged
        write_files(
            out_folder, _archive_stem(out_folder, name, previous.version, document_bytes), files
        )
