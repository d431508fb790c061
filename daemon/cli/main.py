"""The ``calwarden`` command line.

Exit codes: 0 pass, 1 fail, 2 error (the file could not be evaluated, or the
configuration is invalid). Heavy modules are imported inside the commands so
that ``calwarden --help`` and a cold ``check`` start quickly, and ``calwarden
--version`` alone imports nothing of calwarden's but this module
(``tests/benchmarks/bench_startup.py`` measures both).
"""

from __future__ import annotations

import argparse
import gc
import re
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any, NamedTuple

if TYPE_CHECKING:
    from calwarden.daemon.settings.config import AppConfig

EXIT_PASS, EXIT_FAIL, EXIT_ERROR = 0, 1, 2
EXIT_FAULT = (
    3  # the daemon stopped on a fault it cannot recover from; a service manager restarts it
)


def _chart_options(default: object) -> argparse.ArgumentParser:
    """The options of ``chart`` and its actions; accepted before or after the action."""
    options = argparse.ArgumentParser(add_help=False)
    options.add_argument(
        "--out", type=Path, default=default, help="the daemon's output folder (default: here)"
    )
    options.add_argument(
        "--config", type=Path, default=default, help="or: the daemon's configuration"
    )
    options.add_argument("--instrument", default=default, help="only this instrument's series")
    options.add_argument(
        "--analyte", default=default, help="only this analyte's (or internal standard's) series"
    )
    options.add_argument("--kind", default=default, help="only ICV, CCV, LCS, ISTD or slope series")
    return options


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
    check.add_argument(
        "file",
        type=Path,
        help="the run export: native CSV, or the layout that --config's format section describes",
    )
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
    config_commands.add_parser(
        "presets", help="list the method presets and check each (exit 0 all valid, 2 not)"
    )

    watch = commands.add_parser(
        "watch",
        help="watch export folders and judge every file as it lands",
        description="Watch an instrument's export folder: judge each file once it is "
        "complete, write its verdict, flagged copy and report to --out. Runs until "
        "Ctrl+C or SIGTERM (exit 0); exit 2 when it cannot start, 3 after a fault.",
    )
    watch.add_argument(
        "inbox", nargs="?", type=Path, help="the folder to watch (or list inboxes in --config)"
    )
    watch.add_argument("--out", type=Path, help="folder for the outputs (or watch.out)")
    watch.add_argument("--config", type=Path, help="YAML configuration")
    watch.add_argument(
        "--settle",
        type=float,
        metavar="SECONDS",
        help="a file is complete when unchanged for this long (default 2)",
    )
    watch.add_argument(
        "--polling",
        action="store_true",
        default=None,
        help="list the folders instead of waiting for events (network shares)",
    )

    status = commands.add_parser("status", help="what the daemon has done, from its ledger")
    status.add_argument("--out", type=Path, help="the daemon's output folder (default: here)")
    status.add_argument("--config", type=Path, help="or: the daemon's configuration")
    status.add_argument(
        "--json", action="store_true", help="print the status as JSON (keys in the README)"
    )

    alert = commands.add_parser("alert", help="check that alerts reach their recipients")
    alert_commands = alert.add_subparsers(dest="alert_command", metavar="ACTION")
    alert_test = alert_commands.add_parser(
        "test",
        help="send a test message through the configured SMTP server and webhook now",
        description="Sends one test message through every configured channel and says "
        "what happened; with no SMTP server configured, writes it to the outbox folder.",
    )
    alert_test.add_argument("--config", type=Path, help="the daemon's configuration")
    alert_test.add_argument("--out", type=Path, help="the daemon's output folder (default: here)")

    chart_options = _chart_options(argparse.SUPPRESS)  # an action keeps what came before it
    chart = commands.add_parser(
        "chart",
        parents=[_chart_options(None)],
        help="draw the control charts, export the control log, or set new limits",
        description="Without an action: draw the chosen control charts as PNG files in "
        "<out>/charts/ and say where they are.",
    )
    chart.add_argument(
        "--axis",
        choices=("run", "time"),
        help="x axis of the drawn charts: run order, evenly spaced, or acquisition time "
        "(default: control.chart_axis, run)",
    )
    chart_commands = chart.add_subparsers(dest="chart_command", metavar="ACTION")
    chart_commands.add_parser(
        "export",
        parents=[chart_options],
        help="write the control log as CSV (every point, its limits and z-score)",
    ).add_argument("--file", type=Path, help="write here instead of stdout")
    chart_commands.add_parser(
        "baseline",
        parents=[chart_options],
        help="set new limits from each series' most recent in-control points "
        "(the earlier limits are kept, with their dates)",
    )

    store = commands.add_parser(
        "store",
        help="bring the ledger's schema up to date, or copy a PC's ledger into the lab's",
        description="Works on the ledger that --config's store section names (a lab's "
        "PostgreSQL server), or on the state folder's SQLite file.",
    )
    store_commands = store.add_subparsers(dest="store_command", metavar="ACTION")
    store_options = argparse.ArgumentParser(add_help=False)
    store_options.add_argument("--config", type=Path, help="the daemon's configuration")
    store_options.add_argument(
        "--out", type=Path, help="the daemon's output folder (default: here)"
    )
    store_commands.add_parser(
        "migrate",
        parents=[store_options],
        help="apply every schema version the ledger lacks (as the tables' owner)",
    )
    store_copy = store_commands.add_parser(
        "copy",
        parents=[store_options],
        help="copy a SQLite ledger's history into this ledger, exactly once even if "
        "interrupted and run again",
    )
    store_copy.add_argument(
        "--from",
        dest="source",
        type=Path,
        required=True,
        metavar="SQLITE_LEDGER",
        help="the PC's ledger file (<state>/ledger.sqlite3; its daemon stopped)",
    )
    store_copy.add_argument(
        "--batch", type=int, default=500, help="rows per transaction (default 500)"
    )

    demo = commands.add_parser(
        "demo", help="watch a demo folder while example runs land in it, then summarise"
    )
    demo.add_argument(
        "--dir", type=Path, default=Path("calwarden-demo"), help="default ./calwarden-demo"
    )

    listing = commands.add_parser("rules", help="list every acceptance rule with its defaults")
    listing.add_argument("--config", type=Path, help="show the limits of this configuration")
    listing.add_argument(
        "--preset", help="show the limits of this method preset (over --config's criteria)"
    )
    listing.add_argument("rule", nargs="?", help="explain one rule in full")
    return parser


