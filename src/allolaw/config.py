"""Load and validate the batch configuration.

The schema (``schemas/config.schema.yaml``, linked as ``config/schema.yaml``) is the single
description of every key; defaults come from it, so the code never repeats them.
"""

from __future__ import annotations

import copy
import hashlib
import json
import re
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
        If a file is missing, is not YAML, gives one key twice in a mapping, or breaks the
        schema; the message names the key (and the line, with a hint, where YAML 1.1 read an
        unquoted ``no`` as false or ``1e3`` as text).
    """
    if isinstance(paths, str | Path):
        paths = [paths]
    config: dict[str, Any] = {}
    surprises: list[str] = []
    for path in map(Path, paths):
        if not path.is_file():
            msg = f"config file not found: {path}"
            raise UserError(msg)
        loaded, found = _load_yaml(path)
        surprises += found
        if not isinstance(loaded, dict):
            msg = f"{path}: a config file must be a mapping of keys to values"
            raise UserError(msg)
        _merge(config, loaded)
    for item in overrides or []:
        _apply_override(config, item)
    try:
        return validate_config(config, source=" + ".join(str(p) for p in paths))
    except UserError as err:
        if not surprises:
            raise
        msg = f"{err}; note: {'; '.join(surprises[:3])}"
        raise UserError(msg) from None


class _StrictLoader(yaml.SafeLoader):
    """A SafeLoader that refuses duplicate keys and notes YAML 1.1 surprises.

    YAML 1.1 (what PyYAML reads) takes unquoted ``yes``/``no``/``on``/``off`` as booleans and
    ``1e3`` (no dot) as text; ``surprises`` collects such scalars with their line, for hints.
    """

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self.surprises: list[str] = []


_BOOL_WORDS = frozenset({"yes", "no", "on", "off", "y", "n"})
_DOTLESS_EXPONENT = re.compile(r"[-+]?\d+[eE][-+]?\d+")


def _mapping(loader: _StrictLoader, node: yaml.MappingNode) -> dict[Any, Any]:
    lines: dict[Any, int] = {}
    for key_node, _ in node.value:
        if key_node.tag == "tag:yaml.org,2002:merge":
            continue
        key = loader.construct_object(key_node, deep=True)
        line = key_node.start_mark.line + 1
        if key in lines:
            msg = (
                f"{key_node.start_mark.name}, line {line}: key {key!r} is given twice (first "
                f"on line {lines[key]}); YAML would silently keep the last one"
            )
            raise UserError(msg)
        lines[key] = line
    return loader.construct_mapping(node, deep=True)


def _bool(loader: _StrictLoader, node: yaml.ScalarNode) -> bool:
    value = loader.construct_yaml_bool(node)
    if node.value.lower() in _BOOL_WORDS:
        loader.surprises.append(
            f"line {node.start_mark.line + 1}: YAML reads unquoted {node.value!r} as "
            f"{str(value).lower()}; write '{node.value}' in quotes if you mean the word"
        )
    return value


def _str(loader: _StrictLoader, node: yaml.ScalarNode) -> str:
    value = loader.construct_yaml_str(node)
    if node.style is None and _DOTLESS_EXPONENT.fullmatch(value):
        loader.surprises.append(
            f"line {node.start_mark.line + 1}: YAML reads {value!r} as text, not a number; "
            f"write it with a dot ({value.lower().replace('e', '.0e', 1)}) or in full"
        )
    return value


_StrictLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _mapping)
_StrictLoader.add_constructor("tag:yaml.org,2002:bool", _bool)
_StrictLoader.add_constructor("tag:yaml.org,2002:str", _str)


def _load_yaml(path: Path) -> tuple[Any, list[str]]:
    """Parse one YAML file with :class:`_StrictLoader`; return the data and its surprises."""
    loader = _StrictLoader(path.read_text(encoding="utf-8"))
    loader.name = str(path)
    try:
        data = loader.get_single_data() or {}
    except yaml.YAMLError as err:
        msg = f"{path}: not valid YAML: {err}"
        raise UserError(msg) from err
    finally:
        loader.dispose()
    return data, [f"{path}, {s}" for s in loader.surprises]


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
