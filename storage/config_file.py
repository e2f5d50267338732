"""Survey config files: TOML on disk <-> the typed :class:`SurveyConfig`.

``load_config`` validates and names the key, the value got and what was
expected; ``config_template`` writes every key with its default, unit and
meaning as a commented template; ``dump_config`` writes an effective config
that ``load_config`` reads back to an equal object.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ValidationError

from descatter.tasks.cluster_profile import explain_validation_error
from descatter.tasks.config import SurveyConfig
from descatter.tasks.errors import ConfigError, InputNotFoundError


def read_toml(path: str | Path, *, missing: str) -> dict[str, Any]:
    """The parsed TOML document at ``path``.

    A missing file (or a folder) raises :class:`InputNotFoundError` with the
    message ``missing``; a file that is not TOML (or not UTF-8) raises
    :class:`ConfigError` naming the file and the parser's reason."""
    path = Path(path)
    if not path.is_file():
        raise InputNotFoundError(missing)
    try:
        return tomllib.loads(path.read_text())
    except FileNotFoundError:  # removed since the check
        raise InputNotFoundError(missing) from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from None


def parse_config(document: dict[str, Any], *, source: str = "config") -> SurveyConfig:
    """Validate a config mapping; :class:`ConfigError` lists every bad key."""
    try:
        return SurveyConfig.model_validate(document)
    except ValidationError as exc:
        raise ConfigError(explain_validation_error(
            exc, SurveyConfig, source=source, what="survey config",
            unknown_key_hint="run 'descatter config init' to see every key")) from None


def load_config(path: str | Path | None) -> SurveyConfig:
    """Read and validate a TOML survey config; ``None`` gives the defaults."""
    if path is None:
        return SurveyConfig()
    document = read_toml(path, missing=f"{path}: no such config file (write one with 'descatter config init {path}')")
    return parse_config(document, source=str(path))


# -- writing -------------------------------------------------------------

def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isinf(value) or math.isnan(value):
            raise ConfigError(f"cannot write {value!r} to TOML")
        return repr(value)
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, BaseModel):
        value = value.model_dump()
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {_toml_value(v)}" for k, v in value.items()) + " }"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if value is None:
        raise ConfigError("TOML has no null: leave the key out instead")
    raise ConfigError(f"cannot write {type(value).__name__} to TOML")


def _walk(model: BaseModel, prefix: str, out: list[str], *, comments: bool) -> None:
    scalars, sections = [], []
    for name, field in type(model).model_fields.items():
        value = getattr(model, name)
        (sections if isinstance(value, BaseModel) else scalars).append((name, field, value))
    if prefix and scalars:
        out.append(f"\n[{prefix}]")
    for name, field, value in scalars:
        if comments:
            unit = (field.json_schema_extra or {}).get("unit", "") if isinstance(field.json_schema_extra, dict) else ""
            out.append(f"# {field.description or name}" + (f" [{unit}]" if unit else ""))
        out.append(f"{name} = {_toml_value(value)}")
    for name, field, value in sections:
        sub = f"{prefix}.{name}" if prefix else name
        if comments:
            out.append(f"\n# --- {sub}: {field.description or name}")
        _walk(value, sub, out, comments=comments)


def config_template() -> str:
    """Every key with its default, unit and meaning, as a commented TOML file."""
    out = [
        "# descatter survey config. Every key is shown with its default;",
        "# delete what you do not change. Units are given in brackets.",
    ]
    _walk(SurveyConfig(), "", out, comments=True)
    return "\n".join(out) + "\n"


def dump_config(config: SurveyConfig) -> str:
    """The config as TOML, without comments; ``load`` of it gives ``config`` back."""
    out: list[str] = []
    _walk(config, "", out, comments=False)
    return "\n".join(out).lstrip("\n") + "\n"


def config_for_store(store_path: str | Path, path: str | Path | None) -> SurveyConfig:
    """The config a stage runs with: the file given, else the one kept in the
    store at the last ingest, else the defaults."""
    if path is not None:
        return load_config(path)
    from descatter.storage.store import SurveyStore

    stored = SurveyStore.open(store_path).attrs.get("config")
    if stored:
        return parse_config(stored, source=f"{store_path} (config kept at ingest)")
    return SurveyConfig()
