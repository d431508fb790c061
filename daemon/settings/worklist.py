"""The ``worklist:`` section: the re-run worklist in an instrument's sequence-import layout.

Written in the same style as ``format:``: calwarden's own field names map to
the instrument's column headers, calwarden's kind words to the instrument's.
"""

from __future__ import annotations

import codecs
from typing import Literal

from pydantic import Field, field_validator

from calwarden.daemon.settings.section import Section
from calwarden.rules.model import Kind

#: The worklist's own fields, in their default column order.
WorklistField = Literal["position", "sample_id", "kind", "analytes", "dilution", "why", "seq"]
FIELDS: tuple[WorklistField, ...] = (
    "position",
    "sample_id",
    "kind",
    "analytes",
    "dilution",
    "why",
    "seq",
)


class WorklistSettings(Section):
    """How ``<stem>.reruns.csv`` is laid out (a failing run's samples to measure again)."""

    enabled: bool = Field(default=True, description="write a re-run worklist for failing runs")
    columns: dict[WorklistField, str] = Field(
        default_factory=dict,
        description="worklist field: the instrument's column header; only these columns are "
        "written, in this order (empty: every field under its own name). Fields: position, "
        "sample_id, kind, analytes, dilution, why, seq (the injection re-run)",
    )
    kinds: dict[Kind, str] = Field(
        default_factory=dict,
        description="calwarden kind word: the instrument's word for it, e.g. ccv: QC-CHECK "
        "(kinds not named keep calwarden's word)",
    )
    fixed: dict[str, str] = Field(
        default_factory=dict,
        description="extra columns with the same value on every line, e.g. Method: METALS-A",
    )
    delimiter: str = Field(default=",", min_length=1, max_length=1, description="one character")
    encoding: str = Field(default="utf-8", description="any text codec Python knows")
    checks_every: int | None = Field(
        default=None,
        ge=1,
        description="a check standard and a blank after this many samples; "
        "default the criteria's max_field_samples_between_checks",
    )

    @field_validator("encoding")
    @classmethod
    def _known_codec(cls, value: str) -> str:
        try:
            codecs.lookup(value)
        except LookupError:
            raise ValueError(f"unknown encoding '{value}'") from None
        return value
