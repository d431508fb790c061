"""The configuration file: YAML read strictly, validated, errors in plain words.

A configuration that does not fit is a :class:`~rules.errors.ConfigError`
whose message names the key (``criteria.defaults.min_r_sqared: unknown key
(did you mean min_r_squared?)``); the CLI prints it and exits 2.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from calwarden.daemon.alerts.settings import (
    AlertSettings,
    DailySummarySettings,
    EmailSettings,
    RetrySettings,
    Route,
    ThrottleSettings,
    WebhookSettings,
)
from calwarden.daemon.settings.control import ControlSettings, FixedLimits
from calwarden.daemon.settings.formats import (
    ColumnByPattern,
    ExportFormat,
    FooterSection,
    HeaderSection,
    KindPattern,
    KindSection,
    NominalSection,
    WideSection,
)
from calwarden.daemon.settings.presets import with_preset
from calwarden.daemon.settings.store import StoreSettings
from calwarden.daemon.settings.watch import InboxSettings, WatchSettings, merge_criteria
from calwarden.daemon.settings.worklist import WorklistSettings
from calwarden.rules.criteria import AnalyteCriteria, Criteria
from calwarden.rules.errors import ConfigError
from calwarden.rules.evaluate import active_rules


class AppConfig(BaseModel):
    """Everything a configuration file may hold."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    preset: str | None = Field(
        default=None,
        description="a method preset (`calwarden config presets` lists them) or a preset "
        "file's path: its criteria, each with its source, under this file's own criteria",
    )
    criteria: Criteria = Field(default_factory=Criteria)
    format: ExportFormat | None = Field(
        default=None,
        description="the layout of the instrument's export; absent: calwarden's native CSV",
    )
    control: ControlSettings = Field(
        default_factory=ControlSettings,
        description="the control-chart log across runs: limits, Westgard rules, charts",
    )
    worklist: WorklistSettings = Field(
        default_factory=WorklistSettings,
        description="the re-run worklist of a failing run, in an instrument's sequence-import "
        "layout (<stem>.reruns.csv)",
    )
    watch: WatchSettings = Field(default_factory=WatchSettings)
    alerts: AlertSettings = Field(
        default_factory=AlertSettings,
        description="who hears about failed runs, unjudged files, control-chart rules and "
        "daemon trouble, and how (e-mail, .eml files, a webhook)",
    )
    store: StoreSettings = Field(
        default_factory=StoreSettings,
        description="where the ledger lives: the state folder's SQLite file, or a lab-wide "
        "PostgreSQL server shared by every daemon",
    )
    inboxes: tuple[InboxSettings, ...] = Field(
        default=(),
        description="folders to watch, each with its own instrument, patterns, layout and "
        "criteria; `calwarden watch INBOX` watches INBOX instead",
    )

    @model_validator(mode="after")
    def _inbox_names_unique(self) -> AppConfig:
        seen: set[str] = set()
        for index, inbox in enumerate(self.inboxes):
            name = (inbox.name or inbox.path.name).casefold()
            if name in seen:
                raise ValueError(
                    f"inboxes[{index}]: a second inbox named '{inbox.name or inbox.path.name}'; "
                    "give each a distinct name"
                )
            seen.add(name)
        return self


class _StrictLoader(yaml.SafeLoader):
    """A YAML loader that refuses duplicate keys instead of keeping the last one silently."""


def _mapping_without_duplicates(loader: _StrictLoader, node: yaml.MappingNode) -> dict[Any, Any]:
    mapping: dict[Any, Any] = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        if key in mapping:
            raise ConfigError(f"line {key_node.start_mark.line + 1}: key '{key}' is given twice")
        mapping[key] = loader.construct_object(value_node, deep=True)
    return mapping


_StrictLoader.add_constructor(
    yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _mapping_without_duplicates
)


def parse_yaml(text: str, source: str) -> Any:
    """YAML text to plain data; syntax errors and duplicate keys become ConfigError."""
    try:
        return yaml.load(text, Loader=_StrictLoader)  # a SafeLoader subclass: no arbitrary objects
    except ConfigError as error:
        raise ConfigError(f"{source}: {error}") from None
    except yaml.YAMLError as error:
        mark = getattr(error, "problem_mark", None)
        where = f" line {mark.line + 1}" if mark is not None else ""
        problem = getattr(error, "problem", None) or str(error)
        raise ConfigError(f"{source}:{where}: not valid YAML: {problem}") from None


