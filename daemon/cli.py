"""The ``calwarden`` command line.

Exit codes: 0 pass, 1 fail, 2 error (the file could not be evaluated, or the
configuration is invalid). Heavy modules are imported inside the commands so
that ``calwarden --help`` and a cold ``check`` start quickly.
"""

from __future__ import annotations

import argparse
import gc
import json
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from daemon.config import AppConfig

EXIT_PASS, EXIT_FAIL, EXIT_ERROR = 0, 1, 2


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="calwarden",
        description="Quality-control screening of calibrated analytical runs.",
        epilog="Automated screening supports, and does not replace, the analyst's review.",
    )
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")

    check = commands.add_parser(
        "check",
        help="judge one run file and print the verdict",
        description="Judge one run file. Exit 0 pass, 1 fail, 2 error.",
    )
    check.add_argument("file", type=Path, help="the run export (native CSV format)")
    check.add_argument("--config", type=Path, help="YAML configuration (criteria and overrides)")
    check.add_argument(
        "--json", action="store_true", help="print the verdict JSON on stdout and nothing else"
    )
    check.add_argument(
        "--out",
        type=Path,
        help="also write <stem>.verdict.json, <stem>.flagged.csv and <stem>.report.txt here",
    )

    inspect = commands.add_parser(
        "inspect",
        help="show how a file is read: detected layout, mapped columns, first rows, problems",
        description="Show how calwarden reads a file, for setting up a new instrument's "
        "export: exit 0 when every row is read, 2 when some would be rejected.",
    )
    inspect.add_argument("file", type=Path, help="an export of the instrument")
    inspect.add_argument("--config", type=Path, help="YAML configuration with a format section")

    config = commands.add_parser("config", help="check a configuration or print its schema")
    config_commands = config.add_subparsers(dest="config_command", metavar="ACTION")
    config_check = config_commands.add_parser(
        "check", help="validate a configuration file (exit 0 valid, 2 not)"
    )
    config_check.add_argument("file", type=Path, help="the YAML configuration")
    config_commands.add_parser(
        "schema", help="print the configuration's JSON Schema (for editors' YAML completion)"
    )

    listing = commands.add_parser("rules", help="list every acceptance rule with its defaults")
    listing.add_argument("--config", type=Path, help="show the limits of this configuration")
    listing.add_argument("rule", nargs="?", help="explain one rule in full")
    return parser


def _check(args: argparse.Namespace) -> int:
    # One short-lived process building many small acyclic objects: the cycle collector
    # would only rescan them over and over (about a tenth of a large run's time).
    gc.disable()
    from daemon.config import load_config
    from daemon.outputs import write_outputs
    from daemon.pipeline import judge_file
    from daemon.report import render
    from daemon.verdict_json import dump_verdict
    from rules.errors import ConfigError

    try:
        config = load_config(args.config)
        summary_only = not args.json and args.out is None
        judgement = judge_file(args.file, config, summary_only=summary_only)
    except ConfigError as error:
        return _check_failed(args, f"configuration error: {error}")
    except Exception as error:  # a bug of ours must still give a verdict, not a traceback
        message = f"internal error while judging the file ({type(error).__name__}: {error})"
        return _check_failed(args, message)

    document = judgement.document
    if args.out is not None:
        try:
            write_outputs(args.out, args.file.stem, document, judgement.table, judgement.verdict)
        except OSError as error:
            print(f"calwarden: cannot write to {args.out}: {error}", file=sys.stderr)
            if args.json:  # --json always puts the verdict on stdout
                print(dump_verdict(document))
            return EXIT_ERROR
    if args.json:
        print(dump_verdict(document))
    else:
        print(render(document, full=False), end="")
        if args.out is not None:
            print(f"\nverdict, flagged copy and report written to {args.out}")
    return {"pass": EXIT_PASS, "fail": EXIT_FAIL}.get(document["status"], EXIT_ERROR)


def _check_failed(args: argparse.Namespace, message: str) -> int:
    from daemon.pipeline import error_document

    if args.json:
        print(json.dumps(error_document(args.file, message, None), indent=2))
    else:
        print(f"calwarden: {message}", file=sys.stderr)
    return EXIT_ERROR


def _load_config_or_say_why(path: Path | None) -> AppConfig | None:
    """The configuration, or ``None`` after printing why it is invalid."""
    from daemon.config import load_config
    from rules.errors import ConfigError

    try:
        return load_config(path)
    except ConfigError as error:
        print(f"calwarden: configuration error: {error}", file=sys.stderr)
        return None


def _inspect(args: argparse.Namespace) -> int:
    from daemon.inspection import inspect_file, render_inspection

    config = _load_config_or_say_why(args.config)
    if config is None:
        return EXIT_ERROR
    inspection = inspect_file(args.file, config)
    print(render_inspection(inspection), end="")
    return EXIT_ERROR if inspection.fatal or inspection.problems else EXIT_PASS


def _config(args: argparse.Namespace) -> int:
    from daemon.config import AppConfig

    if args.config_command == "schema":
        schema = AppConfig.model_json_schema()
        schema = {"$schema": "https://json-schema.org/draft/2020-12/schema", **schema}
        schema["title"] = "calwarden configuration"
        print(json.dumps(schema, indent=2, ensure_ascii=False))
        return EXIT_PASS
    if args.config_command != "check":
        print("calwarden: say `config check FILE` or `config schema`", file=sys.stderr)
        return EXIT_ERROR
    config = _load_config_or_say_why(args.file)
    if config is None:
        return EXIT_ERROR
    overrides = len(config.criteria.analytes)
    layout = "an export format" if config.format else "the native CSV format"
    print(f"{args.file}: valid ({overrides} analyte override(s), reads {layout})")
    return EXIT_PASS


def _rules(args: argparse.Namespace) -> int:
    from rules.registry import all_rules

    config = _load_config_or_say_why(args.config)
    if config is None:
        return EXIT_ERROR
    rules = all_rules()
    if args.rule:
        chosen = [r for r in rules if r.id == args.rule]
        if not chosen:
            print(
                f"calwarden: no rule {args.rule!r}; `calwarden rules` lists them", file=sys.stderr
            )
            return EXIT_ERROR
        rule = chosen[0]
        print(f"{rule.id}: {rule.summary}\n\n{rule.explanation}")
        return EXIT_PASS
    disabled = set(config.criteria.disabled_rules)
    width = max(len(r.id) for r in rules)
    for rule in rules:
        state = "  (switched off)" if rule.id in disabled else ""
        print(f"{rule.id:<{width}}  {rule.summary}{state}")
    print("\n`calwarden rules RULE` explains one rule: why, its settings and examples.")
    return EXIT_PASS


def main(argv: Sequence[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    if args.version:
        from daemon.verdict_json import calwarden_version

        print(f"calwarden {calwarden_version()}")
        return EXIT_PASS
    if args.command == "check":
        return _check(args)
    if args.command == "rules":
        return _rules(args)
    if args.command == "inspect":
        return _inspect(args)
    if args.command == "config":
        return _config(args)
    _parser().print_help()
    return EXIT_ERROR


if __name__ == "__main__":
    sys.exit(main())
