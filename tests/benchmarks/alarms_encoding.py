"""How often ``encoding: auto`` refuses text it would misread, and text it would read right.

    python tests/benchmarks/alarms_encoding.py [--files 2000]

Writes seeded invented exports (a header and 5–40 rows whose sample ids are
words of 3–10 letters drawn from one language's alphabet, with Western units
and signs in other cells) in a code page, and decodes their bytes with
``encoding: auto``. Detection: the share of non-Western files refused (an
``InputError`` naming ``format.encoding``) instead of read as Windows-1252
nonsense. False alarms: the share of Windows-1252 (Western) files refused.
The alphabets are the letters of each language; real words are more regular,
so the figures are for words of random letters, not for any lab's exports.
"""

from __future__ import annotations

import argparse
import random
import sys
from pathlib import Path

PROJECT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(PROJECT))

from calwarden.daemon.parsing.decode import decode  # noqa: E402
from calwarden.rules.errors import InputError  # noqa: E402

ASCII = "abcdefghijklmnopqrstuvwxyz"
#: language: (code page, the letters its words are drawn from, with ASCII ones)
LANGUAGES = {
    "western (false alarms)": ("cp1252", ASCII * 6 + "äöüßéèêàçñóúíãõâôœæøåÄÖÜÉ"),
    "polish": ("cp1250", ASCII * 4 + "ąćęłńóśźżĄĆĘŁŃÓŚŹŻ"),
    "czech": ("cp1250", ASCII * 4 + "áčďéěíňóřšťúůýžČŘŠŽ"),
    "hungarian": ("cp1250", ASCII * 4 + "áéíóöőúüűÁÉŐŰ"),
    "russian": ("cp1251", "абвгдеёжзийклмнопрстуфхцчшщъыьэюя"),
    "greek": ("cp1253", "αβγδεζηθικλμνξοπρστυφχψω"),
    "japanese": ("shift_jis", "試料標準空河川水海土壌分析検査サンプルブランクアイウエオ"),
    "chinese": ("gb18030", "空白标准水样土壤河流分析检测样品试剂溶液"),
}
UNITS = ("µg/L", "mg/kg", "°C", "±0.5", "mg/m³", "µS/cm")


def encodable(text: str, codec: str) -> bool:
    try:
        text.encode(codec)
    except UnicodeEncodeError:
        return False
    return True


def export(rng: random.Random, letters: str, codec: str) -> str:
    """An invented export: words of the language as sample ids, units its code page has."""
    units = [unit for unit in UNITS if encodable(unit, codec)]
    degrees = "at 25 °C" if encodable("°", codec) else "at 25 C"
    rows = ["seq,sample_id,kind,analyte,response,unit,comment"]
    for seq in range(1, rng.randint(5, 40) + 1):
        word = "".join(rng.choice(letters) for _ in range(rng.randint(3, 10)))
        unit = rng.choice(units)
        rows.append(f"{seq},{word}-{seq},sample,Pb,{rng.uniform(10, 1e5):.1f},{unit},{degrees}")
    return "\n".join(rows) + "\n"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=2000, help="files per language")
    args = parser.parse_args()
    print(f"{'language':<24} {'code page':<10} {'refused':>8}   (of {args.files} files each)")
    for index, (language, (codec, letters)) in enumerate(LANGUAGES.items()):
        rng = random.Random(1000 + index)
        refused = 0
        for _ in range(args.files):
            try:
                decode(export(rng, letters, codec).encode(codec), "auto")
            except InputError as error:
                assert "format.encoding" in str(error)
                refused += 1
        print(f"{language:<24} {codec:<10} {100 * refused / args.files:7.1f} %")


if __name__ == "__main__":
    main()
