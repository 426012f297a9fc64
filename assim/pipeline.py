"""Python entry points behind the CLI: files and arrays meet here.

Each function takes a validated :class:`assim.config.Config`, reads inputs through
:mod:`assim.io`, computes, writes through :mod:`assim.io`, and returns the Dataset it wrote
(with the written path in ``attrs["product_path"]``).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr

from assim.config import Config


@dataclass(frozen=True)
class PreparedLayer:
    """What ``assim.prep`` wrote: the three Datasets of the prepared layer (each with
    ``attrs["product_path"]``) and their folder."""

    folder: Path
    forcing: xr.Dataset
    observations: xr.Dataset
    basins: xr.Dataset


def prep(cfg: Config) -> PreparedLayer:
    """Raw records -> prepared layer (forcing.nc, observations.nc, basins.nc).

    Holds the prepared folder's lock while writing: every caller, the CLI or a second
    ``assim.prep`` in the same process, takes it, and a second prep is refused (LockError).

    Returns
    -------
    PreparedLayer : the Datasets written and their folder
    """
    from assim import preparation
    from assim.io.common import output_lock

    folder = Path(cfg["data"]["prepared"])
    with output_lock(folder / ".prepared.lock", "the prepared layer",
                     [folder / n for n in ("forcing.nc", "observations.nc", "basins.nc", "prep-record.json")]):
        return PreparedLayer(folder, **preparation.prepare(cfg))


def check(cfg: Config) -> str:
    """Validate config and inputs; return a short summary for a person."""
    from assim import preparation

    return preparation.check(cfg)


def calibrate(cfg: Config) -> xr.Dataset:
    """Calibrate each basin's parameters against its gauge (config section ``calibration``);
    writes calibration.nc and returns it (``attrs["product_path"]`` set). basins.yaml is
    never rewritten: point ``model.calibrated_parameters`` at the file and run ``prep``."""
    from assim import calibration_study, paths

    bar = _progress(cfg, "calibrate")
    try:
        with _product_lock(paths.calibration(cfg)):
            return calibration_study.run_calibration(cfg, progress=bar)
    finally:
        bar.close()


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
    from assim.conventions import day_number
    from assim.errors import ConfigError

    try:
        day = day_number(text)
    except ValueError:
        raise ConfigError(f"not a date YYYY-MM-DD: {text!r}", variable=what) from None
    # dates that every reader (pandas, CF time units) can represent: years 1678..2261
    if not day_number("1678-01-01") <= day <= day_number("2261-12-31"):
        raise ConfigError(f"date {text!r} is outside the years 1678 to 2261 that the products can hold",
                          variable=what)
    return day


def _model(cfg: Config, basins: xr.Dataset):
    """The registered model of ``basins`` (plugins were imported when ``cfg`` was loaded)."""
    from assim import models
    from assim.errors import InputError

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
    names = engine.forcing_names(model)
    lacking = [f for f in model.forcings if f not in names]
    if lacking:  # a user model's own forcing: prep writes precipitation, PET and temperature only
        from assim.errors import RunError

        raise RunError(f"model {model.name} needs the forcing {lacking[0]!r}, which ensemble runs do not pass",
                       file=Path(folder) / "basins.nc", variable="model")
    if "temperature" in names and "temperature" not in forcing:
        from assim.errors import InputError

        raise InputError(f"model {model.name} takes the daily mean air temperature, which this forcing file "
                         "lacks: give the basin a `snow:` block in basins.yaml and rerun `assim prep`",
                         file=Path(folder) / prep_io.FORCING_FILE, variable="temperature")
    usable = prep_io.usable_discharge(obs).values
    rejected_mask = int(prep_io.REJECTED)
    flags = obs["qc_flag"].values.astype(np.int64)
    rejected = np.isnan(usable) & ((flags & rejected_mask) != 0)
    ids = tuple(str(b) for b in forcing["basin"].values)
    clim = None
    if climatology:
        full = prep_io.read_forcing(Path(folder) / prep_io.FORCING_FILE)
        clim = engine.Climatology(day_numbers(full["time"].values), full["precipitation"].values,
                                  full["pet"].values, full["temperature"].values if "temperature" in names else None)
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
        temperature=(np.ascontiguousarray(forcing["temperature"].values, dtype=np.float64)
                     if "temperature" in names else None),
    )
    return model, inputs, basins


def _period(cfg: Config):
    p = cfg["period"]
    return p["start"], p["end"]


def _identity(cfg: Config, model, inputs, mode: str) -> dict[str, str | int]:
    import hashlib

    import numpy as np

    h = hashlib.sha256()
    h.update(np.ascontiguousarray(inputs.area_km2).tobytes())
    for k in sorted(inputs.parameters):
        h.update(k.encode())
        h.update(np.ascontiguousarray(inputs.parameters[k]).tobytes())
    return {
        "model": model.name,
        "members": int(cfg["ensemble"]["members"]),
        "seed": int(cfg["ensemble"]["seed"]),
        "mode": mode,
        "digest_perturbation": cfg.digest("perturbation"),
        "digest_filter": cfg.digest("filter"),
        "digest_inputs": h.hexdigest(),
    }


def _to_state(r):
    from assim import engine

    return engine.EnsembleState(r.valid_day, r.states, dict(r.parameters), dict(r.ar1), r.collapse_days,
                                r.inflation_mean, r.inflation_sd, r.window, r.window_days)


def _to_restart(state, model, inputs, identity, settings):
    from assim.engine.window import window_columns
    from assim.io.restart import Restart

    w = {}
    if state.window is not None:  # the smoother's window (filter.smoother.window_days > 0)
        w = dict(window=state.window, window_days=state.window_days,
                 window_columns=window_columns(settings.write_states))
    return Restart(tuple(inputs.basin_ids), int(state.day), model.state_names, state.states,
                   dict(state.parameters), dict(state.ar1), state.collapse_days, identity,
                   inflation_mean=state.inflation_mean, inflation_sd=state.inflation_sd, **w)


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
        "members": int(settings.members),
        "seed": int(settings.seed),
        "filter_method": settings.method if settings.assimilate else "none",
        "updated_states": " ".join(settings.update_states),
        "config_digest": cfg.digest(),
        "results_digest": cfg.digest_results(),
    }
    return out


def _smoother_attrs(settings) -> dict:
    """The fixed-lag smoother's window, and for a reanalysis how final its days are."""
    w = int(settings.smoother_window)
    if not settings.assimilate:
        return {}
    out = {"smoother_window_days": w}
    if settings.reanalysis:
        out["smoothing"] = (
            f"fixed-lag ensemble Kalman smoother (Evensen & van Leeuwen 2000), window {w} days: each day "
            f"is corrected by the readings of its own day and of the {w} days after it; the last {w} days "
            "of the file had fewer later readings (filter plus partial smoothing) and change when the run "
            "is continued")
    return out


