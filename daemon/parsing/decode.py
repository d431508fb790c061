"""Stage 1 of reading a file: bytes → text.

Every file calwarden reads as text passes here: the size check, the binary
check and the decoding, with an :class:`~rules.errors.InputError` naming the
line of the first problem. Lines end at LF, CRLF or a lone CR, as the CSV
reader counts them (:func:`count_line_ends`), so a line number here is the line
number every later stage reports.

The native format is UTF-8 (a byte-order mark is accepted) and says so in its
messages; an instrument export's format chooses its ``encoding`` (``auto``, or
any text codec Python knows: ``utf-8``, ``utf-16``, ``cp1252``, ``cp1250``,
``shift_jis``, ``gb18030``…) and the messages point at that setting.

In ``auto``, bytes that are not UTF-8 are read as Windows-1252 only when the
result is plausible Western text (:func:`implausible_characters`): text in
another code page (Shift-JIS, GB18030, a Central-European one) read as
Windows-1252 turns into symbols strung together (``空白`` in GB18030 reads as
``¿Õ°×``), and judging that would be judging nonsense.
"""

from __future__ import annotations

import codecs
import re
import stat
import unicodedata
from dataclasses import dataclass
from pathlib import Path

from calwarden.rules.errors import InputError

__all__ = [
    "MAX_FILE_BYTES",
    "Text",
    "check_bytes",
    "count_line_ends",
    "decode",
    "excerpt",
    "implausible_characters",
    "read_file_bytes",
]

#: Files larger than this are refused without being read: no run is that big.
MAX_FILE_BYTES = 200 * 1024 * 1024

#: Share of control bytes above which a file is taken for binary data.
_CONTROL_SHARE = 0.05
#: Control bytes that never belong in a text file (tab, LF and CR do).
_CONTROL_BYTES = bytes([*range(0x00, 0x09), 0x0B, 0x0C, *range(0x0E, 0x20), 0x7F])
_UTF16_MARKS = ((codecs.BOM_UTF16_LE, "utf-16-le"), (codecs.BOM_UTF16_BE, "utf-16-be"))
#: UTF-32's marks; the little-endian one begins with UTF-16's, so they are tested first.
_UTF32_MARKS = (codecs.BOM_UTF32_LE, codecs.BOM_UTF32_BE)
_UTF32_REFUSED = "the file is UTF-32 text, which calwarden does not read; save it as UTF-8"


@dataclass(frozen=True, slots=True)
class Text:
    """A file's text, and how it was decoded (for ``calwarden inspect``)."""

    text: str
    encoding: str  # e.g. "utf-8", "utf-8 (with BOM)", "utf-16-le (BOM)", "cp1252"


def count_line_ends(text: str) -> int:
    """How many line ends ``text`` holds: LF, CRLF and a lone CR each end a line."""
    return text.count("\n") + text.count("\r") - text.count("\r\n")


def _line_at(data: bytes, offset: int, codec: str = "latin-1") -> int:
    """The 1-based line holding byte ``offset`` of ``data`` in ``codec``.

    Latin-1 maps each byte to one character, so for the byte-oriented checks it
    counts the LF and CR bytes themselves.
    """
    return count_line_ends(data[:offset].decode(codec, errors="replace")) + 1


def check_bytes(data: bytes, max_bytes: int = MAX_FILE_BYTES) -> None:
    """Refuse a file too large to be a run, or an empty one."""
    if len(data) > max_bytes:
        raise InputError(
            f"the file is too large to be a run: {len(data)} bytes, the limit is {max_bytes}"
        )
    if not data:
        raise InputError("the file is empty")


def read_file_bytes(path: Path, max_bytes: int = MAX_FILE_BYTES) -> bytes:
    """A run file's bytes, read once; refuses what is not a regular file or is too large.

    The size is checked before anything is read, so a huge file is never loaded.
    """
    try:
        info = path.stat()
        if not stat.S_ISREG(info.st_mode):
            kind = "a directory" if stat.S_ISDIR(info.st_mode) else "not a regular file"
            raise InputError(f"cannot read {path}: it is {kind}")
        if info.st_size > max_bytes:
            raise InputError(
                f"the file is too large to be a run: {info.st_size} bytes, the limit is {max_bytes}"
            )
        with path.open("rb") as handle:
            return handle.read(max_bytes + 1)  # a file growing since stat still hits the limit
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror or exc}") from None


def decode(data: bytes, encoding: str | None = None, *, max_bytes: int = MAX_FILE_BYTES) -> Text:
    """The text of a file's bytes, after the size, binary and encoding checks.

    ``encoding`` is an export format's ``encoding`` setting; ``None`` reads the
    native format: UTF-8, with or without a byte-order mark.
    """
    check_bytes(data, max_bytes)
    if encoding is None:
        return _native(data)
    return _configured(data, encoding)