def _check(args: argparse.Namespace) -> int:
    # One short-lived process building many small acyclic objects: the cycle collector
    # would only rescan them over and over (about a tenth of a large run's time).
    gc.disable()
    from calwarden.daemon.outputs.verdict_json import dump_verdict
    from calwarden.daemon.pipeline import judge_file
    from calwarden.daemon.settings.config import load_config
    from calwarden.rules.errors import ConfigError

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
        from calwarden.daemon.outputs.files import fitting_stem, write_outputs

        try:
            write_outputs(
                args.out,
                fitting_stem(args.file.stem),
                document,
                judgement.table,
                judgement.verdict,
                worklist=config.worklist,
                checks_every=config.criteria.defaults.max_field_samples_between_checks,
            )
        except OSError as error:
            print(f"calwarden: cannot write to {args.out}: {error}", file=sys.stderr)
            if args.json:  # --json always puts the verdict on stdout
                print(dump_verdict(document))
            return EXIT_ERROR
    if args.json:
        print(dump_verdict(document))
    else:
        from calwarden.daemon.outputs.report import render

        print(render(document, full=False), end="")
        if args.out is not None:
            print(f"\nverdict, flagged copy, reports and any re-run worklist written to {args.out}")
    return {"pass": EXIT_PASS, "fail": EXIT_FAIL}.get(document["status"], EXIT_ERROR)


def _check_failed(args: argparse.Namespace, message: str) -> int:
    import json

    from calwarden.daemon.pipeline import error_document

    if args.json:
        print(json.dumps(error_document(args.file, message, None), indent=2))
    else:
        print(f"calwarden: {message}", file=sys.stderr)
    return EXIT_ERROR


def _load_config_or_say_why(path: Path | None) -> AppConfig | None:
    """The configuration, or ``None`` after printing why it is invalid."""
    from calwarden.daemon.settings.config import load_config
    from calwarden.rules.errors import ConfigError

    try:
        return load_config(path)
    except ConfigError as error:
        print(f"calwarden: configuration error: {error}", file=sys.stderr)
        return None


