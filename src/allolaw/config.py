"""Load and validate the batch configuration.

The schema (``schemas/config.schema.yaml``, linked as ``config/schema.yaml``) is the single
description of every key; defaults come from it, so the code never repeats them.
"""

from __future__ import annotations

import copy
import hashlib
import json
from importlib import resources
from pathlib import Path
from typing import Any

import jsonschema
import yaml

from allolaw.errors import UserError

__all__ = [
    "config_sha256",
    "dataset_config",
    "hypotheses_config",
    "load_config",
    "load_schema",
    "validate_config",
]


def load_schema(name: str = "config") -> dict[str, Any]:
    """Return the JSON schema ``schemas/<name>.schema.yaml`` shipped with the package."""
    text = resources.files("allolaw").joinpath(f"schemas/{name}.schema.yaml").read_text("utf-8")
    return yaml.safe_load(text)


def load_config(
    paths: str | Path | list[str | Path], overrides: list[str] | None = None
) -> dict[str, Any]:
    """Read YAML config file(s), apply ``key.sub=value`` overrides, validate, fill defaults.

    Later files and overrides are merged into earlier ones key by key (nested mappings are
    merged, everything else replaced), as Snakemake merges ``--configfile`` and ``--config``.

    Raises
    ------
    UserError
        If a file is missing, is not YAML, or breaks the schema; the message names the key.
    """
    if isinstance(paths, str | Path):
        paths = [paths]
    config: dict[str, Any] = {}
    for path in map(Path, paths):
        if not path.is_file():
            msg = f"config file not found: {path}"
            raise UserError(msg)
        try:
            loaded = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
        except yaml.YAMLError as err:
            msg = f"{path}: not valid YAML: {err}"
            raise UserError(msg) from err
        if not isinstance(loaded, dict):
            msg = f"{path}: a config file must be a mapping of keys to values"
            raise UserError(msg)
        _merge(config, loaded)
    for item in overrides or []:
        _apply_override(config, item)
    return validate_config(config, source=" + ".join(str(p) for p in paths))


#: Sampler keys that were renamed: an old key stops with a message naming the new one.
RENAMED_SAMPLER_KEYS = {
    "tune": "warmup",
    "target_accept": "target_acceptance",
    "refit_target_accept": "refit_target_acceptance",
}


def validate_config(config: Any, *, source: str = "config") -> dict[str, Any]:
    """Validate ``config`` against the schema and return a copy with defaults filled in.

    Raises
    ------
    UserError
        If the config breaks the schema, or uses a renamed sampler key (the message names
        the new key).
    """
    sampler = config.get("sampler") if isinstance(config, dict) else None
    for old, new in RENAMED_SAMPLER_KEYS.items():
        if isinstance(sampler, dict) and old in sampler:
            msg = (f"{source}: key 'sampler.{old}' (value {sampler[old]!r}) was renamed: "
                   f"write 'sampler.{new}' instead")
            raise UserError(msg)
    schema = load_schema("config")
    validator = jsonschema.Draft202012Validator(schema)
    errors = sorted(validator.iter_errors(config), key=lambda e: list(e.absolute_path))
    if errors:
        err = errors[0]
        key = ".".join(str(p) for p in err.absolute_path) or "(top level)"
        msg = f"{source}: key '{key}': {err.message}"
        if len(errors) > 1:
            msg += f" (and {len(errors) - 1} more problem(s))"
        raise UserError(msg)
    filled = copy.deepcopy(config)
    _fill_defaults(filled, schema, schema)
    return filled


def dataset_config(config: dict[str, Any], dataset: str) -> dict[str, Any]:
    """Return the config block of one dataset, or a clear error listing the known names."""
    try:
        return config["datasets"][dataset]
    except KeyError:
        known = ", ".join(sorted(config["datasets"]))
        msg = f"dataset '{dataset}' is not in the config (known: {known})"
        raise UserError(msg) from None


def hypotheses_config(config: dict[str, Any], dataset: str) -> dict[str, Any]:
    """Batch-level hypotheses, overridden key by key by the dataset's own block."""
    merged = dict(config.get("hypotheses", {}))
    merged.update(dataset_config(config, dataset).get("hypotheses", {}))
    return merged


def config_sha256(config: dict[str, Any]) -> str:
    """Hash of the validated config (stable key order)."""
    return hashlib.sha256(json.dumps(config, sort_keys=True).encode()).hexdigest()


def _apply_override(config: dict[str, Any], item: str) -> None:
    if "=" not in item:
        msg = f"override '{item}' is not of the form key.sub=value"
        raise UserError(msg)
    key, value = item.split("=", 1)
    try:
        parsed = yaml.safe_load(value)
    except yaml.YAMLError as err:
        msg = f"override '{item}': value is not valid YAML: {err}"
        raise UserError(msg) from err
    update: dict[str, Any] = {}
    node = update
    parts = key.split(".")
    for part in parts[:-1]:
        node = node.setdefault(part, {})
    node[parts[-1]] = parsed
    _merge(config, update)


def _merge(base: dict[str, Any], update: dict[str, Any]) -> None:
    for key, value in update.items():
        if isinstance(value, dict) and isinstance(base.get(key), dict):
            _merge(base[key], value)
        else:
            base[key] = copy.deepcopy(value)


def _fill_defaults(node: Any, schema: dict[str, Any], root: dict[str, Any]) -> None:
    schema = _resolve(schema, root)
    if not isinstance(node, dict):
        if isinstance(node, list) and "items" in schema:
            for item in node:
                _fill_defaults(item, schema["items"], root)
        return
    for key, sub in schema.get("properties", {}).items():
        sub = _resolve(sub, root)
        if key not in node and "default" in sub:
            node[key] = copy.deepcopy(sub["default"])
        if key in node:
            _fill_defaults(node[key], sub, root)
    extra = schema.get("additionalProperties")
    if isinstance(extra, dict):
        for key, value in node.items():
            if key not in schema.get("properties", {}):
                _fill_defaults(value, extra, root)


def _resolve(schema: dict[str, Any], root: dict[str, Any]) -> dict[str, Any]:
    while "$ref" in schema:
        ref = schema["$ref"].removeprefix("#/").split("/")
        target: Any = root
        for part in ref:
            target = target[part]
        schema = target
    return schema
