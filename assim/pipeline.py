"""Python entry points behind the CLI: files and arrays meet here.

Each function takes a validated :class:`assim.config.Config`, reads inputs through
:mod:`assim.io`, computes, writes through :mod:`assim.io`, and returns the Dataset it wrote
(with the written path in ``attrs["product_path"]``).
"""

from __future__ import annotations

from pathlib import Path

import xarray as xr

from assim.config import Config


def prep(cfg: Config) -> dict[str, xr.Dataset]:
    """Raw records -> prepared layer; returns {"forcing", "observations", "basins"} Datasets.

    Holds the prepared folder's lock while writing (a second ``prep`` is refused)."""
    from assim import preparation
    from assim.io.common import output_lock

    folder = Path(cfg["data"]["prepared"])
    with output_lock(folder / ".prepared.lock", "the prepared layer",
                     [folder / n for n in ("forcing.nc", "observations.nc", "basins.nc")]):
        return preparation.prepare(cfg)


def check(cfg: Config) -> str:
    """Validate config and inputs; return a short summary for a person."""
    from assim import preparation

    return preparation.check(cfg)


def verify(cfg: Config) -> xr.Dataset:
    """Skill of the runs and hindcasts in ``cfg['results']``; writes skill.nc and skill.csv."""
    from assim.verification.results import verify_results

    return verify_results(cfg)


def plot(cfg: Config, issue_date: str | None = None) -> list[Path]:
    """Every figure of the results folder (PNG); returns the written paths."""
    from assim import plots

    return plots.plot_results(cfg, issue_date=issue_date)


def report(cfg: Config) -> Path:
    """The self-contained HTML report; returns its path."""
    from assim import reporting

    return reporting.write_report(cfg)


# ---------------------------------------------------------------- runs, hindcasts, forecasts


def _day(text, what: str) -> int:
    """'YYYY-MM-DD' -> day number, or ConfigError naming ``what``."""
    import numpy as np

    from assim.errors import ConfigError

    try:
        return int((np.datetime64(str(text), "D") - np.datetime64("1970-01-01", "D")).astype(int))
    except ValueError:
        raise ConfigError(f"not a date YYYY-MM-DD: {text!r}", variable=what) from None


def _model(cfg: Config, basins: xr.Dataset):
    import importlib

    from assim import models
    from assim.errors import ConfigError, InputError

    for name in cfg["model"]["plugins"]:
        try:
            importlib.import_module(name)
        except ImportError as exc:
            raise ConfigError(f"cannot import model plugin ({exc})", file=cfg.source,
                              variable="model.plugins", place=name) from None
    try:
        return models.get(basins.attrs["model"])
    except KeyError as exc:
        raise InputError(str(exc.args[0]), file=Path(cfg["data"]["prepared"]) / "basins.nc",
                         variable="model") from None


def _inputs(cfg: Config, start=None, end=None, *, climatology: bool = False):
    """Prepared layer -> (model, engine.Inputs, basins Dataset) for the days start..end."""
    import numpy as np

    from assim import engine, perturb
    from assim.io import prepared as prep_io
    from assim.io.products import day_numbers

    folder = cfg["data"]["prepared"]
    forcing, obs, basins = prep_io.read_prepared(folder, start, end)
    model = _model(cfg, basins)
    usable = prep_io.usable_discharge(obs).values
    rejected_mask = int(prep_io.REJECTED)
    flags = obs["qc_flag"].values.astype(np.int64)
    rejected = np.isnan(usable) & ((flags & rejected_mask) != 0)
    ids = tuple(str(b) for b in forcing["basin"].values)
    clim = None
    if climatology:
        full = prep_io.read_forcing(Path(folder) / prep_io.FORCING_FILE)
        clim = engine.Climatology(day_numbers(full["time"].values), full["precipitation"].values,
                                  full["pet"].values)
    inputs = engine.Inputs(
        basin_ids=ids,
        keys=perturb.basin_keys(ids),
        area_km2=basins["area"].values.astype(np.float64),
        days=day_numbers(forcing["time"].values),
        precipitation=np.ascontiguousarray(forcing["precipitation"].values, dtype=np.float64),
        pet=np.ascontiguousarray(forcing["pet"].values, dtype=np.float64),
        observed=np.ascontiguousarray(usable, dtype=np.float64),
        rejected=rejected,
        parameters={p: basins[p].values.astype(np.float64) for p in model.parameter_names},
        climatology=clim,
    )
    return model, inputs, basins


def _period(cfg: Config):
    p = cfg["period"]
    return p["start"], p["end"]


