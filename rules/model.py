"""The normalised run: what every reader produces and every rule consumes.

Objects here are frozen and validated when built, so a rule never sees a
reading that breaks the format's promises (a standard without a nominal value,
a zero dilution, a duplicate ``(seq, analyte)``). Validation failures raise
:class:`~rules.errors.InputError` naming the source line and column.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import datetime
from enum import StrEnum

from calwarden.rules.errors import InputError


class Kind(StrEnum):
    """What an injection is, in the trade's own terms."""

    BLANK = "blank"  # calibration blank
    CAL = "cal"  # calibration standard
    ICV = "icv"  # initial calibration verification
    CCV = "ccv"  # continuing calibration verification
    CCB = "ccb"  # continuing (or initial) calibration blank
    MB = "mb"  # method blank
    LCS = "lcs"  # laboratory control sample
    SAMPLE = "sample"
    DUP = "dup"  # laboratory duplicate of ``parent``
    MS = "ms"  # matrix spike of ``parent``
    MSD = "msd"  # matrix spike duplicate of ``parent``
    ADDITION = "addition"  # one point of a standard-addition series of ``parent``
    # --- issue 15, reporting limits (rules/acceptance/reporting.py)
    LLCCV = "llccv"  # low-level calibration verification at the reporting limit
    # --- metals QC of the ICP methods (US EPA 6010D / 6020B, 200.7) [memory]
    ICS_A = "ics_a"  # interference check solution A: the interferents alone
    ICS_AB = "ics_ab"  # interference check solution AB: the interferents and spiked analytes
    SERIAL_DILUTION = "serial_dilution"  # ``parent`` diluted further (its ``dilution``, e.g. 5)
    PDS = "pds"  # post-digestion spike: ``added`` spiked into ``parent``'s digestate


#: Kinds that must carry a known concentration.
NEEDS_NOMINAL = frozenset({Kind.CAL, Kind.ICV, Kind.CCV, Kind.LCS, Kind.LLCCV})
#: Kinds that must name the native sample they were made from.
NEEDS_PARENT = frozenset(
    {Kind.DUP, Kind.MS, Kind.MSD, Kind.ADDITION, Kind.SERIAL_DILUTION, Kind.PDS}
)
#: Kinds that must say how much was added.
NEEDS_ADDED = frozenset({Kind.MS, Kind.MSD, Kind.ADDITION, Kind.PDS})
#: Matrix spikes: their ``added`` is the spiked concentration, so it must be positive.
SPIKE_KINDS = frozenset({Kind.MS, Kind.MSD, Kind.PDS})
#: Check standards: they open and close brackets.
CHECK_KINDS = frozenset({Kind.ICV, Kind.CCV})
#: Field samples: what brackets protect and what the frequency rule counts.
FIELD_KINDS = frozenset({Kind.SAMPLE, Kind.DUP, Kind.MS, Kind.MSD, Kind.LCS, Kind.MB})
#: Kinds whose result is a reportable concentration of a real sample.
REPORTABLE_KINDS = frozenset({Kind.SAMPLE, Kind.DUP, Kind.MS, Kind.MSD, Kind.LCS})


_NUMERIC_COLUMNS = ("response", "nominal", "istd_response", "dilution", "added", "reporting_limit")
#: Chromatography and mass-spectrometry columns (retention times in minutes, any unit
#: one run keeps; the qualifier ion's response beside the quantifier's ``response``).
CHROMATOGRAPHY_COLUMNS = ("retention_time", "istd_retention_time", "qualifier_response")


def _require_finite(value: float | None, line: int, column: str) -> None:
    if value is not None and not math.isfinite(value):
        raise InputError(f"number must be finite, got {value!r}", line, column)


