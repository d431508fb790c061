"""The verdict as JSON: the contract other tools may rely on.

Stable keys (see README, "The verdict JSON"): ``status``, ``run``, ``source``,
``calwarden_version``, ``criteria_sha256``, ``findings``, ``calibrations``,
``results``, ``reruns``, ``repeat``, ``error``. Added since: ``replicates`` (one entry
per sample injected more than once: the reported mean, its uncertainty, the %RSD, the
injections' seqs); a result's ``reporting_limit``, ``reported_as`` and ``qualifiers``.
More keys may be added; none is removed or renamed.
The document's shape, key by key, is ``verdict_model.VerdictDocument``: a new
key is added there too.
"""

from __future__ import annotations

import functools
import json
import math
from importlib.metadata import PackageNotFoundError, version
from typing import Any, cast

from calwarden.daemon.outputs.verdict_model import (
    AdditionEntry,
    CalibrationEntry,
    ControlChartEntry,
    FindingEntry,
    FitEntry,
    ReplicateEntry,
    RerunEntry,
    ResultEntry,
    VerdictDocument,
)
from calwarden.rules.calibration import Fit
from calwarden.rules.verdict import (
    AdditionSeries,
    Calibration,
    ControlChart,
    Finding,
    Flag,
    ReplicateGroup,
    Result,
    Severity,
    Verdict,
)

SCHEMA_VERSION = 1
CAUTION = (
    "Automated screening supports, and does not replace, the analyst's review, the method's "
    "own criteria, the laboratory's procedures and its accreditation rules."
)


#: Above this many results the verdict is written on one line: Python's indenting encoder
#: is ten times slower than its compact one and would dominate a large run's check time.
PRETTY_RESULTS_LIMIT = 2000


def dump_verdict(document: VerdictDocument) -> str:
    """The verdict as JSON text: indented for people, compact for very large runs."""
    if len(document["results"]) <= PRETTY_RESULTS_LIMIT:
        return json.dumps(document, indent=2, ensure_ascii=False)
    return json.dumps(document, ensure_ascii=False, separators=(",", ":"))


@functools.cache  # package metadata is read from disk: once per process is enough
def calwarden_version() -> str:
    try:
        return version("calwarden")
    except PackageNotFoundError:
        return "unknown"


def _number(value: float | None) -> float | None:
    """JSON has no NaN or infinity: such a number is reported as null."""
    if value is None or not math.isfinite(value):
        return None
    return float(value)


def _finding(finding: Finding, sample_ids: dict[int, str]) -> FindingEntry:
    return {
        "rule": finding.rule,
        "severity": finding.severity.value,
        "analyte": finding.analyte,
        "sample_id": finding.sample_id,
        "seq": finding.seq,
        "value": _number(finding.value),
        "limit": [_number(end) for end in finding.limit] if finding.limit else None,
        "message": finding.message,
        "affected": [{"seq": seq, "sample_id": sample_ids.get(seq)} for seq in finding.affected],
        "causes": [{"seq": seq, "sample_id": sample_ids.get(seq)} for seq in finding.causes],
    }


def _fit(fit: Fit) -> FitEntry:
    return {
        "model": fit.model.value,
        "weighting": fit.weighting.value,
        "coefficients": [_number(c) for c in fit.coefficients],
        "std_errors": [_number(e) for e in fit.std_errors],
        "covariance": [[_number(c) for c in row] for row in fit.covariance]
        if fit.covariance is not None
        else None,
        "r_squared": _number(fit.r_squared),
        "r": _number(fit.r),
        "residual_sd": _number(fit.residual_sd),
        "degrees_of_freedom": fit.dof,
        "points": fit.points,
        "levels": fit.levels,
        "response_factor_mean": _number(fit.rf_mean),
        "response_factor_rsd_pct": _number(fit.rf_rsd_pct),
    }


def _calibration(calibration: Calibration) -> CalibrationEntry:
    fit = calibration.fit
    data: dict[str, Any] = {
        "model": fit.model.value if fit else None,
        "weighting": fit.weighting.value if fit else None,
        "coefficients": None,
        "std_errors": None,
        "r_squared": None,
        "residual_sd": None,
        "points": len(calibration.standards),
    }
    if fit:
        data.update(_fit(fit))
    data.update(
        {
            "range": [_number(calibration.range_low), _number(calibration.range_high)],
            "unit": calibration.unit,
            "blank_response_subtracted": _number(calibration.blank_signal),
            "internal_standard": calibration.uses_internal_standard,
            "internal_standard_reference": _number(calibration.istd_reference),
            "rse_pct": _number(calibration.rse_pct),
            "mandel": {
                "statistic": _number(calibration.mandel.statistic),
                "critical": _number(calibration.mandel.critical),
                "alpha": calibration.mandel.alpha,
                "significant": calibration.mandel.significant,
                "weighting": calibration.mandel.weighting,
                "stated_variance": calibration.mandel.stated_variance,
            }
            if calibration.mandel
            else None,
            "lod": _number(calibration.lod),
            "loq": _number(calibration.loq),
            "problem": calibration.problem,
            "standards": [
                {
                    "sample_id": s.sample_id,
                    "seq": s.seq,
                    "nominal": _number(s.nominal),
                    "response": _number(s.signal),
                    "back_calculated": _number(s.back_calculated),
                    "error_pct": _number(s.error_pct),
                }
                for s in calibration.standards
            ],
        }
    )
    # Built in steps to keep the key order of the written JSON (the fit's figures after
    # "points"); tests/test_verdict_model.py checks every document against the model.
    return cast(CalibrationEntry, data)


