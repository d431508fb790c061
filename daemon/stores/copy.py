"""``calwarden store copy``: a PC's ledger moved into the lab's, exactly once.

Rows are copied table by table, oldest first, in batches; each batch is one
durable transaction holding the rows and, in table ``copied``, the id each had
in its source ledger (named by the ``ledger_id`` in the source's ``meta``). A
copy interrupted anywhere (killed, the server gone) leaves whole batches, and
run again skips every row ``copied`` already names, so each row arrives once.
Ids are new in the lab's ledger; references between the copied rows
(a duplicate's original, a point's evaluation, a limit's first and last point,
an alert's evaluation and digest) are translated through ``copied``.

Rows that have a natural key keep the lab's version when both have one: the
state of a file (``seen``, by inbox and path), an alert (its dedupe key, so an
alert the lab's daemons already sent is not sent again), a delivery, and a
current control point of the same content. Copied limits become their series'
active limits only where the lab has none. The series' sizes are counted again
from the points at the end. Copied runs get no pictures drawn.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable
from dataclasses import dataclass, field

from calwarden.daemon.stores.database import Database, Row, Transaction

#: The tables with an id, in the order their references need, and what each column refers to.
_WITH_IDS: tuple[tuple[str, dict[str, str]], ...] = (
    ("evaluations", {"duplicate_of": "evaluations"}),
    ("control_points", {"evaluation_id": "evaluations"}),
    ("control_limits", {"first_point": "control_points", "last_point": "control_points"}),
    ("alerts", {"evaluation_id": "evaluations", "digest_id": "alerts"}),
)


@dataclass
class CopyReport:
    source: str
    copied: dict[str, int] = field(default_factory=dict)
    already: dict[str, int] = field(default_factory=dict)  # there from an earlier copy or the lab


def ledger_id(source: Database) -> str:
    """The source ledger's own name, made once (it keys ``copied``)."""
    found = source.meta("ledger_id")
    if found is not None:
        return found
    with source.write(durable=True) as transaction:
        transaction.execute(
            "INSERT INTO meta (key, value) VALUES ('ledger_id', ?) ON CONFLICT (key) DO NOTHING",
            (str(uuid.uuid4()),),
        )
    found = source.meta("ledger_id")
    assert found is not None
    return found


def copy_ledger(
    source: Database,
    target: Database,
    *,
    batch: int = 500,
    progress: Callable[[str, int], None] | None = None,
) -> CopyReport:
    """Copy every row of ``source`` that ``target`` lacks; see the module's description."""
    name = ledger_id(source)
    report = CopyReport(name)
    for table, references in _WITH_IDS:
        columns = [
            c
            for c in sorted(set(source.engine.columns(table)) & set(target.engine.columns(table)))
            if c != "id"
        ]
        last = 0
        while True:
            rows = source.rows(
                f"SELECT id, {', '.join(columns)} FROM {table} WHERE id > ? ORDER BY id LIMIT ?",
                (last, batch),
            )
            if not rows:
                break
            last = int(rows[-1][0])
            with target.write(durable=True) as transaction:
                transaction.serialise("calwarden:copy:" + name)
                copied, already = _copy_rows(transaction, name, table, columns, references, rows)
            report.copied[table] = report.copied.get(table, 0) + copied
            report.already[table] = report.already.get(table, 0) + already
            if progress is not None:
                progress(table, copied)
    for table, key in (("seen", ("inbox", "path")), ("deliveries", ("alert_id", "channel"))):
        copied, already = _copy_keyed(source, target, name, table, key, batch)
        report.copied[table], report.already[table] = copied, already
    with target.write(durable=True) as transaction:
        _count_series(transaction, name)
    return report


def _translate(transaction: Transaction, source: str, table: str, old: object) -> int | None:
    if old is None:
        return None
    row = transaction.one(
        "SELECT new_id FROM copied WHERE source = ? AND source_table = ? AND source_id = ?",
        (source, table, old),
    )
    return None if row is None else int(row[0])


