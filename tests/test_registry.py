"""The rule registry: one explicit list, every rule documented, tested by cases, no import cycle."""

from __future__ import annotations

import ast
import importlib
import pkgutil
import re
from pathlib import Path

import yaml

import calwarden.rules.acceptance
from calwarden.rules.registry import RULES
from calwarden.rules.rule import Rule

PROJECT = Path(__file__).resolve().parent.parent
RULES_FOLDER = PROJECT / "rules"
CASES = Path(__file__).parent / "cases"


def _made_rules() -> dict[str, Rule]:
    """Every Rule object an acceptance module makes, by its module-qualified name."""
    found = {}
    for module_info in pkgutil.iter_modules(calwarden.rules.acceptance.__path__):
        module = importlib.import_module(f"calwarden.rules.acceptance.{module_info.name}")
        for name, value in vars(module).items():
            if isinstance(value, Rule):
                found[f"{module_info.name}.{name}"] = value
    return found


def test_rule_ids_are_unique() -> None:
    """No two rules in the registry share an id."""
    ids = [r.id for r in RULES]
    assert len(ids) == len(set(ids)), sorted(i for i in ids if ids.count(i) > 1)


def test_every_rule_made_is_listed() -> None:
    """A rule written in an acceptance module but missing from registry.RULES fails here."""
    listed = {id(r) for r in RULES}
    missing = [name for name, r in _made_rules().items() if id(r) not in listed]
    assert not missing, f"rules made but not in registry.RULES: {missing}"


def test_every_rule_has_a_docstring_with_why_and_examples() -> None:
    """Each rule's docstring says why (its source) and gives a failing and a passing example."""
    for rule in RULES:
        text = rule.explanation
        assert "Why:" in text, rule.id
        assert "Passes:" in text, rule.id
        assert re.search(r"^(Fails|Warns)\b", text, re.MULTILINE), rule.id


def test_every_rule_has_a_case_file_with_a_pass_and_a_failing_case() -> None:
    """tests/cases/<id>.yaml exists for each rule and holds a pass case and one that finds."""
    for rule in RULES:
        path = CASES / f"{rule.id}.yaml"
        assert path.exists(), f"no case file {path.name}"
        expectations = {case["expect"] for case in yaml.safe_load(path.read_text("utf-8"))["cases"]}
        assert "pass" in expectations, rule.id
        assert expectations - {"pass"}, rule.id


def test_a_rule_without_a_docstring_is_refused() -> None:
    """Building a Rule from an undocumented function raises at once (a programming error)."""

    def undocumented(context: object) -> list[object]:
        return []

    try:
        Rule("area.name", "summary", undocumented)  # type: ignore[arg-type]
    except ValueError as error:
        assert "docstring" in str(error)
    else:
        raise AssertionError("an undocumented rule was accepted")


def _module_name(path: Path) -> str:
    parts = path.relative_to(PROJECT).with_suffix("").parts
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(("calwarden", *parts))


def _core_imports(path: Path) -> set[str]:
    """The calwarden.rules modules a core file imports (relative imports resolved)."""
    module = _module_name(path)
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            candidates = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                parts = package.split(".")
                base = ".".join([*parts[: len(parts) - node.level + 1], *filter(None, [base])])
            candidates = [base, *(f"{base}.{alias.name}" for alias in node.names)]
        else:
            continue
        names.update(c for c in candidates if c.startswith("calwarden.rules"))
    return names


def test_the_core_has_no_import_cycle() -> None:
    """calwarden.rules modules import each other without a cycle (no registration by import)."""
    modules = {_module_name(p): p for p in RULES_FOLDER.rglob("*.py")}
    graph = {name: _core_imports(path) & set(modules) for name, path in modules.items()}
    for name in graph:  # a package's parents are imported before it
        graph[name] -= {name, *(other for other in graph if name.startswith(other + "."))}
    state: dict[str, str] = {}

    def visit(name: str, trail: list[str]) -> None:
        state[name] = "open"
        for other in sorted(graph[name]):
            if state.get(other) == "open":
                raise AssertionError("import cycle: " + " → ".join([*trail, name, other]))
            if other not in state:
                visit(other, [*trail, name])
        state[name] = "done"

    for name in sorted(graph):
        if name not in state:
            visit(name, [])
