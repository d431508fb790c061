"""The configuration file: YAML read strictly, validated, errors in plain words.

A configuration that does not fit is a :class:`~rules.errors.ConfigError`
whose message names the key (``criteria.defaults.min_r_sqared: unknown key
(did you mean min_r_squared?)``); the CLI prints it and exits 2.
"""

from __future__ import annotations

import difflib
from pathlib import Path
from typing import Any

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from daemon.formats import (
    ColumnByPattern,
    ExportFormat,
    FooterSection,
    HeaderSection,
    KindPattern,
    KindSection,
    NominalSection,
    WideSection,
)
from rules.criteria import AnalyteCriteria, Criteria
from rules.errors import ConfigError
from rules.evaluate import active_rules


class AppConfig(BaseModel):
    """Everything a configuration file may hold."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    criteria: Criteria = Field(default_factory=Criteria)
    format: ExportFormat | None = Field(
        default=None,
        description="the layout of the instrument's export; absent: calwarden's native CSV",
    )


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
    message = str(problem["msg"])
    if "analytes." in message:  # raised by Criteria's own validator: already located
        return f"{where}.{message}" if where else message
    return f"{where}: {message}" if where else message


def build_config(data: Any, source: str) -> AppConfig:
    """Validate parsed YAML as a configuration."""
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(
            f"{source}: the configuration must be a mapping of keys, not {type(data).__name__}"
        )
    try:
        config = AppConfig.model_validate(data)
    except ValidationError as error:
        raise ConfigError(f"{source}: {describe_validation_error(error)}") from None
    try:
        active_rules(config.criteria)  # a switched-off rule id must exist
    except ConfigError as error:
        raise ConfigError(f"{source}: {error}") from None
    return config


def load_config(path: Path | None) -> AppConfig:
    """Read and validate a configuration file; no file means every default."""
    if path is None:
        return AppConfig()
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as error:
        raise ConfigError(f"{path}: cannot read the configuration: {error}") from None
    return build_config(parse_yaml(text, str(path)), str(path))
