"""The ``alerts`` section of a configuration: who hears about what, and how.

Every key has a default. With no ``email.host`` every alert is still written
as an RFC 5322 ``.eml`` file in ``<state>/outbox/``, so nothing depends on a
mail server being set up. The SMTP password never appears in the YAML: it is
read from an environment variable or a file when a message is sent.
"""

from __future__ import annotations

import os
import re
import unicodedata
from pathlib import Path
from typing import Literal

from pydantic import Field, field_validator, model_validator

from calwarden.daemon.settings.section import PasswordByReference, Section

#: What can raise an alert.
#: fail: a run failed its criteria; error: a file could not be judged;
#: control: a control-chart rule fired on a run that otherwise passed;
#: daemon: the daemon itself is in trouble (observer restarted, inbox gone, fault).
AlertKind = Literal["fail", "error", "control", "daemon"]
ALERT_KINDS: tuple[AlertKind, ...] = ("fail", "error", "control", "daemon")


def _addresses(values: tuple[str, ...]) -> tuple[str, ...]:
    for value in values:
        # Control, format and separator characters (CR, LF, TAB, NUL, U+2028, spaces)
        # have no place in an address and would break or forge a header.
        if "@" not in value or any(
            c in ",;<>" or unicodedata.category(c)[0] in "CZ" for c in value
        ):
            raise ValueError(f"{value!r} is not a plain e-mail address (name@domain)")
    return values


class EmailSettings(PasswordByReference):
    """The SMTP server alerts are sent through; no host: ``.eml`` files only."""

    host: str | None = Field(
        default=None,
        description="SMTP server; absent: no e-mail is sent, every alert is only written "
        "as an .eml file in <state>/outbox/",
    )
    port: int | None = Field(
        default=None,
        ge=1,
        le=65535,
        description="default 587 for starttls, 465 for ssl, 25 for none",
    )
    security: Literal["starttls", "ssl", "none"] = Field(
        default="starttls",
        description="starttls: upgrade a plain connection; ssl: TLS from the first byte; "
        "none: unencrypted (only for a relay on the same machine or network)",
    )
    verify_certificate: bool = Field(
        default=True, description="check the server's certificate and name (keep it on)"
    )
    ca_file: Path | None = Field(
        default=None,
        description="a PEM file of certificate authorities to trust instead of the system's "
        "(for a lab's own mail server)",
    )
    username: str | None = Field(default=None, description="log in with this name")
    password_env: str | None = Field(
        default=None,
        description="name of the environment variable holding the password "
        "(default CALWARDEN_SMTP_PASSWORD when a username is given)",
    )
    password_file: Path | None = Field(
        default=None, description="a file whose first line is the password"
    )
    sender: str = Field(
        default="calwarden@localhost", description="the From address of every alert"
    )
    to: tuple[str, ...] = Field(
        default=(), description="who gets every alert no route below claims"
    )
    timeout_seconds: float = Field(
        default=30.0, gt=0, le=600, description="give up on a silent server after this long"
    )

    _check_to = field_validator("to")(_addresses)

    @field_validator("sender")
    @classmethod
    def _one_sender(cls, value: str) -> str:
        return _addresses((value,))[0]

    @model_validator(mode="after")
    def _complete(self) -> EmailSettings:
        if self.password_env and self.password_file:
            raise ValueError("give email.password_env or email.password_file, not both")
        return self

    @property
    def effective_port(self) -> int:
        if self.port is not None:
            return self.port
        return {"starttls": 587, "ssl": 465, "none": 25}[self.security]

    def password(self) -> str | None:
        """The password, read now; None when no login is configured.

        Raises OSError when the file cannot be read, KeyError when the variable is unset.
        """
        if self.username is None:
            return None
        if self.password_file is not None:
            lines = self.password_file.read_text(encoding="utf-8").splitlines()
            return lines[0] if lines else ""
        name = self.password_env or "CALWARDEN_SMTP_PASSWORD"
        return os.environ[name]


class Route(Section):
    """Who hears about which alerts: every given condition must match."""

    inbox: str | None = Field(default=None, description="only alerts from this inbox")
    instrument: str | None = Field(default=None, description="only alerts about this instrument")
    kinds: tuple[AlertKind, ...] = Field(
        default=ALERT_KINDS, min_length=1, description="only these kinds of alert"
    )
    to: tuple[str, ...] = Field(min_length=1, description="the addresses to send them to")

    _check_to = field_validator("to")(_addresses)

    def matches(self, kind: str, inbox: str | None, instrument: str | None) -> bool:
        return (
            kind in self.kinds
            and (self.inbox is None or (inbox or "").casefold() == self.inbox.casefold())
            and (
                self.instrument is None
                or (instrument or "").casefold() == self.instrument.casefold()
            )
        )