def _identity(cfg: Config, model, inputs, mode: str) -> dict[str, str]:
    import hashlib

    import numpy as np

    h = hashlib.sha256()
    h.update(np.ascontiguousarray(inputs.area_km2).tobytes())
    for k in sorted(inputs.parameters):
        h.update(k.encode())
        h.update(np.ascontiguousarray(inputs.parameters[k]).tobytes())
    return {
        "model": model.name,
        "members": str(cfg["ensemble"]["members"]),
        "seed": str(cfg["ensemble"]["seed"]),
        "mode": mode,
        "digest_perturbation": cfg.digest("perturbation"),
        "digest_filter": cfg.digest("filter"),
        "digest_inputs": h.hexdigest(),
    }


def _to_state(r):
    from assim import engine

    return engine.EnsembleState(r.valid_day, r.states, dict(r.parameters), dict(r.ar1), r.collapse_days)


def _to_restart(state, model, inputs, identity):
    from assim.io.restart import Restart

    return Restart(tuple(inputs.basin_ids), int(state.day), model.state_names, state.states,
                   dict(state.parameters), dict(state.ar1), state.collapse_days, identity)


def _read_checked_restart(path, model, inputs, identity):
    import warnings

    from assim.errors import AssimWarning
    from assim.io.restart import check_restart, read_restart

    r = read_restart(path)
    for w in check_restart(r, identity=identity, basins=inputs.basin_ids, state_names=model.state_names):
        warnings.warn(w, AssimWarning, stacklevel=3)
    return _to_state(r)


def _progress(cfg: Config, label: str):
    from assim.parallel import ProgressBar

    bar = ProgressBar(label)
    bar.enabled = bar.enabled and bool(cfg["ensemble"]["progress"])
    return bar


def _attrs(cfg: Config, model, settings, summary=None) -> dict[str, str]:
    out = {
        "model": model.name,
        "members": str(settings.members),
        "seed": str(settings.seed),
        "filter_method": settings.method if settings.assimilate else "none",
        "updated_states": " ".join(settings.update_states),
        "config_digest": cfg.digest(),
    }
    return out


def _health_attrs(summary, inputs) -> dict[str, str]:
    import numpy as np

    n = summary.n_used + summary.n_gated
    frac = np.where(n > 0, summary.n_gated / np.maximum(n, 1), 0.0)
    return {
        "warnings": " | ".join(summary.warnings) if summary.warnings else "none",
        "readings_used": str(int(summary.n_used.sum())),
        "readings_gated": str(int(summary.n_gated.sum())),
        "gated_fraction_by_basin": " ".join(f"{b}={f:.3f}" for b, f in zip(inputs.basin_ids, frac, strict=True)),
        "ensemble_collapse": " ".join(
            f"{b}" for b, c in zip(inputs.basin_ids, summary.first_collapse, strict=True) if c >= 0) or "none",
    }


def run(cfg: Config, mode: str = "assimilate", restart_from=None, until=None) -> xr.Dataset:
    """Open-loop or assimilation run over ``period``; writes openloop.nc or analysis.nc and
    the restart (restart.nc; restart-openloop.nc for the open loop).

    Parameters
    ----------
    cfg : validated config
    mode : "openloop" or "assimilate"
    restart_from : restart file to continue from (its valid time + 1 is the first day run).
        When the existing product was written by the run being continued (same config,
        ending on the restart's day), the new file holds its days followed by the continued
        ones, equal to an uninterrupted run; otherwise only the continued days.
    until : last day to run, "YYYY-MM-DD" (default: period.end); the restart is valid then

    Returns
    -------
    the written Dataset (opened lazily), ``attrs["product_path"]`` set

    Raises
    ------
    InputError, ConfigError, RestartError, RunError; LockError while another run writes the
    same product
    """
    from assim import paths
    from assim.errors import ConfigError

    if mode not in ("openloop", "assimilate"):
        raise ConfigError(f"mode must be openloop or assimilate, not {mode!r}", variable="mode")
    with _product_lock(paths.run_product(cfg, mode), paths.restart(cfg, mode)):
        return _run(cfg, mode, restart_from, until)


def _product_lock(product: Path, *also: Path):
    """The lock of one product (and the files written with it), beside it.

    One lock per product, so that stages writing different products (the open loop and the
    assimilation run of the workflow) still run side by side."""
    from assim.io.common import output_lock

    return output_lock(product.parent / f".{product.name}.lock", f"writing {product.name}", [product, *also])