def _show_warnings(lines) -> None:
    """Emit each warning line once as an AssimWarning (the CLI prints each as one line); the
    engine returns its warnings and never emits them, so nothing is shown twice."""
    import warnings

    from assim.errors import AssimWarning

    for line in lines:
        warnings.warn(str(line), AssimWarning, stacklevel=3)
def _provenance(cfg: Config) -> dict[str, str]:
    """What a product set was made from: the write (``set_generation``) of the prepared
    layer it read, recorded in each member."""
    import netCDF4

    from assim.io import prepared as prep_io

    out = {}
    for name in (prep_io.FORCING_FILE, prep_io.OBSERVATIONS_FILE, prep_io.BASINS_FILE):
        try:
            with netCDF4.Dataset(Path(cfg["data"]["prepared"]) / name) as nc:
                gen = getattr(nc, "set_generation", None)
        except (OSError, RuntimeError):
            gen = None
        if gen:
            return {"prepared_generation": str(gen)}
    return out


def _health_attrs(summary, inputs) -> dict[str, str]:
    import numpy as np

    n = summary.n_used + summary.n_gated
    frac = np.where(n > 0, summary.n_gated / np.maximum(n, 1), 0.0)
    return {
        "warnings": " | ".join(str(w) for w in summary.warnings) if summary.warnings else "none",
        "readings_used": int(summary.n_used.sum()),
        "readings_gated": int(summary.n_gated.sum()),
        "gated_fraction_by_basin": " ".join(f"{b}={f:.3f}" for b, f in zip(inputs.basin_ids, frac, strict=True)),
        "ensemble_collapse": " ".join(
            f"{b}" for b, c in zip(inputs.basin_ids, summary.first_collapse, strict=True) if c >= 0) or "none",
    }


