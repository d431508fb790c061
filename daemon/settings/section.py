"""The base of every configuration section: unknown keys refused, values frozen once read."""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, model_validator


class Section(BaseModel):
    """A part of the configuration file: a misspelt key is an error, never ignored."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class PasswordByReference(Section):
    """A section that logs in somewhere: the password is named (an environment variable or a
    file), never written in the configuration itself."""

    @model_validator(mode="before")
    @classmethod
    def _no_password_here(cls, data: object) -> object:
        if isinstance(data, dict) and "password" in data:
            raise ValueError(
                "the password never goes in the configuration: name an environment variable "
                "(password_env) or a file readable only by the service (password_file)"
            )
        return data