def _run(cfg: Config, mode: str, restart_from, until) -> xr.Dataset:
    import sys

    from assim import engine, paths
    from assim.io.products import RunWriter, open_product
    from assim.io.restart import write_restart

    start, end = _period(cfg)
    model, inputs, _ = _inputs(cfg, start, end)
    settings = engine.settings_from_config(cfg, model, mode)
    identity = _identity(cfg, model, inputs, mode)
    state = None
    if restart_from is not None:
        state = _read_checked_restart(restart_from, model, inputs, identity)
    until_day = None if until is None else _day(until, "--until")
    plan = engine.plan(inputs, settings, state, until_day)
    out_days = inputs.days[plan.output_slice]
    path = paths.run_product(cfg, mode)
    earlier = None if state is None else _continued_product(path, cfg, inputs, settings, state.day)
    bar = _progress(cfg, mode)
    writer = RunWriter(
        path, basins=inputs.basin_ids, days=out_days, members=settings.members, mode=mode,
        state_names=settings.write_states,
        state_units={s.name: s.unit for s in model.states},
        parameter_names=settings.estimate if mode == "assimilate" else (),
        quantiles=settings.quantiles, float32=settings.float32,
        time_chunk=min(settings.time_block_days, 365), state_noise=bool(settings.state_noise),
        earlier=earlier, attrs=_attrs(cfg, model, settings),
    )
    try:
        with writer:
            summary = engine.run(model, inputs, settings, writer, state=state, until_day=until_day,
                                 progress=bar)
            writer.set_attributes(**_health_attrs(summary, inputs))
    finally:
        bar.close()
    for w in engine.summarise_warnings(summary.warnings):
        print(f"warning: {w}", file=sys.stderr)
    write_restart(paths.restart(cfg, mode),
                  _to_restart(summary.state, model, inputs, {**identity, **_readings_identity(cfg, summary.state.day)}))
    return open_product(path)


def _continued_product(path, cfg: Config, inputs, settings, restart_day: int):
    """The existing product ``path`` if the run being restarted wrote it: same config, same
    basins and members, last day the restart's valid day. Its days are then kept in front
    of the continuation, so that a run split by a restart gives the uninterrupted run's file.
    Anything else is None (the continuation is written alone)."""

    from assim.io.products import read_run_extent

    extent = read_run_extent(path)
    same = (
        extent is not None
        and extent["config_digest"] == cfg.digest()
        and extent["basins"] == list(inputs.basin_ids)
        and extent["members"] in (None, settings.members)
        and extent["n_time"] > 0
        and extent["last_day"] == int(restart_day)
    )
    return path if same else None


class _HindcastSink:
    """Adapter: the engine's ``write_issues`` into one experiment of a HindcastWriter."""

    def __init__(self, writer, experiment: str):
        self.writer = writer
        self.experiment = experiment

    def write_block(self, start, arrays):  # a hindcast keeps no run output
        pass

    def write_issues(self, start, discharge):
        self.writer.write_block(self.experiment, start, discharge)


def hindcast(cfg: Config) -> xr.Dataset:
    """Hindcast experiments over ``period`` (after spin-up): forecasts every
    ``hindcast.every_days`` days with leads 1..``hindcast.leads``, from the open-loop and the
    assimilation states; writes hindcast.nc.

    Returns
    -------
    the written Dataset (lazily opened), ``attrs["product_path"]`` set
    """
    from assim import paths

    with _product_lock(paths.hindcast(cfg)):
        return _hindcast(cfg)


