"""The rule registry: every acceptance rule, in the order they run.

Each module of :mod:`calwarden.rules.acceptance` makes its :class:`Rule`
objects (:func:`~calwarden.rules.rule.rule` builds one from a documented
function); this module lists them all, as ``control.WESTGARD_RULES`` lists the
control-chart rules. Nothing registers itself on import, and no acceptance
module imports this one, so there is no import cycle. The order is cause before
consequence: the calibration, then check standards and blanks, then what their
failures mean for the samples, then the samples' own rules. A new rule is
written in its area's module and added here (a test fails for a rule that is
made but not listed).
"""

from __future__ import annotations

from calwarden.rules.acceptance import (
    additions,
    blanks,
    brackets,
    calibration,
    carryover,
    checks,
    chromatography,
    coverage,
    interference,
    replicates,
    reporting,
    reruns,
    samples,
    standards,
)
from calwarden.rules.rule import AnalyteContext, Rule

__all__ = ["RULES", "AnalyteContext", "Rule", "all_rules"]

#: Every acceptance rule, in the order they run (cause before consequence).
RULES: tuple[Rule, ...] = (
    # the calibration
    calibration.calibration_present,
    calibration.calibration_levels,
    calibration.calibration_r_squared,
    calibration.calibration_back_calculation,
    calibration.calibration_linearity,
    calibration.calibration_rf_rsd,
    calibration.calibration_rse,
    standards.calibration_min_rf,  # issue 15
    # check standards, control samples, blanks, internal standards
    checks.check_standard_recovery,
    reruns.check_rerun,  # issue 15
    standards.check_second_source,  # issue 15
    checks.lcs_recovery,
    reporting.check_low_level,  # issue 15
    coverage.run_required_qc,
    blanks.blank_contamination,
    samples.istd_recovery,
    # the ICP methods' interference check (issue 15)
    interference.ics_recovery,
    # what the sequence and failed QC mean for the samples
    brackets.bracket_frequency,
    brackets.bracket_closing,
    brackets.bracket_reportable,
    brackets.bracket_blank,
    blanks.blank_method_multiple,
    checks.lcs_batch,
    reporting.bracket_low_level,  # issue 15
    # the samples' own results
    samples.result_computable,
    replicates.replicate_rsd,
    samples.range_over,
    samples.range_on_curve,
    samples.range_under,
    samples.duplicate_rpd,
    reporting.duplicate_near_limit,  # issue 15
    samples.spike_recovery,
    samples.spike_rpd,
    additions.addition_fit,
    carryover.carryover_next_injection,  # issue 15
    carryover.carryover_wash_blank,  # issue 15
    # issue 15: reporting limits and qualifiers
    reporting.reporting_limit_rule,
    # metals matrix checks, chromatographic and mass-spectrometric identity (issue 15)
    interference.serial_dilution_difference,
    interference.pds_recovery,
    chromatography.rt_window,
    chromatography.ion_ratio,
    # what the run holds at all
    coverage.run_field_samples,
)


def all_rules() -> tuple[Rule, ...]:
    """Every rule, in the order they run."""
    return RULES
