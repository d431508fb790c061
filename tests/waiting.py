"""Waiting for a condition with a deadline, for the tests of threads and processes.

A fixed sleep is either too short on a loaded machine or needlessly long on a
quiet one; polling a condition is neither. (pytest puts this folder on the import
path, so test files say ``from waiting import wait_for``.)
"""

from __future__ import annotations

import time
from collections.abc import Callable

DEADLINE = 15.0  # seconds: generous, for a loaded 2-core machine


def wait_for(predicate: Callable[[], object], timeout: float = DEADLINE, what: str = "") -> None:
    """Poll ``predicate`` every 20 ms until it is true; fail the test after ``timeout``."""
    deadline = time.monotonic() + timeout
    while not predicate():
        if time.monotonic() > deadline:
            raise AssertionError(f"not within {timeout:g} s: {what or predicate}")
        time.sleep(0.02)
