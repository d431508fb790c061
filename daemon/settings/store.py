"""The ``store`` section: where the ledger lives (a SQLite file per PC, or a lab's server).

Absent (the default): the ledger is the SQLite file ``ledger.sqlite3`` in the
daemon's state folder. With ``url: postgresql://host/db`` every daemon of the lab
that names the same database shares one ledger (README, "Many instruments, one
lab"). The password never appears in the YAML, as for SMTP: it is read from an
environment variable or a file when the daemon connects.
"""

from __future__ import annotations

import os
from pathlib import Path
from urllib.parse import urlsplit

from pydantic import Field, field_validator, model_validator

from calwarden.daemon.settings.section import PasswordByReference


class StoreSettings(PasswordByReference):
    """Where the ledger lives; no url: a SQLite file in the state folder."""

    url: str | None = Field(
        default=None,
        description="postgresql://[user@]host[:port]/database of a lab-wide ledger; absent: "
        "the SQLite file in the state folder",
    )
    password_env: str | None = Field(
        default=None, description="name of the environment variable holding the password"
    )
    password_file: Path | None = Field(
        default=None, description="a file whose first line is the password"
    )
    retry_seconds: float = Field(
        default=5.0,
        gt=0,
        le=300,
        description="while the server is away, how often the daemon tries it again",
    )

    @field_validator("url")
    @classmethod
    def _server_url(cls, value: str | None) -> str | None:
        if value is None:
            return None
        parts = urlsplit(value)
        if parts.scheme not in ("postgresql", "postgres"):
            raise ValueError(f"{value!r}: give a postgresql://host/database URL")
        if parts.password is not None:
            raise ValueError(
                "the password never goes in the URL: name an environment variable "
                "(password_env) or a file readable only by the service (password_file)"
            )
        if not parts.path.strip("/"):
            raise ValueError(f"{value!r}: name the database (postgresql://host/database)")
        return value

    @model_validator(mode="after")
    def _complete(self) -> StoreSettings:
        if self.password_env and self.password_file:
            raise ValueError("give store.password_env or store.password_file, not both")
        if self.url is None and (self.password_env or self.password_file):
            raise ValueError("a store password without store.url: name the server too")
        return self

    def password(self) -> str | None:
        """The password, read now; None when none is configured (peer or certificate login).

        Raises OSError when the file cannot be read, KeyError when the variable is unset.
        """
        if self.password_file is not None:
            lines = self.password_file.read_text(encoding="utf-8").splitlines()
            return lines[0] if lines else ""
        if self.password_env is not None:
            return os.environ[self.password_env]
        return None
