"""``calwarden status``: what the daemon has done, read from its ledger."""

from __future__ import annotations

from pathlib import Path

from daemon.ledger import LEDGER_NAME, Evaluation, Ledger, LedgerError
from daemon.lock import is_locked, lock_owner


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


def status_report(state_dir: Path) -> tuple[str, bool]:
    """The status text, and whether there was a ledger to read."""
    ledger_path = state_dir / LEDGER_NAME
    lines = [f"calwarden state folder: {state_dir}"]
    if is_locked(state_dir):
        owner = lock_owner(state_dir)
        lines.append(f"daemon:       running{f' (process {owner})' if owner else ''}")
    else:
        lines.append("daemon:       not running")
    if not ledger_path.exists():
        lines.append(f"no ledger at {ledger_path}: no daemon has watched into this folder yet")
        return "\n".join(lines) + "\n", False
    try:
        ledger = Ledger(ledger_path, read_only=True)
        try:
            counts = ledger.counts()
            last = ledger.latest(limit=1)
            last_failure = ledger.latest(outcome="fail", limit=1)
            last_error = ledger.latest(outcome="error", limit=1)
            series, points, limited = ledger.control_summary()
        finally:
            ledger.close()
    except LedgerError as error:
        lines.append(f"cannot read the ledger: {error}")
        return "\n".join(lines) + "\n", False
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
    return "\n".join(lines) + "\n", True