def _known_keys() -> list[str]:
    """Every key the configuration knows at any level, for did-you-mean hints."""
    models: tuple[type[BaseModel], ...] = (
        AppConfig,
        Criteria,
        AnalyteCriteria,
        ExportFormat,
        HeaderSection,
        FooterSection,
        KindSection,
        KindPattern,
        NominalSection,
        WideSection,
        ColumnByPattern,
        WatchSettings,
        InboxSettings,
        ControlSettings,
        FixedLimits,
        AlertSettings,
        EmailSettings,
        Route,
        ThrottleSettings,
        RetrySettings,
        WebhookSettings,
        DailySummarySettings,
        WorklistSettings,
        StoreSettings,
    )
    return [name for model in models for name in model.model_fields]


def dotted_path(location: tuple[Any, ...]) -> str:
    """``('inboxes', 1, 'format', 'delimiter')`` as ``inboxes[1].format.delimiter``."""
    text = ""
    for part in location:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
    return text


def describe_validation_error(error: ValidationError) -> str:
    """The first problem of a pydantic error as ``dotted.path: what is wrong (hint)``."""
    problem = error.errors()[0]
    location = tuple(problem["loc"])
    where = dotted_path(location)
    if problem["type"] == "extra_forbidden":
        key = str(location[-1])
        close = difflib.get_close_matches(key, _known_keys(), n=1)
        hint = f" (did you mean {close[0]}?)" if close else ""
        return f"{where}: unknown key{hint}"
    message = str(problem["msg"]).removeprefix("Value error, ")
    if "analytes." in message:  # raised by Criteria's own validator: already located
        return f"{where}.{message}" if where else message
    return f"{where}: {message}" if where else message


def build_config(data: Any, source: str, base: Path | None = None) -> AppConfig:
    """Validate parsed YAML as a configuration (``base``: the folder preset paths start from)."""
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(
            f"{source}: the configuration must be a mapping of keys, not {type(data).__name__}"
        )
    try:
        data = with_preset(data, base)  # the preset's criteria under the file's own
    except ConfigError as error:
        raise ConfigError(f"{source}: {error}") from None
    inboxes = data.get("inboxes")
    if isinstance(inboxes, list) and isinstance(data.get("criteria"), dict):
        # An inbox's criteria are laid over the top-level ones before validation,
        # so an error still names the key the lab wrote.
        data = {
            **data,
            "inboxes": [
                {**inbox, "criteria": merge_criteria(data["criteria"], inbox["criteria"])}
                if isinstance(inbox, dict) and isinstance(inbox.get("criteria"), dict)
                else inbox
                for inbox in inboxes
            ],
        }
    try:
        config = AppConfig.model_validate(data)
    except ValidationError as error:
        raise ConfigError(f"{source}: {describe_validation_error(error)}") from None
    located = [("", config.criteria)] + [
        (f"inboxes[{index}].", inbox.criteria)
        for index, inbox in enumerate(config.inboxes)
        if inbox.criteria is not None
    ]
    for where, criteria in located:
        try:
            active_rules(criteria)  # a switched-off rule id must exist
        except ConfigError as error:
            raise ConfigError(f"{source}: {where}{error}") from None
    return config


def load_config(path: Path | None) -> AppConfig:
    """Read and validate a configuration file; no file means every default."""
    if path is None:
        return AppConfig()
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as error:
        raise ConfigError(f"{path}: cannot read the configuration: {error}") from None
    return build_config(parse_yaml(text, str(path)), str(path), path.parent)


# --------------------------------------------------------------------------- the watch plan


@dataclass(frozen=True, slots=True)
class Inbox:
    """One watched folder with everything resolved: where, what, how judged, where written."""

    name: str
    path: Path
    out_dir: Path
    patterns: tuple[str, ...]
    ignore: tuple[str, ...]
    recursive: bool
    polling: bool
    instrument: str | None
    config: AppConfig  # the criteria and layout this inbox's files are judged with
    follow_links_outside: bool = False  # judge links whose target is outside the inbox


@dataclass(frozen=True, slots=True)
class WatchPlan:
    """What ``calwarden watch`` will do, after the file and the flags are combined."""

    out: Path
    state_dir: Path
    settings: WatchSettings
    inboxes: tuple[Inbox, ...]
    alerts: AlertSettings = field(default_factory=AlertSettings)
    control: ControlSettings = field(default_factory=ControlSettings)  # for charts in alerts
    store: StoreSettings = field(default_factory=StoreSettings)  # where the ledger lives


