"""The wheel installs beside distributions that own the top-level names `daemon` and `rules`."""

from __future__ import annotations

import base64
import hashlib
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from collections.abc import Mapping
from pathlib import Path

import pytest

PROJECT = Path(__file__).resolve().parent.parent
FIXTURES = PROJECT / "fixtures"

#: Stand-ins for two unrelated distributions on the public index: one installs a top-level
#: `daemon` package (as a process-daemonising library does), one a top-level `rules` package.
STAND_INS: Mapping[str, Mapping[str, str]] = {
    "standin_daemon": {
        "daemon/__init__.py": "class DaemonContext:\n    kind = 'stand-in'\n",
    },
    "standin_rules": {
        "rules/__init__.py": "def add_rule(name):\n    return f'stand-in {name}'\n",
    },
}


def _record_line(name: str, data: bytes) -> str:
    digest = base64.urlsafe_b64encode(hashlib.sha256(data).digest()).rstrip(b"=").decode()
    return f"{name},sha256={digest},{len(data)}"


def _stand_in_wheel(folder: Path, distribution: str, files: Mapping[str, str]) -> Path:
    """A minimal, valid wheel (PEP 427) holding ``files``, so pip installs and uninstalls it."""
    info = f"{distribution}-1.0.dist-info"
    contents = {name: text.encode() for name, text in files.items()}
    contents[f"{info}/METADATA"] = (
        f"Metadata-Version: 2.1\nName: {distribution}\nVersion: 1.0\n".encode()
    )
    contents[f"{info}/WHEEL"] = (
        b"Wheel-Version: 1.0\nGenerator: calwarden-tests\n"
        b"Root-Is-Purelib: true\nTag: py3-none-any\n"
    )
    record = [_record_line(name, data) for name, data in contents.items()]
    contents[f"{info}/RECORD"] = ("\n".join([*record, f"{info}/RECORD,,"]) + "\n").encode()
    path = folder / f"{distribution}-1.0-py3-none-any.whl"
    with zipfile.ZipFile(path, "w") as archive:
        for name, data in contents.items():
            archive.writestr(name, data)
    return path


def _build_calwarden_wheel(folder: Path) -> Path:
    """calwarden's own wheel, built by pip from a copy of the sources (not the working tree)."""
    source = folder / "source"
    source.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(PROJECT / name, source / name)
    for name in ("daemon", "rules"):
        shutil.copytree(PROJECT / name, source / name, ignore=shutil.ignore_patterns("__pycache__"))
    built = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "-w", str(folder), str(source)],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert built.returncode == 0, built.stdout + built.stderr
    (wheel,) = folder.glob("calwarden-*.whl")
    return wheel


def _pip(venv: Path) -> list[str]:
    """This environment's pip, installing into ``venv`` (which has no pip of its own)."""
    return [sys.executable, "-m", "pip", "--python", str(venv / "bin" / "python")]


@pytest.fixture(scope="module")
def fresh_venv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A new venv holding the stand-ins and calwarden's wheel; its dependencies come from ours."""
    folder = tmp_path_factory.mktemp("packaging")
    venv = folder / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True)
    python = venv / "bin" / "python"
    site = Path(
        subprocess.run(
            [str(python), "-c", "import sysconfig; print(sysconfig.get_path('purelib'))"],
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
    )
    # numpy, scipy, pydantic … from this test environment, as a plain path entry: the .pth
    # files there (the editable install of calwarden among them) are not run from it.
    (site / "dependencies.pth").write_text(sysconfig.get_path("purelib") + "\n")
    wheels = [_stand_in_wheel(folder, name, files) for name, files in STAND_INS.items()]
    wheels.append(_build_calwarden_wheel(folder))
    installed = subprocess.run(
        [*_pip(venv), "install", "-q", "--no-deps", *map(str, wheels)],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert installed.returncode == 0, installed.stdout + installed.stderr
    return venv


def _python(venv: Path, *args: str) -> subprocess.CompletedProcess[str]:
    """Run the venv's Python away from the project, so nothing is imported from the checkout."""
    return subprocess.run(
        [str(venv / "bin" / "python"), *args],
        cwd=venv,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


@pytest.mark.slow
def test_stand_ins_and_calwarden_all_import(fresh_venv: Path) -> None:
    """Beside calwarden, the stand-in `daemon` and `rules` packages import as their own."""
    script = (
        "from daemon import DaemonContext\n"
        "from rules import add_rule\n"
        "import calwarden.daemon.cli.main, calwarden.rules.evaluate\n"
        "print(DaemonContext.kind, add_rule('x'), calwarden.rules.evaluate.__name__)\n"
    )
    done = _python(fresh_venv, "-c", script)
    assert done.returncode == 0, done.stderr
    assert done.stdout.split() == ["stand-in", "stand-in", "x", "calwarden.rules.evaluate"]


@pytest.mark.slow
def test_installed_wheel_judges_a_run(fresh_venv: Path) -> None:
    """`python -m calwarden.daemon check` from the wheel judges a fixture as the checkout does."""
    done = _python(
        fresh_venv, "-m", "calwarden.daemon", "check", str(FIXTURES / "bwl-metals-pass.csv")
    )
    assert done.returncode == 0, done.stdout + done.stderr
    assert "PASS" in done.stdout.upper()


@pytest.mark.slow
def test_uninstalling_a_stand_in_leaves_calwarden_whole(fresh_venv: Path) -> None:
    """Removing the stand-in `daemon` distribution deletes none of calwarden's files."""
    removed = subprocess.run(
        [*_pip(fresh_venv), "uninstall", "-y", "-q", "standin_daemon"],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert removed.returncode == 0, removed.stdout + removed.stderr
    done = _python(fresh_venv, "-c", "import calwarden.daemon.cli.main; import daemon")
    assert "No module named 'daemon'" in done.stderr
    assert "calwarden" not in done.stderr.split("No module named")[0]