@dataclass(frozen=True, slots=True)
class Reading:
    """One reading of one analyte in one injection (one row of the native format)."""

    line: int  # 1-based line of the source file, for messages
    seq: int
    sample_id: str
    kind: Kind
    analyte: str
    response: float
    nominal: float | None = None
    istd: str | None = None
    istd_response: float | None = None
    dilution: float = 1.0
    unit: str | None = None
    acquired: datetime | None = None
    parent: str | None = None
    added: float | None = None
    run: str | None = None
    instrument: str | None = None
    batch: str | None = None  # preparation batch: the LCS and method blank judge its samples
    # --- issue 15, reporting limits and standards' sources (rules/acceptance/reporting.py)
    reporting_limit: float | None = None  # before dilution; the row's own, over the setting's
    source: str | None = None  # where a standard came from (maker, lot): the ICV's must differ
    # --- chromatography and mass spectrometry (rt.window, ion.ratio)
    retention_time: float | None = None
    istd_retention_time: float | None = None
    qualifier_response: float | None = None

    def __post_init__(self) -> None:
        if not self.sample_id:
            raise InputError("sample_id is empty", self.line, "sample_id")
        if not self.analyte:
            raise InputError("analyte is empty", self.line, "analyte")
        # One sum is finite exactly when every term is (any NaN or infinity makes it so):
        # a cheap first test on the hot path, then the precise one names the column.
        total = self.response + self.dilution
        total += (self.nominal or 0.0) + (self.istd_response or 0.0) + (self.added or 0.0)
        total += self.reporting_limit or 0.0
        if not math.isfinite(total):
            for column in _NUMERIC_COLUMNS:
                _require_finite(getattr(self, column), self.line, column)
        if (
            self.retention_time is not None
            or self.istd_retention_time is not None
            or self.qualifier_response is not None
        ):
            self._check_chromatography()
        if self.dilution <= 0:
            raise InputError(
                f"dilution must be greater than zero, got {self.dilution:g}", self.line, "dilution"
            )
        if self.kind in NEEDS_NOMINAL and self.nominal is None:
            raise InputError(f"a '{self.kind}' row needs a nominal value", self.line, "nominal")
        if self.nominal is not None and self.nominal < 0:
            raise InputError(
                f"nominal must not be negative, got {self.nominal:g}", self.line, "nominal"
            )
        if self.kind in NEEDS_PARENT and not self.parent:
            raise InputError(
                f"a '{self.kind}' row needs the parent sample it was made from", self.line, "parent"
            )
        if self.kind in NEEDS_ADDED and self.added is None:
            raise InputError(f"a '{self.kind}' row needs the amount added", self.line, "added")
        if self.kind in SPIKE_KINDS and self.added is not None and self.added <= 0:
            raise InputError(
                f"a '{self.kind}' row needs a spike greater than zero, got {self.added:g}",
                self.line,
                "added",
            )
        if self.reporting_limit is not None and self.reporting_limit <= 0:
            raise InputError(
                f"reporting_limit must be greater than zero, got {self.reporting_limit:g}",
                self.line,
                "reporting_limit",
            )
        if self.istd_response is not None and self.istd_response <= 0:
            raise InputError(
                f"istd_response must be greater than zero, got {self.istd_response:g}",
                self.line,
                "istd_response",
            )

    def _check_chromatography(self) -> None:
        for column in CHROMATOGRAPHY_COLUMNS:
            value = getattr(self, column)
            _require_finite(value, self.line, column)
            if value is not None and value < 0:
                raise InputError(f"{column} must not be negative, got {value:g}", self.line, column)

    @property
    def signal(self) -> float:
        """The response the calibration uses: the internal-standard ratio when there is one."""
        if self.istd_response is not None:
            return self.response / self.istd_response
        return self.response


@dataclass(frozen=True, slots=True)
class Run:
    """A whole sequence: every reading of every analyte, in the file's order."""

    readings: tuple[Reading, ...]
    name: str | None = None
    instrument: str | None = None
    analytes: tuple[str, ...] = field(init=False)

    def __post_init__(self) -> None:
        if not self.readings:
            raise InputError("the file holds no readings")
        seen: dict[tuple[int, str], int] = {}
        order: dict[str, None] = {}
        units: dict[str, Reading] = {}
        for reading in self.readings:
            key = (reading.seq, reading.analyte)
            if key in seen:
                raise InputError(
                    f"seq {reading.seq} analyte '{reading.analyte}' already given on line "
                    f"{seen[key]}",
                    reading.line,
                    "seq",
                )
            seen[key] = reading.line
            order.setdefault(reading.analyte, None)
            if reading.unit:
                # One curve, one unit: a result in another unit would be off by its factor.
                first = units.setdefault(reading.analyte, reading)
                if first.unit != reading.unit:
                    raise InputError(
                        f"unit '{reading.unit}' of {reading.analyte} differs from "
                        f"'{first.unit}' on line {first.line}; one analyte needs one unit",
                        reading.line,
                        "unit",
                    )
        object.__setattr__(self, "analytes", tuple(order))

    @classmethod
    def of(cls, readings: Iterable[Reading], name: str | None = None) -> Run:
        """Build a run, taking its name and instrument from the rows when not given."""
        rows = tuple(readings)
        run_name = name or next((r.run for r in rows if r.run), None)
        instrument = next((r.instrument for r in rows if r.instrument), None)
        return cls(rows, run_name, instrument)

    def of_analyte(self, analyte: str) -> tuple[Reading, ...]:
        """The readings of one analyte, in acquisition order."""
        return tuple(sorted((r for r in self.readings if r.analyte == analyte), key=_seq))


def _seq(reading: Reading) -> int:
    return reading.seq