def _result(result: Result) -> ResultEntry:
    return {
        "sample_id": result.sample_id,
        "seq": result.seq,
        "kind": result.kind.value,
        "analyte": result.analyte,
        "concentration": _number(result.concentration),
        "uncertainty": _number(result.uncertainty),
        "unit": result.unit,
        "measured": _number(result.measured),
        "dilution": _number(result.dilution),
        "response": _number(result.signal),
        "flags": [flag.value for flag in result.flags],
        "suggested_dilution": _number(result.suggested_dilution),
        # issue 15: the reporting limit (dilution applied) and the data qualifiers
        "reporting_limit": _number(result.reporting_limit),
        "reported_as": reported_as(result),
        "qualifiers": list(result.qualifiers),
    }


def reported_as(result: Result) -> str | None:
    """``< 10`` for a result below its reporting limit (dilution applied), else ``None``."""
    if not result.below_reporting_limit or result.reporting_limit is None:
        return None
    return f"< {result.reporting_limit:.4g}"


def _replicate(group: ReplicateGroup) -> ReplicateEntry:
    return {
        "sample_id": group.sample_id,
        "kind": group.kind.value,
        "analyte": group.analyte,
        "seqs": list(group.seqs),
        "injections": len(group.seqs),
        "concentration": _number(group.concentration),
        "uncertainty": _number(group.uncertainty),
        "unit": group.unit,
        "measured": _number(group.measured),
        "dilution": _number(group.dilution),
        "response": _number(group.signal),
        "rsd_pct": _number(group.rsd_pct),
        "flags": [flag.value for flag in group.flags],
    }


def _addition(series: AdditionSeries) -> AdditionEntry:
    outcome = series.outcome
    return {
        "analyte": series.analyte,
        "parent": series.parent,
        "seqs": list(series.seqs),
        "added": [_number(a) for a in series.added],
        "responses": [_number(s) for s in series.signals],
        "dilution": _number(series.dilution),
        "concentration_measured": _number(outcome.concentration) if outcome else None,
        "std_dev_measured": _number(outcome.std_dev) if outcome else None,
        "fit": _fit(outcome.fit) if outcome else None,
        "problem": series.problem,
    }


def verdict_to_json(
    verdict: Verdict,
    *,
    source_path: str,
    sha256: str | None,
    criteria_sha256: str | None,
    with_results: bool = True,
) -> VerdictDocument:
    """The verdict JSON document; ``with_results=False`` leaves ``results`` empty.

    The terminal summary needs no per-result entries, and on a large run they are
    most of the document's cost.
    """
    sample_ids = {r.seq: r.sample_id for r in verdict.results if r.seq is not None}
    for calibration in verdict.calibrations:
        sample_ids.update({s.seq: s.sample_id for s in calibration.standards})
    document: VerdictDocument = {
        "schema_version": SCHEMA_VERSION,
        "status": verdict.status.value,
        "run": verdict.run,
        "instrument": verdict.instrument,
        "source": {"path": source_path, "sha256": sha256},
        "calwarden_version": calwarden_version(),
        "criteria_sha256": criteria_sha256,
        "caution": CAUTION,
        "findings": [_finding(f, sample_ids) for f in verdict.findings],
        "calibrations": {c.analyte: _calibration(c) for c in verdict.calibrations},
        "results": [_result(r) for r in verdict.results] if with_results else [],
        "additions": [_addition(a) for a in verdict.additions],
        "replicates": [_replicate(g) for g in verdict.replicates],
        "reruns": rerun_list(verdict),
        "repeat": [
            {"what": advice.what.value, "analyte": advice.analyte, "reasons": list(advice.reasons)}
            for advice in verdict.repeats()
        ],
        "error": verdict.error,
    }
    if verdict.control_charts:
        document["control_charts"] = [_control_chart(c) for c in verdict.control_charts]
    return document


def _control_chart(chart: ControlChart) -> ControlChartEntry:
    return {
        "instrument": chart.instrument,
        "analyte": chart.analyte,
        "kind": chart.kind,
        "level": chart.level,
        "points": chart.points,
        "centre": _number(chart.centre),
        "sd": _number(chart.sd),
        "limits": chart.limits,
        "sd_within": _number(chart.sd_within),
        "sd_between": _number(chart.sd_between),
        "runs": chart.runs,
    }


def rerun_list(verdict: Verdict) -> list[RerunEntry]:
    """One entry per injection to re-run: its analytes, flags and the findings that say why."""
    why: dict[tuple[int | None, str], list[str]] = {}
    for finding in verdict.findings:
        if finding.severity is Severity.FAIL and finding.analyte is not None:
            # A finding about the whole analyte (its calibration) concerns every result of it.
            for seq in finding.affected or (None,):
                why.setdefault((seq, finding.analyte), []).append(finding.message)
    entries: dict[tuple[int | None, str], RerunEntry] = {}
    for result in verdict.reruns():
        entry = entries.setdefault(
            (result.seq, result.sample_id),
            {
                "sample_id": result.sample_id,
                "seq": result.seq,
                "analytes": [],
                "flags": [],
                "by_analyte": {},
                "suggested_dilution": None,
                "reasons": [],
            },
        )
        entry["analytes"].append(result.analyte)
        entry["by_analyte"][result.analyte] = [flag.value for flag in result.flags]
        for flag in result.flags:
            if flag.value not in entry["flags"]:
                entry["flags"].append(flag.value)
        if result.suggested_dilution is not None:
            entry["suggested_dilution"] = max(
                entry["suggested_dilution"] or 0.0, result.suggested_dilution
            )
        messages = why.get((result.seq, result.analyte), [])
        if Flag.CALIBRATION_FAILED in result.flags:
            messages = messages + why.get((None, result.analyte), [])
        for message in messages:
            if message not in entry["reasons"]:
                entry["reasons"].append(message)
    return list(entries.values())