def _inspect(args: argparse.Namespace) -> int:
    from calwarden.daemon.parsing.inspection import inspect_file, render_inspection

    config = _load_config_or_say_why(args.config)
    if config is None:
        return EXIT_ERROR
    inspection = inspect_file(args.file, config)
    print(render_inspection(inspection), end="")
    return EXIT_ERROR if inspection.fatal or inspection.problems else EXIT_PASS


def _config(args: argparse.Namespace) -> int:
    from calwarden.daemon.settings.config import AppConfig

    if args.config_command == "schema":
        import json

        schema = AppConfig.model_json_schema()
        schema = {"$schema": "https://json-schema.org/draft/2020-12/schema", **schema}
        schema["title"] = "calwarden configuration"
        print(json.dumps(schema, indent=2, ensure_ascii=False))
        return EXIT_PASS
    if args.config_command == "presets":
        return _presets()
    if args.config_command != "check":
        print(
            "calwarden: say `config check FILE`, `config schema` or `config presets`",
            file=sys.stderr,
        )
        return EXIT_ERROR
    config = _load_config_or_say_why(args.file)
    if config is None:
        return EXIT_ERROR
    if config.preset:
        print(f"preset: {config.preset} (its criteria under this file's own)")
    overrides = len(config.criteria.analytes)
    layout = "an export format" if config.format else "the native CSV format"
    inboxes = f", {len(config.inboxes)} inbox(es)" if config.inboxes else ""
    print(f"{args.file}: valid ({overrides} analyte override(s), reads {layout}{inboxes})")
    alerts = config.alerts
    if not alerts.enabled:
        print("alerts: off")
    elif alerts.email.host:
        email = alerts.email
        print(
            f"alerts: e-mail via {email.host}:{email.effective_port} ({email.security}), "
            f"{len(alerts.routes)} route(s); `calwarden alert test --config {args.file}` "
            "sends a test message"
        )
    else:
        print("alerts: written as .eml files in <state>/outbox/ only (no alerts.email.host)")
    return EXIT_PASS


def _presets() -> int:
    """List the presets that come with calwarden, each checked; 2 when one is broken."""
    from calwarden.daemon.settings.presets import PRESETS_DIR, load_preset, preset_names
    from calwarden.rules.errors import ConfigError

    names = preset_names()
    if not names:
        print(f"calwarden: no presets in {PRESETS_DIR}", file=sys.stderr)
        return EXIT_ERROR
    broken = 0
    width = max(len(name) for name in names)
    for name in names:
        try:
            preset = load_preset(name)
        except ConfigError as error:
            broken += 1
            print(f"calwarden: {error}", file=sys.stderr)
            continue
        print(f"{name:<{width}}  {preset.title}: {preset.method}")
    print(
        "\n`preset: NAME` in a configuration uses one (its own criteria override the "
        "preset's);\n`calwarden rules --preset NAME` shows its criteria and their sources. "
        "Presets are starting\npoints to check against the lab's own method and "
        "accreditation, not a substitute for them."
    )
    return EXIT_ERROR if broken else EXIT_PASS


def _preset_config(args: argparse.Namespace) -> AppConfig | None:
    """``--config``'s configuration with ``--preset`` in it, or ``None`` after saying why."""
    from calwarden.daemon.settings.config import build_config, parse_yaml
    from calwarden.rules.errors import ConfigError

    try:
        data: Any = {}
        source, base = "--preset", None
        if args.config is not None:
            text = args.config.read_text(encoding="utf-8")
            data = parse_yaml(text, str(args.config)) or {}
            source, base = str(args.config), args.config.parent
        if not isinstance(data, dict):
            return build_config(data, source, base)  # it names the mistake
        return build_config({**data, "preset": args.preset}, source, base)
    except (ConfigError, OSError, UnicodeDecodeError) as error:
        print(f"calwarden: configuration error: {error}", file=sys.stderr)
        return None


def _preset_lines(name: str, base: Path | None) -> list[str]:
    """The preset's criteria with their sources, for `calwarden rules --preset`."""
    from calwarden.daemon.settings.presets import load_preset

    preset = load_preset(name, base)
    lines = ["", f"Preset {preset.name}: {preset.title} ({preset.method})"]
    for item in preset.criteria:
        lines.append(f"  {item.key}: {_setting_text(_preset_value(item.value))}")
        lines.append(f"      source: {item.source}")
    for item in preset.disabled_rules:
        lines.append(f"  switched off: {item.key}")
        lines.append(f"      source: {item.source}")
    if preset.notes:
        lines.append(f"  notes: {preset.notes}")
    lines.append(
        "  A starting point to check against the lab's own method and accreditation, "
        "not a substitute for them."
    )
    return lines


