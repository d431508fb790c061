"""Seeded mutation fuzz: mutated run files never break the invariants (tests/fuzzing.py).

A few hundred cases through the pipeline in memory, some through ``calwarden check
--json`` in this process, and three through real ``calwarden check`` processes. The
long run is ``python tests/benchmarks/fuzz.py --cases 10000``.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest
from fuzzing import SEEDS as SEED_CONFIGS
from fuzzing import (
    check_in_process,
    deadline,
    judge_in_memory,
    make_case,
    outcome_problems,
    seed_bytes,
    seed_configs,
    strict_json,
)

from calwarden.daemon.settings.config import load_config

PROJECT = Path(__file__).resolve().parent.parent
SEEDS = seed_bytes()
IN_MEMORY = 300
BATCH = 50


def test_a_case_number_always_gives_the_same_bytes() -> None:
    """The fuzz is reproducible: case n of a seed is the same file every time."""
    assert make_case(17, SEEDS) == make_case(17, SEEDS)
    assert make_case(17, SEEDS, seed=1) != make_case(17, SEEDS)


@pytest.mark.parametrize("first", range(0, IN_MEMORY, BATCH), ids=lambda n: f"cases-{n}")
def test_mutated_files_keep_the_invariants_in_memory(first: int) -> None:
    """Each mutated file is judged (reader, evaluation, JSON, report) keeping every invariant."""
    configs = seed_configs()
    broken = {}
    statuses = set()
    for number in range(first, first + BATCH):
        case = make_case(number, SEEDS)
        with deadline(10.0):
            status, problems = judge_in_memory(case, configs)
        statuses.add(status)
        if problems:
            broken[number] = (case.seed_name, case.mutations, problems)
    assert broken == {}
    assert "crash" not in statuses


def test_mutated_files_through_check_json_keep_the_invariants(tmp_path: Path) -> None:
    """30 mutated files through `check --json --out` in this process: JSON, exit code, outputs."""
    broken = {}
    for number in range(1000, 1030):
        case = make_case(number, SEEDS)
        path = tmp_path / f"case-{number}{Path(case.seed_name).suffix}"
        path.write_bytes(case.data)
        options = ["--out", str(tmp_path / "out")]
        if SEED_CONFIGS[case.seed_name]:
            options += ["--config", str(PROJECT / str(SEED_CONFIGS[case.seed_name]))]
        outcome = check_in_process(path, *options, seconds=10.0)
        _, problems = outcome_problems(outcome)
        if problems:
            broken[number] = (case.mutations, problems)
    assert broken == {}


def test_mutated_files_through_real_processes_keep_the_invariants(tmp_path: Path) -> None:
    """Three mutated files through real `calwarden check --json` processes, with a timeout."""
    env = dict(os.environ, PYTHONPATH=str(PROJECT))
    for number in range(2000, 2003):
        case = make_case(number, SEEDS)
        path = tmp_path / f"case-{number}{Path(case.seed_name).suffix}"
        path.write_bytes(case.data)
        config = SEED_CONFIGS[case.seed_name]
        options = ["--config", str(PROJECT / config)] if config else []
        done = subprocess.run(
            [sys.executable, "-m", "calwarden.daemon", "check", str(path), "--json", *options],
            capture_output=True,
            text=True,
            encoding="utf-8",
            timeout=60,
            env=env,
            check=False,
        )
        assert done.stderr == ""
        document = strict_json(done.stdout)
        assert done.returncode == {"pass": 0, "fail": 1, "error": 2}[document["status"]]


def test_the_checker_sees_each_broken_invariant() -> None:
    """A wrong exit code, NaN in the JSON, a silent gap in a pass and a lost row are caught."""
    from fuzzing import Outcome, document_problems, rows_problems

    from calwarden.daemon.pipeline import judge_file

    path = PROJECT / "fixtures/bwl-addition.csv"
    judgement = judge_file(path, load_config(None))
    document = dict(judgement.document)
    assert document_problems(document, 0) == []
    assert document_problems(document, 1) == ["exit code 1 with status pass"]
    assert "NaN" in outcome_problems(Outcome(0, '{"status": NaN}', ""))[1][0]
    gap = dict(document["results"][0], concentration=None, flags=[])
    assert document_problems(dict(document, results=[gap]))
    assert rows_problems(path.read_bytes(), len(judgement.run.readings) - 1)  # type: ignore[union-attr]
