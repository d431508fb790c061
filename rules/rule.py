"""What an acceptance rule is: its stable id, its one-line summary, its check, and what it sees.

A rule is a function from one analyte's :class:`AnalyteContext` to findings.
It never raises on bad numbers: a result it cannot judge becomes a finding
(or nothing), never an exception. :func:`rule` turns a documented function
into a :class:`Rule`; nothing is registered on import: the one list of every
rule, in the order they run, is ``RULES`` in :mod:`calwarden.rules.registry`.
"""

from __future__ import annotations

import inspect
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass

from calwarden.rules.criteria import AnalyteCriteria
from calwarden.rules.model import Kind, Reading
from calwarden.rules.verdict import AdditionSeries, Calibration, Finding, Result

Check = Callable[["AnalyteContext"], Iterable[Finding]]

#: ``area.name``: lower case words joined by underscores, one dot (labs write these in configs).
_RULE_ID = re.compile(r"[a-z]+(?:_[a-z]+)*\.[a-z]+(?:_[a-z0-9]+)*")


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

    def __post_init__(self) -> None:
        # Programming errors, caught when the module is imported (the rules' test imports all).
        if not _RULE_ID.fullmatch(self.id):
            raise ValueError(f"rule id {self.id!r} is not of the form area.name")
        if not self.summary.strip():
            raise ValueError(f"rule {self.id} has no summary")
        if not (self.check.__doc__ or "").strip():
            raise ValueError(f"rule {self.id} has no docstring saying why it exists")

    @property
    def explanation(self) -> str:
        return inspect.cleandoc(self.check.__doc__ or "")


def rule(rule_id: str, summary: str) -> Callable[[Check], Rule]:
    """Make ``check`` the :class:`Rule` ``rule_id``; list it in ``registry.RULES`` to use it."""

    def make(check: Check) -> Rule:
        return Rule(rule_id, summary, check)

    return make
