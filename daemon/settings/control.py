"""The ``control`` section: the control-chart log, its limits and its rules.

Plain settings: this module imports no store and no control log, so reading a
configuration never opens the ledger.
"""

from __future__ import annotations

from typing import Literal, Protocol

from pydantic import Field, ValidationInfo, field_validator

from calwarden.daemon.settings.section import Section
from calwarden.rules.control import (
    BASELINE_RUNS,
    BASELINE_SIZE,
    DEFAULT_REJECTING,
    DEFAULT_RULES,
    EWMA_LAMBDA,
    EWMA_WIDTH,
    WESTGARD_RULES,
)
from calwarden.rules.control_verdict import ControlPolicy
from calwarden.rules.verdict import Severity

SeriesKind = Literal["ICV", "CCV", "LCS", "ISTD", "slope"]


class SeriesName(Protocol):
    """What names a control chart (the store's SeriesKey is one)."""

    @property
    def instrument(self) -> str: ...
    @property
    def analyte(self) -> str: ...
    @property
    def kind(self) -> str: ...
    @property
    def level(self) -> str: ...


class FixedLimits(Section):
    """A centre and SD given by the laboratory for some series."""

    analyte: str = Field(description="the analyte (or internal standard) of the series")
    kind: SeriesKind = Field(description="ICV, CCV, LCS, ISTD or slope")
    level: str | None = Field(
        default=None, description="the level as charts name it (e.g. '20 µg/L'); absent: every"
    )
    instrument: str | None = Field(default=None, description="absent: every instrument")
    centre: float
    sd: float = Field(gt=0, description="the SD of one observation")
    sd_within: float | None = Field(
        default=None,
        ge=0,
        description="the part of sd seen within one run (repeatability); absent: all of sd is "
        "taken to lie between runs, so a run's mean is judged by sd itself (the cautious choice)",
    )

    @field_validator("sd_within")
    @classmethod
    def _within_at_most_sd(cls, value: float | None, info: ValidationInfo) -> float | None:
        sd = info.data.get("sd")
        if value is not None and sd is not None and value > sd:
            raise ValueError(f"sd_within ({value}) must not exceed sd ({sd})")
        return value

    def matches(self, key: SeriesName) -> bool:
        return (
            self.analyte.casefold() == key.analyte.casefold()
            and self.kind == key.kind
            and (self.level is None or self.level == key.level)
            and (self.instrument is None or self.instrument == key.instrument)
        )


def _known(value: tuple[str, ...]) -> tuple[str, ...]:
    unknown = sorted(set(value) - set(WESTGARD_RULES))
    if unknown:
        raise ValueError(f"unknown control rule {unknown[0]!r}; known: {', '.join(WESTGARD_RULES)}")
    return value


class ControlSettings(Section):
    """The ``control`` section: the control-chart log, its limits and its rules."""

    enabled: bool = Field(default=True, description="log control points and apply the rules")
    baseline_points: int = Field(
        default=BASELINE_SIZE,
        ge=2,
        le=1000,
        description="a baseline holds at least this many points (20: Westgard's "
        "recommendation and common practice)",
    )
    baseline_runs: int = Field(
        default=BASELINE_RUNS,
        ge=2,
        le=1000,
        description="a baseline spans at least this many runs (20, common practice: a run's "
        "points share its calibration, so the spread between days is seen once per run)",
    )
    rules: tuple[str, ...] = Field(
        default=DEFAULT_RULES, description="the Westgard rules applied (ids as `calwarden rules`)"
    )
    rejecting: tuple[str, ...] = Field(
        default=DEFAULT_REJECTING,
        description="the rules whose findings have rejection_severity; the other rules "
        "applied have warning_severity (default: only 1-3.5s rejects, see the README)",
    )
    warning_severity: Literal["warn", "info"] = Field(
        default="warn", description="severity of the findings of the rules not in rejecting"
    )
    rejection_severity: Literal["fail", "warn"] = Field(
        default="fail", description="severity of the findings of the rules in rejecting"
    )
    kinds: tuple[SeriesKind, ...] = Field(
        default=("ICV", "CCV", "LCS"),
        description="which series the rules judge; every series is logged and charted. "
        "ISTD is left out by default: its points drift together within a sequence, and "
        "each run's own istd.recovery rule judges them; slope too: the sensitivity changes "
        "from day to day by design (each day's calibration absorbs it) and each run's "
        "calibration rules judge the curve",
    )
    fixed: tuple[FixedLimits, ...] = Field(
        default=(), description="fixed centre and SD for some series instead of a baseline"
    )
    ewma: bool = Field(
        default=False,
        description="also judge each series by an EWMA chart, for slow drifts "
        "(Roberts 1959; exact limits as in Lucas & Saccucci 1990)",
    )
    ewma_lambda: float = Field(
        default=EWMA_LAMBDA, gt=0, le=1, description="weight of the newest point (0.2)"
    )
    ewma_width: float = Field(
        default=EWMA_WIDTH, gt=0, le=10, description="limits at this many EWMA SDs (3)"
    )
    ewma_severity: Literal["warn", "fail"] = Field(
        default="warn", description="severity of an ewma finding"
    )
    chart_points: int = Field(
        default=60, ge=5, le=1000, description="points drawn on each control chart"
    )
    chart_axis: Literal["run", "time"] = Field(
        default="run",
        description="the x axis of a control chart: run (each run one evenly spaced slot, "
        "so nights and weekends leave no empty stretches) or time (acquisition times)",
    )
    charts: bool = Field(default=True, description="draw the charts as PNG after each run")

    @field_validator("rules", "rejecting")
    @classmethod
    def _known_rules(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        return _known(value)

    def policy(self) -> ControlPolicy:
        """The rules and severities as the pure core takes them."""
        return ControlPolicy(
            rules=self.rules,
            rejecting=self.rejecting,
            warning_severity=Severity(self.warning_severity),
            rejection_severity=Severity(self.rejection_severity),
            ewma=self.ewma,
            ewma_lambda=self.ewma_lambda,
            ewma_width=self.ewma_width,
            ewma_severity=Severity(self.ewma_severity),
        )