def _hindcast(cfg: Config) -> xr.Dataset:
    import dataclasses

    import numpy as np

    from assim import engine, paths
    from assim.errors import ConfigError
    from assim.io.products import HindcastWriter, open_product, read_forcing_forecast

    hc = cfg["hindcast"]
    kind = hc["forcing"]
    start, end = _period(cfg)
    model, inputs, _ = _inputs(cfg, start, end, climatology=kind == "climatology")
    leads, every = int(hc["leads"]), int(hc["every_days"])
    base = engine.settings_from_config(cfg, model, "openloop")
    plan = engine.plan(inputs, base, None)
    issues = engine.issue_indices(plan, every, leads, len(inputs.days))
    if not len(issues):
        raise ConfigError(f"no issue time with {leads} leads inside the period after the spin-up",
                          file=cfg.source, variable="hindcast.leads")
    if kind == "file":
        if not hc["forcing_file"]:
            raise ConfigError("hindcast.forcing is file but hindcast.forcing_file is empty",
                              file=cfg.source, variable="hindcast.forcing_file")
        parts = [read_forcing_forecast(hc["forcing_file"], inputs.basin_ids, int(inputs.days[i]), leads)
                 for i in issues]
        inputs = dataclasses.replace(inputs, forecast_forcing={
            "days": inputs.days[issues],
            **{n: np.stack([p[n] for p in parts], axis=1) for n in ("precipitation", "pet")}})
    path = paths.hindcast(cfg)
    attrs = {**_attrs(cfg, model, base), "forcing": kind, "every_days": str(every)}
    attrs.pop("filter_method")
    with HindcastWriter(path, basins=inputs.basin_ids, issue_days=inputs.days[issues], leads=leads,
                        members=base.members, float32=base.float32, attrs=attrs) as writer:
        notes = []
        for experiment, mode in (("openloop", "openloop"), ("assimilation", "assimilate")):
            settings = engine.settings_from_config(cfg, model, mode)
            bar = _progress(cfg, f"hindcast {experiment}")
            try:
                summary = engine.run(model, inputs, settings, _HindcastSink(writer, experiment),
                                     hindcast=(every, leads, kind), progress=bar)
            finally:
                bar.close()
            notes += summary.warnings
            if mode == "assimilate":
                writer.set_attributes(filter_method=settings.method, **_health_attrs(summary, inputs))
    return open_product(path)


def _readings_digests(cfg: Config, through_days) -> dict[int, str]:
    """Digest of the gauge readings the filter sees (usable discharge and QC flags) from
    ``period.start`` through each of ``through_days``: {day: sha256 hex}.

    A restart records the digest through its valid day; a later digest that differs means a
    reading arrived or changed after the restart was written (a late reading, a re-prepared
    raw folder), so that restart no longer holds every reading up to its day."""
    import hashlib

    import numpy as np

    from assim.io import prepared as prep_io
    from assim.io.products import day_numbers

    obs = prep_io.read_observations(Path(cfg["data"]["prepared"]) / prep_io.OBSERVATIONS_FILE)
    days = day_numbers(obs["time"].values)
    usable = prep_io.usable_discharge(obs).values.T  # (time, basin)
    usable = np.where(np.isnan(usable), np.nan, usable)  # one NaN bit pattern
    flags = obs["qc_flag"].values.astype(np.int64).T
    rows = np.ascontiguousarray(np.concatenate([usable.view(np.int64), flags], axis=1))  # one row a day
    h = hashlib.sha256("\n".join(str(b) for b in obs["basin"].values).encode())
    i = int(np.searchsorted(days, _day(cfg["period"]["start"], "period.start")))
    out = {}
    for day in sorted(set(int(d) for d in through_days)):
        j = int(np.searchsorted(days, day, side="right"))
        if j > i:  # hashing whole days, so the digest does not depend on how the days are split
            h.update(rows[i:j].tobytes())
            i = j
        out[day] = h.copy().hexdigest()
    return out


def _readings_identity(cfg: Config, day: int) -> dict[str, str]:
    """Restart attributes recording which readings the states have taken in."""
    from assim.io.products import dates

    return {"readings_through": str(dates([day])[0].date()), "readings_digest": _readings_digests(cfg, [day])[day]}


def _latest_restart(cfg: Config, issue_day: int):
    """The restart a forecast for ``issue_day`` starts from: (path, valid day, warnings).

    The newest forecasts/restart-YYYY-MM-DD.nc before the issue day (else restart.nc) whose
    readings are still those on file: a restart written before a late reading of its days
    arrived is passed over for an older one, so that the next forecast assimilates the late
    reading. When no restart is current (readings before the run's own restart changed), the
    newest is used and the warning says so. Only the restarts' headers are read.
    """
    import re

    from assim import paths
    from assim.errors import RestartError
    from assim.io.restart import read_restart_header

    candidates = []
    folder = paths.forecasts(cfg)
    if folder.is_dir():
        for f in folder.glob("restart-*.nc"):
            m = re.fullmatch(r"restart-(\d{4}-\d{2}-\d{2})\.nc", f.name)
            if m and _day(m.group(1), f.name) < issue_day:
                candidates.append(f)
    p = paths.restart(cfg)
    if p.exists():
        candidates.append(p)
    if not candidates:
        raise RestartError("no restart to start the forecast from: run `assim run --mode assimilate` first",
                           file=p)
    headers = sorted(((f, *read_restart_header(f)) for f in candidates), key=lambda h: h[1], reverse=True)
    digests = _readings_digests(cfg, [day for _, day, _ in headers])
    skipped = []
    for f, day, attrs in headers:
        recorded = attrs.get("readings_digest")
        if recorded is None or recorded == digests[day]:  # None: written before digests existed
            return f, day, [f"{s}: passed over, readings up to {a.get('readings_through')} arrived or changed "
                            "after it was written" for s, _, a in skipped]
        skipped.append((f, day, attrs))
    f, day, _ = headers[0]
    return f, day, [f"{f}: gauge readings up to {headers[-1][2].get('readings_through')} changed after every "
                    "restart was written; the forecast continues from the newest restart without them "
                    "(rerun `assim run --mode assimilate` to take them in)"]


