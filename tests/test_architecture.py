"""The core stays pure: rules/ never imports the shell, nor anything that does I/O."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

RULES = Path(__file__).resolve().parent.parent / "rules"
#: Modules whose use would give the core files, network, clock, processes or logging.
FORBIDDEN = {
    "daemon", "os", "io", "pathlib", "shutil", "socket", "subprocess", "logging", "structlog",
    "time", "tempfile", "sqlite3", "urllib", "http", "smtplib", "threading", "watchdog", "yaml",
    "glob", "sys",
}  # fmt: skip
FORBIDDEN_CALLS = {"open", "print", "input"}


def _core_files() -> list[Path]:
    return sorted(RULES.rglob("*.py"))


def _imported(tree: ast.AST) -> set[str]:
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module.split(".")[0])
    return names


@pytest.mark.parametrize("path", _core_files(), ids=lambda p: str(p.relative_to(RULES)))
def test_core_module_imports_no_shell_or_io(path: Path) -> None:
    """A rules/ module imports neither daemon nor an I/O, clock or logging module."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    assert not (_imported(tree) & FORBIDDEN)


@pytest.mark.parametrize("path", _core_files(), ids=lambda p: str(p.relative_to(RULES)))
def test_core_module_calls_no_io_builtin(path: Path) -> None:
    """A rules/ module never calls open(), print() or input()."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    called = {
        node.func.id
        for node in ast.walk(tree)
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name)
    }
    assert not (called & FORBIDDEN_CALLS)
