"""Shared test set-up: every test must leave no thread running behind it."""

from __future__ import annotations

import threading
from collections.abc import Iterator, MutableMapping
from contextlib import suppress
from pathlib import Path
from typing import Any

import pytest
from mail_server import Recorder, free_port
from pg_server import Server, binaries
from structlog.testing import capture_logs

PROJECT = Path(__file__).resolve().parent.parent
FIXTURES = PROJECT / "fixtures"


@pytest.fixture(autouse=True)
def no_leaked_threads() -> Iterator[None]:
    """Fail a test that leaves a thread running (a watcher or sender not stopped)."""
    before = set(threading.enumerate())
    yield
    leaked = [t for t in threading.enumerate() if t not in before and t.is_alive()]
    for thread in leaked:
        thread.join(timeout=2)
    still = [t.name for t in leaked if t.is_alive()]
    assert not still, f"threads left running: {still}"


@pytest.fixture
def loopback_smtp() -> Iterator[tuple[Recorder, int]]:
    """A real SMTP server (aiosmtpd) on a free loopback port, accepting every message."""
    from aiosmtpd.controller import Controller

    handler, port = Recorder(), free_port()
    controller = Controller(handler, hostname="127.0.0.1", port=port)
    controller.start()
    try:
        yield handler, port
    finally:
        controller.stop()


@pytest.fixture
def events() -> Iterator[list[MutableMapping[str, Any]]]:
    """Every structlog event logged during the test (by any thread)."""
    with capture_logs() as captured:
        yield captured


@pytest.fixture
def inbox(tmp_path: Path) -> Path:
    """An empty inbox folder for a watcher."""
    folder = tmp_path / "inbox"
    folder.mkdir()
    return folder


@pytest.fixture
def out(tmp_path: Path) -> Path:
    """An empty output folder for a watcher."""
    folder = tmp_path / "out"
    folder.mkdir()
    return folder


@pytest.fixture(scope="session")
def pg_server() -> Iterator[Server]:
    """A throw-away PostgreSQL server for the whole session (tests/pg_server.py), then stopped."""
    bin_dir = binaries()
    if bin_dir is None:
        pytest.skip("Debian's PostgreSQL is not installed (.ci/run installs it)")
    pytest.importorskip("psycopg", reason="the postgresql extra is not installed")
    server = Server(bin_dir)
    try:
        server.start()
        yield server
    finally:
        with suppress(RuntimeError):  # not running: a test stopped it and failed before restarting
            server.stop()
        server.remove()


@pytest.fixture(params=["sqlite", "postgresql"])
def store(request: pytest.FixtureRequest) -> Any:
    """Where a test's ledger lives: a SQLite file in the state folder, or a fresh database on
    the session's PostgreSQL server (a StoreSettings)."""
    from calwarden.daemon.settings.store import StoreSettings

    if request.param == "sqlite":
        return StoreSettings()
    server: Server = request.getfixturevalue("pg_server")
    return StoreSettings(url=server.new_database(), retry_seconds=0.2)
