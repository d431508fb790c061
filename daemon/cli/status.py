"""``calwarden status``: what the daemon has done, read from its ledger."""

from __future__ import annotations

from pathlib import Path

from calwarden.daemon.alerts.sender import DEAD_LETTER_FOLDER, OUTBOX_FOLDER
from calwarden.daemon.intake.lock import is_locked, lock_owner
from calwarden.daemon.outputs.overview import OVERVIEW_NAME
from calwarden.daemon.outputs.printable import printable
from calwarden.daemon.settings.store import StoreSettings
from calwarden.daemon.stores.control import ControlHistory
from calwarden.daemon.stores.database import Database, LedgerError, ServerTarget
from calwarden.daemon.stores.engine import store_target
from calwarden.daemon.stores.files import FileStore
from calwarden.daemon.stores.outbox import Outbox
from calwarden.daemon.stores.owners import InboxOwners
from calwarden.daemon.stores.records import Evaluation


def _line(evaluation: Evaluation) -> str:
    what = evaluation.outcome.upper()
    if evaluation.outcome == "fail":
        what += f" ({evaluation.failures} failure(s))"
    text = f"{evaluation.evaluated_at}  {evaluation.inbox}/{evaluation.path}: {what}"
    if evaluation.run:
        text += f", run {evaluation.run}"
    if evaluation.instrument:
        text += f" on {evaluation.instrument}"
    return text


def _entry(evaluation: Evaluation | None) -> dict[str, object] | None:
    if evaluation is None:
        return None
    return {
        "inbox": evaluation.inbox,
        "path": evaluation.path,
        "status": evaluation.outcome,
        "run": evaluation.run,
        "instrument": evaluation.instrument,
        "version": evaluation.version,
        "failures": evaluation.failures,
        "warnings": evaluation.warnings,
        "reason": evaluation.message,
        "evaluated_at": evaluation.evaluated_at,
    }


#: ``calwarden status --json``'s schema; keys are only ever added (README, "status --json").
STATUS_SCHEMA = 1


def status_document(
    state_dir: Path, out: Path | None = None, store: StoreSettings | None = None
) -> dict[str, object]:
    """What ``status --json`` prints: stable keys, documented in the README."""
    overview = None if out is None else out / OVERVIEW_NAME
    document: dict[str, object] = {
        "schema": STATUS_SCHEMA,
        "state_dir": str(state_dir),
        "overview": str(overview) if overview is not None and overview.exists() else None,
        "daemon_running": is_locked(state_dir),
        "daemon_pid": lock_owner(state_dir) if is_locked(state_dir) else None,
        "ledger": False,
        "problem": None,
        "files": None,
        "control": None,
        "last_file": None,
        "last_failure": None,
        "last_error": None,
        "alerts": None,
    }
    try:
        target = store_target(state_dir, store or StoreSettings())
    except LedgerError as error:
        document["problem"] = f"cannot read the ledger: {error}"
        return document
    if isinstance(target, Path) and not target.exists():
        document["problem"] = f"no ledger at {target}"
        return document
    try:
        database = Database(target, read_only=True)
        try:
            files = FileStore(database)
            counts = files.counts()
            document["last_file"] = _entry(next(iter(files.latest(limit=1)), None))
            for key, outcome in (("last_failure", "fail"), ("last_error", "error")):
                document[key] = _entry(next(iter(files.latest(outcome=outcome, limit=1)), None))
            series, points, limited = ControlHistory(database).control_summary()
            try:
                box = Outbox(database).outbox_counts()
                document["alerts"] = {
                    "written": box.files,
                    "sent": box.sent,
                    "waiting": box.waiting,
                    "held": box.new + box.gathered,
                    "dead": box.dead,
                }
            except LedgerError:  # a ledger from before the outbox
                pass
        finally:
            database.close()
    except LedgerError as error:
        document["problem"] = f"cannot read the ledger: {error}"
        return document
    document["ledger"] = True
    document["files"] = {
        "judged": counts["pass"] + counts["fail"] + counts["error"],
        "pass": counts["pass"],
        "fail": counts["fail"],
        "error": counts["error"],
        "duplicate": counts["duplicate"],
    }
    document["control"] = {"series": series, "points": points, "with_limits": limited}
    return document