def run(cfg: Config, mode: str = "assimilate", restart_from=None, until=None) -> xr.Dataset:
    """Open-loop, assimilation or reanalysis run over ``period``; writes openloop.nc,
    analysis.nc or reanalysis.nc and the restart (restart.nc; restart-openloop.nc,
    restart-reanalysis.nc).

    Parameters
    ----------
    cfg : validated config
    mode : "openloop", "assimilate" or "reanalysis" (the assimilation with the fixed-lag
        smoother of ``filter.smoother.window_days`` W, recording each day's smoothed
        ensemble once W later days' readings have corrected it; the last W days of the
        period hold the filter's values smoothed by the readings up to the period's end only)
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

    if mode not in ("openloop", "assimilate", "reanalysis"):
        raise ConfigError(f"mode must be openloop, assimilate or reanalysis, not {mode!r}", variable="mode")
    with _product_lock(paths.run_product(cfg, mode), paths.restart(cfg, mode)), _reading_layer(cfg):
        return _run(cfg, mode, restart_from, until)


def _reading_layer(cfg: Config):
    """The shared lock on the prepared layer, held while a command reads it: ``prep`` cannot
    replace the layer under a run (see :func:`assim.io.common.layer_lock`)."""
    from assim.io.common import layer_lock

    return layer_lock(cfg["data"]["prepared"], exclusive=False)


def _product_lock(product: Path, *also: Path):
    """The lock of one product (and the files written with it), beside it.

    One lock per product, so that stages writing different products (the open loop and the
    assimilation run of the workflow) still run side by side."""
    from assim.io.common import output_lock

    return output_lock(product.parent / f".{product.name}.lock", f"writing {product.name}", [product, *also])


def _run(cfg: Config, mode: str, restart_from, until) -> xr.Dataset:

    from assim import engine, paths
    from assim.errors import ConfigError, RestartError, RunError
    from assim.io.common import FileSet
    from assim.io.products import RunWriter, open_product
    from assim.io.restart import write_restart
    from assim.settings import settings_from_config

    start, end = _period(cfg)
    model, inputs, _ = _inputs(cfg, start, end)
    settings = settings_from_config(cfg, model, mode)
    identity = _identity(cfg, model, inputs, mode)
    state = None
    if restart_from is not None:
        state = _read_checked_restart(restart_from, model, inputs, identity)
        w = settings.smoother_window
        if settings.reanalysis and w and (state.window is None or state.window.shape[2] != w):
            raise RestartError(f"the restart carries no smoother window of {w} days, which a reanalysis "
                               "continues from", file=restart_from, variable="window")
    until_day = None if until is None else _day(until, "--until")
    try:
        plan = engine.plan(inputs, settings, state, until_day)
    except RunError as exc:  # the engine knows no files: name the restart
        if exc.file is None and exc.variable == "valid_time":
            raise RestartError(exc.message, file=restart_from, variable=exc.variable, place=exc.place) from None
        raise
    out_days = inputs.days[plan.output_slice]
    if settings.spinup_days >= len(inputs.days):
        raise ConfigError(f"the spin-up ({settings.spinup_days} days) leaves no day of the period "
                          f"{_period(cfg)[0]} to {_period(cfg)[1]} to write; shorten it",
                          file=cfg.source, variable="period.spinup_days")
    path = paths.run_product(cfg, mode)
    earlier = None if state is None else _continued_product(path, cfg, inputs, settings, state.day, restart_from)
    bar = _progress(cfg, mode)
    restart_path = paths.restart(cfg, mode)
    files = FileSet([path, restart_path], checksummed=[restart_path], attrs=_provenance(cfg))
    writer = RunWriter(
        path, basins=inputs.basin_ids, days=out_days, members=settings.members, mode=mode,
        state_names=settings.write_states,
        state_units={s.name: s.unit for s in model.states},
        parameter_names=settings.estimate if mode == "assimilate" else (),
        quantiles=settings.quantiles, float32=settings.float32,
        time_chunk=min(settings.time_block_days, 365),
        state_noise=bool(settings.state_noise) and not settings.reanalysis,
        adaptive_inflation=settings.adaptive_inflation and mode == "assimilate",
        earlier=earlier, attrs={**_attrs(cfg, model, settings), **_smoother_attrs(settings)}, commit=files,
    )
    # the product and its restart are one set: both replaced, or neither (a full disk)
    with files:
        try:
            with writer:
                summary = engine.run(model, inputs, settings, writer, state=state, until_day=until_day,
                                     progress=bar)
                writer.set_attributes(**_health_attrs(summary, inputs))
                writer.write_innovation_statistics()
        finally:
            bar.close()
        write_restart(restart_path, _to_restart(summary.state, model, inputs,
                                                {**identity, **_readings_identity(cfg, summary.state.day)}, settings),
                      commit=files)
    _show_warnings(engine.summarise_warnings(summary.warnings))
    return open_product(path)


def _continued_product(path, cfg: Config, inputs, settings, restart_day: int, restart_path):
    """The existing product ``path`` if the run being restarted wrote it: written together
    with the restart (same ``set_generation``), with the settings that change results
    (:meth:`assim.config.Config.digest_results`; not scheduler, workers, chunks, period.end),
    the same basins and members, last day the restart's valid day. Its days are then kept in
    front of the continuation, so that a run split by a restart gives the uninterrupted
    run's file. None when there is no product (the continuation is written alone).

    Raises
    ------
    RunError
        naming the product, when it exists but cannot be continued: a continuation never
        replaces a product's earlier days silently.
    """
    from assim.errors import RunError
    from assim.io.products import dates, read_run_extent
    from assim.io.restart import read_restart_header

    extent = read_run_extent(path)
    if extent is None or extent["n_time"] == 0:
        return None
    generation = read_restart_header(restart_path)[1].get("set_generation")
    why = None
    if extent["basins"] != list(inputs.basin_ids) or extent["members"] not in (None, settings.members):
        why = "it holds other basins or another ensemble size"
    elif extent["results_digest"] != cfg.digest_results():
        why = "it was written with other settings that change results"
    elif extent["last_day"] != int(restart_day):
        why = (f"it ends on {dates([extent['last_day']])[0].date()}, the restart is valid on "
               f"{dates([restart_day])[0].date()}")
    elif generation and extent["set_generation"] and generation != extent["set_generation"]:
        why = "it was not written with this restart"
    if why is None:
        return path
    span = f"{dates([extent['first_day']])[0].date()} to {dates([extent['last_day']])[0].date()}"
    raise RunError(f"holds {extent['n_time']} days ({span}) that this continuation cannot keep: {why}; "
                   "move the file away (or choose another results folder) to write the continuation alone",
                   file=path)


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

    with _product_lock(paths.hindcast(cfg)), _reading_layer(cfg):
        return _hindcast(cfg)


def _hindcast(cfg: Config) -> xr.Dataset:
    import dataclasses

    import numpy as np

    from assim import engine, paths
    from assim.errors import ConfigError
    from assim.io.products import HindcastWriter, open_product, read_forcing_forecast
    from assim.settings import settings_from_config

    hc = cfg["hindcast"]
    kind = hc["forcing"]
    start, end = _period(cfg)
    model, inputs, _ = _inputs(cfg, start, end, climatology=kind == "climatology")
    leads, every = int(hc["leads"]), int(hc["every_days"])
    base = settings_from_config(cfg, model, "openloop")
    plan = engine.plan(inputs, base, None)
    issues = engine.issue_indices(plan, every, leads, len(inputs.days))
    if not len(issues):
        raise ConfigError(f"no issue time with {leads} leads inside the period after the spin-up",
                          file=cfg.source, variable="hindcast.leads")
    if kind == "file":
        if not hc["forcing_file"]:
            raise ConfigError("hindcast.forcing is file but hindcast.forcing_file is empty",
                              file=cfg.source, variable="hindcast.forcing_file")
        names = engine.forcing_names(model)
        parts = [read_forcing_forecast(hc["forcing_file"], inputs.basin_ids, int(inputs.days[i]), leads, names)
                 for i in issues]
        inputs = dataclasses.replace(inputs, forecast_forcing={
            "days": inputs.days[issues], **{n: np.stack([p[n] for p in parts], axis=1) for n in names}})
    path = paths.hindcast(cfg)
    attrs = {**_attrs(cfg, model, base), "forcing": kind, "every_days": every}
    attrs.pop("filter_method")
    with HindcastWriter(path, basins=inputs.basin_ids, issue_days=inputs.days[issues], leads=leads,
                        members=base.members, float32=base.float32, attrs=attrs) as writer:
        for experiment, mode in (("openloop", "openloop"), ("assimilation", "assimilate")):
            settings = settings_from_config(cfg, model, mode)
            bar = _progress(cfg, f"hindcast {experiment}")
            try:
                summary = engine.run(model, inputs, settings, _HindcastSink(writer, experiment),
                                     hindcast=(every, leads, kind), progress=bar)
            finally:
                bar.close()
            _show_warnings(engine.summarise_warnings(summary.warnings))
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
    from assim.conventions import iso

    return {"readings_through": iso(day), "readings_digest": _readings_digests(cfg, [day])[day]}


def _span(files) -> str:
    """'a' or 'a … b (n restarts)' for a list of restart files, newest first."""
    files = [str(f) for f in files]
    return files[0] if len(files) == 1 else f"{files[-1]} … {files[0]} ({len(files)} restarts)"


def _misfit(attrs: dict, basins, identity: dict, basin_ids) -> str | None:
    """Why a restart's header does not fit the forecast's settings (None when it fits)."""
    for key in ("model", "members", "seed", "mode"):
        if attrs.get(key) != str(identity[key]):
            return f"{key} {attrs.get(key)}, the config has {identity[key]}"
    if tuple(basins) != tuple(basin_ids):
        return "other basins than the prepared layer"
    return None


def _choose_restart(cfg: Config, issue_day: int, identity: dict, basin_ids, state_names):
    """The restart a forecast for ``issue_day`` continues from: (Restart, notes).

    Candidates are forecasts/restart-YYYY-MM-DD.nc before the issue day and restart.nc valid
    on or before it, newest first; the first that fits is taken: readable, written with
    this model, members, seed, basins and mode (assimilate), with the perturbation, filter
    and input digests of the config, and whose readings digest is still that of the
    prepared layer (a late or corrected reading of its days means the states have not seen
    it, so an older restart is taken and the readings since then are assimilated again).
    Only candidates newer than the one taken are opened, so an old damaged restart never
    matters and the cost does not grow with the number of days issued.

    When no restart fits fully, the newest one that differs only in its perturbation,
    filter or input settings is taken, else the newest one whose readings changed, each
    with a note saying so. ``notes`` says, once, why newer restarts were passed over.

    Raises
    ------
    RestartError
        naming the newest candidate and why it does not fit, when none can be used.
    """
    import re

    from assim import paths
    from assim.errors import RestartError
    from assim.io.products import dates
    from assim.io.restart import LOOSE, check_restart, read_restart, read_restart_header

    run_restart = paths.restart(cfg)
    candidates = []  # (day, path, header or None)
    folder = paths.forecasts(cfg)
    if folder.is_dir():
        for f in folder.glob("restart-*.nc"):
            m = re.fullmatch(r"restart-(\d{4}-\d{2}-\d{2})\.nc", f.name)
            if m and _day(m.group(1), f.name) < issue_day:
                candidates.append((_day(m.group(1), f.name), f, None))
    unreadable, after = [], []
    if run_restart.exists():
        try:
            header = read_restart_header(run_restart)
        except RestartError as exc:
            unreadable.append(f"{run_restart} ({exc.args[0]})")
        else:
            if header[0] <= issue_day:
                candidates.append((header[0], run_restart, header))
            else:
                after.append(run_restart)
    if not candidates:
        if after:
            raise RestartError(f"the restart is valid at {dates([header[0]])[0].date()}, after the issue date "
                               f"{dates([issue_day])[0].date()}, and no earlier restart exists",
                               file=run_restart, variable="valid_time")
        why = f" ({unreadable[0]})" if unreadable else ""
        raise RestartError("no restart to start the forecast from: run `assim run --mode assimilate` "
                           f"first{why}", file=run_restart)
    candidates.sort(key=lambda c: (c[0], c[1] == run_restart), reverse=True)
    digests = _readings_digests(cfg, [c[0] for c in candidates])
    misfits, changed, loose = [], [], None

    def notes(taken):
        out = []
        if unreadable:
            out.append(f"passed over {len(unreadable)} unreadable restart(s): {'; '.join(unreadable[:3])}")
        if misfits:
            out.append(f"passed over {_span([f for f, _ in misfits])}: written with other settings "
                       f"({misfits[0][1]})")
        if changed:
            first = dates([min(d for _, d in changed)])[0].date()
            out.append(f"gauge readings up to {first} arrived or changed after {_span([f for f, _ in changed])} "
                       f"{'was' if len(changed) == 1 else 'were'} written (a late or corrected reading): "
                       f"re-assimilating from {taken}")
        return out

    for _, f, header in candidates:
        try:
            valid, attrs, basins = header or read_restart_header(f)
        except RestartError as exc:
            unreadable.append(f"{f} ({exc.args[0]})")
            continue
        why = _misfit(attrs, basins, identity, basin_ids)
        if why is not None:
            misfits.append((f, why))
            continue
        recorded = attrs.get("readings_digest")
        if valid not in digests:
            digests.update(_readings_digests(cfg, [valid]))
        if recorded is not None and recorded != digests[valid]:  # None: written before digests existed
            changed.append((f, valid))
            continue
        try:
            r = read_restart(f)
            check_restart(r, identity=identity, basins=basin_ids, state_names=state_names)
        except RestartError as exc:
            unreadable.append(f"{f} ({exc.args[0]})")
            continue
        if any(k in identity and attrs.get(k) != str(identity[k]) for k in LOOSE):
            loose = loose or r
            continue
        return r, notes(f)
    if loose is not None:
        return loose, notes(loose.path)
    if changed:  # every restart predates the changed readings: the newest, and say so
        f = changed[0][0]
        r = read_restart(f)
        check_restart(r, identity=identity, basins=basin_ids, state_names=state_names)
        return r, [f"{f}: gauge readings up to {r.identity.get('readings_through')} changed after every "
                   "restart was written; the forecast continues from the newest restart without them "
                   "(rerun `assim run --mode assimilate` to take them in)"]
    f, why = (misfits[0] if misfits else (candidates[0][1], unreadable[0] if unreadable else "unusable"))
    raise RestartError(f"no restart fits the forecast: {why}", file=f)


def latest_issue_date(cfg: Config, last_weather_day=None) -> str:
    """The latest issue date the inputs allow, "YYYY-MM-DD".

    A forecast issued at the end of day D assimilates the readings through D and needs
    D's weather (with ``forecast.forcing: observed`` also the weather of its leads), so the
    latest D is the last weather day (minus ``forecast.leads`` for observed forcing).

    Parameters
    ----------
    last_weather_day : the last day of weather, datetime64[D]; None = the last day of the
        prepared forcing.

    Raises
    ------
    InputError
        when the weather's last day cannot be read.
    """
    import numpy as np

    from assim.errors import InputError
    from assim.io import prepared as prep_io
    from assim.io import raw as raw_io
    from assim.io.products import dates

    if last_weather_day is None:
        forcing = prep_io.read_forcing(Path(cfg["data"]["prepared"]) / prep_io.FORCING_FILE)
        last_weather_day = forcing["time"].values[-1]
    if last_weather_day is None or np.isnat(np.datetime64(last_weather_day, "D")):
        raise InputError("cannot read the last day of the weather records",
                         file=Path(cfg["data"]["raw"]) / raw_io.WEATHER_FILE, variable="date")
    day = _day(np.datetime64(last_weather_day, "D"), "weather date")
    if cfg["forecast"]["forcing"] == "observed":
        day -= int(cfg["forecast"]["leads"])
    return str(dates([day])[0].date())


def forecast(cfg: Config, issue_date: str | None = None) -> xr.Dataset:
    """Operational forecast issued at the end of ``issue_date``: it assimilates the readings
    through that UTC day and lead 1 is the next day. ``None`` or "latest" = the latest date
    the inputs allow (:func:`latest_issue_date`).

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

    from assim import conventions, engine, paths
    from assim.errors import ConfigError, RunError
    from assim.io.common import FileSet
    from assim.io.products import forecast_lock, read_forcing_forecast, write_forecast
    from assim.io.restart import check_restart, write_restart
    from assim.settings import settings_from_config

    fc = cfg["forecast"]
    kind, leads = fc["forcing"], int(fc["leads"])
    if issue_date in (None, "latest"):
        issue_date = latest_issue_date(cfg)
    issue_day = _day(issue_date, "--issue-date")
    iso = conventions.iso(issue_day)
    lock = paths.forecasts(cfg) / f".forecast-{iso}.lock"
    with forecast_lock(lock, [paths.forecast(cfg, iso), paths.forecast_restart(cfg, iso), paths.bulletin(cfg, iso),
                              paths.alerts(cfg, iso, "json"), paths.alerts(cfg, iso, "csv")]), _reading_layer(cfg):
        # the identity needs only the basins' areas and parameters: one day of inputs
        model, probe, _ = _inputs(cfg, iso, iso)
        identity = _identity(cfg, model, probe, "assimilate")
        restart, notes = _choose_restart(cfg, issue_day, identity, probe.basin_ids, model.state_names)
        restart_path, valid = restart.path, restart.valid_day
        _show_warnings(notes)
        last = issue_day + (leads if kind == "observed" else 0)
        model, inputs, basins = _inputs(cfg, conventions.iso(valid), conventions.iso(last),
                                        climatology=kind == "climatology")
        settings = dataclasses.replace(settings_from_config(cfg, model, "assimilate"), spinup_days=0)
        _show_warnings(check_restart(restart, identity=identity, basins=inputs.basin_ids,
                                     state_names=model.state_names))
        state = _to_state(restart)
        file_forcing = None  # read before anything is written: a bad file leaves no restart behind
        if kind == "file":
            if not fc["forcing_file"]:
                raise ConfigError("forecast.forcing is file but forecast.forcing_file is empty",
                                  file=cfg.source, variable="forecast.forcing_file")
            file_forcing = read_forcing_forecast(fc["forcing_file"], inputs.basin_ids, issue_day, leads,
                                                 engine.forcing_names(model))
        assimilated = _Assimilated()  # the ensemble of the days taken in, for the bulletin
        summary = engine.run(model, inputs, settings, assimilated, state=state, until_day=issue_day)
        _show_warnings(engine.summarise_warnings(summary.warnings))
        n_used = int(summary.n_used.sum())
        n_days = issue_day - valid
        if n_days == 0:
            analysis = "not performed: the restart is already valid at the issue date"
        elif n_used == 0:
            analysis = (f"not performed: no gauge reading since the last restart "
                        f"(valid at {conventions.iso(valid)})")
        else:
            analysis = (f"performed: {n_used} gauge readings assimilated over the {n_days} days since the "
                        f"last restart (valid at {conventions.iso(valid)})")
        try:
            cols = tuple(model.state_index(n) for n in settings.write_states)
            q = engine.forecast_issue(model, inputs, settings, summary.state, leads, kind, file_forcing,
                                      keep_states=cols)
            q, kept = q if cols else (q, None)
        except RunError as exc:  # the engine knows no files: name the forcing it lacked
            if exc.file is None:
                forcing = fc["forcing_file"] if kind == "file" else Path(cfg["data"]["prepared"]) / "forcing.nc"
                raise RunError(exc.message, file=forcing, variable=exc.variable, place=exc.place) from None
            raise
        traces = _forcing_traces(inputs, issue_day, leads, settings.members, kind, file_forcing)
        thr = basins["thresholds"].values
        names = [str(t) for t in basins["threshold"].values] if "threshold" in basins.coords else []
        product, restart_file = paths.forecast(cfg, iso), paths.forecast_restart(cfg, iso)
        # the forecast and its restart are one set: both written, or neither
        with FileSet([product, restart_file], checksummed=[restart_file], attrs=_provenance(cfg)) as files:
            ds = write_forecast(
                product, basins=inputs.basin_ids, issue_day=issue_day, discharge=q,
                quantiles=fc["quantiles"], thresholds={n: thr[:, j] for j, n in enumerate(names)},
                analysis=analysis, float32=settings.float32,
                assimilated=assimilated.result(inputs.days, valid),
                states={n: kept[..., j] for j, n in enumerate(settings.write_states)},
                state_units={s.name: s.unit for s in model.states},
                attrs={**_attrs(cfg, model, settings), "forcing": kind, "restart": str(restart_path),
                       "restart_valid_time": conventions.iso(valid), **traces,
                       **({"warnings": " | ".join(notes + [str(w) for w in summary.warnings])}
                          if notes or summary.warnings else {})},
                commit=files,
            )
            write_restart(restart_file, _to_restart(summary.state, model, inputs,
                                                    {**identity, **_readings_identity(cfg, issue_day)}, settings),
                          commit=files)
        ds.attrs["bulletin"] = str(_write_bulletin(cfg, ds, iso, issue_day))
    return ds