def _preset_value(value: object) -> object:
    if isinstance(value, list):
        return tuple(float(v) if isinstance(v, int) else v for v in value)
    if isinstance(value, dict):
        return ", ".join(f"{k}: {v}" for k, v in value.items())
    return value


class _Listed(NamedTuple):
    """One rule as `calwarden rules` shows it: acceptance rules and control-chart rules alike."""

    id: str
    summary: str
    explanation: str
    state: str = ""  # "switched off", or a control rule's severity under this configuration


def _plain(text: str) -> str:
    """Docstring text for a terminal: reST ``literals`` shown as plain words."""
    return re.sub(
        r"``([^`]+)``", r"\1", re.sub(r":(?:func|class|data|mod):`~?([^`]+)`", r"\1", text)
    )


def _listed_rules(config: AppConfig) -> list[_Listed]:
    import inspect

    from calwarden.rules.control import WESTGARD_RULES, ewma_violations
    from calwarden.rules.registry import all_rules

    disabled = set(config.criteria.disabled_rules)
    listed = [
        _Listed(r.id, r.summary, r.explanation, "switched off" if r.id in disabled else "")
        for r in all_rules()
    ]
    control = config.control
    for rule in WESTGARD_RULES.values():
        if rule.id not in control.rules:
            state = "not applied"
        elif rule.id in control.rejecting:
            state = control.rejection_severity
        else:
            state = control.warning_severity
        explanation = inspect.cleandoc(rule.find.__doc__ or "")
        listed.append(_Listed(f"control.{rule.id}", rule.summary, explanation, state))
    explanation = inspect.cleandoc(ewma_violations.__doc__ or "")
    state = control.ewma_severity if control.ewma else "not applied"
    listed.append(_Listed("control.ewma", "EWMA of a series beyond its limits", explanation, state))
    return listed


def _configured_settings(rule: _Listed, config: AppConfig) -> list[str]:
    """The criteria a rule's explanation names, as this configuration sets them."""
    from calwarden.rules.criteria import AnalyteCriteria

    named = [
        key
        for key in dict.fromkeys(re.findall(r"`+([a-z_]+)`+", rule.explanation))
        if key in AnalyteCriteria.model_fields
    ]
    if not named:
        return []
    criteria = config.criteria
    lines = ["", "In this configuration:"]
    for key in named:
        lines.append(f"  {key}: {_setting_text(getattr(criteria.defaults, key))}")
        for analyte, override in criteria.analytes.items():
            if key in override:
                value = getattr(criteria.for_analyte(analyte), key)
                lines.append(f"    {analyte}: {_setting_text(value)}")
    return lines


def _setting_text(value: object) -> str:
    if isinstance(value, tuple):
        return "–".join(f"{v:g}" if isinstance(v, float) else str(v) for v in value)
    if isinstance(value, float):
        return f"{value:g}"
    return "none" if value is None else str(getattr(value, "value", value))


def _rules(args: argparse.Namespace) -> int:
    import difflib

    config = _preset_config(args) if args.preset else _load_config_or_say_why(args.config)
    if config is None:
        return EXIT_ERROR
    rules = _listed_rules(config)
    if args.rule:
        chosen = [r for r in rules if r.id == args.rule]
        if not chosen:
            ids = [r.id for r in rules]
            near = difflib.get_close_matches(args.rule, ids, n=3, cutoff=0.5)
            hint = f"; did you mean {' or '.join(near)}?" if near else ""
            print(
                f"calwarden: no rule {args.rule!r}{hint} (`calwarden rules` lists them)",
                file=sys.stderr,
            )
            return EXIT_ERROR
        rule = chosen[0]
        state = f"  ({rule.state})" if rule.state else ""
        print(f"{rule.id}: {rule.summary}{state}\n\n{_plain(rule.explanation)}")
        for line in _configured_settings(rule, config):
            print(line)
        return EXIT_PASS
    width = max(len(r.id) for r in rules)
    for rule in rules:
        state = f"  ({rule.state})" if rule.state else ""
        print(f"{rule.id:<{width}}  {rule.summary}{state}")
    print("\n`calwarden rules RULE` explains one rule: why, its settings and examples.")
    if args.preset:
        for line in _preset_lines(args.preset, args.config.parent if args.config else None):
            print(line)
    return EXIT_PASS