def status_report(
    state_dir: Path, out: Path | None = None, store: StoreSettings | None = None
) -> tuple[str, bool]:
    """The status text, and whether there was a ledger to read.

    On a lab's server the ledger is the whole lab's: the counts are every daemon's,
    and each inbox is listed with the daemon that owns it.
    """
    lines = [f"calwarden state folder: {state_dir}"]
    if out is not None:
        page = out / OVERVIEW_NAME
        lines.append(
            f"overview:     {page}" + ("" if page.exists() else " (written once the daemon runs)")
        )
    if is_locked(state_dir):
        owner = lock_owner(state_dir)
        lines.append(f"daemon:       running{f' (process {owner})' if owner else ''}")
    else:
        lines.append("daemon:       not running")
    try:
        target = store_target(state_dir, store or StoreSettings())
    except LedgerError as error:
        lines.append(f"cannot read the ledger: {error}")
        return "\n".join(lines) + "\n", False
    if isinstance(target, Path) and not target.exists():
        lines.append(f"no ledger at {target}: no daemon has watched into this folder yet")
        return "\n".join(lines) + "\n", False
    if isinstance(target, ServerTarget):
        lines.append(f"ledger:       {target} (the whole lab's)")
    try:
        database = Database(target, read_only=True)
        try:
            files = FileStore(database)
            counts = files.counts()
            last = files.latest(limit=1)
            last_failure = files.latest(outcome="fail", limit=1)
            last_error = files.latest(outcome="error", limit=1)
            series, points, limited = ControlHistory(database).control_summary()
            owners = InboxOwners(database).listing() if database.shared else []
            try:
                alert_lines = _alerts(Outbox(database), state_dir)
            except LedgerError:  # a ledger from before the outbox, not yet opened by a daemon
                alert_lines = ["alerts:       none yet"]
        finally:
            database.close()
    except LedgerError as error:
        lines.append(f"cannot read the ledger: {error}")
        return "\n".join(lines) + "\n", False
    for taken in owners:
        state = "watching" if taken.watching else "not watched now; last"
        lines.append(
            f"inbox:        {taken.inbox}: {state} by {taken.host} (process {taken.pid}, "
            f"since {taken.claimed_at})"
        )
    judged = counts["pass"] + counts["fail"] + counts["error"]
    lines.append(
        f"files judged: {judged} (pass {counts['pass']}, fail {counts['fail']}, "
        f"error {counts['error']}); duplicates not judged again: {counts['duplicate']}"
    )
    lines.append(
        f"control log:  {points} point(s) in {series} series, {limited} with limits "
        f"(`calwarden chart export` lists them)"
    )
    if last:
        lines.append(f"last file:    {_line(last[0])}")
    for label, found in (("last failure", last_failure), ("last error", last_error)):
        if found:
            lines.append(f"{label + ':':<13} {_line(found[0])}")
            if found[0].message:
                lines.append(f"{'':<14}{found[0].message}")
    lines.extend(alert_lines)
    # Names and reasons come from files: their control characters are shown escaped.
    return "\n".join(printable(line) for line in lines) + "\n", True


def _alerts(outbox: Outbox, state_dir: Path) -> list[str]:
    """The outbox: what is written, sent, waiting or refused, and the newest messages."""
    counts = outbox.outbox_counts()
    held = counts.new + counts.gathered
    lines = [
        f"alerts:       {counts.files} written as .eml in {state_dir / OUTBOX_FOLDER}; "
        f"sent {counts.sent}, waiting to send {counts.waiting}"
        + (f", held for a digest {held}" if held else "")
        + f", dead letters {counts.dead}"
    ]
    if counts.dead:
        lines.append(
            f"{'':<14}DEAD LETTERS: {counts.dead} alert(s) refused for good; copies and "
            f"reasons in {state_dir / DEAD_LETTER_FOLDER}"
        )
    for state, name, channel, error, attempts in outbox.problems():
        label = "refused" if state == "dead" else f"retrying ({attempts} attempt(s))"
        lines.append(f"{'':<14}{label} by {channel}: {name}: {error}")
    for created_at, kind, name in outbox.recent_files():
        lines.append(f"{'':<14}{created_at}  {kind.upper():<8} {name}")
    return lines
