"""`calwarden check` and `calwarden rules`: exit codes, output, files written."""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from calwarden.daemon.cli.main import main

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
PASSING = FIXTURES / "bwl-metals-pass.csv"
FAILING = FIXTURES / "bwl-metals-fail.csv"
BROKEN = FIXTURES / "bwl-bad-missing-nominal.csv"


@pytest.mark.parametrize(
    ("path", "code"), [(PASSING, 0), (FAILING, 1), (BROKEN, 2)], ids=["pass", "fail", "error"]
)
def test_exit_code_follows_the_status(
    path: Path, code: int, capsys: pytest.CaptureFixture[str]
) -> None:
    """check exits 0 on pass, 1 on fail and 2 on a file that cannot be evaluated."""
    assert main(["check", str(path)]) == code


@pytest.mark.parametrize("path", [PASSING, FAILING, BROKEN], ids=["pass", "fail", "error"])
def test_json_flag_prints_only_the_verdict(path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """With --json, stdout is exactly one JSON document, also for an error."""
    main(["check", str(path), "--json"])
    out = capsys.readouterr().out
    document = json.loads(out)
    assert document["source"]["path"] == str(path)
    assert document["status"] in {"pass", "fail", "error"}


def test_an_extreme_nominal_fails_quietly_with_json(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A standard of 1e300 with --json: exit 1, one JSON document, nothing on stderr."""
    lines = PASSING.read_text(encoding="utf-8").splitlines()
    lines[5] = lines[5].replace(",10644.6,1,", ",10644.6,1e300,")  # CAL-1 Zn
    path = tmp_path / "extreme.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    assert main(["check", str(path), "--json"]) == 1
    captured = capsys.readouterr()
    assert json.loads(captured.out)["status"] == "fail"
    assert captured.err == ""


def test_summary_names_the_samples_to_rerun(capsys: pytest.CaptureFixture[str]) -> None:
    """The readable summary lists each sample to re-run and why."""
    main(["check", str(FAILING)])
    out = capsys.readouterr().out
    assert "BW-1124-18 (seq 38) — Cu: over range; dilute to 5x in total" in out
    assert "Samples to re-run (14)" in out  # the failed duplicate is measured again


def test_out_writes_verdict_flagged_copy_and_report(tmp_path: Path) -> None:
    """--out writes the five files, and the flagged copy keeps every input row and column."""
    main(["check", str(FAILING), "--out", str(tmp_path)])
    names = sorted(p.name for p in tmp_path.iterdir())
    assert names == [
        "bwl-metals-fail.flagged.csv",
        "bwl-metals-fail.report.html",
        "bwl-metals-fail.report.txt",
        "bwl-metals-fail.reruns.csv",
        "bwl-metals-fail.verdict.json",
    ]
    source = FAILING.read_text(encoding="utf-8").splitlines()
    flagged = (tmp_path / "bwl-metals-fail.flagged.csv").read_text(encoding="utf-8").splitlines()
    assert len(flagged) == len(source)
    added = "concentration,uncertainty,result_unit,flags,reported_as,reporting_limit,qualifiers"
    assert flagged[0] == f"{source[0]},{added}"
    assert all(row.startswith(original) for row, original in zip(flagged, source, strict=True))


def test_flagged_copy_marks_the_over_range_sample(tmp_path: Path) -> None:
    """The flagged copy carries the over_range flag, and the E qualifier, on the sample's Cu row."""
    main(["check", str(FAILING), "--out", str(tmp_path)])
    rows = (tmp_path / "bwl-metals-fail.flagged.csv").read_text(encoding="utf-8").splitlines()
    cu_18 = [r for r in rows if r.startswith("38,BW-1124-18,sample,Cu,")]
    assert len(cu_18) == 1 and cu_18[0].endswith("over_range,,,E")


def test_error_verdict_is_written_too(tmp_path: Path) -> None:
    """A file that cannot be evaluated still gets a verdict and a report, with the reason."""
    assert main(["check", str(BROKEN), "--out", str(tmp_path)]) == 2
    document = json.loads((tmp_path / "bwl-bad-missing-nominal.verdict.json").read_text("utf-8"))
    assert document["status"] == "error"
    assert "line 15" in document["error"] and "nominal" in document["error"]


def test_bad_config_exits_2_with_a_message(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """An invalid configuration gives exit 2 and a one-line message naming the key."""
    config = tmp_path / "lab.yaml"
    config.write_text("criteria:\n  defaults:\n    ccv_recovery: [90, 110]\n", encoding="utf-8")
    assert main(["check", str(PASSING), "--config", str(config)]) == 2
    err = capsys.readouterr().err
    assert "criteria.defaults.ccv_recovery: unknown key (did you mean ccv_recovery_pct?)" in err


def test_missing_file_is_an_error_verdict(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A path that does not exist is judged error with exit 2, not a traceback."""
    assert main(["check", str(tmp_path / "absent.csv"), "--json"]) == 2
    assert json.loads(capsys.readouterr().out)["status"] == "error"


def test_rules_lists_every_rule(capsys: pytest.CaptureFixture[str]) -> None:
    """`calwarden rules` lists each rule id with its summary."""
    assert main(["rules"]) == 0
    out = capsys.readouterr().out
    assert "check.recovery" in out and "range.over" in out


def test_rules_explains_one_rule(capsys: pytest.CaptureFixture[str]) -> None:
    """`calwarden rules ID` prints the rule's explanation with its source."""
    assert main(["rules", "check.recovery"]) == 0
    assert "6010D" in capsys.readouterr().out


def test_installed_command_runs_without_traceback(tmp_path: Path) -> None:
    """The console entry point, run as a process, prints no traceback on garbage input."""
    garbage = tmp_path / "garbage.csv"
    garbage.write_bytes(bytes(range(256)) * 8)
    result = subprocess.run(
        [sys.executable, "-m", "calwarden.daemon", "check", str(garbage)],
        capture_output=True,
        text=True,
        check=False,
    )
    assert result.returncode == 2
    assert "Traceback" not in result.stdout + result.stderr
    assert "binary" in result.stdout


def test_config_check_accepts_every_shipped_configuration(
    capsys: pytest.CaptureFixture[str],
) -> None:
    """`calwarden config check` exits 0 on each configuration in config/."""
    for path in sorted((FIXTURES.parent / "config").glob("*.yaml")):
        assert main(["config", "check", str(path)]) == 0, capsys.readouterr().err


def test_config_check_refuses_a_bad_key(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """`calwarden config check` exits 2 and names the bad key with a hint."""
    config = tmp_path / "lab.yaml"
    config.write_text("format:\n  delimeter: ';'\n", encoding="utf-8")
    assert main(["config", "check", str(config)]) == 2
    assert "format.delimeter: unknown key (did you mean delimiter?)" in capsys.readouterr().err


def test_config_schema_is_json_schema_of_the_whole_configuration(
    capsys: pytest.CaptureFixture[str],
) -> None:
    """`calwarden config schema` prints a JSON Schema that forbids unknown keys."""
    assert main(["config", "schema"]) == 0
    schema = json.loads(capsys.readouterr().out)
    assert schema["additionalProperties"] is False
    assert {"criteria", "format"} <= set(schema["properties"])


def test_flagged_copy_of_a_wide_export_keeps_each_analyte_apart(tmp_path: Path) -> None:
    """In a wide export's flagged copy each analyte's row carries that analyte's own result."""
    export = FIXTURES / "exports" / "bwl-lcms-herbicides.csv"
    config = FIXTURES.parent / "config" / "export-lcms-wide.yaml"
    main(["check", str(export), "--config", str(config), "--out", str(tmp_path)])
    document = json.loads((tmp_path / "bwl-lcms-herbicides.verdict.json").read_text("utf-8"))
    expected = {
        (r["seq"], r["analyte"]): repr(r["concentration"])
        for r in document["results"]
        if r["concentration"] is not None
    }
    flagged = (tmp_path / "bwl-lcms-herbicides.flagged.csv").read_text("utf-8").splitlines()
    header = flagged[0].split(",")
    seq, kind, analyte, concentration = (
        header.index(n) for n in ("seq", "kind", "analyte", "concentration")
    )
    found = {}
    for line in csv.reader(flagged[1:]):
        if line[concentration] and line[kind] != "cal":  # standards carry their read-back value
            found[(int(line[seq]), line[analyte])] = line[concentration]
    assert found == expected


def test_unwritable_out_still_prints_the_json(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """With --json, an --out folder that cannot be written still leaves the verdict on stdout."""
    blocker = tmp_path / "file-not-folder"
    blocker.write_text("", encoding="utf-8")
    assert main(["check", str(PASSING), "--json", "--out", str(blocker / "out")]) == 2
    captured = capsys.readouterr()
    assert json.loads(captured.out)["status"] == "pass"
    assert "cannot write" in captured.err


def test_ascii_terminal_prints_a_passing_verdict() -> None:
    """With an ASCII-only terminal encoding a passing run still exits 0 (text is replaced)."""
    env = {**os.environ, "PYTHONIOENCODING": "ascii"}
    done = subprocess.run(
        [sys.executable, "-m", "calwarden.daemon", "check", str(FIXTURES / "bwl-metals-pass.csv")],
        env=env,
        capture_output=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    assert b"Traceback" not in done.stderr


def test_closed_pipe_ends_quietly() -> None:
    """A reader that closes the pipe early ends the command quietly, with no traceback."""
    command = [sys.executable, "-m", "calwarden.daemon", "check", str(PASSING), "--json"]
    with subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE) as process:
        assert process.stdout is not None and process.stderr is not None
        process.stdout.close()  # before the command has started: its first write meets no reader
        errors = process.stderr.read()
        code = process.wait(timeout=120)
    assert b"Traceback" not in errors and b"BrokenPipe" not in errors
    assert code == 141


def test_a_crash_exits_2_with_one_line(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """An uncaught exception is one line on stderr and exit 2, never 1 ("fail")."""
    import calwarden.daemon.cli.main as cli

    def broken(args: object) -> int:
        raise RuntimeError("something of ours broke")

    monkeypatch.setattr(cli, "_rules", broken)
    assert cli.main(["rules"]) == 2
    assert (
        capsys.readouterr().err
        == "calwarden: internal error: RuntimeError: something of ours broke\n"
    )


def test_flagged_copy_neutralises_formulas_but_not_numbers(tmp_path: Path) -> None:
    """A sample id that a spreadsheet would run as a formula is written as text; numbers stay."""
    text = PASSING.read_text(encoding="utf-8")
    first_sample = next(line for line in text.splitlines() if ",sample," in line).split(",")[1]
    attack = tmp_path / "attack.csv"
    attack.write_text(text.replace(f",{first_sample},", ",=cmd|' /C calc'!A0,"), encoding="utf-8")
    main(["check", str(attack), "--out", str(tmp_path)])
    with (tmp_path / "attack.flagged.csv").open(encoding="utf-8", newline="") as stream:
        rows = list(csv.DictReader(stream))
    ids = {row["sample_id"] for row in rows}
    assert "'=cmd|' /C calc'!A0" in ids and "=cmd|' /C calc'!A0" not in ids
    assert all(float(row["response"]) == float(row["response"]) for row in rows)


@pytest.mark.parametrize(
    ("cell", "written"),
    [("=1+1", "'=1+1"), ("+1+1", "'+1+1"), ("@SUM(A1)", "'@SUM(A1)"), ("\tx", "'\tx"),
     ("-0.5", "-0.5"), ("+1e-3", "+1e-3"), ("Cu", "Cu")],
)  # fmt: skip
def test_formula_like_cells_get_a_leading_quote(cell: str, written: str) -> None:
    """Text starting =, +, -, @, tab or CR gets a leading quote (OWASP CSV injection)."""
    from calwarden.daemon.outputs.files import neutralised

    assert neutralised(cell) == written


@pytest.mark.parametrize("kind", ["fifo", "device", "link-to-device", "folder"])
def test_what_is_not_a_regular_file_is_refused_at_once(tmp_path: Path, kind: str) -> None:
    """check refuses a FIFO, a device, a link to one or a folder at once, exit 2, no hang."""
    target = tmp_path / "run.csv"
    if kind == "fifo":
        os.mkfifo(target)
    elif kind == "device":
        target = Path("/dev/zero")
    elif kind == "link-to-device":
        target.symlink_to("/dev/zero")
    else:
        target.mkdir()
    for extra in ([], ["--json"]):
        done = subprocess.run(
            [sys.executable, "-m", "calwarden.daemon", "check", str(target), *extra],
            capture_output=True,
            text=True,
            timeout=60,
            check=False,
        )
        assert done.returncode == 2, done.stdout + done.stderr
        assert "Traceback" not in done.stderr


def test_version_is_read_without_importing_numpy() -> None:
    """``calwarden --version`` prints the installed version and loads no numpy to learn it."""
    from importlib.metadata import version

    code = (
        "import sys; from calwarden.daemon.cli.main import main; "
        "main(['--version']); print('numpy' in sys.modules)"
    )
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    )
    assert result.stdout.split() == ["calwarden", version("calwarden"), "False"]


def test_rules_lists_the_control_chart_rules_with_their_severity(
    capsys: pytest.CaptureFixture[str],
) -> None:
    """`calwarden rules` lists the control.* rules verdicts use, each with its severity."""
    assert main(["rules"]) == 0
    listing = capsys.readouterr().out
    assert "control.1-3.5s" in listing and "(fail)" in listing
    assert main(["rules", "control.1-3s"]) == 0
    assert "Westgard" in capsys.readouterr().out


def test_rules_shows_the_configured_limits(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """With --config, a rule's explanation ends with the limits that configuration sets."""
    config = tmp_path / "lab.yaml"
    config.write_text(
        "criteria:\n  defaults: {ccv_recovery_pct: [85, 115]}\n"
        "  analytes: {Pb: {ccv_recovery_pct: [80, 120]}}\n",
        encoding="utf-8",
    )
    assert main(["rules", "check.recovery", "--config", str(config)]) == 0
    out = capsys.readouterr().out
    assert "ccv_recovery_pct: 85–115" in out and "Pb: 80–120" in out
    assert "``" not in out


def test_unknown_rule_suggests_the_nearest(capsys: pytest.CaptureFixture[str]) -> None:
    """A mistyped rule id gets a did-you-mean with the nearest ids."""
    assert main(["rules", "check.recovry"]) == 2
    assert "did you mean check.recovery" in capsys.readouterr().err


HOSTILE_RUN = "BWL\x1b[2J\x1b]0;owned\x07-RUN"


def _hostile_run(tmp_path: Path) -> Path:
    """The failing fixture with its run named with terminal escapes, in a file named with CR."""
    text = FAILING.read_text(encoding="utf-8").replace("BWL-ICPMS-2-20261124-A", HOSTILE_RUN)
    path = tmp_path / "run\rone.csv"
    path.write_text(text, encoding="utf-8")
    return path


def _controls(text: str) -> set[str]:
    return {c for c in text if (ord(c) < 0x20 and c != "\n") or 0x7F <= ord(c) < 0xA0}


def test_terminal_summary_escapes_control_characters(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A run named with ESC sequences in a file named with CR: the summary shows escapes."""
    main(["check", str(_hostile_run(tmp_path))])
    out = capsys.readouterr().out
    assert _controls(out) == set()
    assert "run:        BWL\\x1b[2J\\x1b]0;owned\\x07-RUN" in out
    assert "run\\rone.csv" in out


def test_report_file_escapes_control_characters(tmp_path: Path) -> None:
    """report.txt of the same run holds no raw control character, only their escapes."""
    main(["check", str(_hostile_run(tmp_path)), "--out", str(tmp_path / "out")])
    (report,) = (tmp_path / "out").glob("*.report.txt")
    text = report.read_text(encoding="utf-8")
    assert _controls(text) == set()
    assert "BWL\\x1b[2J" in text


def test_verdict_json_keeps_the_exact_run_name(tmp_path: Path) -> None:
    """The verdict JSON is data, not display: it keeps the run name byte for byte."""
    main(["check", str(_hostile_run(tmp_path)), "--out", str(tmp_path / "out")])
    (verdict,) = (tmp_path / "out").glob("*.verdict.json")
    assert json.loads(verdict.read_text(encoding="utf-8"))["run"] == HOSTILE_RUN