# --------------------------------------------------------------------------- native


def _native(data: bytes) -> Text:
    label = "utf-8"
    if data.startswith(codecs.BOM_UTF8):
        data, label = data[len(codecs.BOM_UTF8) :], "utf-8 (with BOM)"
        if not data:
            raise InputError("the file is empty")
    _check_binary(data, configured=False)
    try:
        return Text(data.decode("utf-8"), label)
    except UnicodeDecodeError as exc:
        bad = data[exc.start : exc.start + 1].hex()
        raise InputError(
            f"the file is not valid UTF-8 text: byte 0x{bad} cannot be decoded "
            "(was it saved as Latin-1 or Windows-1252? save it as UTF-8, or name its "
            "encoding in the configuration's format section, key encoding, e.g. "
            "format: {encoding: cp1252}, or encoding: auto to try UTF-8, then Windows-1252)",
            _line_at(data, exc.start, "utf-8"),
        ) from None


# --------------------------------------------------------------------------- configured


def _configured(data: bytes, encoding: str) -> Text:
    """Decode as a format's ``encoding`` says; ``auto`` tries UTF-8, then Windows-1252."""
    if encoding != "auto":
        encoding = codecs.lookup(encoding).name  # "UTF8", "utf_8" → "utf-8"
    if data.startswith(_UTF32_MARKS) and not encoding.startswith("utf-32"):
        raise InputError(_UTF32_REFUSED, 1)
    for mark, codec in _UTF16_MARKS:
        if data.startswith(mark) and not encoding.startswith("utf-32"):  # FF FE 00 00
            if encoding not in ("auto", "utf-16", codec):
                raise InputError(
                    f"the file starts with a UTF-16 byte-order mark, but format.encoding is "
                    f"{encoding}",
                    1,
                )
            return _decode_as(data[len(mark) :], codec, f"{codec} (BOM)", len(mark))
    if encoding == "utf-16":
        # Without a mark, little-endian: what every common writer of UTF-16 files produces.
        return _decode_as(data, "utf-16-le", "utf-16-le", 0)
    if encoding in ("auto", "utf-8") and data.startswith(codecs.BOM_UTF8):
        return _decode_as(data[len(codecs.BOM_UTF8) :], "utf-8", "utf-8 (with BOM)", 3)
    if encoding == "auto":
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError:
            # Not UTF-8: a Windows program's export, in its ANSI code page, if it reads as one.
            return _western_fallback(data)
        _check_binary(data, configured=True)
        return Text(text, "utf-8")
    return _decode_as(data, encoding, encoding, 0)


def _ascii_compatible(codec: str) -> bool:
    """Whether ``codec`` writes ASCII as ASCII bytes, so the byte-wise binary check holds."""
    try:
        return "\t\n\r ,;.0-9A-Za-z".encode(codec) == b"\t\n\r ,;.0-9A-Za-z"
    except (UnicodeError, LookupError):
        return False


def excerpt(text: str, limit: int = 40) -> str:
    """At most ``limit`` characters of ``text`` for a message, control characters escaped.

    File text quoted in a message reaches verdicts, reports and e-mails: it is
    kept short, and nothing in it can move a terminal's cursor or fold a line.
    """
    short = text[:limit]
    shown = "".join(char if char.isprintable() else f"\\x{ord(char):02x}" for char in short)
    return shown + ("…" if len(text) > limit else "")


#: Non-letters outside ASCII that Western lab text holds on their own (units, signs,
#: typographic quotes and dashes); any other non-ASCII non-letter is implausible.
_LAB_SYMBOLS = frozenset("°±µ²³·×÷‰€£§–—‘’‚“”„…•«»©®™\u00a0")
#: Western words hold at most this many non-ASCII letters in a row ("ção"); Cyrillic or
#: Greek read as Windows-1252 are whole words of them ("ïðîáà").
_LONGEST_FOREIGN_RUN = 4
_NON_ASCII_RUN = re.compile(r"[^\x00-\x7f]+")
#: A fallback decoding is refused at this many implausible characters, when they
#: are also at least this share of the text's non-ASCII characters.
_IMPLAUSIBLE_COUNT = 3
_IMPLAUSIBLE_SHARE = 0.05


