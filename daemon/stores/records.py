"""What the ledger records and gives back: plain frozen values, no database in sight.

The stores (:mod:`.files`, :mod:`.control`, :mod:`.pictures`, :mod:`.outbox`)
take these in and hand these out, so that no caller ever sees a row, a cursor or
an engine's types.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime


def timestamp(moment: datetime | None = None) -> str:
    """A time as the ledger stores it, e.g. ``2026-12-01T22:40:12.123+00:00``.

    Every stored time has this one form (UTC, ISO 8601, milliseconds), so that
    string order is time order: the daily summary selects evaluations by
    comparing these strings.
    """
    return (moment or datetime.now(UTC)).astimezone(UTC).isoformat(timespec="milliseconds")


@dataclass(frozen=True, slots=True)
class Seen:
    size: int
    mtime_ns: int
    sha256: str


@dataclass(frozen=True, slots=True)
class Evaluation:
    """One row of the ledger's audit trail."""

    id: int
    inbox: str
    path: str
    sha256: str
    outcome: str
    version: int
    output_stem: str | None
    run: str | None
    instrument: str | None
    failures: int
    warnings: int
    message: str | None
    evaluated_at: str
    duplicate_of: int | None


@dataclass(frozen=True, slots=True)
class NewAlert:
    """An alert for the outbox: what it is about, and its stored summary (JSON)."""

    dedupe_key: str
    kind: str
    inbox: str | None
    instrument: str | None
    created_at: str
    summary: str


@dataclass(frozen=True, slots=True)
class SeriesKey:
    """What names one control chart."""

    instrument: str
    analyte: str
    kind: str
    level: str


@dataclass(frozen=True, slots=True)
class StoredPoint:
    """One point of the control-chart log."""

    id: int
    run: str
    seq: int | None
    sample_id: str | None
    acquired: str | None
    value: float
    unit: str
    evaluated_at: str
    accepted: bool = True


@dataclass(frozen=True, slots=True)
class StoredLimits:
    """One set of limits of a series."""

    id: int
    centre: float
    sd: float
    n: int
    source: str
    first_point: int | None
    last_point: int | None
    set_at: str
    active: bool
    sd_within: float | None = None  # schema 3: the split of sd (None: not known)
    sd_between: float | None = None
    runs: int = 0  # baseline runs behind the limits (0: not known)


@dataclass(frozen=True, slots=True)
class NewPoint:
    """A control observation to log with its evaluation."""

    key: SeriesKey
    run: str
    seq: int | None
    sample_id: str | None
    acquired: str | None
    value: float
    unit: str
    accepted: bool = True


@dataclass(frozen=True, slots=True)
class NewLimits:
    """Limits to store (and make active) with an evaluation, or on request."""

    key: SeriesKey
    centre: float
    sd: float
    n: int
    source: str
    first_point: int | None
    last_point: int | None
    set_at: str
    sd_within: float | None = None  # schema 3: the split of sd (None: not known)
    sd_between: float | None = None
    runs: int = 0


@dataclass(frozen=True, slots=True)
class NewEvaluation:
    """What the daemon records about one judged file, in one durable transaction."""

    inbox: str
    path: str
    sha256: str
    size: int
    mtime_ns: int
    outcome: str
    version: int
    output_stem: str
    run: str | None
    instrument: str | None
    failures: int
    warnings: int
    message: str | None
    criteria_sha256: str | None
    config_sha256: str | None
    calwarden_version: str
    evaluated_at: str
    document: bytes
    flagged: bytes | None
    control_points: tuple[NewPoint, ...] = ()
    control_limits: tuple[NewLimits, ...] = ()
    alert: NewAlert | None = None  # recorded in the same transaction as the evaluation
