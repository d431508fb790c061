"""Lint, format and strict typing run as tests, so CI's one test line covers them."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

PROJECT = Path(__file__).resolve().parent.parent


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", *args], cwd=PROJECT, capture_output=True, text=True, check=False
    )


def test_ruff_lint_is_clean() -> None:
    """ruff finds nothing to complain about in the project."""
    result = _run("ruff", "check", "--no-cache", ".")
    assert result.returncode == 0, result.stdout + result.stderr


def test_ruff_format_is_clean() -> None:
    """Every file is formatted as ruff formats it."""
    result = _run("ruff", "format", "--check", "--no-cache", ".")
    assert result.returncode == 0, result.stdout + result.stderr


def test_mypy_strict_on_core_and_shell(tmp_path: Path) -> None:
    """calwarden.rules and calwarden.daemon type-check under mypy --strict."""
    # mypy cannot follow the editable install's import hook, so it reads the two
    # folders through a tree of links shaped as they install.
    package = tmp_path / "calwarden"
    package.mkdir()
    for folder in ("daemon", "rules"):
        (package / folder).symlink_to(PROJECT / folder, target_is_directory=True)
    result = subprocess.run(
        [
            sys.executable, "-m", "mypy", "--strict", "--no-incremental",
            "--cache-dir", "/dev/null", "--config-file", str(PROJECT / "pyproject.toml"),
            "-p", "calwarden.daemon", "-p", "calwarden.rules",
        ],
        cwd=tmp_path, capture_output=True, text=True, check=False,
    )  # fmt: skip
    assert result.returncode == 0, result.stdout + result.stderr