def forecast(cfg: Config, issue_date: str) -> xr.Dataset:
    """Operational forecast issued at the end of ``issue_date``.

    Starts from the latest restart before the date (forecasts/restart-*.nc, else
    restart.nc), assimilates the readings since then up to the issue date, writes
    forecasts/restart-DATE.nc and forecasts/forecast-DATE.nc (ensemble discharge, quantiles,
    threshold exceedance probabilities per lead). A second run for the same date is refused
    while one holds the lock; rerunning a finished date reproduces the same numbers.

    Returns
    -------
    the written Dataset, ``attrs["product_path"]`` set; ``attrs["analysis"]`` says whether
    readings were assimilated.
    """
    import dataclasses
    import sys

    from assim import engine, paths
    from assim.errors import ConfigError, RestartError
    from assim.io.products import dates, forecast_lock, read_forcing_forecast, write_forecast
    from assim.io.restart import write_restart

    fc = cfg["forecast"]
    kind, leads = fc["forcing"], int(fc["leads"])
    issue_day = _day(issue_date, "--issue-date")
    iso = str(dates([issue_day])[0].date())
    lock = paths.forecasts(cfg) / f".forecast-{iso}.lock"
    with forecast_lock(lock, [paths.forecast(cfg, iso), paths.forecast_restart(cfg, iso)]):
        restart_path, valid, passed_over = _latest_restart(cfg, issue_day)
        for w in passed_over:
            print(f"warning: {w}", file=sys.stderr)
        if valid > issue_day:
            raise RestartError(f"the restart is valid at {dates([valid])[0].date()}, after the issue date {iso}",
                               file=restart_path, variable="valid_time")
        last = issue_day + (leads if kind == "observed" else 0)
        model, inputs, basins = _inputs(cfg, str(dates([valid])[0].date()), str(dates([last])[0].date()),
                                        climatology=kind == "climatology")
        settings = dataclasses.replace(engine.settings_from_config(cfg, model, "assimilate"), spinup_days=0)
        identity = _identity(cfg, model, inputs, "assimilate")
        state = _read_checked_restart(restart_path, model, inputs, identity)
        file_forcing = None  # read before anything is written: a bad file leaves no restart behind
        if kind == "file":
            if not fc["forcing_file"]:
                raise ConfigError("forecast.forcing is file but forecast.forcing_file is empty",
                                  file=cfg.source, variable="forecast.forcing_file")
            file_forcing = read_forcing_forecast(fc["forcing_file"], inputs.basin_ids, issue_day, leads)
        summary = engine.run(model, inputs, settings, None, state=state, until_day=issue_day)
        n_used = int(summary.n_used.sum())
        n_days = issue_day - valid
        if n_days == 0:
            analysis = "not performed: the restart is already valid at the issue date"
        elif n_used == 0:
            analysis = (f"not performed: no gauge reading since the last restart "
                        f"(valid at {dates([valid])[0].date()})")
        else:
            analysis = (f"performed: {n_used} gauge readings assimilated over the {n_days} days since the "
                        f"last restart (valid at {dates([valid])[0].date()})")
        write_restart(paths.forecast_restart(cfg, iso),
                      _to_restart(summary.state, model, inputs, {**identity, **_readings_identity(cfg, issue_day)}))
        q = engine.forecast_issue(model, inputs, settings, summary.state, leads, kind, file_forcing)
        thr = basins["thresholds"].values
        names = [str(t) for t in basins["threshold"].values] if "threshold" in basins.coords else []
        ds = write_forecast(
            paths.forecast(cfg, iso), basins=inputs.basin_ids, issue_day=issue_day, discharge=q,
            quantiles=fc["quantiles"], thresholds={n: thr[:, j] for j, n in enumerate(names)},
            analysis=analysis, float32=settings.float32,
            attrs={**_attrs(cfg, model, settings), "forcing": kind, "restart": str(restart_path),
                   **({"warnings": " | ".join(passed_over + summary.warnings)}
                      if passed_over or summary.warnings else {})},
        )
    return ds