def _watch(args: argparse.Namespace) -> int:
    import signal
    import threading

    from calwarden.daemon.intake.watcher import StartError, Watcher
    from calwarden.daemon.logs import configure_logging
    from calwarden.daemon.settings.config import plan_watch
    from calwarden.rules.errors import ConfigError

    config = _load_config_or_say_why(args.config)
    if config is None:
        return EXIT_ERROR
    try:
        plan = plan_watch(
            config,
            config_dir=args.config.resolve().parent if args.config else None,
            inbox=args.inbox,
            out=args.out,
            settle_seconds=args.settle,
            polling=args.polling,
        )
    except ConfigError as error:
        print(f"calwarden: {error}", file=sys.stderr)
        return EXIT_ERROR
    try:
        undo_logging = configure_logging(
            plan.state_dir,
            max_bytes=plan.settings.log_max_bytes,
            backups=plan.settings.log_backups,
        )
    except OSError as error:
        print(
            f"calwarden: cannot write the state folder {plan.state_dir}: {error}", file=sys.stderr
        )
        return EXIT_ERROR
    stop = threading.Event()

    def request_stop(signum: int, frame: object) -> None:
        stop.set()

    watcher = Watcher(plan)
    # Installed before the watcher starts, so that no signal finds the daemon half-started.
    previous = {
        number: signal.signal(number, request_stop) for number in (signal.SIGINT, signal.SIGTERM)
    }
    try:
        try:
            watcher.start()
        except StartError as error:
            print(f"calwarden: {error}", file=sys.stderr)
            return EXIT_ERROR
        try:
            while not stop.is_set() and not watcher.wait(0.5):
                pass
        finally:
            watcher.stop()
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler)
        undo_logging()
    if watcher.fault:
        print(f"calwarden: stopped after a fault: {watcher.fault}", file=sys.stderr)
        return EXIT_FAULT
    return EXIT_PASS


def _daemon_folders(args: argparse.Namespace) -> tuple[Path, Path, AppConfig] | None:
    """The daemon's output and state folders and configuration, from --out / --config."""
    from calwarden.daemon.settings.config import AppConfig

    out = (args.out or Path.cwd()).resolve()
    state_dir = out / ".calwarden"
    config = AppConfig()
    if args.config is not None:
        loaded = _load_config_or_say_why(args.config)
        if loaded is None:
            return None
        base = args.config.resolve().parent
        from calwarden.daemon.settings.config import resolve_store_paths

        config = loaded.model_copy(update={"store": resolve_store_paths(loaded.store, base)})
        if args.out is None and config.watch.out is not None:
            out = (base / config.watch.out).resolve()
            state_dir = out / ".calwarden"
        if config.watch.state_dir is not None:
            state_dir = (base / config.watch.state_dir).resolve()
    return out, state_dir, config


def _status(args: argparse.Namespace) -> int:
    from calwarden.daemon.cli.status import status_document, status_report

    folders = _daemon_folders(args)
    if folders is None:
        return EXIT_ERROR
    out, state_dir, config = folders
    if args.json:
        import json

        document = status_document(state_dir, out, config.store)
        print(json.dumps(document, indent=2, ensure_ascii=False))
        return EXIT_PASS if document["ledger"] else EXIT_ERROR
    text, found = status_report(state_dir, out, config.store)
    print(text, end="")
    return EXIT_PASS if found else EXIT_ERROR