def implausible_characters(text: str) -> list[int]:
    """Offsets of the characters of ``text`` that Western text seldom holds.

    A non-ASCII character is implausible when it is not a letter (Unicode
    category L) and either is not one of the symbols lab files use on their own
    (``°``, ``±``, ``µ``, ``²``, ``€``, quotes, dashes…) or stands next to
    another non-ASCII character; and every character of a run of more than
    four non-ASCII characters is. Western text keeps its accented letters among
    ASCII ones (``Müller``, ``Solução``) and its symbols apart (``25 °C``,
    ``±0.5``); a multi-byte or other code page read as Windows-1252 strings
    symbols together (``¿Õ°×``, ``³¹ka``) or makes whole words of accented
    letters (Russian ``проба`` as ``ïðîáà``). A limit: text that reads as
    Western words in both code pages (Czech ``Řeka`` as ``Øeka``, most
    Hungarian) cannot always be told apart this way; configure its encoding.
    ``tests/benchmarks/alarms_encoding.py`` measures both rates.
    """
    found = {
        offset
        for run in _NON_ASCII_RUN.finditer(text)
        if len(run.group()) > _LONGEST_FOREIGN_RUN
        for offset in range(run.start(), run.end())
    }
    for offset, char in enumerate(text):
        if char.isascii() or unicodedata.category(char).startswith("L"):
            continue
        beside = text[offset - 1 : offset] + text[offset + 1 : offset + 2]
        if char not in _LAB_SYMBOLS or not beside.isascii():
            found.add(offset)
    return sorted(found)


def _western_fallback(data: bytes) -> Text:
    """``auto`` on bytes that are not UTF-8: Windows-1252, refused when it reads as nonsense."""
    _check_binary(data, configured=True)
    try:
        text = data.decode("cp1252")
    except UnicodeDecodeError as exc:
        bad = data[exc.start : exc.start + 1].hex()
        raise InputError(
            f"the file is neither UTF-8 nor Windows-1252 (cp1252) text: byte 0x{bad} at "
            f"offset {exc.start} cannot be decoded (set format.encoding to the file's "
            f"encoding, e.g. cp1250, shift_jis, gb18030)",
            _line_at(data, exc.start, "cp1252"),
        ) from None
    odd = implausible_characters(text)
    foreign = sum(1 for char in text if not char.isascii())
    if len(odd) >= _IMPLAUSIBLE_COUNT and len(odd) >= _IMPLAUSIBLE_SHARE * foreign:
        first = odd[0]
        shown = excerpt(text[first:].splitlines()[0], 8)
        raise InputError(
            f"the file is not UTF-8, and read as Windows-1252 it is implausible text: "
            f"{len(odd)} of its {foreign} non-ASCII characters are "
            f"symbols no Western text holds there "
            f"(the first on this line: '{shown}'); it is in another encoding: set "
            f"format.encoding to it (e.g. cp1250, shift_jis, gb18030)",
            count_line_ends(text[:first]) + 1,
        )
    return Text(text, "cp1252")


def _decode_as(data: bytes, codec: str, label: str, skipped: int) -> Text:
    """``data`` decoded with ``codec``; ``skipped``: the bytes of a mark before it."""
    utf16 = codec.startswith("utf-16") or not _ascii_compatible(codec)
    if not utf16:
        _check_binary(data, configured=True)  # UTF-8 and Windows-1252 keep control bytes
    try:
        text = data.decode(codec)
    except UnicodeDecodeError as exc:
        bad = data[exc.start : exc.end].hex()
        raise InputError(
            f"the file is not valid {label} text: byte(s) 0x{bad} at offset "
            f"{exc.start + skipped} cannot be decoded (set format.encoding to the file's encoding)",
            _line_at(data, exc.start, codec),
        ) from None
    if utf16:
        # The binary check works on bytes; as UTF-8 the text keeps its control characters
        # and its lines, so the check and its line numbers hold.
        _check_binary(text.encode("utf-8", errors="surrogatepass"), configured=True)
    return Text(text, label)


# --------------------------------------------------------------------------- binary


def _check_binary(data: bytes, *, configured: bool) -> None:
    """Refuse bytes that are not text: UTF-16, a NUL, or too many control bytes.

    ``configured``: the file is read by an export format, whose ``encoding`` can
    be set to UTF-16; ASCII text in UTF-16 is every other byte NUL, so the
    message then says that rather than only "binary".
    """
    nul = data.find(b"\0")
    if data.startswith(_UTF32_MARKS):
        raise InputError(_UTF32_REFUSED, 1)
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        reason, offset = (
            "the file is UTF-16 text, which reads as binary here; save it as UTF-8, or set "
            "format: {encoding: utf-16} in the configuration",
            0,
        )
    elif nul >= 0:
        reason, offset = "the file looks binary, not text: it holds a NUL byte", nul
    else:
        controls = len(data) - len(data.translate(None, _CONTROL_BYTES))
        if not controls or controls <= _CONTROL_SHARE * len(data):
            return
        offset = min(i for i in (data.find(bytes([b])) for b in _CONTROL_BYTES) if i >= 0)
        reason = (
            f"the file looks binary, not text: {controls} of its {len(data)} bytes "
            f"are control characters (the first is on this line)"
        )
    if configured and data.count(0) * 3 > len(data):
        reason += "; it may be UTF-16 text without a byte-order mark (set format.encoding: utf-16)"
    raise InputError(reason, _line_at(data, offset))
