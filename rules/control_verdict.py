"""A judged run's control-chart findings: a verdict and its control history in, a verdict out.

The run is judged first on its own criteria (``rules/evaluate.py``); the control
log then supplies, for every series the run added points to, the series' recent
points (this run's included) and its limits. This module applies the Westgard
rules (``rules/control.py``) to them, adds the findings completed by this run's
points to the verdict and derives its status once more the same way
``evaluate`` does, so the verdict is serialised once, with everything in it.
This is the one place where earlier runs influence a verdict.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass, field

from calwarden.rules.control import (
    DEFAULT_REJECTING,
    DEFAULT_RULES,
    EWMA_LAMBDA,
    EWMA_WIDTH,
    ControlSeries,
    Violation,
    evaluate_group,
    ewma_violations,
)
from calwarden.rules.verdict import ControlChart, Finding, Severity, Status, Verdict, status_of

#: The single-value rules, mildest first: at one point only the strictest one broken is told.
_SINGLE_VALUE_RULES = ("1-2s", "1-3s", "1-3.5s")


@dataclass(frozen=True, slots=True)
class ControlPolicy:
    """Which Westgard rules apply and how severe their findings are.

    A finding of a rule in ``rejecting`` has ``rejection_severity`` (fail by
    default); of any other active rule ``warning_severity`` (warn).
    """

    rules: tuple[str, ...] = DEFAULT_RULES
    rejecting: tuple[str, ...] = DEFAULT_REJECTING
    warning_severity: Severity = Severity.WARN
    rejection_severity: Severity = Severity.FAIL
    ewma: bool = False
    ewma_lambda: float = EWMA_LAMBDA
    ewma_width: float = EWMA_WIDTH
    ewma_severity: Severity = Severity.WARN


@dataclass(frozen=True, slots=True)
class ControlGroup:
    """The series of one analyte and kind (its levels), judged together.

    ``seqs`` gives the seq of each of this run's points by its order.
    """

    analyte: str
    series: tuple[ControlSeries, ...]
    seqs: Mapping[int, int | None] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class ControlHistory:
    """What the control log knows about the series one run added points to.

    Points whose order is at least ``first_new`` are this run's; ``groups`` are
    the series with limits that the rules judge; ``charts`` summarise every
    series the run touched, judged or not.
    """

    first_new: int
    groups: tuple[ControlGroup, ...] = ()
    charts: tuple[ControlChart, ...] = ()


def control_findings(history: ControlHistory, policy: ControlPolicy) -> tuple[Finding, ...]:
    """The findings of the violations this run's points complete, group by group."""
    findings: list[Finding] = []
    for group in history.groups:
        violations = list(evaluate_group(group.series, policy.rules))
        if policy.ewma:
            for series in group.series:
                violations += ewma_violations(series, policy.ewma_lambda, policy.ewma_width)
        for violation in _told(violations):
            completing = violation.points[-1]
            if completing.order < history.first_new:
                continue  # completed by an earlier run: that run's verdict said so
            if violation.rule == "ewma":
                severity = policy.ewma_severity
            elif violation.rule in policy.rejecting:
                severity = policy.rejection_severity
            else:
                severity = policy.warning_severity
            findings.append(
                Finding(
                    rule=f"control.{violation.rule}",
                    severity=severity,
                    message=f"control chart {violation.rule}: {violation.message}",
                    analyte=group.analyte,
                    sample_id=completing.label,
                    seq=group.seqs.get(completing.order),
                    value=round(completing.z, 4),
                )
            )
    return tuple(findings)


def _told(violations: list[Violation]) -> list[Violation]:
    """The violations worth a finding: at one point, only the strictest single-value rule,
    and no 1-2s warning where another rule fired (it says more)."""
    strictest: dict[tuple[str, int], int] = {}
    others: set[tuple[str, int]] = set()
    for violation in violations:
        at = (violation.points[-1].series, violation.points[-1].index)
        if violation.rule in _SINGLE_VALUE_RULES:
            rank = _SINGLE_VALUE_RULES.index(violation.rule)
            strictest[at] = max(strictest.get(at, rank), rank)
        elif violation.rule != "ewma":
            others.add(at)
    told = []
    for violation in violations:
        at = (violation.points[-1].series, violation.points[-1].index)
        if violation.rule in _SINGLE_VALUE_RULES:
            if _SINGLE_VALUE_RULES.index(violation.rule) < strictest[at]:
                continue
            if violation.rule == "1-2s" and at in others:
                continue
        told.append(violation)
    return told


def with_control(verdict: Verdict, history: ControlHistory, policy: ControlPolicy) -> Verdict:
    """``verdict`` with the control-chart findings and chart summaries in it, status derived.

    A verdict of a file that could not be judged (``error``) stays as it is.
    """
    if verdict.status is Status.ERROR or (not history.charts and not history.groups):
        return verdict
    findings = verdict.findings + control_findings(history, policy)
    return dataclasses.replace(
        verdict,
        status=status_of(findings),
        findings=findings,
        control_charts=verdict.control_charts + history.charts,
    )
