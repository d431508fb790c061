"""Random kill -9 cycles of a real ``calwarden watch`` while files land (a script, not a test).

    python tests/benchmarks/kill9.py [--cycles 40] [--seed 0] [--keep DIR]

Each cycle starts ``calwarden watch`` (settle time 0.1 s, default configuration:
control log, pictures and alerts as ``.eml`` files on), drops a few files into its
inbox while it runs (new runs, written directly or under a temporary name renamed
into place; rewrites of a known file with new content; identical copies of a
known file under a new name), and kills it with SIGKILL at a random instant up
to 1.5 s after it logged its start (one cycle in five: while it starts). After
the last cycle the daemon is started once more, left to catch up, and stopped
with SIGTERM. Then it checks:

- every input has exactly one current verdict with its bytes' SHA-256: its own
  ``<stem>.verdict.json``, or, for an identical copy recorded as a duplicate, the
  verdict of the file it copies (both inputs are counted, each judged once);
- no content is judged twice at one path (no doubled ledger rows), and each
  earlier version's verdict is kept as ``<stem>@vN``;
- no temporary file is left in the output folder; ``PRAGMA integrity_check`` is ok;
- the last daemon exits 0.

It prints the figures and exits 1 if any check fails.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import random
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

PROJECT = Path(__file__).resolve().parents[2]
SMALL_RUN = PROJECT / "fixtures" / "bwl-addition.csv"
SMALL_RUN_NAME = "BWL-ICPMS-2-20261126-SA"  # its `run` column, varied to make distinct files


WATCH = (sys.executable, "-m", "calwarden.daemon", "watch")


def _environment() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(PROJECT), env.get("PYTHONPATH")) if p)
    return env


class Dropper:
    """Puts files into the inbox and remembers what each input should hold."""

    def __init__(self, inbox: Path, rng: random.Random) -> None:
        self.inbox = inbox
        self.rng = rng
        self.template = SMALL_RUN.read_text(encoding="utf-8")
        self.contents = 0
        self.names: list[str] = []
        self.counts: Counter[str] = Counter()

    def _content(self) -> bytes:
        self.contents += 1
        return self.template.replace(SMALL_RUN_NAME, f"KILL9-{self.contents:05d}").encode()

    def _write(self, name: str, data: bytes) -> None:
        target = self.inbox / name
        if self.rng.random() < 0.5:
            target.write_bytes(data)
        else:  # an instrument writing under a temporary name and renaming it into place
            temporary = self.inbox / f".{name}.part"
            temporary.write_bytes(data)
            os.replace(temporary, target)

    def drop(self) -> None:
        choice = self.rng.random()
        if not self.names or choice < 0.55:
            name = f"run-{len(self.names) + 1:04d}.csv"
            self._write(name, self._content())
            self.names.append(name)
            self.counts["new"] += 1
        elif choice < 0.8:
            name = self.rng.choice(self.names)
            self._write(name, self._content())
            self.counts["rewritten"] += 1
        else:
            original = self.rng.choice(self.names)
            name = f"copy-{len(self.names) + 1:04d}.csv"
            shutil.copyfile(self.inbox / original, self.inbox / name)
            self.names.append(name)
            self.counts["identical copy"] += 1


def start(inbox: Path, out: Path, logs: Path, number: int) -> subprocess.Popen[bytes]:
    with (logs / f"watch-{number}.err").open("wb") as stderr:
        return subprocess.Popen(
            [*WATCH, str(inbox), "--out", str(out), "--settle", "0.1"],
            env=_environment(),
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=stderr,
        )


def wait_started(out: Path, process: subprocess.Popen[bytes], timeout: float = 30.0) -> None:
    """Until the process has logged ``daemon_started`` (or ended, or the timeout passed)."""
    log = out / ".calwarden" / "calwarden.log"
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and process.poll() is None:
        try:
            text = log.read_text(encoding="utf-8", errors="replace")
        except FileNotFoundError:
            text = ""
        for line in text.splitlines():
            if '"daemon_started"' in line and f'"pid": {process.pid},' in line:
                return
        time.sleep(0.05)


def sha256_of(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def ledger_rows(out: Path) -> list[sqlite3.Row]:
    uri = f"file:{out / '.calwarden' / 'ledger.sqlite3'}?mode=ro"
    try:
        connection = sqlite3.connect(uri, uri=True, timeout=5)
    except sqlite3.Error:
        return []
    try:
        connection.row_factory = sqlite3.Row
        return connection.execute(
            "SELECT id, path, sha256, outcome, duplicate_of, version, output_stem "
            "FROM evaluations ORDER BY id"
        ).fetchall()
    except sqlite3.Error:
        return []
    finally:
        connection.close()


def all_recorded(inbox: Path, out: Path) -> bool:
    current = {}
    for row in ledger_rows(out):
        current[row["path"]] = row["sha256"]
    return all(current.get(p.name) == sha256_of(p) for p in inbox.glob("*.csv"))


def temporaries(out: Path) -> list[Path]:
    from calwarden.daemon.outputs.files import is_leftover_temporary

    return [p for p in out.rglob("*") if p.is_file() and is_leftover_temporary(p.name)]


def verdict_sha(path: Path) -> str | None:
    try:
        return str(json.loads(path.read_text(encoding="utf-8"))["source"]["sha256"])
    except (OSError, ValueError, KeyError):
        return None


def check(inbox: Path, out: Path) -> tuple[list[str], dict[str, int]]:
    """Every broken promise, and the figures."""
    problems: list[str] = []
    rows = ledger_rows(out)
    by_id = {row["id"]: row for row in rows}
    latest: dict[str, sqlite3.Row] = {}
    pairs: Counter[tuple[str, str]] = Counter()
    for row in rows:
        latest[row["path"]] = row
        pairs[(row["path"], row["sha256"])] += 1
    doubled = [pair for pair, n in pairs.items() if n > 1]
    if doubled:
        problems.append(f"content judged twice at one path: {doubled[:3]}")
    every_verdict_sha = {verdict_sha(p) for p in out.glob("*.verdict.json")}
    inputs = sorted(inbox.glob("*.csv"))
    judged = duplicates = 0
    for path in inputs:
        sha = sha256_of(path)
        row = latest.get(path.name)
        if row is None or row["sha256"] != sha:
            problems.append(f"{path.name}: its current content has no record")
            continue
        if row["outcome"] == "duplicate":
            duplicates += 1
            original = by_id.get(row["duplicate_of"])
            if original is None or original["sha256"] != sha or sha not in every_verdict_sha:
                problems.append(f"{path.name}: a duplicate without its original's verdict")
            if (out / f"{path.stem}.verdict.json").exists():
                problems.append(f"{path.name}: a duplicate with a verdict of its own")
            continue
        judged += 1
        current = out / f"{row['output_stem']}.verdict.json"
        if verdict_sha(current) != sha:
            problems.append(f"{path.name}: {current.name} is not of its current bytes")
        versions = [r for r in rows if r["path"] == path.name and r["outcome"] != "duplicate"]
        archived = {verdict_sha(p) for p in out.glob(f"{row['output_stem']}@v*.verdict.json")}
        for earlier in versions[:-1]:
            if earlier["sha256"] not in archived:
                problems.append(f"{path.name}: version {earlier['version']} not kept as @v")
    current_verdicts = [p for p in out.glob("*.verdict.json") if "@v" not in p.name]
    if len(current_verdicts) != judged:
        problems.append(f"{len(current_verdicts)} current verdicts for {judged} judged inputs")
    left = temporaries(out)
    if left:
        problems.append(f"temporary files left: {[p.name for p in left[:5]]}")
    connection = sqlite3.connect(out / ".calwarden" / "ledger.sqlite3")
    try:
        integrity = connection.execute("PRAGMA integrity_check").fetchone()[0]
    finally:
        connection.close()
    if integrity != "ok":
        problems.append(f"integrity_check: {integrity}")
    figures = {
        "inputs": len(inputs),
        "judged inputs (own verdict)": judged,
        "identical copies (duplicate of a judged input)": duplicates,
        "ledger rows": len(rows),
        "archived earlier versions": len(list(out.glob("*@v*.verdict.json"))),
    }
    return problems, figures


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cycles", type=int, default=40)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--keep", type=Path, help="work in this folder and keep it")
    args = parser.parse_args()
    rng = random.Random(args.seed)
    work = args.keep or Path(tempfile.mkdtemp(prefix="calwarden-kill9-"))
    inbox, out, logs = work / "inbox", work / "out", work / "logs"
    for folder in (inbox, logs):
        folder.mkdir(parents=True, exist_ok=True)
    dropper = Dropper(inbox, rng)
    began = time.monotonic()
    temporaries_after_kills = 0
    early_exits = 0
    for cycle in range(args.cycles):
        process = start(inbox, out, logs, cycle)
        if rng.random() < 0.8:  # most kills while it judges; the others while it starts
            wait_started(out, process)
        kill_at = time.monotonic() + rng.uniform(0.0, 1.5)
        while time.monotonic() < kill_at:
            for _ in range(rng.randint(0, 3)):
                dropper.drop()
            time.sleep(rng.uniform(0.0, 0.15))
        if process.poll() is not None:
            early_exits += 1  # it must not end by itself: counted and reported
        process.send_signal(signal.SIGKILL)
        process.wait(timeout=30)
        temporaries_after_kills += len(temporaries(out)) if out.exists() else 0
    final = start(inbox, out, logs, args.cycles)
    wait_started(out, final)  # SIGTERM before its handler is set would simply end it
    deadline = time.monotonic() + 180
    while time.monotonic() < deadline and not all_recorded(inbox, out):
        time.sleep(0.2)
    time.sleep(1.0)  # let it finish what it was doing after the last record (pictures)
    final.send_signal(signal.SIGTERM)
    code = final.wait(timeout=60)
    problems, figures = check(inbox, out)
    if code != 0:
        problems.append(f"the last daemon exited {code}")
    if early_exits:
        problems.append(f"{early_exits} daemons ended before their kill (see {logs})")
    seconds = time.monotonic() - began
    print(f"kill -9: {args.cycles} cycles, seed {args.seed}, {seconds:.0f} s")
    for kind, count in sorted(dropper.counts.items()):
        print(f"  files dropped, {kind}: {count}")
    for name, value in figures.items():
        print(f"  {name}: {value}")
    print(
        "  temporary files found left by kills (removed at the next start): "
        f"{temporaries_after_kills}"
    )
    print(f"  integrity_check: {'ok' if not any('integrity' in p for p in problems) else 'FAILED'}")
    print(f"  last daemon's exit code: {code}")
    print(f"  broken promises: {len(problems)}")
    for problem in problems[:20]:
        print(f"    {problem}")
    if args.keep is None and not problems:
        shutil.rmtree(work)
    elif problems:
        print(f"  the folders are kept in {work}")
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
