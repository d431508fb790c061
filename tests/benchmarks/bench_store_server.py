"""Benchmark: four daemons sharing one PostgreSQL ledger (a script, not a test).

    python tests/benchmarks/bench_store_server.py [--files 500] [--daemons 4] [--settle 0.2]

Starts a throw-away PostgreSQL server (Debian's binaries, as the tests do:
tests/pg_server.py) and a real SMTP server on a loopback port, then:

1. the floor, measured in the same run: one `calwarden watch` on its own SQLite
   ledger clearing a backlog of N typical runs (the demo's metals runs, each copy's
   run renamed so that every file is judged);
2. four `calwarden watch` processes (each its own inbox, instrument, output and
   state folder) sharing one database on the server, started together, each
   clearing its own backlog of N such runs.

Throughput is files judged per second from a daemon's start to its last judged
file (polled in the ledger every 0.1 s), for each daemon and in total (all files
over the time until the last daemon finished). Then the alerts: every failed run
raises one, and every alert must reach the SMTP server exactly once, whichever
daemon's sender took it (Message-IDs counted). Every file must be judged exactly
once (one ledger row per file, one verdict file). Pictures and inline charts are
off (they measure matplotlib, not the store); the throttle allows 1000 messages.
"""

from __future__ import annotations

import argparse
import csv
import io
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

PROJECT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(PROJECT))  # measure this checkout, whatever is installed
sys.path.insert(0, str(PROJECT / "tests"))

from aiosmtpd.controller import Controller  # noqa: E402
from mail_server import Recorder, free_port  # noqa: E402
from pg_server import Server, binaries  # noqa: E402

from calwarden.daemon.stores.database import Database, ServerTarget  # noqa: E402

TYPICAL = sorted((PROJECT / "fixtures" / "demo").glob("*metals*.csv"))
DEADLINE = 600.0


def _run_name(data: bytes) -> bytes:
    rows = csv.reader(io.StringIO(data.decode("utf-8")))
    header = next(rows)
    return next(rows)[header.index("run")].encode("utf-8")


def typical(number: int, tag: str) -> bytes:
    source = TYPICAL[number % len(TYPICAL)].read_bytes()
    run = _run_name(source)
    return source.replace(run, run + f"-{tag}{number:05d}".encode())


def write_config(folder: Path, name: str, smtp_port: int, url: str | None) -> Path:
    store = f"store:\n  url: '{url}'\n" if url else ""
    config = folder / "calwarden.yaml"
    config.write_text(
        f"""control:
  charts: false
alerts:
  inline_charts: 0
  throttle: {{max_messages: 1000, window_minutes: 1}}
  email: {{host: 127.0.0.1, port: {smtp_port}, security: none,
          sender: calwarden@lab.example, to: [qc@lab.example]}}
{store}inboxes:
  - path: inbox
    name: {name}
    instrument: ICP-{name}
watch:
  out: out
""",
        encoding="utf-8",
    )
    return config


def prepare(root: Path, name: str, files: int, smtp_port: int, url: str | None) -> Path:
    folder = root / name
    (folder / "inbox").mkdir(parents=True)
    (folder / "out").mkdir()
    for number in range(files):
        (folder / "inbox" / f"run-{number:05d}.csv").write_bytes(typical(number, name))
    return write_config(folder, name, smtp_port, url)


def spawn(config: Path, settle: float) -> subprocess.Popen[bytes]:
    env = dict(os.environ, PYTHONPATH=str(PROJECT))
    return subprocess.Popen(
        [
            sys.executable,
            "-m",
            "calwarden.daemon",
            "watch",
            "--config",
            str(config),
            "--settle",
            str(settle),
        ],
        cwd=config.parent,
        env=env,
        stdin=subprocess.DEVNULL,
        stdout=subprocess.DEVNULL,
        stderr=(config.parent / "watch.stderr").open("wb"),
    )


def judged_per_inbox(database: Database) -> dict[str, int]:
    rows = database.rows(
        "SELECT inbox, COUNT(*) FROM evaluations WHERE outcome != 'duplicate' GROUP BY inbox"
    )
    return {str(inbox): int(count) for inbox, count in rows}