class _Assimilated:
    """Sink of the forecast's assimilation: keeps the ensemble after each day's update."""

    def __init__(self):
        self.blocks: list[tuple[int, object]] = []

    def write_block(self, start, arrays):
        if "discharge_analysis" in arrays:
            self.blocks.append((int(start), arrays["discharge_analysis"].copy()))

    def result(self, days, valid_day: int):
        """(days, (basin, day, member) m3 s-1) of the days after ``valid_day``, or None."""
        import numpy as np

        if not self.blocks:
            return None
        values = np.concatenate([v for _, v in sorted(self.blocks, key=lambda b: b[0])], axis=1)
        first = int(np.searchsorted(days, valid_day, side="right"))
        return np.asarray(days[first:first + values.shape[1]]), values


def _forcing_traces(inputs, issue_day: int, leads: int, members: int, kind: str, file_forcing) -> dict[str, str]:
    """How many distinct weather traces drive the members, and a plain note when fewer
    than the members (climatology forcing with fewer past years, a forcing file with fewer
    members): probabilities then move in steps of 1/traces, not 1/members."""
    import numpy as np

    from assim import engine

    if kind == "climatology":
        idx = engine.climatology_index(inputs.climatology.days, np.array([issue_day]), leads, np.arange(members))
        traces, what = len(np.unique(idx[0, 0])), "past years of weather (climatology forcing)"
    elif kind == "file":
        traces, what = int(file_forcing["precipitation"].shape[-1]), "members in the forcing file"
    else:
        return {"forcing_traces": str(members), "forcing_note": "none"}
    note = "none"
    if traces < members:
        note = (f"Only {traces} distinct {what} for {members} members: each trace is shared by several "
                f"members, so exceedance probabilities move in steps of about 1/{traces}, not 1/{members}, "
                "and rest on a small sample.")
    return {"forcing_traces": str(traces), "forcing_note": note}


