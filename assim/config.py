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
from assim.io.common import load_yaml, yaml_problem

# Package data: installed with assim, so a wheel validates configs without the repository.
SCHEMA_PATH = Path(__file__).resolve().parent / "schemas" / "config.schema.yaml"

#: Settings that change how a run is computed but never its numbers (scheduling, chunking,
#: display) and the sections a run product does not depend on (paths, later stages). They
#: are left out of :meth:`Config.digest_results`, so that changing them (as the workflow
#: does with ``--set ensemble.workers=N``) never stops a continued run from keeping its
#: earlier days.
NOT_RESULTS = {
    "ensemble": ("basin_chunk", "member_chunk", "time_block_days", "scheduler", "workers", "progress"),
    "period": ("end",),
    "data": None, "results": None, "hindcast": None, "forecast": None, "issue_date": None,
}


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

    def digest_results(self) -> str:
        """SHA-256 of the settings that change a run product's numbers or layout: everything
        but :data:`NOT_RESULTS` (a run's product and its continuation from a restart must
        agree on this digest for the earlier days to be kept)."""
        chosen = {}
        for k in sorted(self):
            skip = NOT_RESULTS.get(k, ())
            if skip is None:
                continue
            v = self[k]
            chosen[k] = {kk: vv for kk, vv in v.items() if kk not in skip} if isinstance(v, Mapping) else v
        text = json.dumps(chosen, sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()


def read_schema() -> dict:
    with open(SCHEMA_PATH, encoding="utf-8") as f:
        return load_yaml(f)


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


def validate(raw: Mapping, source: str = "<config>", overrides: Mapping | None = None,
             overrides_source: str = "--set") -> Config:
    """Validate a config mapping against the schema, fill defaults, return a :class:`Config`.

    ``overrides`` (already merged into ``raw``) are the keys given apart from the file; an
    error in one of them names ``overrides_source`` instead of ``source``.

    Raises
    ------
    ConfigError
        naming the file (or ``--set``), the key path and what the schema expects.
    """
    schema = read_schema()
    if not isinstance(raw, Mapping):
        raise ConfigError("the configuration must be a mapping of sections", file=source)
    validator = jsonschema.Draft202012Validator(schema)
    errors = sorted(validator.iter_errors(dict(raw)), key=lambda e: list(e.absolute_path))
    if errors:
        e = errors[0]
        key = ".".join(str(p) for p in e.absolute_path) or "(top level)"
        where = overrides_source if _within(overrides, list(e.absolute_path)) else source
        raise ConfigError(_short(e.message), file=where, variable=key)
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
def _within(tree: Mapping | None, key_path: list) -> bool:
    """Does ``key_path`` (a schema error's path) lie in the override tree ``tree``?"""
    node: Any = tree
    if not node or not key_path:
        return False
    for k in key_path:
        if not isinstance(node, Mapping) or k not in node:
            return False
        node = node[k]
    return True


def _short(message: str, limit: int = 200) -> str:
    """A schema message cut to a readable length (it quotes the offending value)."""
    return message if len(message) <= limit else message[:limit] + "..."


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
        if the file is missing, is not YAML (a key given twice included, named with its
        line), or fails the schema (an override's error names ``--set``).
    """
    if path is None:
        return validate(_merge({}, overrides), "<defaults>", overrides)
    return validate(_merge(read_config_file(path), overrides), str(path), overrides)


def read_config_file(path: str | Path) -> dict:
    """The sections of a YAML config file, read with the project's one YAML loader.

    Raises
    ------
    ConfigError
        (one line naming the file, and the key and line where known) if the file is
        missing, unreadable, not YAML, gives a key twice, or is not a mapping of sections.
    """
    source = str(path)
    try:
        with open(path, encoding="utf-8") as f:
            raw = load_yaml(f)
    except FileNotFoundError:
        raise ConfigError("config file not found", file=source) from None
    except IsADirectoryError:
        raise ConfigError("the config path is a folder, not a file", file=source) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read config file ({exc})", file=source) from None
    except yaml.YAMLError as exc:
        message, key, place = yaml_problem(exc)
        raise ConfigError(message, file=source, variable=key, place=place) from None
    if raw is None:
        return {}
    if not isinstance(raw, dict):
        raise ConfigError("the configuration must be a mapping of sections", file=source)
    return raw
