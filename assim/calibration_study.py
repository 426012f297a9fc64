"""``assim calibrate``: from the config and the raw records to calibration.nc (entry layer).

What a hydrologist setting up a new basin expects:

- the records are read and quality-controlled exactly as ``assim prep`` does (the same
  daily means, the same rejected readings), but the basins.yaml parameters are the start,
  never rewritten;
- each basin is calibrated over ``calibration.start..end`` after ``warmup_days`` of
  simulation from the model's initial state, maximising ``calibration.objective``; days
  without an observed discharge are skipped, and a basin with fewer than ``min_days``
  observed days in the period is an error naming it;
- the calibrated parameters are then scored over the validation period (split-sample test,
  Klemeš 1986) with the same metrics, after their own warm-up;
- everything is written to calibration.nc (:mod:`assim.io.calibration`), which
  ``model.calibrated_parameters`` can point ``assim prep`` at.

Objectives (each larger is better, 1 is perfect): ``kge`` (Gupta et al. 2009), ``nse``
(Nash & Sutcliffe 1970), ``nse_log`` (NSE of log(Q + mean(Qobs)/100), Pushpalatha et al.
2012) and ``composite`` = (KGE + NSE_log) / 2, which weighs the high flows (KGE) and the low
flows (NSE of logs) alike; common practice, no single published source.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import xarray as xr

from assim import calibration, preparation
from assim.errors import ConfigError, InputError
from assim.io import calibration as cal_io
from assim.io import prepared as prep_io
from assim.io.products import day_numbers
from assim.verification import metrics


def _composite(sim, obs):
    return 0.5 * (metrics.kge(sim, obs) + metrics.nse_log(sim, obs))


OBJECTIVES = {"kge": metrics.kge, "nse": metrics.nse, "nse_log": metrics.nse_log, "composite": _composite}
assert tuple(OBJECTIVES) == cal_io.METRICS


def _index(days: np.ndarray, text, key: str, source, default: int) -> int:
    """Index into ``days`` of the date ``text`` (``default`` when null); ConfigError if outside."""
    if text in (None, ""):
        return default
    try:
        day = int((np.datetime64(str(text), "D") - np.datetime64("1970-01-01", "D")).astype(int))
    except ValueError:
        raise ConfigError(f"not a date YYYY-MM-DD: {text!r}", file=source, variable=key) from None
    if not days[0] <= day <= days[-1]:
        first, last = (np.datetime64(int(d), "D") for d in (days[0], days[-1]))
        raise ConfigError(f"{text} is outside the forcing record ({first} to {last})", file=source, variable=key)
    return int(day - days[0])


def periods(cfg: Mapping, days: np.ndarray) -> tuple[tuple[int, int], tuple[int, int] | None]:
    """Calibration and validation periods as [first, last + 1) indices into ``days``.

    Defaults: calibration from ``warmup_days`` after the start of the forcing to the middle
    of what is left; validation from the day after the calibration to the end.
    """
    c, src, n = cfg["calibration"], getattr(cfg, "source", None), len(days)
    c0 = _index(days, c["start"], "calibration.start", src, min(int(c["warmup_days"]), n - 1))
    c1 = _index(days, c["end"], "calibration.end", src, c0 + (n - c0) // 2 - 1) + 1
    if c1 - c0 < 2:
        raise ConfigError("the calibration period must hold at least two days", file=src, variable="calibration.end")
    v0 = _index(days, c["validation_start"], "calibration.validation_start", src, min(c1, n))
    v1 = _index(days, c["validation_end"], "calibration.validation_end", src, n - 1) + 1
    return (c0, c1), ((v0, v1) if v1 - v0 >= 2 else None)


def _search_box(cfg: Mapping, model, names) -> tuple[np.ndarray, np.ndarray]:
    c, src = cfg["calibration"], getattr(cfg, "source", None)
    declared = {p.name: p for p in model.parameters}
    for name, (lo, hi) in c["parameters"].items():
        if name not in declared:
            raise ConfigError(f"{model.name} has no parameter {name!r} (it has {', '.join(declared)})",
                              file=src, variable=f"calibration.parameters.{name}")
        p = declared[name]
        if not p.low <= lo < hi <= p.high:
            raise ConfigError(f"[{lo}, {hi}] must be an increasing range inside the valid range "
                              f"[{p.low}, {p.high}]", file=src, variable=f"calibration.parameters.{name}")
    for name in c["fixed"]:
        if name not in declared:
            raise ConfigError(f"{model.name} has no parameter {name!r}", file=src, variable="calibration.fixed")
    return calibration.search_box(model, names, c["parameters"])


def _scores(sim: np.ndarray, obs: np.ndarray) -> np.ndarray:
    """(basin, metric) scores of (basin, time) series."""
    return np.stack([np.asarray(f(sim, obs), dtype=np.float64) for f in OBJECTIVES.values()], axis=-1)


def run_calibration(cfg: Mapping, progress=None) -> xr.Dataset:
    """Calibrate every basin of ``cfg`` and write calibration.nc; returns the Dataset written.

    Raises
    ------
    ConfigError, InputError
    """
    from assim import paths

    c = cfg["calibration"]
    datasets, _ = preparation.build(cfg, calibrated=False)
    forcing, obs, basins = datasets["forcing"], datasets["observations"], datasets["basins"]
    from assim import models

    model = models.get(basins.attrs["model"])
    ids = tuple(str(b) for b in basins["basin"].values)
    days = day_numbers(forcing["time"].values)
    (c0, c1), val = periods(cfg, days)
    warmup = int(c["warmup_days"])
    area = basins["area"].values.astype(np.float64)
    to_mm = 86.4 / area[:, None]
    q_obs = prep_io.usable_discharge(obs).values.astype(np.float64)
    n_cal = np.isfinite(q_obs[:, c0:c1]).sum(axis=1)
    few = n_cal < int(c["min_days"])
    if few.any():
        j = int(np.flatnonzero(few)[0])
        raise InputError(f"only {int(n_cal[j])} days with an observed discharge in the calibration period "
                         f"(calibration.min_days is {c['min_days']})",
                         file=f"{cfg['data']['raw']}/gauge.csv", variable="value", place=f"basin '{ids[j]}'")
    # snow_routine says which basins have snow: never searched
    fixed_names = [n for n in model.parameter_names if n in c["fixed"] or n == "snow_routine"]
    names = tuple(n for n in model.parameter_names if n not in fixed_names)
    lo, hi = _search_box(cfg, model, names)
    nb = len(ids)
    lower, upper = np.tile(lo, (nb, 1)), np.tile(hi, (nb, 1))
    if "snow_routine" in basins:  # a rain-only basin keeps its (unused) snow parameters
        from assim.models.snow import NAMES

        rain_only = basins["snow_routine"].values == 0
        for j, n in enumerate(names):
            if n in NAMES:
                lower[rain_only, j] = upper[rain_only, j] = basins[n].values[rain_only]
    fixed = {n: basins[n].values.astype(np.float64) for n in fixed_names}
    w0 = max(c0 - warmup, 0)
    fields = {n: forcing[n].values.astype(np.float64) for n in model.forcings}
    settings = calibration.Settings(
        seed=int(cfg["ensemble"]["seed"] if c["seed"] is None else c["seed"]),
        population=int(c["population"] or 10 * max(len(names), 1)),
        max_generations=int(c["max_generations"]), tolerance=float(c["tolerance"]),
        mutation=(float(c["mutation"][0]), float(c["mutation"][1])), crossover=float(c["crossover"]),
        strategy=c["strategy"])
    chunk = int(c["basins_per_chunk"]) or nb
    parts = []
    for b0 in range(0, nb, chunk):
        sl = slice(b0, min(b0 + chunk, nb))
        problem = calibration.Problem(
            ids[sl], {n: v[sl, w0:c1] for n, v in fields.items()}, (q_obs[sl] * to_mm[sl])[:, w0:c1],
            c0 - w0, names, lower[sl], upper[sl], {n: v[sl] for n, v in fixed.items()})
        parts.append(calibration.search(model, problem, settings, OBJECTIVES[c["objective"]], progress))
    best = {n: np.concatenate([r.parameters[n] for r in parts]) for n in model.parameter_names}

    # Split-sample scores, each period after its own warm-up.
    n_time = len(days)
    sim = np.full((nb, n_time), np.nan)
    flag = np.zeros(n_time, dtype=np.int8)
    score = np.full((nb, 2, len(OBJECTIVES)), np.nan)
    n_days = np.zeros((nb, 2), dtype=np.int64)
    for k, span in enumerate(((c0, c1), val)):
        if span is None:
            continue
        p0, p1 = span
        s0 = max(p0 - warmup, 0)
        q = calibration.simulate(model, {n: v[:, s0:p1] for n, v in fields.items()}, best, first=p0 - s0)
        sim[:, p0:p1] = q / to_mm
        flag[p0:p1] = np.where(flag[p0:p1] == 0, k + 1, flag[p0:p1])
        score[:, k] = _scores(sim[:, p0:p1], q_obs[:, p0:p1])
        n_days[:, k] = np.isfinite(q_obs[:, p0:p1]).sum(axis=1)
    keep = flag > 0
    fixed_box = {n: basins[n].values.astype(np.float64) for n in fixed_names}
    all_names = model.parameter_names
    col = {n: j for j, n in enumerate(names)}
    pop = np.concatenate([r.population for r in parts])
    npop = pop.shape[1]
    full_pop = np.stack([pop[..., col[n]] if n in col else np.repeat(fixed_box[n][:, None], npop, axis=1)
                         for n in all_names], axis=-1)
    full_lo = np.stack([lower[:, col[n]] if n in col else fixed_box[n] for n in all_names], axis=-1)
    full_hi = np.stack([upper[:, col[n]] if n in col else fixed_box[n] for n in all_names], axis=-1)

    def date(i):
        return str(np.datetime64(int(days[i]), "D"))

    attrs = {
        "objective": c["objective"], "seed": str(settings.seed), "strategy": settings.strategy,
        "population_size": str(settings.population), "max_generations": str(settings.max_generations),
        "tolerance": str(settings.tolerance), "warmup_days": str(warmup),
        "calibration_period": f"{date(c0)} to {date(c1 - 1)}",
        "validation_period": "none" if val is None else f"{date(val[0])} to {date(val[1] - 1)}",
        "method": "differential evolution per basin, every basin's population in one batch "
                  "(Storn & Price 1997)",
    }
    ds = cal_io.calibration_dataset(
        basins=ids, model=model, names=all_names, parameters=best, lower=full_lo, upper=full_hi,
        population=full_pop, population_objective=np.concatenate([r.population_objective for r in parts]),
        score=score, n_days=n_days, dates=forcing["time"].values[keep], simulated=sim[:, keep],
        observed=q_obs[:, keep], period_flag=flag[keep],
        generations=np.concatenate([r.generations for r in parts]),
        converged=np.concatenate([r.converged for r in parts]), attrs=attrs)
    path = cal_io.write_calibration(ds, paths.calibration(cfg))
    ds.attrs["product_path"] = str(path)
    return ds


def summary(ds: xr.Dataset) -> str:
    """A table for a person: each basin's parameters and its scores in both periods."""
    names = [str(p) for p in ds["parameter"].values]
    objective = ds.attrs.get("objective", "kge")
    lines = [f"{'basin':<16}" + "".join(f"{n:>10}" for n in names)
             + f"{'cal ' + objective:>14}{'val ' + objective:>14}{'gens':>6}"]
    for j, b in enumerate(ds["basin"].values):
        s = ds["score"].sel(metric=objective).values[j]
        lines.append(f"{str(b):<16}" + "".join(f"{float(ds[n].values[j]):>10.4g}" for n in names)
                     + f"{s[0]:>14.3f}{s[1]:>14.3f}{int(ds['generations'].values[j]):>6}")
    return "\n".join(lines)
