"""sd_notify: READY, WATCHDOG and STOPPING reach a real AF_UNIX datagram socket."""

from __future__ import annotations

import os
import socket
import tempfile
from collections.abc import Iterator
from pathlib import Path

import pytest
from structlog.testing import capture_logs

from calwarden.daemon.intake.notify import Notifier
from calwarden.daemon.intake.watcher import Watcher
from calwarden.daemon.settings.config import build_config, plan_watch


@pytest.fixture
def manager() -> Iterator[tuple[str, socket.socket]]:
    """A bound datagram socket standing in for the service manager (a short path: 108 bytes)."""
    folder = tempfile.mkdtemp(prefix="cw-")
    path = os.path.join(folder, "notify")
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(path)
    sock.settimeout(5.0)
    try:
        yield path, sock
    finally:
        sock.close()
        os.unlink(path)
        os.rmdir(folder)


def _received(sock: socket.socket, until: bytes) -> list[bytes]:
    messages: list[bytes] = []
    while not messages or not messages[-1].startswith(until):
        messages.append(sock.recv(4096))
    return messages


def test_without_notify_socket_nothing_is_sent() -> None:
    """No NOTIFY_SOCKET: every call is a no-op, and there is no watchdog."""
    notifier = Notifier({})
    assert not notifier.enabled and notifier.watchdog_seconds is None
    assert notifier.send("READY=1") is False
    notifier.ready()
    notifier.watchdog()
    notifier.stopping()


def test_watchdog_pings_at_half_the_interval(manager: tuple[str, socket.socket]) -> None:
    """WATCHDOG_USEC=10 s: a ping after READY only once 5 s have passed (a fake clock)."""
    path, sock = manager
    now = [100.0]
    notifier = Notifier({"NOTIFY_SOCKET": path, "WATCHDOG_USEC": "10000000"}, clock=lambda: now[0])
    assert notifier.watchdog_seconds == 5.0
    notifier.ready()
    assert sock.recv(4096).startswith(b"READY=1\n")
    now[0] = 104.9
    notifier.watchdog()  # too early: nothing sent
    now[0] = 105.0
    notifier.watchdog()
    notifier.stopping()
    assert [sock.recv(4096), sock.recv(4096)] == [b"WATCHDOG=1", b"STOPPING=1"]


def test_a_watchdog_meant_for_another_process_is_ignored(
    manager: tuple[str, socket.socket],
) -> None:
    """WATCHDOG_PID of another process: no pings from this one."""
    path, _ = manager
    env = {"NOTIFY_SOCKET": path, "WATCHDOG_USEC": "1000000", "WATCHDOG_PID": "1"}
    assert Notifier(env).watchdog_seconds is None


def test_a_socket_that_is_gone_is_logged_not_raised(tmp_path: Path) -> None:
    """A NOTIFY_SOCKET nobody listens on: send returns False and logs notify_failed."""
    with capture_logs() as events:
        assert Notifier({"NOTIFY_SOCKET": str(tmp_path / "none")}).send("READY=1") is False
    assert [e["event"] for e in events] == ["notify_failed"]


def test_the_watcher_says_ready_pings_and_says_stopping(
    manager: tuple[str, socket.socket], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A real watcher under NOTIFY_SOCKET and a 0.2 s watchdog: READY, WATCHDOG…, STOPPING."""
    path, sock = manager
    monkeypatch.setenv("NOTIFY_SOCKET", path)
    monkeypatch.setenv("WATCHDOG_USEC", "200000")
    monkeypatch.delenv("WATCHDOG_PID", raising=False)
    (tmp_path / "inbox").mkdir()
    plan = plan_watch(
        build_config({}, "test"), inbox=tmp_path / "inbox", out=tmp_path / "out", settle_seconds=0.1
    )
    with capture_logs():
        watcher = Watcher(plan)
        watcher.start()
        try:
            assert sock.recv(4096).startswith(b"READY=1")
            assert _received(sock, b"WATCHDOG=1")[-1] == b"WATCHDOG=1"
            assert _received(sock, b"WATCHDOG=1")[-1] == b"WATCHDOG=1"  # and again
        finally:
            watcher.stop()
        assert _received(sock, b"STOPPING=1")[-1] == b"STOPPING=1"
        assert watcher.wait(10.0)
