"""``calwarden demo``: the daemon at work on one invented week, with no set-up.

It makes a demo folder (an inbox and an output folder), starts the watcher in
this process, and drops the week's exports of ``fixtures/demo/`` into the
inbox one at a time, the ways instruments write them: in one go, slowly in
chunks, under a temporary name renamed into place. A failing run, a cut-off
file and a copy of an earlier file are among them. Each file's verdict is
printed as it is judged, then where everything is.
"""

from __future__ import annotations

import queue
import shutil
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from calwarden.daemon.alerts.sender import OUTBOX_FOLDER
from calwarden.daemon.intake.accept import Outcome
from calwarden.daemon.intake.watcher import StartError, Watcher
from calwarden.daemon.logs import LOG_NAME, configure_logging
from calwarden.daemon.settings.config import load_config, plan_watch

DEMO_RUNS = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
MARKER = ".calwarden-demo"
SETTLE_SECONDS = 1.0  # shorter than the daemon's default, so that the demo does not drag
_WAIT_SECONDS = 60.0


@dataclass(frozen=True, slots=True)
class Drop:
    """One file as the demo's "instrument" writes it into the inbox."""

    source: str  # in fixtures/demo/
    name: str  # its name in the inbox
    how: str  # "at once", "slowly", "renamed", "copy"
    story: str


DROPS = (
    Drop("bwl-demo-1130-metals.csv", "bwl-demo-1130-metals.csv", "at once", "Monday, metals"),
    Drop("bwl-demo-1201-metals.csv", "bwl-demo-1201-metals.csv", "slowly", "Tuesday, metals"),
    Drop("bwl-demo-1202-metals.csv", "bwl-demo-1202-metals.csv", "at once", "Wednesday, metals"),
    Drop(
        "bwl-demo-1203-herbicides.csv",
        "bwl-demo-1203-herbicides.csv",
        "renamed",
        "Thursday, herbicides",
    ),
    Drop("bwl-demo-1204-metals.csv", "bwl-demo-1204-metals.csv", "at once", "Friday, metals"),
    Drop("bwl-demo-1204-broken.csv", "bwl-demo-1204-broken.csv", "at once", "Friday, batch 2"),
    Drop(
        "bwl-demo-1130-metals.csv",
        "bwl-demo-1130-metals-copy.csv",
        "copy",
        "Monday's file, copied again",
    ),
)


class DemoError(Exception):
    """The demo cannot run (its folder is taken, the example runs are missing)."""


def _prepare(folder: Path, settle_seconds: float, pictures: bool) -> tuple[Path, Path]:
    """An empty demo folder; an earlier demo's folder is cleared, anything else refused."""
    if not DEMO_RUNS.is_dir():
        raise DemoError(
            f"the demo's example runs are not at {DEMO_RUNS}; run the demo from a source "
            "checkout installed with `pip install -e .`"
        )
    if folder.exists():
        if (folder / MARKER).exists():
            shutil.rmtree(folder)
        elif folder.is_dir() and not any(folder.iterdir()):
            pass
        else:
            raise DemoError(
                f"{folder} exists and is not a calwarden demo folder; give another one with --dir"
            )
    inbox, out = folder / "inbox", folder / "out"
    inbox.mkdir(parents=True, exist_ok=True)
    out.mkdir(exist_ok=True)
    (folder / MARKER).write_text(
        "Made by `calwarden demo`; the next demo clears this folder.\n", encoding="utf-8"
    )
    (folder / "calwarden.yaml").write_text(
        "# Watch this demo's inbox yourself:  calwarden watch --config calwarden.yaml\n"
        "# (drop a file of ../fixtures into inbox/ and see its verdict appear in out/)\n"
        "watch:\n"
        "  out: out\n"
        f"  settle_seconds: {settle_seconds}\n"
        + ("" if pictures else "control:\n  charts: false\n")
        + "inboxes:\n"
        "  - path: inbox\n"
        "    name: demo\n",
        encoding="utf-8",
    )
    return inbox, out


