"""Telling a service manager how the daemon is: the sd_notify protocol, standard library only.

Under systemd with ``Type=notify``, the manager passes ``NOTIFY_SOCKET`` (a path,
or ``@name`` in the abstract namespace) and, with ``WatchdogSec=``,
``WATCHDOG_USEC`` (and ``WATCHDOG_PID``). The daemon sends one datagram per
state: ``READY=1`` once it watches, ``WATCHDOG=1`` from the worker's loop at half
the watchdog interval (systemd's own advice in sd_watchdog_enabled(3)), so that a
worker that hangs is restarted, and ``STOPPING=1`` when it stops. Without
``NOTIFY_SOCKET`` every call does nothing, so the daemon runs the same anywhere
else. A message that cannot be sent is logged, never raised: telling the manager
is never worth stopping the daemon for.
"""

from __future__ import annotations

import math
import os
import socket
import time
from collections.abc import Callable, Mapping

import structlog

log = structlog.get_logger("calwarden")


class Notifier:
    """Sends READY, WATCHDOG and STOPPING to the service manager, when there is one."""

    def __init__(
        self,
        environ: Mapping[str, str] | None = None,
        *,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        env = os.environ if environ is None else environ
        address = env.get("NOTIFY_SOCKET") or None
        if address is not None and address.startswith("@"):
            address = "\0" + address[1:]  # the abstract namespace
        self._address = address
        self._clock = clock
        self._last_ping = -math.inf
        self.watchdog_seconds: float | None = None  # between pings: half the interval
        usec, pid = env.get("WATCHDOG_USEC"), env.get("WATCHDOG_PID")
        ours = pid is None or (pid.isdigit() and int(pid) == os.getpid())
        if address is not None and usec and usec.isdigit() and int(usec) > 0 and ours:
            self.watchdog_seconds = int(usec) / 2_000_000

    @property
    def enabled(self) -> bool:
        return self._address is not None

    def send(self, message: str) -> bool:
        """One datagram to the manager; True if it was sent."""
        if self._address is None:
            return False
        try:
            with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
                sock.connect(self._address)
                sock.sendall(message.encode("utf-8"))
        except OSError as error:
            log.warning("notify_failed", message=message.split("\n")[0], error=str(error))
            return False
        return True

    def ready(self) -> None:
        """The daemon watches its inboxes."""
        if self.send("READY=1\nSTATUS=watching the inboxes"):
            self._last_ping = self._clock()

    def watchdog(self) -> None:
        """Called from the worker's loop: a ping once half the watchdog interval has passed."""
        if self.watchdog_seconds is None:
            return
        now = self._clock()
        if now - self._last_ping >= self.watchdog_seconds and self.send("WATCHDOG=1"):
            self._last_ping = now

    def stopping(self) -> None:
        """The daemon is stopping (a restart by the watchdog is not wanted now)."""
        self.send("STOPPING=1")
