"""The ion-ratio tolerances against the published table they follow."""

from __future__ import annotations

import pytest

from calwarden.rules.acceptance.chromatography import graded_tolerance_pct


@pytest.mark.parametrize(
    ("reference", "technique", "tolerance"),
    [
        # Commission Decision 2002/657/EC, Table 4 [memory]: relative intensity (% of the base
        # peak) > 50 %, > 20–50 %, > 10–20 %, ≤ 10 %.
        (0.60, "lc_ms", 20.0),
        (0.50, "lc_ms", 25.0),  # exactly 50 % belongs to the "> 20 % to 50 %" class
        (0.21, "lc_ms", 25.0),
        (0.15, "lc_ms", 30.0),
        (0.10, "lc_ms", 50.0),
        (0.05, "lc_ms", 50.0),
        (2.50, "lc_ms", 25.0),  # qualifier stronger than quantifier: 1/2.5 = 40 % class
        (0.60, "gc_ei_ms", 10.0),
        (0.30, "gc_ei_ms", 15.0),
        (0.15, "gc_ei_ms", 20.0),
        (0.08, "gc_ei_ms", 50.0),
    ],
)
def test_graded_tolerance_follows_the_table(
    reference: float, technique: str, tolerance: float
) -> None:
    """Each ratio size gets its class's relative tolerance, the weaker ion over the stronger."""
    assert graded_tolerance_pct(reference, technique) == tolerance
