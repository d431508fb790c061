"""The rule registry: every acceptance rule, its stable id and its one-line summary.

A rule is a function from one analyte's :class:`AnalyteContext` to findings.
It never raises on bad numbers: a result it cannot judge becomes a finding
(or nothing), never an exception. Register with :func:`rule`; the id is
stable (labs switch rules off by id and other tools read it from verdicts).
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass

from calwarden.rules.criteria import AnalyteCriteria
from calwarden.rules.model import Kind, Reading
from calwarden.rules.verdict import AdditionSeries, Calibration, Finding, Result

Check = Callable[["AnalyteContext"], Iterable[Finding]]


@dataclass(frozen=True, slots=True)
class AnalyteContext:
    """Everything a rule may look at for one analyte, all computed before any rule runs."""

    analyte: str
    criteria: AnalyteCriteria
    readings: tuple[Reading, ...]  # in seq order
    calibration: Calibration | None  # None when the analyte has no calibration standards
    results: Mapping[int, Result]  # by seq; additions by the first seq of their series
    additions: Mapping[str, AdditionSeries]  # by parent sample

    def of_kind(self, *kinds: Kind) -> tuple[Reading, ...]:
        return tuple(r for r in self.readings if r.kind in kinds)

    @property
    def unit(self) -> str:
        """The analyte's unit for messages, or an empty string."""
        for reading in self.readings:
            if reading.unit:
                return f" {reading.unit}"
        return ""


@dataclass(frozen=True, slots=True)
class Rule:
    """One acceptance rule: its id, summary (the heading of its findings) and why it exists."""

    id: str
    summary: str
    check: Check

    @property
    def explanation(self) -> str:
        return inspect.cleandoc(self.check.__doc__ or "")


_REGISTRY: dict[str, Rule] = {}


def rule(rule_id: str, summary: str) -> Callable[[Check], Check]:
    """Register ``check`` under ``rule_id``."""

    def register(check: Check) -> Check:
        if rule_id in _REGISTRY:
            raise RuntimeError(f"rule id {rule_id} registered twice")
        if not check.__doc__:
            raise RuntimeError(f"rule {rule_id} has no docstring saying why it exists")
        _REGISTRY[rule_id] = Rule(rule_id, summary, check)
        return check

    return register


def all_rules() -> tuple[Rule, ...]:
    """Every registered rule, in registration order."""
    import calwarden.rules.acceptance  # noqa: F401  (registers the rules on first use)

    return tuple(_REGISTRY.values())
