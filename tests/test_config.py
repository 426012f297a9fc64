"""Tests of assim.config: one schema, every default documented, unknown keys refused."""

from pathlib import Path

import pytest
import yaml

from assim.config import load_config, read_schema, validate
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
    cfg = load_config(Path(__file__).resolve().parents[1] / "config" / "config.yaml")
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


# ---------------------------------------------------------------------------------- plugins


def _documented_plugin() -> str:
    """The user model of DEVELOPERS.md ("Adding a model"), exactly as documented."""
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "DEVELOPERS.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(# my_bucket\.py\n.*?)```", text, flags=re.S)
    assert len(blocks) == 1, "DEVELOPERS.md must show the my_bucket.py example once"
    return blocks[0]


def test_plugin_that_does_not_import_is_a_config_error(tmp_path):
    """Common practice, no published source: a plugin that cannot be imported is refused
    when the config is loaded, naming model.plugins and the module."""
    with pytest.raises(ConfigError) as info:
        load_config(None, model={"plugins": ["no_such_assim_plugin_module"]})
    assert "model.plugins" in str(info.value) and "no_such_assim_plugin_module" in str(info.value)
    with pytest.raises(ConfigError, match="model.plugins"):
        load_config(None, model={"plugins": ["not a module name"]})


def test_user_model_plugin_runs_prep_run_forecast_through_the_cli(tmp_path):
    """Common practice, no published source: a user model registered as DEVELOPERS.md
    documents (module on PYTHONPATH, listed in model.plugins, named in basins.yaml) goes
    through prep, the assimilation run and a forecast on the command line, and the products
    say they were made with it: the restarts hold the bucket's one state, not a built-in
    model's."""
    import os
    import subprocess
    import sys

    import numpy as np
    import xarray as xr
    from _scenario import make_raw, write_config

    plugin_dir = tmp_path / "plugins"
    plugin_dir.mkdir()
    (plugin_dir / "my_bucket.py").write_text(_documented_plugin(), encoding="utf-8")
    raw = make_raw(tmp_path / "raw", ["oskerrin"], "2012-01-01", "2012-03-31")
    doc = yaml.safe_load((raw / "basins.yaml").read_text())
    for b in doc["basins"]:
        b["model"], b["parameters"] = "bucket", {"k": 0.2}
    (raw / "basins.yaml").write_text(yaml.safe_dump(doc, sort_keys=False))
    conf = write_config(tmp_path, {
        "data": {"raw": str(raw), "prepared": str(tmp_path / "prepared")},
        "results": str(tmp_path / "results"),
        "period": {"start": "2012-01-01", "end": "2012-03-20", "spinup_days": 10},
        "ensemble": {"members": 4, "seed": 3, "scheduler": "synchronous", "progress": False},
        "forecast": {"leads": 3, "forcing": "observed"},
        "model": {"plugins": ["my_bucket"]},
    })
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(plugin_dir), os.environ.get("PYTHONPATH", "")]),
           "PYTHONWARNINGS": "ignore"}

    def cli(*args):
        r = subprocess.run([sys.executable, "-m", "assim", *args, "--config", str(conf)],
                           capture_output=True, text=True, env=env, cwd=tmp_path, timeout=300)
        assert r.returncode == 0, (args, r.stderr)
        return r

    cli("prep")
    cli("run", "--mode", "openloop")
    cli("run", "--mode", "assimilate")
    cli("forecast", "--issue-date", "2012-03-20")
    with xr.open_dataset(tmp_path / "prepared" / "basins.nc") as b:
        assert b.attrs["model"] == "bucket"
    with xr.open_dataset(tmp_path / "results" / "forecasts" / "forecast-2012-03-20.nc") as f:
        assert f.attrs["model"] == "bucket"
        assert np.isfinite(f["discharge"].values).all()
    with xr.open_dataset(tmp_path / "results" / "forecasts" / "restart-2012-03-20.nc") as r:
        assert [str(s) for s in r["state"].values] == ["store"] and "parameter_k" in r
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
    """Scheduler, workers, chunk sizes, progress, period.end and the products' compression
    (lossless) leave the results digest as
    it is; seed, members, filter and spin-up change it. Common practice, no published source."""
    base = load_config(None).digest_results()
    for section, value in (("ensemble", {"scheduler": "processes", "workers": 3, "basin_chunk": 5,
                                         "member_chunk": 2, "time_block_days": 30, "progress": False}),
                           ("period", {"end": "2030-01-01"}), ("forecast", {"leads": 3}),
                           ("outputs", {"compression": "zlib"})):
        assert load_config(None, **{section: value}).digest_results() == base, section
    for section, value in (("ensemble", {"seed": 1}), ("ensemble", {"members": 8}), ("filter", {"method": "etkf"}),
                           ("period", {"spinup_days": 10}), ("outputs", {"float32": False})):
        assert load_config(None, **{section: value}).digest_results() != base, (section, value)