def _chart(args: argparse.Namespace) -> int:
    import csv

    from calwarden.daemon.control_log.log import SeriesFilter, export_rows, recompute_baselines
    from calwarden.daemon.stores.control import ControlHistory, ControlLog
    from calwarden.daemon.stores.database import Database, LedgerError
    from calwarden.daemon.stores.engine import store_target
    from calwarden.daemon.stores.records import timestamp

    folders = _daemon_folders(args)
    if folders is None:
        return EXIT_ERROR
    out, state_dir, config = folders
    try:
        ledger_path = store_target(state_dir, config.store)
    except LedgerError as error:
        print(f"calwarden: {error}", file=sys.stderr)
        return EXIT_ERROR
    if isinstance(ledger_path, Path) and not ledger_path.exists():
        print(
            f"calwarden: no ledger at {ledger_path}: nothing has been watched there yet",
            file=sys.stderr,
        )
        return EXIT_ERROR
    chosen = SeriesFilter(args.instrument, args.analyte, args.kind)
    try:
        if args.chart_command == "export":
            database = Database(ledger_path, read_only=True)
            try:
                rows = export_rows(ControlHistory(database), chosen, config.control)
            finally:
                database.close()
            stream = args.file.open("w", encoding="utf-8", newline="") if args.file else sys.stdout
            try:
                csv.writer(stream, lineterminator="\n").writerows(rows)
            finally:
                if args.file:
                    stream.close()
            if args.file:
                print(f"{len(rows) - 1} control point(s) written to {args.file}")
            return EXIT_PASS
        if args.chart_command == "baseline":
            now = timestamp()
            database = Database(ledger_path)
            try:
                control = ControlLog(database)
                limits, skipped = recompute_baselines(control, config.control, chosen, now)
                control.set_limits(tuple(limits))
            finally:
                database.close()
            from calwarden.daemon.control_log.log import series_name

            for entry in limits:
                print(
                    f"{entry.key.instrument} {series_name(entry.key)}: centre "
                    f"{entry.centre:.4g}, SD {entry.sd:.3g} from {entry.n} points"
                )
            for reason in skipped:
                print(f"unchanged: {reason}")
            print(f"{len(limits)} series given new limits, set {now}; earlier limits kept")
            return EXIT_PASS
        from calwarden.daemon.outputs.pictures import ChartCriteria, draw_charts

        criteria = ChartCriteria.of(
            config.criteria, [(inbox.instrument, inbox.criteria) for inbox in config.inboxes]
        )
        database = Database(ledger_path, read_only=True)
        try:
            written = draw_charts(
                ControlHistory(database),
                config.control,
                out / "charts",
                chosen,
                criteria,
                axis=args.axis,
            )
        finally:
            database.close()
        for path in written:
            print(path)
        print(f"{len(written)} chart(s) in {out / 'charts'}")
        return EXIT_PASS if written else EXIT_ERROR
    except (LedgerError, OSError) as error:
        print(f"calwarden: {error}", file=sys.stderr)
        return EXIT_ERROR


def _store(args: argparse.Namespace) -> int:
    from calwarden.daemon.intake.lock import is_locked
    from calwarden.daemon.stores.copy import copy_ledger
    from calwarden.daemon.stores.database import Database, LedgerError
    from calwarden.daemon.stores.engine import store_target
    from calwarden.daemon.stores.migrations import MIGRATIONS, SCHEMA_VERSION, current_version

    if args.store_command not in ("migrate", "copy"):
        print("calwarden: say `store migrate` or `store copy --from LEDGER`", file=sys.stderr)
        return EXIT_ERROR
    folders = _daemon_folders(args)
    if folders is None:
        return EXIT_ERROR
    _, state_dir, config = folders
    try:
        target = store_target(state_dir, config.store)
        if args.store_command == "migrate":
            found = 0
            if not isinstance(target, Path) or target.exists():
                before = Database(target, migrate=False, read_only=True)
                try:
                    found = current_version(before.engine)
                finally:
                    before.close()
            Database(target).close()
            for step in MIGRATIONS:
                if step.version > found:
                    print(f"schema {step.version}: {step.summary}")
            print(f"{target}: schema {SCHEMA_VERSION} (was {found or 'empty'})")
            return EXIT_PASS
        source_path = args.source.resolve()
        if not source_path.is_file():
            print(f"calwarden: no ledger file at {source_path}", file=sys.stderr)
            return EXIT_ERROR
        if is_locked(source_path.parent):
            print(
                f"calwarden: a daemon still runs on {source_path}; stop it first",
                file=sys.stderr,
            )
            return EXIT_ERROR
        if source_path == target:
            print("calwarden: the source is this ledger itself", file=sys.stderr)
            return EXIT_ERROR
        source = Database(source_path)
        try:
            destination = Database(target)
            try:
                report = copy_ledger(source, destination, batch=max(1, args.batch))
            finally:
                destination.close()
        finally:
            source.close()
    except LedgerError as error:
        print(f"calwarden: {error}", file=sys.stderr)
        return EXIT_ERROR
    for table, copied in report.copied.items():
        print(f"{table}: {copied} copied, {report.already.get(table, 0)} there already")
    print(f"{source_path} (ledger {report.source}) is in {target}")
    return EXIT_PASS