class ThrottleSettings(Section):
    """Beyond this many messages in a window, alerts wait and go out as one digest."""

    max_messages: int = Field(
        default=5,
        ge=1,
        le=1000,
        description="messages sent one by one within a window; later alerts are gathered",
    )
    window_minutes: float = Field(
        default=10.0,
        gt=0,
        le=1440,
        description="the window; gathered alerts go out as one digest when it allows",
    )


class RetrySettings(Section):
    """How a message the server could not take now is tried again."""

    first_seconds: float = Field(
        default=30.0, gt=0, le=3600, description="wait before the first retry"
    )
    max_seconds: float = Field(
        default=1800.0, gt=0, le=86400, description="the wait doubles up to this"
    )
    give_up_hours: float = Field(
        default=72.0,
        gt=0,
        le=8760,
        description="a message still refused for now after this long goes to the dead-letter "
        "folder (a permanent refusal goes there at once)",
    )


class WebhookSettings(Section):
    """An HTTP POST of each alert as JSON, for a chat tool's incoming hook."""

    url: str | None = Field(default=None, description="absent: no webhook")
    token_env: str | None = Field(
        default=None,
        description="environment variable whose value is sent as 'Authorization: Bearer …'",
    )
    timeout_seconds: float = Field(default=10.0, gt=0, le=600)
    verify_certificate: bool = Field(default=True)

    @field_validator("url")
    @classmethod
    def _http(cls, value: str | None) -> str | None:
        if value is not None and not value.startswith(("http://", "https://")):
            raise ValueError("the webhook url must start with http:// or https://")
        return value


class DailySummarySettings(Section):
    """Once a day, one message counting every file judged in the last 24 hours."""

    enabled: bool = Field(default=False, description="send the daily summary (off by default)")
    at: str = Field(default="07:00", description="local time, HH:MM")

    @field_validator("at")
    @classmethod
    def _time_of_day(cls, value: str) -> str:
        if not re.fullmatch(r"([01]\d|2[0-3]):[0-5]\d", value):
            raise ValueError("must be a time of day as HH:MM (00:00 to 23:59), e.g. 07:00")
        return value


class AlertSettings(Section):
    """What raises an alert and where it goes."""

    enabled: bool = Field(
        default=True,
        description="raise alerts at all; off: no outbox rows, no .eml files, no e-mail",
    )
    kinds: tuple[AlertKind, ...] = Field(
        default=ALERT_KINDS,
        description="which events raise an alert: fail, error, control, daemon",
    )
    control_rules: tuple[str, ...] = Field(
        default=("1-3.5s", "R-4s", "ewma"),
        description="control-chart rules whose finding on an otherwise passing run raises a "
        "'control' alert. By default the rejection rule and the two that flag a run's own "
        "scatter or a slow drift; the warning rules 1-2s, 1-3s, 2-2s, 4-1s and 10-x, which "
        "together fire on about one good run in eight, stay in the verdict and report",
    )
    attach_verdict: bool = Field(default=True, description="attach the verdict JSON")
    inline_charts: int = Field(
        default=1,
        ge=0,
        le=20,
        description="control charts drawn into a message, of the series the rules fired on, "
        "first named first (each takes about 0.3 s to draw; all are in <out>/charts/)",
    )
    email: EmailSettings = Field(default_factory=EmailSettings)
    routes: tuple[Route, ...] = Field(
        default=(),
        description="recipients by inbox, instrument and kind; an alert goes to every "
        "matching route, or to email.to when none matches",
    )
    throttle: ThrottleSettings = Field(default_factory=ThrottleSettings)
    retry: RetrySettings = Field(default_factory=RetrySettings)
    webhook: WebhookSettings = Field(default_factory=WebhookSettings)
    daily_summary: DailySummarySettings = Field(default_factory=DailySummarySettings)

    @model_validator(mode="after")
    def _someone_to_tell(self) -> AlertSettings:
        if self.email.host is not None and not self.email.to and not self.routes:
            raise ValueError("email.host is set but neither email.to nor routes name anyone")
        return self

    def recipients(self, kind: str, inbox: str | None, instrument: str | None) -> tuple[str, ...]:
        """Who gets an alert of this kind from this inbox and instrument."""
        chosen = [r for r in self.routes if r.matches(kind, inbox, instrument)]
        if not chosen:
            return self.email.to
        return tuple(dict.fromkeys(address for route in chosen for address in route.to))
