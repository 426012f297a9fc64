"""The engine's settings built from a validated config (entry layer).

The engine receives a frozen :class:`assim.engine.Settings` record and never reads the
config. Most fields are one config key each (:data:`CONFIG_KEYS`, converted to the type of
the field); the rest are built from several keys or checked against the model (the states
to update, write or perturb; the parameters to perturb or estimate).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping

from assim import perturb as pt
from assim.engine import ObsError, Settings
from assim.errors import ConfigError
from assim.models.base import Model

# Settings field -> config key (section, key, ...); the value takes the type of the field's default
CONFIG_KEYS: dict[str, tuple[str, ...]] = {
    "members": ("ensemble", "members"),
    "seed": ("ensemble", "seed"),
    "basin_chunk": ("ensemble", "basin_chunk"),
    "member_chunk": ("ensemble", "member_chunk"),
    "time_block_days": ("ensemble", "time_block_days"),
    "scheduler": ("ensemble", "scheduler"),
    "workers": ("ensemble", "workers"),
    "kernel": ("ensemble", "kernel"),
    "spinup_days": ("period", "spinup_days"),
    "method": ("filter", "method"),
    "transform": ("filter", "transform", "kind"),
    "transform_offset": ("filter", "transform", "offset_m3s"),
    "transform_lambda": ("filter", "transform", "lambda"),
    "gate_sigma": ("filter", "gate_sigma"),
    "inflation": ("filter", "inflation", "multiplicative"),
    "rtps": ("filter", "inflation", "rtps"),
    "rtpp": ("filter", "inflation", "rtpp"),
    "adaptive_inflation": ("filter", "inflation", "adaptive", "enabled"),
    "adaptive_initial_mean": ("filter", "inflation", "adaptive", "initial_mean"),
    "adaptive_initial_sd": ("filter", "inflation", "adaptive", "initial_sd"),
    "adaptive_damping": ("filter", "inflation", "adaptive", "damping"),
    "adaptive_lower": ("filter", "inflation", "adaptive", "lower"),
    "adaptive_upper": ("filter", "inflation", "adaptive", "upper"),
    "adaptive_min_sd": ("filter", "inflation", "adaptive", "min_sd"),
    "shrinkage": ("filter", "parameters", "shrinkage"),
    "collapse_ratio": ("filter", "collapse_ratio"),
    "collapse_days": ("filter", "collapse_days"),
    "gating_warn_fraction": ("filter", "gating_warn_fraction"),
    "smoother_window": ("filter", "smoother", "window_days"),
    "float32": ("outputs", "float32"),
    "compression": ("outputs", "compression"),
}


def _key(cfg: Mapping, path: tuple[str, ...]):
    value = cfg
    for k in path:
        value = value[k]
    return value


def _check_names(cfg: Mapping, model: Model) -> None:
    """ConfigError naming the key when a state or parameter name is not one of the model's."""
    per, fil = cfg["perturbation"], cfg["filter"]
    for what, known, chosen in (
        ("state", model.state_names, {"filter.update_states": fil["update_states"],
                                      "perturbation.state_noise": list(per["state_noise"])}),
        ("parameter", model.parameter_names, {"perturbation.parameters": list(per["parameters"]),
                                              "filter.parameters.estimate": fil["parameters"]["estimate"]}),
    ):
        for key, names in chosen.items():
            for n in names:
                if n not in known:
                    raise ConfigError(f"model {model.name!r} has no {what} {n!r}; {what}s: {', '.join(known)}",
                                      file=getattr(cfg, "source", None), variable=key)


def settings_from_config(cfg: Mapping, model: Model, mode: str) -> Settings:
    """Engine settings of a run in ``mode`` ("openloop", "assimilate" or "reanalysis") from a
    validated config. A reanalysis records members (``outputs.ensemble`` quantiles apply to
    the filter's products).

    Raises
    ------
    ConfigError
        naming the key when a state or parameter name is not one of the model's.
    """
    _check_names(cfg, model)
    defaults = {f.name: f.default for f in dataclasses.fields(Settings)}
    plain = {name: type(defaults[name])(_key(cfg, path)) for name, path in CONFIG_KEYS.items()}
    per, fil, out = cfg["perturbation"], cfg["filter"], cfg["outputs"]
    names = model.state_names
    chosen = tuple(fil["update_states"]) or model.default_updated_states()
    update = tuple(n for n in names if n in chosen)  # model order
    write = names if out["all_states"] else model.reported_states(update) if out["states"] else ()
    oe = fil["obs_error"]
    settings = Settings(
        mode=mode,
        precipitation=pt.LognormalAR1(float(per["precipitation_cv"]), float(per["precipitation_ar1"])),
        pet=pt.LognormalAR1(float(per["pet_cv"]), float(per["pet_ar1"])),
        temperature=pt.GaussianAR1(float(per["temperature_sd_c"]), float(per["temperature_ar1"])),
        parameter_sd=dict(per["parameters"]),
        state_noise=dict(per["state_noise"]),
        update_states=update,
        obs_error=ObsError(oe["kind"], float(oe["absolute_m3s"]), float(oe["relative"]), float(oe["floor_m3s"])),
        estimate=tuple(p for p in model.parameter_names if p in fil["parameters"]["estimate"]),
        quantiles=tuple(out["quantiles"]) if out["ensemble"] == "quantiles" and mode != "reanalysis" else None,
        write_states=write,
        **plain,
    )
    if settings.kernel == "compiled":
        from assim.engine.fused import kernel_choice

        why = kernel_choice(model, settings)
        if why is not None:
            raise ConfigError(f"the compiled kernel cannot run this: {why}", file=getattr(cfg, "source", None),
                              variable="ensemble.kernel")
    return settings
