"""Acceptance criteria: every limit a rule applies, with its default and source.

The defaults here are the source of truth; ``config/criteria.yaml`` is the same
set written out for people to read and copy, and a test keeps the two equal.
Per-analyte overrides are partial: only the keys given change.
"""

from __future__ import annotations

import hashlib
import json
import math
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from calwarden.rules.calibration import Model, Weighting
from calwarden.rules.errors import ConfigError
from calwarden.rules.model import Kind

Range = tuple[float, float]

#: The data qualifiers calwarden gives (rules/acceptance/reporting.py says what each means).
GUIDANCE_QUALIFIERS = ("U", "J", "B", "E")


class _Frozen(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class AnalyteCriteria(_Frozen):
    """Limits for one analyte. Percentages are in percent."""

    # --- calibration
    model: Model = Model.LINEAR
    weighting: Weighting = Weighting.NONE
    blank: Literal["subtract", "zero_point", "none"] = "subtract"
    # US EPA SW-846 Method 8000D: at least 5 standards for a line, 6 for a quadratic [memory].
    min_levels: int = Field(default=5, ge=2)
    min_levels_quadratic: int = Field(default=6, ge=3)
    # 8000D accepts r ≥ 0.995 for a line; r² ≥ 0.995 is the stricter common practice.
    min_r_squared: float = Field(default=0.995, ge=0, le=1)
    # FDA BMV (2018) / ICH M10 (2022): standards within ±15 %, ±20 % at the lowest level.
    back_calculation_pct: float = Field(default=15.0, gt=0)
    back_calculation_lowest_pct: float = Field(default=20.0, gt=0)
    # ISO 8466-1:1990 §4.1.3: F test at the 99 % level.
    mandel_alpha: float = Field(default=0.01, gt=0, lt=1)
    # Variance model of an unweighted calibration's linearity test: "proportional" tests in
    # 1/x² space (reading noise grows with the response, as in ICP and chromatography;
    # common practice), "constant" is ISO 8466-1's homogeneous variance (the plain test).
    # Weighted calibrations are always tested in their own weights.
    linearity_variance: Literal["proportional", "constant"] = "proportional"
    # Reading repeatability in % RSD from the method's validation; None: estimated per run.
    linearity_reading_rsd_pct: float | None = Field(default=None, gt=0)
    # 8000D: average response factor %RSD ≤ 20 % [memory].
    max_rf_rsd_pct: float = Field(default=20.0, gt=0)
    # 8000D RSE ≤ 20 % [memory]; off by default (None) since the back-calculation rule covers it.
    max_rse_pct: float | None = Field(default=None, gt=0)
    # --- check standards: US EPA 6010D / 6020B and 200.7 / 200.8, ±10 % [memory].
    icv_recovery_pct: Range = (90.0, 110.0)
    ccv_recovery_pct: Range = (90.0, 110.0)
    # --- bracketing: a check every 10 samples and at the end (6010D / 6020B, 200.8) [memory].
    max_field_samples_between_checks: int = Field(default=10, ge=1)
    require_closing_check: bool = True
    # --- QC a run must hold, kind: least count per run (run.required_qc). An ICV and a CCV:
    # 6010D / 6020B, 200.7 / 200.8 [memory]; method blank and LCS per batch: the lab's to add.
    required_qc: dict[Kind, int] = Field(default_factory=lambda: {Kind.ICV: 1, Kind.CCV: 1})
    # --- blanks: below the lowest calibration level (6010D / 6020B: ICB/CCB < LLOQ) [memory].
    # None = the lowest non-zero calibration standard.
    blank_limit: float | None = Field(default=None, gt=0)
    # A contaminated method blank: samples below this multiple of it are not reportable
    # (common practice, the "10× rule" of US EPA data review [memory]).
    method_blank_multiple: float = Field(default=10.0, gt=0)
    # --- internal standard: common practice between 6020B (70–120 %) and 200.8 (60–125 %).
    istd_recovery_pct: Range = (70.0, 130.0)
    # --- duplicates, spikes and control samples: 6010D / 6020B [memory].
    duplicate_max_rpd_pct: float = Field(default=20.0, gt=0)
    # RPD judged only when both results reach this multiple of the lowest standard.
    duplicate_min_multiple: float = Field(default=5.0, ge=0)
    spike_recovery_pct: Range = (75.0, 125.0)
    spike_max_native_ratio: float = Field(default=4.0, gt=0)  # native > 4× spike: not judged
    spike_max_rpd_pct: float = Field(default=20.0, gt=0)  # matrix spike vs its duplicate
    lcs_recovery_pct: Range = (80.0, 120.0)
    # --- replicate injections of one sample: common practice (no single source).
    replicate_max_rsd_pct: float = Field(default=10.0, gt=0)
    # %RSD judged only when the replicate mean reaches this multiple of the lowest standard.
    replicate_min_multiple: float = Field(default=5.0, ge=0)
    # --- standard addition: common practice.
    addition_min_points: int = Field(default=3, ge=2)
    addition_min_r_squared: float = Field(default=0.99, ge=0, le=1)
    # --- issue 15: reporting limits, qualifiers, low-level checks, carry-over, sources,
    # CCV re-runs (rules/acceptance/reporting.py, carryover.py, standards.py, reruns.py).
    # Reporting limit in the measured solution (before dilution); None: no reporting limit
    # (a `reporting_limit` column gives a row's own). Results below it × dilution: "< RL".
    reporting_limit: float | None = Field(default=None, gt=0)
    # Detection limit (MDL) in the measured solution; between it and the RL: "J", below: "U".
    detection_limit: float | None = Field(default=None, gt=0)
    # The lab's own letters for the guidance's qualifiers U, J, B, E (e.g. {B: V}).
    qualifier_letters: dict[str, str] = Field(default_factory=dict)
    # Low-level CCV (llccv) at the RL: ±30 % (6010D / 6020B LLCCV [memory]).
    low_check_recovery_pct: Range = (70.0, 130.0)
    # A failing low-level check concerns results below this multiple of its nominal (ours).
    low_check_covers_multiple: float = Field(default=2.0, gt=0)
    # Duplicates below duplicate_min_multiple × RL: |difference| ≤ this many RLs (common
    # practice, the "± RL" control limit of US EPA inorganic data review [memory]).
    duplicate_max_difference_rl: float = Field(default=1.0, gt=0)
    # Carry-over: a result above this (None: the top standard) checks the next injection.
    carryover_high: float | None = Field(default=None, gt=0)
    # Carry-over: a blank (ccb) must follow each high result (common practice).
    carryover_wash_blank: bool = False
    # Average response factor of the standards at least this (8260D / 8270E tables [memory]).
    min_response_factor: float | None = Field(default=None, gt=0)
    # The ICV's `source` must be given and differ from the standards' (6010D / 6020B [memory]).
    require_second_source: bool = False
    # A failing CCV may be superseded by re-runs right after it: none | single (one re-run
    # that passes) | two_passing (two consecutive passing ones, TNI 2016 V1M4 1.7.2 [memory]).
    ccv_rerun_policy: Literal["none", "single", "two_passing"] = "none"
    # Recoveries rounded to this many significant digits before the limits (None: not rounded).
    compare_rounded_digits: int | None = Field(default=None, ge=1, le=15)

    @field_validator("qualifier_letters")
    @classmethod
    def _known_qualifiers(cls, value: dict[str, str]) -> dict[str, str]:
        for letter, own in value.items():
            if letter not in GUIDANCE_QUALIFIERS:
                known = ", ".join(GUIDANCE_QUALIFIERS)
                raise ValueError(f"qualifier_letters: unknown qualifier {letter!r}; known: {known}")
            if not own.strip() or len(own) > 8:
                raise ValueError(f"qualifier_letters.{letter}: 1 to 8 characters, not {own!r}")
        return value

    # --- metals QC of the ICP methods (issue 15 items 3-4; rules/acceptance/interference.py)
    # ICS-A / ICS-AB: interferents and spiked analytes within ±20 % of their true values
    # (US EPA 6010D and 200.7; 6020B likewise [memory]).
    ics_recovery_pct: Range = (80.0, 120.0)
    # Analytes not spiked in an ICS: |result| at most this; None = the lowest standard, the
    # run's stand-in for the lower limit of quantitation (6010D / 6020B: < LLOQ [memory]).
    ics_unspiked_limit: float | None = Field(default=None, gt=0)
    # Serial dilution: the diluted result within 10 % of the undiluted one (200.7 and the US
    # EPA CLP inorganic statement of work: 10 %; 6010D / 6020B: 20 % [memory]) ...
    serial_dilution_max_difference_pct: float = Field(default=10.0, gt=0)
    # ... judged only when the undiluted result in the measured solution is at least this
    # multiple of the calibration's detection limit (CLP: 50× the MDL [memory]).
    serial_dilution_min_multiple: float = Field(default=50.0, ge=0)
    # Post-digestion spike recovery (6010D / 6020B: 80–120 % [memory]).
    pds_recovery_pct: Range = (80.0, 120.0)
    # A failing matrix spike asks for a post-digestion spike of its parent (6010D / 6020B
    # [memory]); off by default, the metals presets switch it on.
    pds_after_failed_spike: bool = False
    # --- chromatography (issue 15 item 5; rules/acceptance/chromatography.py)
    # Retention time within ± this many minutes of the reference (SANTE/11312/2021 ±0.1 min
    # [memory]); None: absolute windows off.
    rt_window_min: float | None = Field(default=0.1, gt=0)
    # Relative retention time (analyte over internal standard) within ± this percent of the
    # reference's (Commission Decision 2002/657/EC: GC 0.5 %, LC 2.5 % [memory]); None: off.
    rrt_window_pct: float | None = Field(default=None, gt=0)
    # The reference retention time: the calibration standards' mean, or the check standard
    # (ICV or CCV) acquired last before the reading (US EPA 8000D: the day's
    # windows centred on the opening check [memory]).
    rt_reference: Literal["calibration", "check"] = "calibration"
    # --- mass-spectrometric confirmation (issue 15 item 6)
    # Ion ratio (qualifier over quantifier) against the standards' mean: None = graded by the
    # ratio's size as 2002/657/EC Table 4 (±20 % above 50 %, ±25 % 20–50 %, ±30 % 10–20 %,
    # ±50 % ≤ 10 %, relative [memory]); a number = one relative tolerance for every size
    # (SANTE/11312/2021: ±30 % [memory]).
    ion_ratio_tolerance_pct: float | None = Field(default=None, gt=0)
    # Which column of 2002/657/EC Table 4 grades the tolerance [memory].
    ion_ratio_technique: Literal["lc_ms", "gc_ei_ms"] = "lc_ms"

    @field_validator("required_qc")
    @classmethod
    def _counts_whole(cls, value: dict[Kind, int]) -> dict[Kind, int]:
        for kind, least in value.items():
            if least < 0:
                raise ValueError(f"required_qc.{kind}: a count, not {least}")
        return value

    @model_validator(mode="after")
    def _ranges_ordered(self) -> AnalyteCriteria:
        for name, value in self:
            numbers = value if isinstance(value, tuple) else (value,)
            if any(isinstance(n, float) and math.isnan(n) for n in numbers):
                # NaN compares false with everything, so a NaN limit would pass every value.
                raise ValueError(f"{name}: not a number (NaN) cannot be a limit")
            if name.endswith("_recovery_pct") and value[0] >= value[1]:
                raise ValueError(f"{name}: low limit {value[0]} must be below high {value[1]}")
        return self


class Criteria(_Frozen):
    """All criteria of one configuration: defaults, per-analyte overrides, switched-off rules."""

    defaults: AnalyteCriteria = AnalyteCriteria()
    analytes: dict[str, dict[str, Any]] = Field(default_factory=dict)
    disabled_rules: tuple[str, ...] = ()

    @field_validator("disabled_rules")
    @classmethod
    def _sorted_unique(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        # Sorted so that the digest does not depend on the order the lab wrote them in.
        return tuple(sorted(set(value)))

    @model_validator(mode="after")
    def _overrides_valid(self) -> Criteria:
        seen: dict[str, str] = {}
        for analyte in self.analytes:
            other = seen.setdefault(analyte.strip().casefold(), analyte)
            if other != analyte:
                raise ValueError(f"analytes: '{other}' and '{analyte}' name the same analyte")
        for analyte, override in self.analytes.items():
            try:
                AnalyteCriteria.model_validate({**self.defaults.model_dump(), **override})
            except ValidationError as error:
                raise ValueError(f"analytes.{analyte}: {_first_problem(error)}") from None
        return self

    def for_analyte(self, analyte: str) -> AnalyteCriteria:
        """The defaults with this analyte's overrides applied (names matched ignoring case)."""
        # Analyte names are matched ignoring case and surrounding spaces, as elsewhere.
        wanted = analyte.strip().casefold()
        override = next(
            (value for name, value in self.analytes.items() if name.strip().casefold() == wanted),
            None,
        )
        if not override:
            return self.defaults
        return AnalyteCriteria.model_validate({**self.defaults.model_dump(), **override})

    def digest(self) -> str:
        """SHA-256 of the canonical JSON of these criteria, for the audit trail."""
        canonical = json.dumps(self.model_dump(mode="json"), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(canonical.encode()).hexdigest()


def _first_problem(error: ValidationError) -> str:
    problem = error.errors()[0]
    where = ".".join(str(part) for part in problem["loc"])
    return f"{where}: {problem['msg']}" if where else str(problem["msg"])


def build_criteria(data: dict[str, Any] | None) -> Criteria:
    """Validate criteria from plain data (parsed YAML); raise ConfigError naming the bad key."""
    try:
        return Criteria.model_validate(data or {})
    except ValidationError as error:
        raise ConfigError(f"criteria.{_first_problem(error)}") from None
