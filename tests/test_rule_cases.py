"""Every rule against its case files in tests/cases/ (see tests/cases/README.md)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
import yaml

from calwarden.daemon.parsing.native import decode_table, normalise
from calwarden.rules.criteria import build_criteria
from calwarden.rules.evaluate import evaluate
from calwarden.rules.registry import all_rules

CASES = Path(__file__).parent / "cases"
BASE = (CASES / "_base.csv").read_text(encoding="utf-8")


def _load() -> list[tuple[str, dict[str, Any]]]:
    found = []
    for path in sorted(CASES.glob("*.yaml")):
        document = yaml.safe_load(path.read_text(encoding="utf-8"))
        assert document["rule"] == path.stem, f"{path.name} is about {document['rule']}"
        for case in document["cases"]:
            found.append((document["rule"], case))
    return found


ALL_CASES = _load()


def _run_case(case: dict[str, Any]) -> Any:
    header, *base_rows = BASE.splitlines()
    rows = [] if case.get("base") == "none" else base_rows
    extra = list(case.get("extra_columns") or [])
    if extra:  # columns after the base ones: empty in the base rows, given in the case's rows
        header = ",".join([header, *extra])
        rows = [row + "," * len(extra) for row in rows]
    text = "\n".join([header, *rows, *(case.get("rows") or "").splitlines()]) + "\n"
    run = normalise(decode_table(text.encode("utf-8")), run_name=case["name"])
    return evaluate(run, build_criteria({"defaults": case.get("criteria", {})}))


@pytest.mark.parametrize(
    ("rule_id", "case"), ALL_CASES, ids=[f"{rule}:{case['name']}" for rule, case in ALL_CASES]
)
def test_rule_case(rule_id: str, case: dict[str, Any]) -> None:
    """The rule gives the expected finding (or none) on the case's run, and the expected flags."""
    verdict = _run_case(case)
    severities = {f.severity.value for f in verdict.findings if f.rule == rule_id}
    messages = [f.message for f in verdict.findings if f.rule == rule_id]
    if case["expect"] == "pass":
        assert not severities, messages
    else:
        assert case["expect"] in severities, messages
    for seq, expected in (case.get("flags") or {}).items():
        flags = [f.value for r in verdict.results if r.seq == seq for f in r.flags]
        for flag in expected:
            assert flag in flags, (seq, flags)
        if not expected:
            assert not flags, (seq, flags)
    for seq, expected in (case.get("qualifiers") or {}).items():
        given = [q for r in verdict.results if r.seq == seq for q in r.qualifiers]
        assert given == expected, (seq, given)


def test_every_rule_has_a_passing_and_a_failing_case() -> None:
    """Each registered rule has at least one pass case and one case that finds something."""
    expectations: dict[str, set[str]] = {}
    for rule_id, case in ALL_CASES:
        expectations.setdefault(rule_id, set()).add("pass" if case["expect"] == "pass" else "finds")
    missing = [r.id for r in all_rules() if expectations.get(r.id) != {"pass", "finds"}]
    assert not missing, f"rules without both a pass and a failing case: {missing}"
