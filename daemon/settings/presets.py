"""Method presets: ready criteria for the methods labs run most, each value with its source.

A preset is a YAML file in ``config/presets/`` (or any file a configuration
names by path). ``preset: NAME`` in a configuration lays the preset's criteria
under the file's own ``criteria``, so every key the lab writes overrides the
preset's. Each criterion is written with its source beside it::

    title: Metals by ICP-OES, solid and waste samples
    method: US EPA SW-846 Method 6010D
    criteria:
      ccv_recovery_pct: {value: [90, 110], source: "6010D §9 (quality control) [memory]"}
    disabled_rules:
      - {rule: calibration.linearity, source: "..."}

A preset is a starting point to check against the lab's own method and
accreditation, never a substitute for them.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from calwarden.rules.criteria import AnalyteCriteria, build_criteria
from calwarden.rules.errors import ConfigError

#: The presets that come with calwarden (the repository's config/presets/).
PRESETS_DIR = Path(__file__).resolve().parents[2] / "config" / "presets"

_TOP_KEYS = frozenset({"title", "method", "notes", "criteria", "disabled_rules"})


@dataclass(frozen=True, slots=True)
class Sourced:
    """One value of a preset and where it comes from."""

    key: str
    value: Any
    source: str


@dataclass(frozen=True, slots=True)
class Preset:
    """A preset read and validated: its criteria, each with its source."""

    name: str
    path: Path
    title: str
    method: str
    notes: str
    criteria: tuple[Sourced, ...]
    disabled_rules: tuple[Sourced, ...]

    def criteria_data(self) -> dict[str, Any]:
        """The preset as plain criteria data, ready to lay a configuration's criteria over."""
        data: dict[str, Any] = {"defaults": {item.key: item.value for item in self.criteria}}
        if self.disabled_rules:
            data["disabled_rules"] = [item.key for item in self.disabled_rules]
        return data


def preset_names(folder: Path = PRESETS_DIR) -> list[str]:
    """The names of the presets in ``folder``, sorted."""
    if not folder.is_dir():
        return []
    return sorted(path.stem for path in folder.glob("*.yaml"))


def preset_path(reference: str, base: Path | None = None, folder: Path = PRESETS_DIR) -> Path:
    """The file a ``preset:`` value names: a preset's name, or a path (relative to ``base``)."""
    if "/" in reference or reference.endswith((".yaml", ".yml")):
        path = Path(reference).expanduser()
        return path if path.is_absolute() or base is None else base / path
    path = folder / f"{reference}.yaml"
    if not path.is_file():
        known = ", ".join(preset_names(folder)) or "none found"
        raise ConfigError(f"preset: no preset '{reference}' (presets: {known})")
    return path


def load_preset(reference: str, base: Path | None = None, folder: Path = PRESETS_DIR) -> Preset:
    """Read and validate a preset; every problem is a ConfigError naming the preset's key."""
    from calwarden.daemon.settings.config import parse_yaml  # config imports this module

    path = preset_path(reference, base, folder)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as error:
        raise ConfigError(f"preset '{reference}': cannot read {path}: {error}") from None
    where = f"preset '{reference}' ({path.name})"
    data = parse_yaml(text, where)
    if not isinstance(data, dict):
        raise ConfigError(f"{where}: a preset is a mapping of keys")
    unknown = sorted(set(data) - _TOP_KEYS)
    if unknown:
        raise ConfigError(f"{where}: {unknown[0]}: unknown key (known: {', '.join(_TOP_KEYS)})")
    for key in ("title", "method"):
        if not isinstance(data.get(key), str) or not data[key].strip():
            raise ConfigError(f"{where}: {key}: give it as text")
    criteria = data.get("criteria") or {}
    if not isinstance(criteria, dict):
        raise ConfigError(f"{where}: criteria: a mapping of criteria keys")
    items = tuple(_sourced(where, f"criteria.{key}", key, entry) for key, entry in criteria.items())
    for item in items:
        if item.key not in AnalyteCriteria.model_fields:
            raise ConfigError(f"{where}: criteria.{item.key}: not a criteria key")
    disabled = data.get("disabled_rules") or []
    if not isinstance(disabled, list):
        raise ConfigError(f"{where}: disabled_rules: a list of {{rule, source}}")
    switched_off = tuple(
        _sourced(where, f"disabled_rules[{i}]", None, entry) for i, entry in enumerate(disabled)
    )
    preset = Preset(
        name=path.stem,
        path=path,
        title=data["title"].strip(),
        method=data["method"].strip(),
        notes=str(data.get("notes") or "").strip(),
        criteria=items,
        disabled_rules=switched_off,
    )
    try:
        build_criteria(preset.criteria_data())
    except ConfigError as error:
        raise ConfigError(f"{where}: {error}") from None
    return preset


def _sourced(where: str, at: str, key: str | None, entry: Any) -> Sourced:
    """One ``{value, source}`` (or ``{rule, source}``) entry, its source required."""
    wanted = "value" if key is not None else "rule"
    if not isinstance(entry, dict) or set(entry) != {wanted, "source"}:
        raise ConfigError(f"{where}: {at}: write it as {{{wanted}: ..., source: ...}}")
    source = entry["source"]
    if not isinstance(source, str) or not source.strip():
        raise ConfigError(f"{where}: {at}: the source is missing")
    return Sourced(key if key is not None else str(entry["rule"]), entry[wanted], source.strip())


def with_preset(data: dict[str, Any], base: Path | None) -> dict[str, Any]:
    """Configuration data with its ``preset`` laid under its own ``criteria``."""
    from calwarden.daemon.settings.watch import merge_criteria

    reference = data.get("preset")
    if reference is None:
        return data
    if not isinstance(reference, str) or not reference.strip():
        raise ConfigError("preset: give a preset's name (`calwarden config presets`) or a path")
    preset = load_preset(reference.strip(), base)
    own = data.get("criteria")
    if own is not None and not isinstance(own, dict):
        return data  # the model names the mistake
    merged = merge_criteria(preset.criteria_data(), own or {})
    return {**data, "criteria": merged}
