"""Exceptions of the core, split by whose fault the problem is.

The shell decides what to do from the class alone: an :class:`InputError` means
the file is broken (judge it ``error``, keep going); a :class:`ConfigError` means
the lab's configuration is broken (refuse to start, exit 2).
"""

from __future__ import annotations


class CalwardenError(Exception):
    """Base of every error calwarden raises on purpose."""


class InputError(CalwardenError):
    """The input file cannot be read as a run; the message names where."""

    def __init__(self, message: str, line: int | None = None, column: str | None = None) -> None:
        self.reason = message
        self.line = line
        self.column = column
        where = []
        if line is not None:
            where.append(f"line {line}")
        if column is not None:
            where.append(f"column '{column}'")
        prefix = ", ".join(where)
        super().__init__(f"{prefix}: {message}" if prefix else message)


class ConfigError(CalwardenError):
    """The configuration or criteria are invalid; nothing can be judged with them."""