def _write_bulletin(cfg: Config, forecast: xr.Dataset, iso: str, issue_day: int) -> Path:
    """The bulletin of one issue (:mod:`assim.bulletin`), from the forecast just written and
    the prepared layer: the assimilated ensemble of the last ``forecast.history_days`` days
    (analysis.nc and the forecasts of those days), the observations, the latest reading
    of each gauge and the last day of the weather."""
    import numpy as np

    from assim import bulletin, paths
    from assim.io import prepared as prep_io
    from assim.io.products import dates, day_numbers

    history = int(cfg["forecast"]["history_days"])
    obs = prep_io.read_observations(paths.prepared(cfg, prep_io.OBSERVATIONS_FILE))
    ids = [str(b) for b in obs["basin"].values]
    observed = prep_io.usable_discharge(obs).assign_coords(basin=ids)
    had = obs["n_readings"].values > 0  # readings this forecast could take in: up to the issue day
    had &= (day_numbers(obs["time"].values) <= issue_day)[None, :]
    last = np.where(had.any(axis=1), had.shape[1] - 1 - np.argmax(had[:, ::-1], axis=1), -1)
    times = obs["time"].values
    latest = {b: (times[j] if j >= 0 and had[i, j] else None) for i, (b, j) in enumerate(zip(ids, last, strict=True))}
    forcing_days = prep_io.read_forcing(paths.prepared(cfg, prep_io.FORCING_FILE))["time"].values
    b_ds = prep_io.read_basins(paths.prepared(cfg, "basins.nc"))
    names = {str(k): str(n) for k, n in zip(b_ds["basin"].values, b_ds["name"].values, strict=True)}
    first = str(dates([issue_day - max(history, 1) + 1])[0].date())
    recent = _recent_ensemble(cfg, forecast, first, iso, day_numbers)
    section = cfg["bulletin"]
    bulletin.write_bulletin(
        forecast, html_path=paths.bulletin(cfg, iso), figure_folder=paths.bulletin_figures(cfg, iso),
        alerts_json=paths.alerts(cfg, iso, "json"), alerts_csv=paths.alerts(cfg, iso, "csv"),
        levels=bulletin.alert_levels(cfg, forecast), observed=observed, recent=recent, latest_reading=latest,
        weather_through=forcing_days[-1] if len(forcing_days) else None, names=names, history_days=history,
        max_figures=int(section["max_figures"]), figures=bool(section["figures"]))
    return paths.bulletin(cfg, iso)


