"""File text made safe to show a person: control characters shown as escapes.

A run name, a sample id or a file name comes from the file, and a file may hold
anything: an ESC sequence that recolours or clears a terminal, a CR that
overwrites the start of a line, a right-to-left override that reverses what
follows. Everything meant for a person (the report, the terminal summary,
``calwarden status``, an alert's text body) shows such characters as visible
escapes (``\\x1b``, ``\\r``, ``\\u202e``) through :func:`printable`; the
verdict JSON keeps the exact text (JSON escapes it itself).
"""

from __future__ import annotations

import unicodedata
from typing import TypeVar

__all__ = ["printable", "printable_strings"]

_T = TypeVar("_T")
_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}
#: Control (C0, DEL, C1 such as CSI 0x9b), format (bidi overrides, zero-width) and
#: line or paragraph separator characters.
_ESCAPED = frozenset({"Cc", "Cf", "Zl", "Zp"})


def _escape(character: str) -> str:
    if character in _NAMED:
        return _NAMED[character]
    code = ord(character)
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def printable(text: str) -> str:
    """``text`` with each control, format and separator character written as an escape."""
    if text.isprintable():  # the usual case: nothing to do (space is printable)
        return text
    return "".join(_escape(c) if unicodedata.category(c) in _ESCAPED else c for c in text)


def printable_strings(value: _T) -> _T:
    """A copy of a JSON-like ``value`` (dicts, lists, strings…) with every string printable."""
    if isinstance(value, str):
        return printable(value)  # type: ignore[return-value]
    if isinstance(value, dict):
        return {key: printable_strings(item) for key, item in value.items()}  # type: ignore[return-value]
    if isinstance(value, list | tuple):
        return type(value)(printable_strings(item) for item in value)
    return value
