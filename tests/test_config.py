"""Tests of assim.config: one schema, every default documented, unknown keys refused."""

import pytest
import yaml

from assim.config import SCHEMA_PATH, load_config, read_schema, validate
from assim.errors import ConfigError


def _walk(schema, path=""):
    for key, sub in schema.get("properties", {}).items():
        yield f"{path}{key}", sub
        yield from _walk(sub, f"{path}{key}.")


def test_every_key_has_a_default_and_a_description():
    """The design asks every key to have a documented default (common practice, no published source)."""
    schema = read_schema()
    missing = [k for k, s in _walk(schema) if "default" not in s or not s.get("description")]
    assert missing == []


def test_every_object_refuses_unknown_keys():
    schema = read_schema()
    open_objects = [
        k
        for k, s in _walk(schema)
        if s.get("type") == "object" and "properties" in s and s.get("additionalProperties") is not False
    ]
    assert open_objects == []


def test_defaults_are_valid_against_the_schema_itself():
    cfg = load_config()
    assert validate(dict(cfg)) == cfg
    assert cfg["ensemble"]["members"] >= 2


def test_demo_config_is_valid():
    cfg = load_config(SCHEMA_PATH.parents[1] / "config.yaml")
    assert cfg["data"]["raw"] == "sample_basin"


def test_overrides_merge_into_sections(tmp_path):
    f = tmp_path / "c.yaml"
    f.write_text(yaml.safe_dump({"ensemble": {"members": 10, "seed": 3}}))
    cfg = load_config(f, ensemble={"members": 12})
    assert cfg["ensemble"]["members"] == 12
    assert cfg["ensemble"]["seed"] == 3  # untouched by the override
    assert cfg.source == str(f)


@pytest.mark.parametrize(
    ("raw", "key"),
    [
        ({"ensembel": {}}, "(top level)"),
        ({"ensemble": {"members": 1}}, "ensemble.members"),
        ({"ensemble": {"members": "many"}}, "ensemble.members"),
        ({"filter": {"method": "magic"}}, "filter.method"),
        ({"filter": {"inflation": {"rtps": 1.5}}}, "filter.inflation.rtps"),
        ({"period": {"spinup_days": -1}}, "period.spinup_days"),
    ],
)
def test_bad_values_name_the_key(tmp_path, raw, key):
    f = tmp_path / "bad.yaml"
    f.write_text(yaml.safe_dump(raw))
    with pytest.raises(ConfigError) as info:
        load_config(f)
    msg = str(info.value)
    assert str(f) in msg and key in msg and "\n" not in msg


def test_yaml_syntax_error_names_the_line(tmp_path):
    f = tmp_path / "broken.yaml"
    f.write_text("ensemble:\n  members: [1, 2\n")
    with pytest.raises(ConfigError, match="line"):
        load_config(f)


def test_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="not found"):
        load_config(tmp_path / "absent.yaml")


def test_digest_changes_with_content():
    a = load_config()
    b = load_config(None, ensemble={"seed": 1})
    assert a.digest("ensemble") != b.digest("ensemble")
    assert a.digest("filter") == b.digest("filter")
