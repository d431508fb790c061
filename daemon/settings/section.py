"""The base of every configuration section: unknown keys refused, values frozen once read."""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict


class Section(BaseModel):
    """A part of the configuration file: a misspelt key is an error, never ignored."""

    model_config = ConfigDict(extra="forbid", frozen=True)
