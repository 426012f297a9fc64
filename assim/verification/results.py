"""Skill of the run and hindcast products against the gauge observations (skill.nc, skill.csv).

Leads and experiments:

- lead 0 is the *background* discharge of ``openloop.nc`` (experiment ``openloop``) and of
  ``analysis.nc`` (experiment ``assimilation``): simulated before the day's reading is
  assimilated, so it uses no reading of the day it is scored on;
- leads 1..L are the forecasts of ``hindcast.nc``, scored on the valid day issue_time + lead.

Choices (recorded in the attributes of skill.nc):

- deterministic metrics (NSE, log NSE, KGE, KGE', percent bias, RMSE) score the ensemble
  *median* (the 0.5 quantile for products written as quantiles);
- ``crpss`` is the skill of each experiment's CRPS against the CRPS of the observed
  day-of-year climatology (every usable reading within 15 days of the day of year, all
  years; :func:`climatology_crps`), over the same pairs;
- ``crpss_openloop`` is the skill against the open loop's CRPS over the same pairs, so it
  is 0 for the open loop by definition (kept, as the reference line);
- Brier scores are per named threshold of basins.nc (``brier_<name>``), exceedance meaning
  strictly above the threshold, as in the forecast products;
- only usable readings count (missing and QC-flagged days are skipped); ``n`` is the number
  of scored pairs of each metric;
- products written as quantiles give deterministic metrics only (probabilistic ones NaN).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
import xarray as xr

from assim import paths
from assim.errors import InputError
from assim.io.common import global_attributes
from assim.io.products import open_product
from assim.io.skill import write_skill
from assim.verification import metrics as m

EXPERIMENTS = ("openloop", "assimilation")
RUN_MODES = {"openloop": "openloop", "assimilation": "assimilate"}
DETERMINISTIC = ("nse", "nse_log", "kge", "kge_modified", "pbias", "rmse")
PROBABILISTIC = ("crps", "crps_fair", "crpss", "crpss_openloop", "spread_skill")
UNITS = {"pbias": "%", "rmse": "m3 s-1", "crps": "m3 s-1", "crps_fair": "m3 s-1"}
LONG_NAMES = {
    "nse": "Nash-Sutcliffe efficiency of the ensemble median",
    "nse_log": "Nash-Sutcliffe efficiency of log(Q + mean(Q_obs)/100), ensemble median",
    "kge": "Kling-Gupta efficiency (Gupta et al. 2009) of the ensemble median",
    "kge_modified": "modified Kling-Gupta efficiency (Kling et al. 2012) of the ensemble median",
    "pbias": "percent bias of the ensemble median (positive: overestimation)",
    "rmse": "root mean square error of the ensemble median",
    "crps": "mean continuous ranked probability score of the ensemble",
    "crps_fair": "mean fair CRPS (Ferro 2014)",
    "crpss": "CRPS skill score against the day-of-year climatology of the observations",
    "crpss_openloop": "CRPS skill score against the open loop",
    "spread_skill": "spread-skill ratio with the finite-ensemble correction (Fortin et al. 2014)",
}
RELIABILITY_BINS = 10
CLIMATOLOGY_HALF_WINDOW_DAYS = 15
CLIMATOLOGY_MIN_VALUES = 10


def verify_results(cfg: Mapping) -> xr.Dataset:
    """Score every product of ``cfg["results"]``; write skill.nc and skill.csv.

    Parameters
    ----------
    cfg : a validated configuration (:func:`assim.load_config`)

    Returns
    -------
    xarray.Dataset
        ``skill`` and ``n`` on (basin, experiment, lead, metric), ``rank_histogram`` on
        (basin, experiment, lead, rank), reliability tables on (basin, experiment, lead,
        threshold, probability_bin), ``threshold_value`` on (basin, threshold);
        ``attrs["product_path"]`` is the skill.nc written, ``attrs["notes"]`` lists the
        products that were absent and skipped.

    Raises
    ------
    InputError
        when no run or hindcast product exists, or observations.nc is missing or invalid.
    """
    from assim.io.prepared import read_observations, usable_discharge

    notes: list[str] = []
    runs: dict[str, xr.Dataset] = {}
    for exp in EXPERIMENTS:
        path = paths.run_product(cfg, RUN_MODES[exp])
        if path.is_file():
            runs[exp] = open_product(path, ("basin", "time"), any_of=("discharge", "discharge_quantile"), load=True)
        else:
            notes.append(f"{path.name} absent: lead 0 of {exp} not scored")
    hindcast = None
    hc_path = paths.hindcast(cfg)
    if hc_path.is_file():
        hindcast = open_product(hc_path, ("discharge", "experiment", "issue_time", "lead"), load=True)
    else:
        notes.append(f"{hc_path.name} absent: leads 1..L not scored")
    if not runs and hindcast is None:
        raise InputError(
            "no product to verify: run `assim run` or `assim hindcast` first",
            file=paths.results(cfg),
            variable="openloop.nc, analysis.nc, hindcast.nc",
        )
    try:
        observed = usable_discharge(read_observations(paths.prepared(cfg, "observations.nc")))
        thresholds = _thresholds(cfg, notes)
        return _verify(cfg, runs, hindcast, observed, thresholds, notes)
    finally:
        for ds in (*runs.values(), hindcast):
            if ds is not None:
                ds.close()


def _thresholds(cfg: Mapping, notes: list[str]) -> xr.DataArray | None:
    path = paths.prepared(cfg, "basins.nc")
    if not path.is_file():
        notes.append("basins.nc absent: Brier scores not computed")
        return None
    from assim.io.prepared import read_basins

    basins = read_basins(path)
    if "thresholds" not in basins or basins.sizes.get("threshold", 0) == 0:
        notes.append("basins.nc has no thresholds: Brier scores not computed")
        return None
    thr = basins["thresholds"].load()
    return thr.assign_coords(threshold=[str(t) for t in thr["threshold"].values])


def _verify(cfg, runs, hindcast, observed, thresholds, notes) -> xr.Dataset:
    observed = observed.assign_coords(basin=[str(b) for b in observed["basin"].values])
    basins = _basins(runs, hindcast)
    missing = [b for b in basins if b not in set(observed["basin"].values)]
    if missing:
        notes.append(f"no observations for basins {', '.join(missing)}: not scored")
    leads = [0] + ([int(x) for x in hindcast["lead"].values] if hindcast is not None else [])
    thr_names = [] if thresholds is None else [str(t) for t in thresholds["threshold"].values]
    metric_names = [*DETERMINISTIC, *PROBABILISTIC, *(f"brier_{t}" for t in thr_names)]
    members = _members(runs, hindcast)
    # Both runs on one time axis, so that CRPSS compares the same days.
    run_time = np.unique(np.concatenate([ds["time"].values for ds in runs.values()])) if runs else None

    nb, ne, nl, nk = len(basins), len(EXPERIMENTS), len(leads), len(thr_names)
    skill = np.full((nb, ne, nl, len(metric_names)), np.nan)
    count = np.zeros(skill.shape, dtype=np.int64)
    ranks = np.full((nb, ne, nl, members + 1), np.nan)
    rel_p = np.full((nb, ne, nl, nk, RELIABILITY_BINS), np.nan)
    rel_o = np.full(rel_p.shape, np.nan)
    rel_n = np.zeros(rel_p.shape, dtype=np.int64)
    thr_values = np.full((nb, nk), np.nan)

    chunk = int(cfg.get("ensemble", {}).get("basin_chunk", 64) or 64)
    for start in range(0, nb, chunk):
        block = basins[start:start + chunk]
        sl = slice(start, start + len(block))
        obs_block = observed.reindex(basin=block)
        clim_block = obs_block.copy(data=climatology_crps(obs_block.values, obs_block["time"].values))
        ref_block = xr.concat([obs_block, clim_block], dim="kind")
        thr = None
        if thresholds is not None:
            thr = thresholds.reindex(basin=block).transpose("basin", "threshold").values.astype(float)
            thr_values[sl] = thr
        groups = []  # (lead slice, {experiment: (obs, ens, det)})
        if runs:
            groups.append((slice(0, 1), {e: _lead0(ds, block, ref_block, run_time) for e, ds in runs.items()}))
        if hindcast is not None:
            hc_exps = [str(e) for e in hindcast["experiment"].values]
            groups.append(
                (slice(1, nl), {e: _hindcast(hindcast, e, block, ref_block) for e in EXPERIMENTS if e in hc_exps})
            )
        for lead_sl, by_exp in groups:
            crps_by_exp = {}
            for exp, (obs, clim, ens, det) in by_exp.items():
                e = EXPERIMENTS.index(exp)
                scores, crps, rank, rel = _score(obs, ens, det, thr, thr_names)
                if crps is not None:
                    scores["crpss"] = (m.crpss(crps, clim), (np.isfinite(crps) & np.isfinite(clim)).sum(axis=-1))
                for j, name in enumerate(metric_names):
                    if name in scores:
                        skill[sl, e, lead_sl, j], count[sl, e, lead_sl, j] = scores[name]
                if rank is not None:
                    ranks[sl, e, lead_sl, : rank.shape[-1]] = rank
                if rel is not None:
                    rel_p[sl, e, lead_sl], rel_o[sl, e, lead_sl], rel_n[sl, e, lead_sl] = rel
                if crps is not None:
                    crps_by_exp[exp] = crps
            _crpss_openloop(crps_by_exp, skill, count, sl, lead_sl, metric_names.index("crpss_openloop"))
    if not count[..., metric_names.index("crpss_openloop")].any():
        notes.append("no open-loop ensemble to compare with: CRPSS not computed")

    ds = xr.Dataset(
        {
            "skill": (("basin", "experiment", "lead", "metric"), skill,
                      {"long_name": "verification score (unit per metric: see metric_units)"}),
            "n": (("basin", "experiment", "lead", "metric"), count,
                  {"long_name": "number of scored forecast-observation pairs", "units": "1"}),
            "rank_histogram": (("basin", "experiment", "lead", "rank"), ranks,
                               {"long_name": "rank histogram counts (ties shared between tied ranks)",
                                "units": "1"}),
            "reliability_forecast_probability": (
                ("basin", "experiment", "lead", "threshold", "probability_bin"), rel_p,
                {"long_name": "mean forecast probability of exceedance in the bin", "units": "1"}),
            "reliability_observed_frequency": (
                ("basin", "experiment", "lead", "threshold", "probability_bin"), rel_o,
                {"long_name": "observed frequency of exceedance in the bin", "units": "1"}),
            "reliability_count": (
                ("basin", "experiment", "lead", "threshold", "probability_bin"), rel_n,
                {"long_name": "forecasts in the bin", "units": "1"}),
            "threshold_value": (("basin", "threshold"), thr_values,
                                {"long_name": "named discharge threshold", "units": "m3 s-1",
                                 "standard_name": "water_volume_transport_in_river_channel"}),
        },
        coords={
            "basin": ("basin", np.array(basins, dtype=object), {"cf_role": "timeseries_id"}),
            "experiment": ("experiment", np.array(EXPERIMENTS, dtype=object)),
            "lead": ("lead", np.array(leads, dtype=np.int32),
                     {"units": "days", "long_name": "lead time; 0 = background of the run"}),
            "metric": ("metric", np.array(metric_names, dtype=object)),
            "metric_units": ("metric", np.array([_unit(k) for k in metric_names], dtype=object)),
            "metric_long_name": ("metric", np.array([_long_name(k) for k in metric_names], dtype=object)),
            "rank": ("rank", np.arange(members + 1, dtype=np.int32),
                     {"long_name": "members below the observation"}),
            "threshold": ("threshold", np.array(thr_names, dtype=object)),
            "probability_bin": ("probability_bin",
                                (np.arange(RELIABILITY_BINS) + 0.5) / RELIABILITY_BINS,
                                {"long_name": "centre of the forecast probability bin", "units": "1"}),
        },
        attrs=global_attributes(
            "verification scores of the open-loop and assimilation experiments",
            deterministic_reduction="ensemble median",
            crpss_reference=(f"climatology: every usable observation within {CLIMATOLOGY_HALF_WINDOW_DAYS} days of "
                             "the day of year, all years of observations.nc (the verified day included)"),
            crpss_openloop_reference="openloop (0 for the open loop by definition)",
            lead_0="background discharge of openloop.nc / analysis.nc (no same-day reading used)",
            exceedance="strictly above the threshold",
            notes="; ".join(notes) if notes else "none",
        ),
    )
    ds.attrs.pop("featureType", None)  # scores on (basin, experiment, lead, metric), not time series
    nc_path, csv_path = paths.skill(cfg, "nc"), paths.skill(cfg, "csv")
    write_skill(ds, nc_path, csv_path)
    ds.attrs["product_path"] = str(nc_path)
    ds.attrs["csv_path"] = str(csv_path)
    return ds


def _unit(metric: str) -> str:
    return UNITS.get(metric, "1")


def _long_name(metric: str) -> str:
    if metric.startswith("brier_"):
        return f"mean Brier score of exceeding the '{metric[6:]}' threshold"
    return LONG_NAMES[metric]


def _basins(runs, hindcast) -> list[str]:
    seen: dict[str, None] = {}
    for ds in (*runs.values(), hindcast):
        if ds is not None:
            seen.update((str(b), None) for b in ds["basin"].values)
    return list(seen)


def _members(runs, hindcast) -> int:
    sizes = [ds.sizes["member"] for ds in (*runs.values(), hindcast) if ds is not None and "member" in ds.dims]
    return max(sizes) if sizes else 0


def _median_of_quantiles(ds: xr.Dataset, name: str) -> xr.DataArray | None:
    q = ds[name]
    probs = np.asarray(ds["quantile"].values, dtype=float)
    hit = np.flatnonzero(np.isclose(probs, 0.5))
    if hit.size == 0:
        return None
    return q.isel(quantile=int(hit[0]))


def _lead0(ds: xr.Dataset, block: Sequence[str], ref: xr.DataArray, time: np.ndarray):
    """(obs, clim, ens, det) with a lead axis of length 1: obs and clim (basin, 1, time),
    ens (basin, 1, time, member) or det (basin, 1, time).

    ``ref`` stacks the usable observations and the climatology's CRPS on (kind, basin, time).
    """
    obs, clim = ref.reindex(time=time).transpose("kind", "basin", "time").values[:, :, None, :]
    where = {"basin": list(block), "time": time}
    if "discharge" in ds:
        ens = ds["discharge"].reindex(where).transpose("basin", "time", "member").values
        return obs, clim, ens.astype(float)[:, None], None
    med = _median_of_quantiles(ds, "discharge_quantile")
    det = None if med is None else med.reindex(where).transpose("basin", "time").values[:, None]
    return obs, clim, None, det


def _hindcast(ds: xr.Dataset, exp: str, block: Sequence[str], ref: xr.DataArray):
    """(obs, clim, ens, None): obs and clim (basin, lead, issue), ens (basin, lead, issue,
    member), at the valid days issue_time + lead."""
    da = ds["discharge"].sel(experiment=exp).reindex(basin=list(block))
    ens = da.transpose("basin", "lead", "issue_time", "member").values.astype(float)
    issue = pd.DatetimeIndex(ds["issue_time"].values)
    leads = np.asarray(ds["lead"].values, dtype=np.int64)
    valid = issue.values[None, :] + leads[:, None] * np.timedelta64(1, "D")  # (lead, issue)
    obs_index = pd.DatetimeIndex(ref["time"].values)
    pos = obs_index.get_indexer(valid.ravel()).reshape(valid.shape)
    values = ref.transpose("kind", "basin", "time").values.astype(float)
    obs, clim = np.where(pos >= 0, values[:, :, np.clip(pos, 0, None)], np.nan)  # (basin, lead, issue) each
    return obs, clim, ens, None


def _score(obs, ens, det, thr, thr_names):
    """Every metric of one experiment over a group of leads.

    obs (basin, lead, time); ens (basin, lead, time, member) or None; det (basin, lead, time)
    or None (the deterministic series when there are no members).
    """
    scores: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    if ens is not None:
        with np.errstate(invalid="ignore"):
            det = np.median(ens, axis=-1)
    if det is not None:
        n = m.count_pairs(det, obs)
        for name in DETERMINISTIC:
            scores[name] = (getattr(m, name)(det, obs), n)
    if ens is None:
        return scores, None, None, None
    crps = m.crps_ensemble(obs, ens)
    n_ens = np.isfinite(crps).sum(axis=-1)
    scores["crps"] = (m.mean_score(crps), n_ens)
    scores["crps_fair"] = (m.mean_score(m.crps_ensemble(obs, ens, fair=True)), n_ens)
    scores["spread_skill"] = (m.spread_skill(obs, ens), n_ens)
    rank = m.rank_histogram(obs, ens)
    rel = None
    if thr is not None:
        nk = len(thr_names)
        shape = obs.shape[:2] + (nk, RELIABILITY_BINS)
        rel = (np.full(shape, np.nan), np.full(shape, np.nan), np.zeros(shape, dtype=np.int64))
        for k in range(nk):
            t = thr[:, k][:, None, None]  # (basin, 1, 1) against (basin, lead, time)
            bs = m.brier_score(obs, ens, t)
            scores[f"brier_{thr_names[k]}"] = (m.mean_score(bs), np.isfinite(bs).sum(axis=-1))
            table = m.reliability_table(obs, ens, t, bins=RELIABILITY_BINS)
            rel[0][:, :, k], rel[1][:, :, k], rel[2][:, :, k] = (
                table.forecast_probability, table.observed_frequency, table.count)
    return scores, crps, rank, rel


def _crpss_openloop(crps_by_exp, skill, count, sl, lead_sl, j) -> None:
    """CRPSS of each experiment against the open loop, over the pairs both scored."""
    ref = crps_by_exp.get("openloop")
    if ref is None:
        return
    for exp, crps in crps_by_exp.items():
        e = EXPERIMENTS.index(exp)
        skill[sl, e, lead_sl, j] = m.crpss(crps, ref)
        count[sl, e, lead_sl, j] = (np.isfinite(crps) & np.isfinite(ref)).sum(axis=-1)


def climatology_crps(values: np.ndarray, days, *, half_window: int = CLIMATOLOGY_HALF_WINDOW_DAYS,
                     min_values: int = CLIMATOLOGY_MIN_VALUES) -> np.ndarray:
    """CRPS of the observed day-of-year climatology, the reference of ``crpss``.

    The climatological forecast of a day is the sample of every usable observation whose
    day of year lies within ``half_window`` days of it (circularly), over all years of the
    record, the verified day included (in-sample climatology).

    Parameters
    ----------
    values : (basin, time) float64, m3 s-1, usable observations (NaN where missing)
    days : (time,) datetime64, consecutive days
    half_window : days either side of the day of year
    min_values : fewer values than this in the sample give NaN

    Returns
    -------
    (basin, time) float64, m3 s-1; NaN where the observation is missing.
    """
    t = pd.DatetimeIndex(days)
    out = np.full(values.shape, np.nan)
    if len(t) == 0:
        return out
    doy = t.day_of_year.to_numpy() - 1
    year = t.year.to_numpy() - t.year.min()
    grid = np.full((values.shape[0], int(year.max()) + 1, 366), np.nan)
    grid[:, year, doy] = values
    offsets = np.arange(-half_window, half_window + 1)
    # One step per day of the year, each vectorised over basins and years.
    for k in np.unique(doy):
        sample = grid[:, :, (k + offsets) % 366].reshape(values.shape[0], -1)  # (basin, years * window)
        idx = np.flatnonzero(doy == k)
        crps = m.crps_ensemble(values[:, idx], sample[:, None, :], skip_nan_members=True)
        enough = np.isfinite(sample).sum(axis=-1) >= min_values
        out[:, idx] = np.where(enough[:, None], crps, np.nan)
    return out
