"""The typed verdict model describes the verdict JSON exactly: every key, its order, its type."""

from __future__ import annotations

import json
import types
from pathlib import Path
from typing import Any, Union, get_args, get_origin, get_type_hints, is_typeddict

import pytest

from calwarden.daemon.outputs.verdict_model import VerdictDocument
from calwarden.daemon.pipeline import error_document, judge_file
from calwarden.daemon.settings.config import load_config

PROJECT = Path(__file__).resolve().parent.parent
#: Files judged as ``check`` judges them, with their configuration (None: the defaults).
JUDGED = {
    **{f"fixtures/{path.name}": None for path in sorted(PROJECT.glob("fixtures/*.csv"))},
    "fixtures/bwl-quadratic.csv": "example.yaml",
    **{f"fixtures/demo/{path.name}": None for path in sorted(PROJECT.glob("fixtures/demo/*.csv"))},
    "fixtures/exports/bwl-icpms-metals-pass.txt": "export-icpms-semicolon.yaml",
    "fixtures/exports/bwl-lcms-herbicides.csv": "export-lcms-wide.yaml",
    "fixtures/exports/bwl-icpms-metals-fail.xlsx": "export-icpms-xlsx.yaml",
    "fixtures/exports/bwl-oes-cations.tsv": "export-oes-tab.yaml",
}


def shape_problems(value: object, hint: Any, where: str = "$") -> list[str]:
    """Where ``value`` (parsed JSON) departs from the type ``hint``; [] when it fits.

    A TypedDict must have its required keys, no key it does not declare, and its
    keys in the order declared (the order they are written in).
    """
    if is_typeddict(hint):
        if not isinstance(value, dict):
            return [f"{where}: {type(value).__name__}, not an object"]
        hints = get_type_hints(hint)
        problems = [f"{where}: no key '{k}'" for k in hint.__required_keys__ if k not in value]
        problems += [f"{where}: unknown key '{k}'" for k in value if k not in hints]
        declared = [k for k in hints if k in value]
        if not problems and list(value) != declared:
            problems.append(f"{where}: keys in the order {list(value)}, declared {declared}")
        for key, item in value.items():
            if key in hints:
                problems += shape_problems(item, hints[key], f"{where}.{key}")
        return problems
    origin = get_origin(hint)
    if origin in (Union, types.UnionType):
        options = [shape_problems(value, option, where) for option in get_args(hint)]
        return [] if any(not found for found in options) else min(options, key=len)
    if origin is list:
        if not isinstance(value, list):
            return [f"{where}: {type(value).__name__}, not a list"]
        (item_hint,) = get_args(hint)
        return [
            p
            for i, item in enumerate(value)
            for p in shape_problems(item, item_hint, f"{where}[{i}]")
        ]
    if origin is dict:
        if not isinstance(value, dict):
            return [f"{where}: {type(value).__name__}, not an object"]
        _, item_hint = get_args(hint)
        return [
            p for k, item in value.items() for p in shape_problems(item, item_hint, f"{where}.{k}")
        ]
    if hint is type(None):
        return [] if value is None else [f"{where}: {value!r}, not null"]
    if hint is float:
        fits = isinstance(value, int | float) and not isinstance(value, bool)
    elif hint is int:
        fits = isinstance(value, int) and not isinstance(value, bool)
    else:
        fits = isinstance(value, hint)
    return [] if fits else [f"{where}: {value!r}, not {hint.__name__}"]


def _written(document: object) -> object:
    """The document as a reader gets it back from the file."""
    return json.loads(json.dumps(document))


@pytest.mark.parametrize("name", sorted(JUDGED))
def test_every_judged_file_gives_a_document_of_the_model(name: str) -> None:
    """Each fixture's verdict, read back from JSON, has exactly the model's keys and types."""
    config_name = JUDGED[name]
    config = load_config(PROJECT / "config" / config_name if config_name else None)
    document = judge_file(PROJECT / name, config).document
    assert shape_problems(_written(document), VerdictDocument) == []


def test_an_error_document_is_of_the_model(tmp_path: Path) -> None:
    """The verdict of a file that could not be read fits the model too."""
    document = error_document(tmp_path / "gone.csv", "cannot read it", None)
    assert shape_problems(_written(document), VerdictDocument) == []


def test_the_check_finds_a_missing_an_unknown_and_a_mistyped_key() -> None:
    """The shape check itself notices each kind of departure."""
    config = load_config(None)
    document: dict[str, Any] = dict(
        judge_file(PROJECT / "fixtures" / "bwl-metals-pass.csv", config).document
    )
    del document["reruns"]
    document["surprise"] = 1
    document["findings"][0]["seq"] = "12"
    problems = shape_problems(_written(document), VerdictDocument)
    assert problems == [
        "$: no key 'reruns'",
        "$: unknown key 'surprise'",
        "$.findings[0].seq: '12', not int",
    ]
