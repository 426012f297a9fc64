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


# ------------------------------------------------------------- duplicate keys, --set


@pytest.mark.parametrize("text, key, line", [
    ("ensemble:\n  members: 16\n  members: 3\n", "members", 3),
    ("ensemble: {seed: 1}\nfilter: {}\nensemble: {seed: 2}\n", "ensemble", 3),
    ("ensemble: {members: 8, members: 9}\n", "members", 1),
])
def test_duplicate_keys_are_errors(tmp_path, text, key, line):
    """PyYAML keeps the last of two equal keys silently; the config loader refuses them,
    naming the key and the line (YAML 1.2 section 3.2.1.1: mapping keys are unique)."""
    p = tmp_path / "c.yaml"
    p.write_text(text)
    with pytest.raises(ConfigError) as info:
        load_config(p)
    text = str(info.value)
    assert f"'{key}'" in text and f"line {line}" in text and "c.yaml" in text


def test_merge_keys_may_be_overridden():
    """A `<<: *anchor` merge overridden by an explicit key is not a duplicate (YAML merge key
    type, yaml.org/type/merge: explicit keys override merged ones)."""
    from assim.io.common import load_yaml

    assert load_yaml("a: &x {k: 1, j: 2}\nb: {<<: *x, k: 3}\n")["b"] == {"k": 3, "j": 2}


def test_dates_stay_text_and_set_errors_blame_set(tmp_path):
    """An unquoted date is read as the text the schema expects (YAML 1.1 would make it a
    date); a schema error in an override names --set, one in the file names the file.
    Common practice, no published source."""
    p = tmp_path / "c.yaml"
    p.write_text("period: {start: 2012-01-01, end: 2012-12-31}\n")
    cfg = load_config(p, period={"end": "2012-06-30"})
    assert cfg["period"] == {**cfg["period"], "start": "2012-01-01", "end": "2012-06-30"}
    with pytest.raises(ConfigError, match=r"^--set: variable 'ensemble.members'"):
        load_config(p, ensemble={"members": 1})
    p.write_text("ensemble: {members: 1}\n")
    with pytest.raises(ConfigError, match=r"c.yaml: variable 'ensemble.members'"):
        load_config(p)
    with pytest.raises(ConfigError, match="ensemble.seed"):
        load_config(None, ensemble={"seed": 2**64})
    assert load_config(None, ensemble={"seed": 2**64 - 1})["ensemble"]["seed"] == 2**64 - 1


def test_results_digest_ignores_only_what_does_not_change_results():
    """Scheduler, workers, chunk sizes, progress and period.end leave the results digest as
    it is; seed, members, filter and spin-up change it. Common practice, no published source."""
    base = load_config(None).digest_results()
    for section, value in (("ensemble", {"scheduler": "processes", "workers": 3, "basin_chunk": 5,
                                         "member_chunk": 2, "time_block_days": 30, "progress": False}),
                           ("period", {"end": "2030-01-01"}), ("forecast", {"leads": 3})):
        assert load_config(None, **{section: value}).digest_results() == base, section
    for section, value in (("ensemble", {"seed": 1}), ("ensemble", {"members": 8}), ("filter", {"method": "etkf"}),
                           ("period", {"spinup_days": 10}), ("outputs", {"float32": False})):
        assert load_config(None, **{section: value}).digest_results() != base, (section, value)
