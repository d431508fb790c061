"""The ``watch`` and ``inboxes`` sections of a configuration: how the daemon runs.

Every key has a default, so ``calwarden watch INBOX --out DIR`` needs no file;
a configuration can list several inboxes, each with its own instrument name,
file patterns, layout and criteria. Command-line flags override the file.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

from pydantic import Field, field_validator

from calwarden.daemon.settings.formats import ExportFormat
from calwarden.daemon.settings.section import Section
from calwarden.daemon.settings.worklist import WorklistSettings
from calwarden.rules.criteria import Criteria

#: Names an instrument or its software writes while a file is still being written.
DEFAULT_IGNORE = ("~*", ".*", "*.tmp", "*.part")
_SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")


class WatchSettings(Section):
    """How the watcher behaves; shared by every inbox unless an inbox says otherwise."""

    out: Path | None = Field(
        default=None,
        description="folder for verdicts, flagged copies and reports (relative paths are "
        "relative to the configuration file); `--out` overrides it",
    )
    state_dir: Path | None = Field(
        default=None,
        description="folder for the ledger, the lock and the log; default <out>/.calwarden",
    )
    settle_seconds: float = Field(
        default=2.0,
        gt=0,
        le=3600,
        description="a file is complete when its size and modification time have not "
        "changed for this long",
    )
    rescan_seconds: float = Field(
        default=60.0,
        ge=1,
        le=86400,
        description="every so often each inbox is compared with the ledger, to catch files "
        "whose events the operating system dropped",
    )
    polling: bool = Field(
        default=False,
        description="look for changes by listing the folder instead of waiting for the "
        "operating system's events (needed on network shares)",
    )
    polling_interval_seconds: float = Field(
        default=5.0, gt=0, le=3600, description="how often a polling inbox is listed"
    )
    observer_check_seconds: float = Field(
        default=5.0,
        gt=0,
        le=3600,
        description="how often the folder observer is checked to be alive (restarted if not)",
    )
    patterns: tuple[str, ...] = Field(
        default=("*.csv",),
        min_length=1,
        description="file names to judge (shell patterns, matched ignoring case)",
    )
    ignore: tuple[str, ...] = Field(
        default=DEFAULT_IGNORE,
        description="file names never judged: temporary names of files still being written",
    )
    follow_links_outside: bool = Field(
        default=False,
        description="judge a symbolic link in an inbox whose target lies outside the inbox; "
        "by default such a link is skipped unread, with a link_outside_inbox log event",
    )
    overview_days: int = Field(
        default=7,
        ge=1,
        le=366,
        description="days of runs the overview page (<out>/index.html) lists",
    )
    overview_seconds: float = Field(
        default=300.0,
        ge=5,
        le=86400,
        description="the overview page is written after each file and at least this often",
    )
    silent_after_hours: float | None = Field(
        default=72.0,
        gt=0,
        description="an instrument with no file for this long is shown as silent on the "
        "overview and raises one daemon alert; null: never",
    )
    log_max_bytes: int = Field(
        default=10_000_000, ge=10_000, description="the log file is rotated at this size"
    )
    log_backups: int = Field(default=5, ge=0, le=100, description="rotated log files kept")


class InboxSettings(Section):
    """One folder an instrument exports into."""

    path: Path = Field(description="the folder to watch (relative: to the configuration file)")
    name: str | None = Field(
        default=None,
        description="short name; with several inboxes, outputs go to <out>/<name>/ "
        "(default: the folder's name)",
    )
    instrument: str | None = Field(
        default=None, description="instrument name for runs whose file does not name one"
    )
    patterns: tuple[str, ...] | None = Field(
        default=None, min_length=1, description="file names to judge; default watch.patterns"
    )
    recursive: bool = Field(
        default=False,
        description="also watch sub-folders (outputs then mirror the sub-folders)",
    )
    polling: bool | None = Field(default=None, description="default watch.polling")
    follow_links_outside: bool | None = Field(
        default=None, description="default watch.follow_links_outside"
    )
    format: ExportFormat | None = Field(
        default=None, description="this instrument's export layout; default the top-level format"
    )
    worklist: WorklistSettings | None = Field(
        default=None, description="this instrument's worklist layout; default the top-level one"
    )
    criteria: Criteria | None = Field(
        default=None,
        description="criteria for this inbox, laid over the top-level criteria "
        "(keys given here win; analytes are merged one by one)",
    )

    @field_validator("name")
    @classmethod
    def _safe_name(cls, value: str | None) -> str | None:
        if value is not None and not _SAFE_NAME.match(value):
            raise ValueError(
                "a name of letters, digits, '.', '_' or '-' (at most 64), as it names a folder"
            )
        return value


def merge_criteria(base: Any, override: Any) -> Any:
    """Lay an inbox's criteria mapping over the top-level one; lists are replaced whole."""
    if not isinstance(base, dict) or not isinstance(override, dict):
        return override
    merged = dict(base)
    for key, value in override.items():
        merged[key] = merge_criteria(base.get(key), value) if key in base else value
    return merged