def resolve_store_paths(store: StoreSettings, base: Path) -> StoreSettings:
    """The store settings with the password file made relative to the configuration's folder."""
    if store.password_file is None:
        return store
    return store.model_copy(update={"password_file": base / store.password_file})


def resolve_alert_paths(alerts: AlertSettings, base: Path) -> AlertSettings:
    """The alert settings with their file paths made relative to the configuration's folder."""
    email = alerts.email
    updates = {
        field: base / value
        for field in ("ca_file", "password_file")
        if (value := getattr(email, field)) is not None
    }
    if not updates:
        return alerts
    return alerts.model_copy(update={"email": email.model_copy(update=updates)})


def _inside(inner: Path, outer: Path) -> bool:
    return inner == outer or outer in inner.parents


def plan_watch(
    config: AppConfig,
    *,
    config_dir: Path | None = None,
    inbox: Path | None = None,
    out: Path | None = None,
    settle_seconds: float | None = None,
    polling: bool | None = None,
) -> WatchPlan:
    """Combine the configuration with the command line's flags; the flags win.

    Relative paths in the file are relative to the file's folder. Refuses (as a
    ConfigError) what would go wrong later: no inbox, a missing inbox folder, an
    output folder inside an inbox (its own flagged CSVs would be judged).
    """
    base = config_dir or Path.cwd()
    settings = config.watch
    overrides: dict[str, object] = {}
    if settle_seconds is not None:
        overrides["settle_seconds"] = settle_seconds
    if polling is not None:
        overrides["polling"] = polling
    if overrides:
        try:
            settings = WatchSettings.model_validate({**settings.model_dump(), **overrides})
        except ValidationError as error:
            raise ConfigError(f"command line: {describe_validation_error(error)}") from None

    out_dir = out if out is not None else settings.out
    if out_dir is None:
        raise ConfigError("no output folder: give --out DIR, or watch.out in the configuration")
    out_dir = (Path.cwd() / out) if out is not None else (base / out_dir)
    out_dir = out_dir.resolve()
    state_dir = (
        (base / settings.state_dir).resolve() if settings.state_dir else out_dir / ".calwarden"
    )

    if inbox is not None:
        declared: tuple[InboxSettings, ...] = (InboxSettings(path=Path.cwd() / inbox),)
    else:
        declared = tuple(
            entry.model_copy(update={"path": base / entry.path}) for entry in config.inboxes
        )
    if not declared:
        raise ConfigError("no inbox to watch: give INBOX, or list inboxes in the configuration")

    resolved = []
    for entry in declared:
        path = entry.path.resolve()
        if not path.is_dir():
            raise ConfigError(f"the inbox folder {path} does not exist (or is not a folder)")
        if _inside(out_dir, path) or _inside(path, out_dir):
            raise ConfigError(
                f"the output folder {out_dir} and the inbox {path} overlap; keep them apart "
                "so that calwarden never judges its own outputs"
            )
        name = entry.name or path.name
        layout = entry.format or config.format
        if entry.instrument and layout is not None and layout.instrument is None:
            layout = layout.model_copy(update={"instrument": entry.instrument})
        resolved.append(
            Inbox(
                name=name,
                path=path,
                out_dir=out_dir if len(declared) == 1 else out_dir / name,
                patterns=entry.patterns or settings.patterns,
                ignore=settings.ignore,
                recursive=entry.recursive,
                polling=settings.polling if entry.polling is None else entry.polling,
                follow_links_outside=(
                    settings.follow_links_outside
                    if entry.follow_links_outside is None
                    else entry.follow_links_outside
                ),
                instrument=entry.instrument,
                config=AppConfig(
                    criteria=entry.criteria or config.criteria,
                    format=layout,
                    control=config.control,
                    worklist=entry.worklist or config.worklist,
                ),
            )
        )
    paths = [item.path for item in resolved]
    for index, path in enumerate(paths):
        for other in paths[index + 1 :]:
            if _inside(path, other) or _inside(other, path):
                raise ConfigError(f"the inboxes {path} and {other} overlap")
    return WatchPlan(
        out_dir,
        state_dir,
        settings,
        tuple(resolved),
        alerts=resolve_alert_paths(config.alerts, base),
        control=config.control,
        store=resolve_store_paths(config.store, base),
    )