def _copy_rows(
    transaction: Transaction,
    source: str,
    table: str,
    columns: list[str],
    references: dict[str, str],
    rows: list[Row],
) -> tuple[int, int]:
    copied = already = 0
    for row in rows:
        old_id = row[0]
        if _translate(transaction, source, table, old_id) is not None:
            already += 1
            continue
        values = dict(zip(columns, row[1:], strict=True))
        for column, referred in references.items():
            if column in values:
                values[column] = _translate(transaction, source, referred, values[column])
        new_id = _existing(transaction, table, values)
        if new_id is None:
            new_id = transaction.insert(
                f"INSERT INTO {table} ({', '.join(values)}) "
                f"VALUES ({', '.join('?' for _ in values)})",
                tuple(values.values()),
            )
            copied += 1
        else:
            already += 1
        transaction.execute(
            "INSERT INTO copied (source, source_table, source_id, new_id) VALUES (?, ?, ?, ?)",
            (source, table, old_id, new_id),
        )
    return copied, already


def _existing(transaction: Transaction, table: str, values: dict[str, object]) -> int | None:
    """The lab's own row standing for this one, if any; adjusts what is inserted otherwise."""
    if table == "evaluations":
        values["pictures_drawn"] = 2  # another PC's run: its pictures are drawn there
        return None
    if table == "alerts":
        row = transaction.one("SELECT id FROM alerts WHERE dedupe_key = ?", (values["dedupe_key"],))
        return None if row is None else int(row[0])
    if table == "control_points":
        if values.get("superseded") == 0 and values.get("seq") is not None:
            row = transaction.one(
                "SELECT id FROM control_points WHERE superseded = 0 AND sha256 = ? "
                "AND instrument = ? AND analyte = ? AND kind = ? AND level = ? AND seq = ?",
                tuple(
                    values[c] for c in ("sha256", "instrument", "analyte", "kind", "level", "seq")
                ),
            )
            if row is not None:
                return int(row[0])
        return None
    if table == "control_limits" and values.get("active"):
        row = transaction.one(
            "SELECT 1 FROM control_limits WHERE active = 1 AND instrument = ? AND analyte = ? "
            "AND kind = ? AND level = ?",
            tuple(values[c] for c in ("instrument", "analyte", "kind", "level")),
        )
        if row is not None:
            values["active"] = 0  # the lab's own limits stay the active ones
    return None


def _copy_keyed(
    source: Database, target: Database, name: str, table: str, key: tuple[str, str], batch: int
) -> tuple[int, int]:
    """Rows keyed by their content (files seen, deliveries): the lab's version wins."""
    columns = sorted(set(source.engine.columns(table)) & set(target.engine.columns(table)))
    copied = already = 0
    offset = 0
    while True:
        rows = source.rows(
            f"SELECT {', '.join(columns)} FROM {table} ORDER BY {', '.join(key)} LIMIT ? OFFSET ?",
            (batch, offset),
        )
        if not rows:
            return copied, already
        offset += len(rows)
        with target.write(durable=True) as transaction:
            for row in rows:
                values = dict(zip(columns, row, strict=True))
                if table == "deliveries":
                    values["alert_id"] = _translate(transaction, name, "alerts", values["alert_id"])
                    if values["alert_id"] is None:
                        continue
                added = transaction.execute(
                    f"INSERT INTO {table} ({', '.join(values)}) "
                    f"VALUES ({', '.join('?' for _ in values)}) ON CONFLICT DO NOTHING",
                    tuple(values.values()),
                )
                copied += added
                already += 1 - added


def _count_series(transaction: Transaction, source: str) -> None:
    """Count again the series that copied points belong to (their sizes are kept, not summed)."""
    keys = transaction.rows(
        "SELECT DISTINCT p.instrument, p.analyte, p.kind, p.level FROM control_points p "
        "JOIN copied c ON c.new_id = p.id AND c.source_table = 'control_points' "
        "AND c.source = ?",
        (source,),
    )
    for key in keys:
        row = transaction.one(
            "SELECT COUNT(*), COALESCE(SUM(accepted), 0) FROM control_points "
            "WHERE superseded = 0 AND instrument = ? AND analyte = ? AND kind = ? AND level = ?",
            tuple(key),
        )
        points, in_control = (0, 0) if row is None else (int(row[0]), int(row[1]))
        transaction.execute(
            "INSERT INTO control_series (instrument, analyte, kind, level, points, in_control) "
            "VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT (instrument, analyte, kind, level) DO UPDATE "
            "SET points = excluded.points, in_control = excluded.in_control",
            (*key, points, in_control),
        )