def _write(drop: Drop, inbox: Path, settle_seconds: float) -> None:
    data = (DEMO_RUNS / drop.source).read_bytes()
    target = inbox / drop.name
    if drop.how == "slowly":
        # Chunks closer together than the settle time: judged once, when complete.
        with target.open("wb") as stream:
            step = max(1, len(data) // 6)
            for start in range(0, len(data), step):
                stream.write(data[start : start + step])
                stream.flush()
                time.sleep(settle_seconds / 4)
    elif drop.how == "renamed":
        temporary = inbox / f"~{drop.name}.tmp"  # an ignored name until renamed into place
        temporary.write_bytes(data)
        temporary.replace(target)
    else:
        target.write_bytes(data)


def describe(outcome: Outcome) -> str:
    """One line per judged file, in plain words."""
    name = outcome.path
    if outcome.status == "duplicate":
        return f"SAME   {name}: same content as {outcome.duplicate_of}, not judged again"
    if outcome.status == "error":
        return f"ERROR  {name}: {outcome.message}"
    warnings = f", {outcome.warnings} warning(s)" if outcome.warnings else ""
    if outcome.status == "pass":
        return f"PASS   {name}: every check passed{warnings}"
    reruns = f"; {outcome.reruns} injection(s) to re-run" if outcome.reruns else ""
    first = f"\n         first: {outcome.message}" if outcome.message else ""
    return f"FAIL   {name}: {outcome.failures} failure(s){warnings}{reruns}{first}"


def run_demo(
    folder: Path,
    *,
    say: Callable[[str], None] = print,
    settle_seconds: float = SETTLE_SECONDS,
    pictures: bool = True,
) -> int:
    """Run the demo in ``folder``; 0 when every file got its verdict, 2 otherwise.

    ``settle_seconds`` is shorter in tests, which need no pause for a reader, and
    ``pictures=False`` leaves out the charts (the slowest part).
    """
    folder = folder.resolve()
    try:
        inbox, out = _prepare(folder, settle_seconds, pictures)
    except (DemoError, OSError) as error:
        print(f"calwarden: {error}", file=sys.stderr)
        return 2
    # The plan comes from the configuration the demo writes, so that watching the folder
    # later with it finds every file already judged (the ledger keys files on the inbox name).
    config_path = folder / "calwarden.yaml"
    config = load_config(config_path)
    plan = plan_watch(config, config_dir=folder)
    undo_logging = configure_logging(
        plan.state_dir,
        max_bytes=plan.settings.log_max_bytes,
        backups=plan.settings.log_backups,
        console=False,
    )
    outcomes: queue.Queue[Outcome] = queue.Queue()
    watcher = Watcher(plan, on_outcome=outcomes.put)
    say(f"calwarden demo: watching {inbox}")
    say(f"  outputs go to {out}; a file counts as complete after {settle_seconds:g} s unchanged\n")
    tally: dict[str, int] = {}
    try:
        try:
            watcher.start()
        except StartError as error:
            print(f"calwarden: {error}", file=sys.stderr)
            return 2
        try:
            for drop in DROPS:
                say(f"-> {drop.story}: {drop.name} arrives ({drop.how})")
                _write(drop, inbox, settle_seconds)
                try:
                    outcome = outcomes.get(timeout=_WAIT_SECONDS)
                except queue.Empty:
                    say(f"   no verdict for {drop.name} within {_WAIT_SECONDS:g} s")
                    return 2
                tally[outcome.status] = tally.get(outcome.status, 0) + 1
                say("   " + describe(outcome))
            say("\n(drawing the calibration pictures and control charts)")
            watcher.wait_pictures(_WAIT_SECONDS)
            if watcher.sender is not None:
                watcher.sender.wait_settled(_WAIT_SECONDS)
        finally:
            watcher.stop()
    finally:
        undo_logging()
    if watcher.fault:
        print(f"calwarden: the watcher stopped: {watcher.fault}", file=sys.stderr)
        return 2
    counts = ", ".join(f"{number} {status}" for status, number in sorted(tally.items()))
    say(f"\n{len(DROPS)} files, {counts}.")
    say(f"  verdicts, flagged copies, reports: {out}")
    say(f"  ledger and JSON log:               {plan.state_dir} ({LOG_NAME})")
    say(f"  the failing run's report:          {out / 'bwl-demo-1202-metals.report.html'} (.txt)")
    say(f"  its re-run worklist:               {out / 'bwl-demo-1202-metals.reruns.csv'}")
    say(f"  the overview page (open it):       {out / 'index.html'}")
    say(f"  control charts (PNG):              {out / 'charts'}")
    outbox = plan.state_dir / OUTBOX_FOLDER
    alerts = sorted(outbox.glob("*.eml")) if outbox.is_dir() else []
    say(
        f"  alerts (e-mails as .eml files):    {outbox} ({len(alerts)}; no mail server is "
        "set up in the demo, see README 'Alerts')"
    )
    say(f"  status any time:                   calwarden status --out {out}")
    say(f"  watch it yourself:                 calwarden watch --config {config_path}")
    say(
        "Automated screening supports, and does not replace, the analyst's review, the "
        "method's own criteria and the lab's procedures."
    )
    return 0