def _recent_ensemble(cfg: Config, forecast: xr.Dataset, first: str, iso: str, day_numbers):
    """The ensemble after each day's update from ``first`` to ``iso``: analysis.nc, then the
    days each forecast of the window assimilated (later files win), this forecast last.
    (basin, time, member) m3 s-1, or None when no member ensemble covers the window."""
    import re

    from assim import paths
    from assim.errors import InputError
    from assim.io.products import open_product

    parts = []
    p = paths.run_product(cfg, "assimilate")
    if p.is_file():
        try:
            with open_product(p, ("basin", "time")) as ds:
                if "discharge" in ds and "member" in ds["discharge"].dims:  # analysis.nc: the analysis
                    parts.append(ds["discharge"].rename("discharge_analysis").sel(time=slice(first, iso)).load())
        except InputError:
            pass  # a damaged earlier product only shortens the history drawn
    folder = paths.forecasts(cfg)
    for f in sorted(folder.glob("forecast-????-??-??.nc")):
        m = re.fullmatch(r"forecast-(\d{4}-\d{2}-\d{2})\.nc", f.name)
        if not m or not (first <= m.group(1) < iso):
            continue
        try:
            with open_product(f) as ds:
                if "discharge_analysis" in ds:
                    parts.append(ds["discharge_analysis"].load())
        except InputError:
            pass
    if "discharge_analysis" in forecast:
        parts.append(forecast["discharge_analysis"])
    parts = [x.reset_coords(drop=True).transpose("basin", "time", "member")
             .assign_coords(basin=[str(b) for b in x["basin"].values])
             for x in parts if x.sizes.get("time", 0)]
    if not parts:
        return None
    joined = xr.concat(parts, dim="time", join="outer")
    _, keep = np.unique(joined["time"].values[::-1], return_index=True)  # the last part of each day wins
    return joined.isel(time=len(joined["time"]) - 1 - keep).sortby("time").sel(time=slice(first, iso))
