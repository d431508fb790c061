"""The house: rules/ imports no shell and no I/O; the packaging matches the folders."""

from __future__ import annotations

import ast
import re
import tomllib
from pathlib import Path

import pytest

PROJECT = Path(__file__).resolve().parent.parent
RULES = PROJECT / "rules"
#: Top-level modules whose use would give the core files, network, clock, processes or logging.
FORBIDDEN = {
    "daemon", "os", "io", "pathlib", "shutil", "socket", "subprocess", "logging", "structlog",
    "time", "tempfile", "sqlite3", "urllib", "http", "smtplib", "threading", "watchdog", "yaml",
    "glob", "sys", "asyncio", "psycopg",
}  # fmt: skip
#: Dotted prefixes the core may never import, however they are spelt.
FORBIDDEN_PREFIXES = ("calwarden.daemon",)
FORBIDDEN_CALLS = {"open", "print", "input"}


def _core_files() -> list[Path]:
    return sorted(RULES.rglob("*.py"))


def _package_of(path: Path) -> str:
    """The dotted package a core file lives in, as installed (calwarden.rules...)."""
    parts = path.relative_to(PROJECT).with_suffix("").parts
    package = parts if path.name == "__init__.py" else parts[:-1]
    if path.name == "__init__.py":
        package = package[:-1]
    return ".".join(("calwarden", *package))


def _absolute(path: Path, node: ast.ImportFrom) -> str:
    """The absolute module name of a `from ... import`, relative imports resolved."""
    if node.level == 0:
        return node.module or ""
    base = _package_of(path).split(".")
    base = base[: len(base) - (node.level - 1)]
    return ".".join([*base, *([node.module] if node.module else [])])


def _imported(path: Path, tree: ast.AST) -> set[str]:
    """Every dotted module name a file imports, and every dotted prefix of it."""
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            modules = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            module = _absolute(path, node)
            modules = [module, *(f"{module}.{alias.name}" for alias in node.names)]
        else:
            continue
        for module in modules:
            parts = module.split(".")
            names.update(".".join(parts[: i + 1]) for i in range(len(parts)))
    return names


@pytest.mark.parametrize("path", _core_files(), ids=lambda p: str(p.relative_to(RULES)))
def test_core_module_imports_no_shell_or_io(path: Path) -> None:
    """A rules/ module imports neither the shell nor an I/O, clock or logging module."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    imported = _imported(path, tree)
    assert not (imported & FORBIDDEN)
    assert not [name for name in imported if name.startswith(FORBIDDEN_PREFIXES)]


def test_relative_imports_are_resolved() -> None:
    """The import check sees through relative imports, so `from ..daemon` cannot slip by."""
    path = RULES / "acceptance" / "blanks.py"
    tree = ast.parse("from ...daemon.stores import ledger\nfrom . import common\n")
    imported = _imported(path, tree)
    assert "calwarden.daemon.stores.ledger" in imported
    assert "calwarden.rules.acceptance.common" in imported


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


def test_every_folder_is_an_installed_package() -> None:
    """pyproject.toml lists exactly the package folders under daemon/ and rules/."""
    listed = set(
        tomllib.loads((PROJECT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"]
    )
    folders = {
        ".".join(("calwarden", *init.parent.relative_to(PROJECT).parts))
        for top in ("daemon", "rules")
        for init in (PROJECT / top).rglob("__init__.py")
    }
    assert listed == folders


#: The modules that know a ledger's engine (SQLite, PostgreSQL); see DEVELOPERS.md.
ENGINE_MODULES = {
    "sqlite3": PROJECT / "daemon" / "stores" / "engine_sqlite.py",
    "psycopg": PROJECT / "daemon" / "stores" / "engine_postgres.py",
}


@pytest.mark.parametrize(
    "path",
    sorted((PROJECT / "daemon").rglob("*.py")),
    ids=lambda p: str(p.relative_to(PROJECT)),
)
def test_only_the_engine_modules_import_the_database_drivers(path: Path) -> None:
    """Only daemon/stores/engine_sqlite.py imports sqlite3, only engine_postgres.py psycopg."""
    imported = _imported(path, ast.parse(path.read_text(encoding="utf-8")))
    for driver, engine_module in ENGINE_MODULES.items():
        if path != engine_module:
            assert not any(name == driver or name.startswith(driver + ".") for name in imported)


_SQL = re.compile(r"\b(SELECT\s.+\sFROM|INSERT\s+INTO|UPDATE\s+\w+\s+SET|DELETE\s+FROM)\b")


@pytest.mark.parametrize(
    "path",
    sorted(p for p in (PROJECT / "daemon").rglob("*.py") if p.parent.name != "stores"),
    ids=lambda p: str(p.relative_to(PROJECT)),
)
def test_no_sql_outside_the_stores(path: Path) -> None:
    """No daemon module outside daemon/stores/ holds a SQL statement in a string."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    texts = [
        node.value
        for node in ast.walk(tree)
        if isinstance(node, ast.Constant) and isinstance(node.value, str)
    ]
    assert not [text for text in texts if _SQL.search(text)]
