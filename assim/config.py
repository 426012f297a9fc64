"""Load and validate the configuration (one YAML file, one JSON schema).

The schema ``assim/schemas/config.schema.yaml`` (package data) documents every key and its default; the CLI
and the Snakefile validate against the same file. Unknown keys are errors. Validating a config
imports its model plugins (``model.plugins``), so a user model is registered before anything
reads a basin.
"""

from __future__ import annotations

import copy
import hashlib
import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import jsonschema
import yaml

from assim.errors import ConfigError

# Package data: installed with assim, so a wheel validates configs without the repository.
SCHEMA_PATH = Path(__file__).resolve().parent / "schemas" / "config.schema.yaml"


class Config(dict):
    """A validated configuration: a nested dict with every default filled in.

    ``source`` is the file it was read from (None for a config built in code).
    Paths stay as written; :meth:`path` resolves them against the working directory.
    """

    source: str | None = None

    def path(self, *keys: str) -> Path:
        """The path stored under ``keys`` (e.g. ``cfg.path("data", "raw")``), as a Path."""
        value: Any = self
        for k in keys:
            value = value[k]
        return Path(value)

    @property
    def results(self) -> Path:
        return Path(self["results"])

    def digest(self, *sections: str) -> str:
        """SHA-256 of the named sections (all when none), for provenance and restarts."""
        chosen = {k: self[k] for k in (sections or sorted(self))}
        text = json.dumps(chosen, sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()


def read_schema() -> dict:
    with open(SCHEMA_PATH, encoding="utf-8") as f:
        return yaml.safe_load(f)


def _fill_defaults(schema: Mapping, value: Any) -> Any:
    """Return ``value`` with every missing key set to the default the schema gives."""
    if schema.get("type") != "object" or not isinstance(value, dict):
        return value
    out = dict(value)
    for key, sub in schema.get("properties", {}).items():
        if key not in out and "default" in sub:
            out[key] = copy.deepcopy(sub["default"])
        if key in out:
            out[key] = _fill_defaults(sub, out[key])
    return out


def _merge(base: dict, extra: Mapping) -> dict:
    out = dict(base)
    for k, v in extra.items():
        if isinstance(v, Mapping) and isinstance(out.get(k), dict):
            out[k] = _merge(out[k], v)
        else:
            out[k] = copy.deepcopy(v) if isinstance(v, Mapping | list) else v
    return out


def _first_nul(value: Any, key: str = "") -> str | None:
    """Key path of the first string holding a NUL character (the OS refuses such paths)."""
    if isinstance(value, str):
        return (key or "(top level)") if "\x00" in value else None
    items = value.items() if isinstance(value, Mapping) else enumerate(value) if isinstance(value, list) else ()
    for k, v in items:
        found = _first_nul(v, f"{key}.{k}" if key else str(k))
        if found is not None:
            return found
    return None


def validate(raw: Mapping, source: str = "<config>") -> Config:
    """Validate a config mapping against the schema, fill defaults, return a :class:`Config`.

    Raises
    ------
    ConfigError
        naming the file, the key path and what the schema expects.
    """
    schema = read_schema()
    if not isinstance(raw, Mapping):
        raise ConfigError("the configuration must be a mapping of sections", file=source)
    validator = jsonschema.Draft202012Validator(schema)
    errors = sorted(validator.iter_errors(dict(raw)), key=lambda e: list(e.absolute_path))
    if errors:
        e = errors[0]
        key = ".".join(str(p) for p in e.absolute_path) or "(top level)"
        raise ConfigError(e.message, file=source, variable=key)
    bad = _first_nul(raw)
    if bad is not None:
        raise ConfigError("contains a NUL character, which no path or name may hold", file=source,
                          variable=bad)
    cfg = Config(_fill_defaults(schema, dict(raw)))
    cfg.source = source
    load_plugins(cfg)
    return cfg


def load_plugins(cfg: Config) -> None:
    """Import the modules of ``model.plugins``, each registering a user model.

    Called once, by :func:`validate`, so that every reader (raw basins.yaml, the prepared
    basins.nc, restarts) finds the model in the registry whatever command runs.

    Raises
    ------
    ConfigError
        naming the config file, ``model.plugins`` and the module that failed to import.
    """
    import importlib

    for name in cfg["model"]["plugins"]:
        try:
            importlib.import_module(name)
        except ImportError as exc:
            raise ConfigError(f"cannot import model plugin ({exc})", file=cfg.source,
                              variable="model.plugins", place=name) from None


def load_config(path: str | Path | None = None, **overrides: Any) -> Config:
    """Read, merge overrides into, and validate a configuration.

    Parameters
    ----------
    path : str or Path, optional
        YAML file; None gives the defaults.
    **overrides
        Sections to merge over the file, e.g. ``ensemble={"members": 16}``.

    Returns
    -------
    Config

    Raises
    ------
    ConfigError
        if the file is missing, is not YAML, or fails the schema.
    """
    raw: Any = {}
    source = "<defaults>"
    if path is not None:
        source = str(path)
        try:
            with open(path, encoding="utf-8") as f:
                raw = yaml.safe_load(f)
        except FileNotFoundError:
            raise ConfigError("config file not found", file=source) from None
        except (OSError, UnicodeDecodeError) as exc:
            raise ConfigError(f"cannot read config file ({exc})", file=source) from None
        except yaml.YAMLError as exc:
            mark = getattr(exc, "problem_mark", None)
            place = f"line {mark.line + 1}" if mark is not None else None
            raise ConfigError("not valid YAML", file=source, place=place) from None
        if raw is None:
            raw = {}
        if not isinstance(raw, dict):
            raise ConfigError("the configuration must be a mapping of sections", file=source)
    return validate(_merge(raw, overrides), source)
