"""The acceptance rules, one module per area; importing this package registers them all."""

from calwarden.rules.acceptance import (
    additions,
    blanks,
    brackets,
    calibration,
    checks,
    replicates,
    samples,
)

__all__ = ["additions", "blanks", "brackets", "calibration", "checks", "replicates", "samples"]
