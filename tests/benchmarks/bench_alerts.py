"""Benchmark of the alert path (a script, not a test: timings never gate the suite).

    python tests/benchmarks/bench_alerts.py [--files 30] [--burst 200] [--settle 0.2]

1. Latency: failing runs (the failing metals fixture, each with its own run name)
   dropped one at a time into the inbox of an in-process Watcher whose alerts go to
   a real SMTP server (aiosmtpd) on a loopback port. For each: recorded verdict →
   message accepted by the server, and file written → message accepted; p50, p95,
   max. Target (common practice for "the moment it lands"): the alert within a
   second of the verdict.
2. Burst: that many failing runs already in the inbox at start, default throttle
   (5 per 10 minutes): how many messages reach the server while they are judged,
   and the time to judge them all, against the same burst with alerts switched off.
"""

from __future__ import annotations

import argparse
import socket
import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

from aiosmtpd.controller import Controller
from aiosmtpd.smtp import SMTP, Envelope, Session

PROJECT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(PROJECT))

from calwarden.daemon.intake.accept import Outcome  # noqa: E402
from calwarden.daemon.intake.watcher import Watcher  # noqa: E402
from calwarden.daemon.settings.config import build_config, plan_watch  # noqa: E402

FAILING = (PROJECT / "fixtures" / "bwl-metals-fail.csv").read_text(encoding="utf-8")
FAILING_RUN = "BWL-ICPMS-2-20261124-A"


class Timestamps:
    """An SMTP handler noting when each run's message was accepted."""

    def __init__(self) -> None:
        self.accepted: dict[str, float] = {}
        self.count = 0
        self.lock = threading.Lock()

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        now = time.monotonic()
        content = (envelope.original_content or b"").decode("utf-8", "replace")
        with self.lock:
            self.count += 1
            for line in content.splitlines():
                if line.startswith("Subject:"):
                    self.accepted[line] = now
        return "250 OK"


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port: int = probe.getsockname()[1]
    return port


def run_file(number: int) -> tuple[str, bytes]:
    run = f"BWL-ICPMS-2-20261124-B{number:04d}"
    return run, FAILING.replace(FAILING_RUN, run).encode("utf-8")


def percentile(values: list[float], share: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, round(share * (len(ordered) - 1)))]


def plan_for(root: Path, port: int, settle: float, alerts: dict[str, Any]) -> Any:
    inbox = root / "inbox"
    inbox.mkdir(exist_ok=True)
    config = build_config(
        {
            "control": {"charts": False},
            "alerts": {
                "email": {
                    "host": "127.0.0.1",
                    "port": port,
                    "security": "none",
                    "to": ["analyst@brindlewick.example"],
                },
                **alerts,
            },
        },
        "bench",
    )
    return plan_watch(config, inbox=inbox, out=root / "out", settle_seconds=settle)


def latency(files: int, settle: float) -> None:
    handler, port = Timestamps(), free_port()
    controller = Controller(handler, hostname="127.0.0.1", port=port)
    controller.start()
    recorded: dict[str, float] = {}
    written: dict[str, float] = {}

    def noted(outcome: Outcome) -> None:
        if outcome.run:
            recorded[outcome.run] = time.monotonic()

    with tempfile.TemporaryDirectory() as folder:
        plan = plan_for(Path(folder), port, settle, {"throttle": {"max_messages": 1000}})
        watcher = Watcher(plan, on_outcome=noted)
        watcher.start()
        try:
            for number in range(files):
                run, data = run_file(number)
                (plan.inboxes[0].path / f"{run}.csv").write_bytes(data)
                written[run] = time.monotonic()
                deadline = time.monotonic() + 30
                while time.monotonic() < deadline:
                    if any(run in subject for subject in list(handler.accepted)):
                        break
                    time.sleep(0.005)
        finally:
            watcher.stop()
            controller.stop()
    after_verdict, after_write = [], []
    for subject, accepted in handler.accepted.items():
        run = next((r for r in recorded if r in subject), None)
        if run is None:
            continue
        after_verdict.append((accepted - recorded[run]) * 1000)
        after_write.append((accepted - written[run]) * 1000)
    for label, values in (
        ("verdict recorded -> message accepted", after_verdict),
        (f"file written -> message accepted (settle {settle:g} s)", after_write),
    ):
        print(
            f"{label}: n={len(values)} p50 {statistics.median(values):.0f} ms, "
            f"p95 {percentile(values, 0.95):.0f} ms, max {max(values):.0f} ms"
        )


def burst(files: int, settle: float, enabled: bool) -> None:
    handler, port = Timestamps(), free_port()
    controller = Controller(handler, hostname="127.0.0.1", port=port)
    controller.start()
    judged = [0]

    def noted(outcome: Outcome) -> None:
        judged[0] += 1

    with tempfile.TemporaryDirectory() as folder:
        plan = plan_for(Path(folder), port, settle, {"enabled": enabled})
        for number in range(files):
            run, data = run_file(number)
            (plan.inboxes[0].path / f"{run}.csv").write_bytes(data)
        watcher = Watcher(plan, on_outcome=noted)
        started = time.monotonic()
        watcher.start()
        try:
            while judged[0] < files and time.monotonic() - started < 600:
                time.sleep(0.01)
            elapsed = time.monotonic() - started - settle
            if watcher.sender is not None:
                watcher.sender.wait_settled(10)
        finally:
            watcher.stop()
            controller.stop()
    label = "alerts on " if enabled else "alerts off"
    print(
        f"burst of {files} failing runs, {label}: judged in {elapsed:.1f} s "
        f"({files / elapsed:.0f} files/s), messages sent {handler.count}"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=30)
    parser.add_argument("--burst", type=int, default=200)
    parser.add_argument("--settle", type=float, default=0.2)
    args = parser.parse_args()
    import structlog

    structlog.configure(logger_factory=structlog.ReturnLoggerFactory())  # quiet
    latency(args.files, args.settle)
    burst(args.burst, args.settle, enabled=True)
    burst(args.burst, args.settle, enabled=False)


if __name__ == "__main__":
    main()
