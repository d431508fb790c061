"""The control observations of one judged run: what its control charts log.

A run passes or fails on its own criteria; a control chart follows the same
check standards across runs, to see an instrument drift day by day while each
run still passes. This module picks those observations out of a run and its
verdict:

* every ICV, CCV and LCS recovery (found concentration over nominal, in %),
  one series per analyte, kind and nominal level;
* every internal-standard recovery (its response over the standards' mean, in
  %), one series per internal standard;
* each calibration's sensitivity (the slope of its curve, in response per
  concentration unit), one series per analyte.

Pure: the shell stores the observations and reads them back as series.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from calwarden.rules.calibration import Model
from calwarden.rules.model import Kind, Run
from calwarden.rules.verdict import Severity, Verdict

RECOVERY_UNIT = "%"
_RECOVERY_KINDS = (Kind.ICV, Kind.CCV, Kind.LCS)


@dataclass(frozen=True, slots=True)
class ControlObservation:
    """One point for a control chart.

    ``kind`` is ``ICV``, ``CCV``, ``LCS``, ``ISTD`` or ``slope``; ``level`` tells
    the materials of one kind apart (the nominal with its unit, or the internal
    standard's name); together with the instrument and ``analyte`` they name a
    series. ``acquired`` is the reading's ISO 8601 time, when the file gives one.
    """

    analyte: str
    kind: str
    level: str
    value: float
    unit: str
    seq: int | None
    sample_id: str | None
    acquired: str | None
    accepted: bool = True  # it met its run's own acceptance criteria


#: The per-run rules whose failure makes a control observation not "in control".
_OWN_CRITERIA = frozenset({"check.recovery", "lcs.recovery", "istd.recovery"})


def _level(nominal: float, unit: str | None) -> str:
    return f"{nominal:g} {unit}" if unit else f"{nominal:g}"


def control_observations(run: Run, verdict: Verdict) -> tuple[ControlObservation, ...]:
    """Every control observation of a judged run, in the run's order."""
    results = {(r.analyte, r.seq): r for r in verdict.results}
    # A control limit computed from points that failed their own run's criteria would
    # be too wide to catch the next failure; such points are charted, not baselined.
    failed = {
        (f.analyte, f.seq)
        for f in verdict.findings
        if f.rule in _OWN_CRITERIA and f.severity is Severity.FAIL
    }
    istd_failed = {
        f.seq for f in verdict.findings if f.rule == "istd.recovery" and f.severity is Severity.FAIL
    }
    calibrations = {c.analyte: c for c in verdict.calibrations}
    found: list[ControlObservation] = []
    istd_seen: set[tuple[str, int]] = set()
    for reading in run.readings:
        when = reading.acquired.isoformat() if reading.acquired is not None else None
        if reading.kind in _RECOVERY_KINDS and reading.nominal:
            result = results.get((reading.analyte, reading.seq))
            if result is not None and result.concentration is not None:
                found.append(
                    ControlObservation(
                        reading.analyte,
                        reading.kind.value.upper(),
                        _level(reading.nominal, reading.unit),
                        100.0 * result.concentration / reading.nominal,
                        RECOVERY_UNIT,
                        reading.seq,
                        reading.sample_id,
                        when,
                        (reading.analyte, reading.seq) not in failed,
                    )
                )
        calibration = calibrations.get(reading.analyte)
        if (
            reading.istd
            and reading.istd_response is not None
            and calibration is not None
            and calibration.uses_internal_standard
            and calibration.istd_reference
            and (reading.istd, reading.seq) not in istd_seen
        ):
            # One internal standard serves several analytes: one point per injection.
            istd_seen.add((reading.istd, reading.seq))
            found.append(
                ControlObservation(
                    reading.istd,
                    "ISTD",
                    reading.istd,
                    100.0 * reading.istd_response / calibration.istd_reference,
                    RECOVERY_UNIT,
                    reading.seq,
                    reading.sample_id,
                    when,
                    reading.seq not in istd_failed,
                )
            )
    for calibration in verdict.calibrations:
        fit = calibration.fit
        if fit is None or calibration.problem is not None:
            continue
        # Ascending powers: the linear term is the sensitivity at zero for every model.
        slope = fit.rf_mean if fit.model is Model.AVERAGE_RF else fit.coefficients[1]
        if slope is None:
            continue
        first = min(calibration.standards, key=lambda s: s.seq, default=None)
        acquired = None
        if first is not None:
            standard = next(
                (
                    r
                    for r in run.readings
                    if r.seq == first.seq and r.analyte == calibration.analyte
                ),
                None,
            )
            if standard is not None and standard.acquired is not None:
                acquired = standard.acquired.isoformat()
        unit = f"response per {calibration.unit}" if calibration.unit else "response per unit"
        if calibration.uses_internal_standard:
            unit = unit.replace("response", "response ratio", 1)
        found.append(
            ControlObservation(
                calibration.analyte,
                "slope",
                "",
                float(slope),
                unit,
                first.seq if first else None,
                first.sample_id if first else None,
                acquired,
            )
        )
    # A value that overflowed cannot be charted (the run's own result.computable rule
    # fails it); dropping it here keeps the log's point ids as the control log predicts.
    return tuple(o for o in found if math.isfinite(o.value))
