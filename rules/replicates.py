"""Replicate injections: readings of one sample id and kind in a run become one result.

Pure: results (and the curve they were read off) in, groups out. Check
standards and blanks (ICV, CCV, CCB, calibration blank) are never grouped:
each of their injections is its own check at its own time in the run.
Calibration standards are points of the curve and addition points are a
series; neither is a reported result.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from statistics import fmean, stdev

from calwarden.rules.calibration import Fit
from calwarden.rules.model import Kind, Reading
from calwarden.rules.verdict import Calibration, ReplicateGroup, Result

#: Kinds whose repeated injections are replicates of one reported result.
REPLICATE_KINDS = frozenset({Kind.SAMPLE, Kind.DUP, Kind.MS, Kind.MSD, Kind.LCS, Kind.MB})


def replicate_sets(results: Sequence[Result]) -> list[list[Result]]:
    """Results sharing sample id and kind (two or more), in seq order, in order of first seq."""
    grouped: dict[tuple[str, Kind], list[Result]] = {}
    for result in sorted(results, key=lambda r: r.seq if r.seq is not None else -1):
        if result.kind in REPLICATE_KINDS and result.seq is not None:
            grouped.setdefault((result.sample_id, result.kind), []).append(result)
    return [members for members in grouped.values() if len(members) > 1]


def replicate_group(
    members: Sequence[Result], fit_of: Callable[[int], Fit | None]
) -> ReplicateGroup:
    """The one reported result of ``members`` (see :class:`~rules.verdict.ReplicateGroup`).

    ``fit_of(seq)`` is the curve the injection was read off, ``None`` when it had none.
    """
    first = members[0]
    m = len(members)
    seqs = tuple(r.seq for r in members if r.seq is not None)
    signals = [r.signal for r in members]
    concentrations = [r.concentration for r in members]
    flags = tuple(dict.fromkeys(flag for r in members for flag in r.flags))
    dilutions = {r.dilution for r in members}
    fits = {id(fit_of(seq)) for seq in seqs}
    fit = fit_of(seqs[0])
    signal = fmean(s for s in signals if s is not None) if None not in signals else None
    measured = concentration = uncertainty = None
    dilution = first.dilution if len(dilutions) == 1 else None
    if None not in concentrations:
        values = [c for c in concentrations if c is not None]
        concentration = fmean(values)
        measured = fmean(r.measured for r in members if r.measured is not None)
        if dilution is not None and fit is not None and len(fits) == 1 and signal is not None:
            # The curve at the mean response: the concentration the m-reading uncertainty is of.
            at_mean = fit.invert(signal)
            if at_mean is not None and math.isfinite(at_mean * dilution):
                measured = at_mean
                concentration = at_mean * dilution
                spread = fit.inverse_uncertainty(signal, replicates=m)
                uncertainty = spread * dilution if spread is not None else None
    rsd = None
    if None not in concentrations:
        values = [c for c in concentrations if c is not None]
        mean = fmean(values)
        rsd = 100.0 * stdev(values) / mean if mean > 0 and all(map(math.isfinite, values)) else None
    return ReplicateGroup(
        sample_id=first.sample_id,
        kind=first.kind,
        analyte=first.analyte,
        seqs=seqs,
        signal=signal,
        measured=measured,
        concentration=concentration,
        uncertainty=uncertainty,
        rsd_pct=rsd,
        dilution=dilution,
        unit=first.unit,
        flags=flags,
    )


def curve_of(
    calibration: Calibration | None, readings: Sequence[Reading]
) -> Callable[[int], Fit | None]:
    """For each seq, the curve its reading was read off (none on another basis than the curve)."""
    by_seq = {r.seq: r for r in readings}

    def fit_of(seq: int) -> Fit | None:
        reading = by_seq.get(seq)
        if calibration is None or reading is None or not calibration.same_basis(reading):
            return None
        return calibration.fit

    return fit_of
