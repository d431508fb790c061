"""The parsing stages: one line count for every stage, public names only between them."""

from __future__ import annotations

import ast
from pathlib import Path

from hypothesis import given, settings
from hypothesis import strategies as st

from calwarden.daemon.parsing.decode import count_line_ends
from calwarden.daemon.parsing.table import physical_lines, split_rows

PARSING = Path(__file__).resolve().parent.parent / "daemon" / "parsing"


def _imports(path: Path) -> list[tuple[str, str]]:
    """(module, name) of each ``from module import name`` in a module."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    return [
        (node.module or "", alias.name)
        for node in ast.walk(tree)
        if isinstance(node, ast.ImportFrom)
        for alias in node.names
    ]


def test_parsing_modules_import_no_private_names() -> None:
    """No parsing module reaches into another calwarden module's private names."""
    private = [
        f"{path.name}: {module}.{name}"
        for path in sorted(PARSING.glob("*.py"))
        for module, name in _imports(path)
        if module.startswith("calwarden") and name.startswith("_")
    ]
    assert private == []


def test_only_the_table_stage_splits_csv() -> None:
    """table.py is the one parsing module that imports the csv module."""
    importers = sorted(
        path.name
        for path in PARSING.glob("*.py")
        if any(
            isinstance(node, ast.Import) and any(a.name == "csv" for a in node.names)
            for node in ast.walk(ast.parse(path.read_text(encoding="utf-8")))
        )
    )
    assert importers == ["table.py"]


@settings(max_examples=300, derandomize=True)
@given(st.text(alphabet="a,\r\n", max_size=40))
def test_every_stage_counts_lines_alike(text: str) -> None:
    """The line counter, the physical lines and the CSV rows agree on every line number."""
    lines = count_line_ends(text) + (1 if text and not text.endswith(("\n", "\r")) else 0)
    assert [number for number, _, _ in physical_lines(text)] == list(range(1, lines + 1))
    rows = list(split_rows(text))
    assert [(start, end) for start, end, _ in rows] == [(n, n) for n in range(1, lines + 1)]
