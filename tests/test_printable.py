"""File text shown to a person: control characters escaped, ordinary text untouched."""

from __future__ import annotations

from calwarden.daemon.outputs.printable import printable, printable_strings


def test_escape_sequences_and_line_breaks_are_shown_as_escapes() -> None:
    """ESC, BEL, CR, LF and the C1 CSI become visible escapes, nothing raw is left."""
    assert printable("A\x1b[2J\x07B\r\nC\x9bD") == "A\\x1b[2J\\x07B\\r\\nC\\x9bD"


def test_invisible_direction_overrides_are_shown() -> None:
    """A right-to-left override and the Unicode line separator are escaped too."""
    assert printable("run\u202e-1\u2028") == "run\\u202e-1\\u2028"


def test_ordinary_text_is_unchanged() -> None:
    """Spaces, accents, the micro sign and a Windows path stay as they are."""
    text = "Zn 5 µg/L, Probe Nr. 3 (Müller) D:\\exports\\run 1.csv\u00a0"
    assert printable(text) == text


def test_every_string_of_a_document_is_printable() -> None:
    """Strings nested in dicts and lists are escaped; numbers and None stay."""
    document = {"run": "R\x1b", "findings": [{"message": "a\rb", "value": 1.5, "x": None}]}
    assert printable_strings(document) == {
        "run": "R\\x1b",
        "findings": [{"message": "a\\rb", "value": 1.5, "x": None}],
    }