def clear(
    configs: dict[str, Path], files: int, settle: float, open_reader: object
) -> tuple[dict[str, float], float, list[subprocess.Popen[bytes]]]:
    """Start a daemon per config at once; seconds until each had judged all its files."""
    started = time.monotonic()
    processes = [spawn(config, settle) for config in configs.values()]
    finished: dict[str, float] = {}
    reader: Database | None = None
    while len(finished) < len(configs):
        if time.monotonic() - started > DEADLINE:
            raise SystemExit(f"not all judged within {DEADLINE} s: {finished}")
        for process, name in zip(processes, configs, strict=True):
            if process.poll() is not None:
                stderr = (configs[name].parent / "watch.stderr").read_text(errors="replace")
                raise SystemExit(f"daemon {name} exited {process.returncode}:\n{stderr}")
        try:
            if reader is None:
                reader = open_reader()  # type: ignore[operator]
            assert reader is not None
            counts = judged_per_inbox(reader)
        except Exception:
            reader = None  # not made yet
            time.sleep(0.1)
            continue
        now = time.monotonic() - started
        for name in configs:
            if name not in finished and counts.get(name, 0) >= files:
                finished[name] = now
        time.sleep(0.1)
    if reader is not None:
        reader.close()
    return finished, max(finished.values()), processes


def stop(processes: list[subprocess.Popen[bytes]]) -> None:
    for process in processes:
        process.send_signal(signal.SIGTERM)
    for process in processes:
        process.wait(60)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--files", type=int, default=500, help="backlog per daemon")
    parser.add_argument("--daemons", type=int, default=4)
    parser.add_argument("--settle", type=float, default=0.2)
    args = parser.parse_args()
    bin_dir = binaries()
    if bin_dir is None:
        raise SystemExit("Debian's PostgreSQL is not installed (apt-get install postgresql)")
    handler, port = Recorder(), free_port()
    controller = Controller(handler, hostname="127.0.0.1", port=port)
    controller.start()
    server = Server(bin_dir)
    server.start()
    try:
        with tempfile.TemporaryDirectory(prefix="calwarden-bench-") as folder:
            root = Path(folder)
            print(f"cores {os.cpu_count()}; {args.files} files per daemon, settle {args.settle} s")

            floor_config = prepare(root / "floor", "solo", args.files, port, None)
            ledger = floor_config.parent / "out" / ".calwarden" / "ledger.sqlite3"
            times, _, processes = clear(
                {"solo": floor_config},
                args.files,
                args.settle,
                lambda: Database(ledger, read_only=True),
            )
            stop(processes)
            floor = args.files / (times["solo"] - args.settle)
            print(f"  floor: one daemon, its SQLite ledger: {floor:.1f} files/s")
            handler.received.clear()

            url = server.new_database()
            # The schema made once first, as `calwarden store migrate` would.
            Database(ServerTarget(url)).close()
            names = [f"icp{number + 1}" for number in range(args.daemons)]
            configs = {name: prepare(root / "lab", name, args.files, port, url) for name in names}
            times, last, processes = clear(
                configs,
                args.files,
                args.settle,
                lambda: Database(ServerTarget(url), read_only=True),
            )
            reader = Database(ServerTarget(url), read_only=True)
            try:
                expected_alerts = int(reader.rows("SELECT COUNT(*) FROM alerts")[0][0])
                deadline = time.monotonic() + DEADLINE
                while len(handler.received) < expected_alerts and time.monotonic() < deadline:
                    time.sleep(0.2)
                rows = reader.rows(
                    "SELECT inbox, path, COUNT(*) FROM evaluations "
                    "WHERE outcome != 'duplicate' GROUP BY inbox, path"
                )
                failed = int(
                    reader.rows("SELECT COUNT(*) FROM evaluations WHERE outcome = 'fail'")[0][0]
                )
            finally:
                reader.close()
            time.sleep(2.0)  # any second sending of an alert would arrive by now
            stop(processes)

            total_files = args.files * len(names)
            once = len(rows) == total_files and all(int(count) == 1 for *_, count in rows)
            verdicts = sum(
                len(list((root / "lab" / name / "out").glob("*.verdict.json"))) for name in names
            )
            ids = [received.message()["Message-ID"] for received in handler.received]
            print("| what | floor: one daemon on SQLite | measured |")
            print("|---|---|---|")
            for name in names:
                rate = args.files / (times[name] - args.settle)
                print(f"| {name}: files judged per second | {floor:.1f} | {rate:.1f} |")
            total = total_files / (last - args.settle)
            print(
                f"| all {len(names)} together: files judged per second | {floor:.1f} | "
                f"{total:.1f} |"
            )
            print(
                f"| files judged exactly once (ledger rows, verdict files) | {total_files} | "
                f"{'yes' if once else 'NO'} ({len(rows)}, {verdicts}) |"
            )
            print(
                f"| alerts (failed runs {failed}) sent exactly once | {expected_alerts} | "
                f"{len(ids)} messages, {len(set(ids))} distinct |"
            )
            good = once and verdicts == total_files and len(ids) == len(set(ids)) == expected_alerts
            return 0 if good else 1
    finally:
        server.stop()
        server.remove()
        controller.stop()


if __name__ == "__main__":
    sys.exit(main())
