"""Tests of the engine settings built from a config (assim.settings)."""

from __future__ import annotations

import dataclasses

import pytest

from assim import engine, models
from assim.config import load_config
from assim.errors import ConfigError
from assim.settings import CONFIG_KEYS, settings_from_config

GR4J = models.get("gr4j")


def test_every_field_comes_from_the_config():
    """Each Settings field changes when its config key changes (no field left at the
    record's default by a forgotten key). Common practice, no published source."""
    cfg = load_config(
        ensemble={"members": 7, "seed": 11, "basin_chunk": 3, "member_chunk": 2, "time_block_days": 40,
                  "scheduler": "synchronous", "workers": 1, "kernel": "numpy"},
        period={"spinup_days": 9},
        perturbation={"precipitation_cv": 0.25, "precipitation_ar1": 0.4, "pet_cv": 0.15, "pet_ar1": 0.7,
                      "temperature_sd_c": 1.5, "temperature_ar1": 0.6,
                      "parameters": {"x1": 0.1}, "state_noise": {"routing_store": 0.5}},
        filter={"method": "etkf", "update_states": ["routing_store", "production_store"],
                "obs_error": {"kind": "absolute", "absolute_m3s": 2.0, "relative": 0.2, "floor_m3s": 0.1},
                "transform": {"kind": "boxcox", "offset_m3s": 0.02, "lambda": 0.4}, "gate_sigma": 4.0,
                "inflation": {"multiplicative": 1.1, "rtps": 0.3, "rtpp": 0.2,
                              "adaptive": {"enabled": True, "initial_mean": 1.5, "initial_sd": 0.3,
                                           "damping": 0.95, "lower": 0.9, "upper": 5.0, "min_sd": 0.05}},
                "parameters": {"estimate": ["x3", "x1"], "shrinkage": 0.9}, "collapse_ratio": 0.2,
                "collapse_days": 12, "gating_warn_fraction": 0.3, "smoother": {"window_days": 4}},
        outputs={"ensemble": "quantiles", "quantiles": [0.1, 0.9], "states": True, "all_states": True,
                 "float32": False, "compression": "zlib"},
    )
    st = settings_from_config(cfg, GR4J, "assimilate")
    default = engine.Settings()
    for f in dataclasses.fields(engine.Settings):
        if f.name == "mode":  # an argument, not a key
            continue
        assert getattr(st, f.name) != getattr(default, f.name), f.name
    for name, path in CONFIG_KEYS.items():
        value = cfg
        for k in path:
            value = value[k]
        assert getattr(st, name) == value and type(getattr(st, name)) is type(getattr(default, name)), name
    assert st.precipitation.cv == 0.25 and st.pet.phi == 0.7
    assert st.temperature == engine.Settings().temperature.__class__(1.5, 0.6)
    assert st.obs_error == engine.ObsError("absolute", 2.0, 0.2, 0.1)
    assert st.update_states == ("production_store", "routing_store")  # the model's order
    assert st.estimate == ("x1", "x3") and st.write_states == GR4J.state_names
    assert st.quantiles == (0.1, 0.9)


def test_default_update_and_written_states():
    """No update_states: the model's default (every GR4J state); outputs.states writes the
    updated ones but the internal unit-hydrograph slots; all_states writes every state."""
    st = settings_from_config(load_config(), GR4J, "openloop")
    assert st.mode == "openloop" and not st.assimilate
    assert st.update_states == GR4J.default_updated_states() == GR4J.state_names
    assert st.write_states == ("production_store", "routing_store")
    everything = settings_from_config(load_config(outputs={"all_states": True}), GR4J, "openloop")
    assert everything.write_states == GR4J.state_names
    assert st.quantiles is None


@pytest.mark.parametrize("section, values, key", [
    ("filter", {"update_states": ["snowpack"]}, "filter.update_states"),
    ("perturbation", {"state_noise": {"snowpack": 1.0}}, "perturbation.state_noise"),
    ("perturbation", {"parameters": {"x9": 0.1}}, "perturbation.parameters"),
    ("filter", {"parameters": {"estimate": ["x9"]}}, "filter.parameters.estimate"),
])
def test_an_unknown_state_or_parameter_is_a_config_error(section, values, key):
    with pytest.raises(ConfigError) as info:
        settings_from_config(load_config(**{section: values}), GR4J, "assimilate")
    assert info.value.variable == key and "gr4j" in str(info.value)