def _alert(args: argparse.Namespace) -> int:
    from calwarden.daemon.alerts.sender import send_test_message
    from calwarden.daemon.alerts.transport import DeliveryError
    from calwarden.daemon.settings.config import resolve_alert_paths

    if args.alert_command != "test":
        print("calwarden: say what to do: calwarden alert test [--config CFG]", file=sys.stderr)
        return EXIT_ERROR
    folders = _daemon_folders(args)
    if folders is None:
        return EXIT_ERROR
    _, state_dir, config = folders
    settings = config.alerts
    if args.config is not None:
        settings = resolve_alert_paths(settings, args.config.resolve().parent)
    try:
        done = send_test_message(settings, state_dir)
    except DeliveryError as error:
        print(f"calwarden: the test message was not delivered: {error}", file=sys.stderr)
        return EXIT_ERROR
    except OSError as error:
        print(f"calwarden: cannot write the test message: {error}", file=sys.stderr)
        return EXIT_ERROR
    for line in done:
        print(line)
    return EXIT_PASS


def _demo(args: argparse.Namespace) -> int:
    from calwarden.daemon.cli.demo import run_demo

    return run_demo(args.dir)


#: What a command returns when the reader of its output went away (``| head -1``): the
#: shell's own code for a writer ended by a closed pipe, so `set -o pipefail` still sees it.
EXIT_CLOSED_PIPE = 141


def _tolerant_output() -> None:
    """Text output never fails on the terminal's encoding: what it cannot show is replaced."""
    for stream in (sys.stdout, sys.stderr):
        reconfigure = getattr(stream, "reconfigure", None)
        if reconfigure is not None:
            reconfigure(errors="replace")


def main(argv: Sequence[str] | None = None) -> int:
    """Run one command; never a traceback and never exit 1 (which means "fail") on a crash."""
    _tolerant_output()
    try:
        return _dispatch(argv)
    except BrokenPipeError:
        # The reader closed the pipe: end quietly. Point stdout at /dev/null so that the
        # interpreter's final flush does not complain about the pipe once more.
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_CLOSED_PIPE
    except Exception as error:  # a bug of ours: one line, exit 2, never 1 (which means "fail")
        print(f"calwarden: internal error: {type(error).__name__}: {error}", file=sys.stderr)
        return EXIT_ERROR


def _installed_version() -> str:
    """The installed distribution's version, from its metadata's ``Version`` field.

    Read from the first ``calwarden-*.dist-info`` on ``sys.path``, as
    ``importlib.metadata`` finds it, but without importing it: that alone costs
    more than a bare interpreter's start-up (it imports the email package). It
    stays the fallback. The verdict module would import numpy to say it.
    """
    import os

    for entry in sys.path:
        try:
            names = os.listdir(entry or ".")
        except OSError:
            continue
        for name in names:
            if not (name.lower().startswith("calwarden-") and name.endswith(".dist-info")):
                continue
            try:
                with open(os.path.join(entry, name, "METADATA"), encoding="utf-8") as metadata:
                    for line in metadata:
                        if line.startswith("Version:"):
                            return line.removeprefix("Version:").strip()
                        if not line.strip():
                            break  # the end of the headers
            except OSError:
                pass
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("calwarden")
    except PackageNotFoundError:
        return "unknown"


def _dispatch(argv: Sequence[str] | None) -> int:
    if list(sys.argv[1:] if argv is None else argv) == ["--version"]:
        print(f"calwarden {_installed_version()}")  # before the parser: nothing else to load
        return EXIT_PASS
    args = _parser().parse_args(argv)
    if args.version:
        print(f"calwarden {_installed_version()}")
        return EXIT_PASS
    if args.command == "check":
        return _check(args)
    if args.command == "rules":
        return _rules(args)
    if args.command == "inspect":
        return _inspect(args)
    if args.command == "config":
        return _config(args)
    if args.command == "watch":
        return _watch(args)
    if args.command == "status":
        return _status(args)
    if args.command == "demo":
        return _demo(args)
    if args.command == "chart":
        return _chart(args)
    if args.command == "alert":
        return _alert(args)
    if args.command == "store":
        return _store(args)
    _parser().print_help()
    return EXIT_ERROR


if __name__ == "__main__":
    sys.exit(main())
