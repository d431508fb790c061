"""Shared test set-up: every test must leave no thread running behind it."""

from __future__ import annotations

import threading
from collections.abc import Iterator, MutableMapping
from pathlib import Path
from typing import Any

import pytest
from mail_server import Recorder, free_port
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
