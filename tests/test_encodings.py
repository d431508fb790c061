"""Export encodings: any codec Python knows, and ``auto`` refusing text it would misread."""

from __future__ import annotations

import pytest

from calwarden.daemon.parsing.decode import decode, implausible_characters
from calwarden.daemon.parsing.exports import export_table
from calwarden.daemon.parsing.native import normalise
from calwarden.daemon.settings.config import build_config
from calwarden.daemon.settings.formats import ExportFormat
from calwarden.rules.errors import ConfigError, InputError

HEADER = "seq,sample_id,kind,analyte,response,nominal\n"
# An invented export's sample names in four scripts; the bytes are Python's own codecs'.
CHINESE = HEADER + "1,空白-0,blank,Pb,12,\n2,标准-1,cal,Pb,1012,10\n3,水样-3,sample,Pb,505,\n"
JAPANESE = (
    HEADER + "1,空試料,blank,Pb,12,\n2,標準1,cal,Pb,1012,10\n3,河川水サンプル,sample,Pb,505,\n"
)
POLISH = (
    HEADER
    + "1,Próbka ślepa,blank,Pb,12,\n2,Wzorzec łąka,cal,Pb,1012,10\n3,Woda żółta,sample,Pb,505,\n"
)
RUSSIAN = (
    HEADER + "1,Холостая проба,blank,Pb,12,\n2,Стандарт,cal,Pb,1012,10\n3,Вода,sample,Pb,505,\n"
)
WESTERN = (
    "seq,sample_id,kind,analyte,response,nominal,unit\n"
    "1,Müller Blindwert,blank,Pb,12,,µg/L\n"
    "2,Solução padrão ±0.5 °C,cal,Pb,1012,10,mg/m³\n"
    "3,Échantillon d’eau «rivière»,sample,Pb,505,,µg/L\n"
)


def sample_ids(data: bytes, encoding: str) -> list[str]:
    """The sample ids an export gives, read with ``format.encoding: <encoding>``."""
    table, _ = export_table(data, ExportFormat(encoding=encoding), source="test")
    return [reading.sample_id for reading in normalise(table).readings]


@pytest.mark.parametrize(
    ("text", "codec"), [(CHINESE, "gb18030"), (JAPANESE, "shift_jis"), (POLISH, "cp1250")]
)
def test_a_configured_codec_reads_the_text_as_written(text: str, codec: str) -> None:
    """format.encoding takes any codec Python knows and reads its bytes as written."""
    assert sample_ids(text.encode(codec), codec)[0] == text.splitlines()[1].split(",")[1]


def test_an_unknown_encoding_is_refused_at_load_with_a_suggestion() -> None:
    """A misspelt encoding is a ConfigError naming the key, with the nearest codec's name."""
    with pytest.raises(ConfigError, match=r"format\.encoding: .*did you mean shift-jis\?"):
        build_config({"format": {"encoding": "shift-jsi"}}, "calwarden.yaml")


def test_a_bytes_to_bytes_codec_is_no_encoding() -> None:
    """base64 is a codec Python knows but not a text encoding: refused at load."""
    with pytest.raises(ConfigError, match="not a text encoding"):
        build_config({"format": {"encoding": "base64"}}, "calwarden.yaml")


@pytest.mark.parametrize(
    ("text", "codec"), [(CHINESE, "gb18030"), (POLISH, "cp1250"), (RUSSIAN, "cp1251")]
)
def test_auto_refuses_a_foreign_code_page_read_as_windows_1252(text: str, codec: str) -> None:
    """auto does not judge GB18030, Central-European or Cyrillic bytes as Windows-1252 nonsense."""
    with pytest.raises(InputError, match=r"implausible.*set format\.encoding") as caught:
        decode(text.encode(codec), "auto")
    assert caught.value.line is not None and caught.value.line >= 2


def test_auto_names_the_setting_when_windows_1252_cannot_decode() -> None:
    """Shift-JIS bytes Windows-1252 leaves undefined are an error pointing at format.encoding."""
    with pytest.raises(InputError, match=r"set format\.encoding"):
        decode(JAPANESE.encode("shift_jis"), "auto")


def test_auto_still_reads_western_text_with_units_and_accents() -> None:
    """Windows-1252 text with accents, units and typographic quotes reads as written."""
    assert decode(WESTERN.encode("cp1252"), "auto").text == WESTERN


def test_implausible_counts_symbols_strung_together_not_lone_units() -> None:
    """'°' beside ASCII is plausible; '¿Õ°×' has three implausible characters, and 'ïðîáà' five."""
    assert implausible_characters("25 °C, ±0.5 µg/L") == []
    assert implausible_characters("1,¿Õ°×-0") == [2, 4, 5]
    assert implausible_characters("1,ïðîáà") == [2, 3, 4, 5, 6]


def test_utf32_reads_when_configured() -> None:
    """A codec that is not ASCII-compatible (UTF-32) is checked for binary on its text."""
    assert decode(HEADER.encode("utf-32"), "utf-32").text == HEADER


def test_the_native_utf8_refusal_says_which_key_reads_the_file() -> None:
    """Windows-1252 bytes in a native file: the message names format: {encoding: cp1252}."""
    with pytest.raises(InputError) as caught:
        decode(WESTERN.encode("cp1252"))
    assert "not valid UTF-8" in caught.value.reason
    assert "format: {encoding: cp1252}" in caught.value.reason
    # The key the message names reads the same bytes as written.
    assert decode(WESTERN.encode("cp1252"), "cp1252").text == WESTERN
