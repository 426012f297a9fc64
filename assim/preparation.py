"""Raw records to the prepared layer: ``assim prep`` and ``assim check``.

Steps, all vectorised over readings, basins and days:

1. Read and validate basins.yaml, weather.csv and gauge.csv (:mod:`assim.io.raw`).
2. Stage readings -> discharge through each gauge's rating (:func:`rating_discharge`).
3. Quality control of readings, one bit flag per test (:func:`qc_readings`).
4. Accepted readings -> time-weighted daily means over UTC days where the day is covered
   well enough (:func:`daily_means`); nothing is ever filled in.
5. PET from temperature (:mod:`assim.evaporation`) or as given.
6. Validate the three Datasets, then write them (each atomically).

The coverage rule. Each accepted reading of a basin stands for the time from half-way to
the previous accepted reading to half-way to the next one, but at most
``data.max_reading_gap_hours`` on either side (the first and last readings stand for that
many hours on their open side). A UTC day's coverage is the fraction of its 24 h that these
intervals cover; the daily mean is the mean of the readings weighted by the length of their
interval inside the day. A day covered less than ``data.daily_coverage`` has no discharge
(NaN) and the flag ``insufficient_coverage``. Rejected readings are not among the accepted
ones: they neither enter the mean nor cover time.
"""

from __future__ import annotations

import importlib
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import xarray as xr

from assim.errors import ConfigError, InputError
from assim.evaporation import day_of_year, extraterrestrial_radiation, hargreaves, oudin
from assim.io import prepared as prep_io
from assim.io import raw as raw_io
from assim.io.prepared import QC_FLAGS, REJECTED

SPIKE_LEVEL_FLOOR = 1e-3  # m3 s-1 per km2 of area, added to levels in the spike test

_F = QC_FLAGS


# ---------------------------------------------------------------------------------- rating


def rating_discharge(stage, a, b, h0, stage_min, stage_max) -> tuple[np.ndarray, np.ndarray]:
    """Discharge from stage through the power-law rating ``Q = a (h - h0)^b``.

    Parameters
    ----------
    stage : (n,) float64, m
    a, b, h0, stage_min, stage_max : (n,) float64 (or scalars), the rating of each reading's
        gauge: Q in m3 s-1, h0 and the valid stage range in m.

    Returns
    -------
    discharge : (n,) float64, m3 s-1; NaN at or below h0
    flags : (n,) int64, ``below_rating_offset`` at or below h0, ``rating_extrapolated``
        above h0 but outside [stage_min, stage_max]
    """
    h = np.asarray(stage, dtype=float)
    depth = h - np.asarray(h0, dtype=float)
    above = depth > 0
    q = np.full(h.shape, np.nan)
    q[above] = (np.broadcast_to(a, h.shape)[above] * depth[above] ** np.broadcast_to(b, h.shape)[above])
    flags = np.zeros(h.shape, dtype=np.int64)
    flags[~above] |= _F["below_rating_offset"]
    outside = above & ((h < stage_min) | (h > stage_max))
    flags[outside] |= _F["rating_extrapolated"]
    return q, flags


# ---------------------------------------------------------------------------------- QC


def _neighbours(group: np.ndarray):
    """Indices of the previous and next element of the same group (-1 where none)."""
    n = group.size
    idx = np.arange(n)
    prev = np.where(np.r_[False, group[1:] == group[:-1]], idx - 1, -1)
    nxt = np.where(np.r_[group[:-1] == group[1:], False], idx + 1, -1)
    return prev, nxt


def qc_readings(basin, seconds, value, discharge, area_km2, *, max_discharge_m3s: float,
                spike_ratio: float, flatline_hours: float) -> np.ndarray:
    """Quality-control flags of gauge readings.

    Parameters
    ----------
    basin : (n,) int, basin index of each reading (readings sorted by basin, then time)
    seconds : (n,) float64, s since an epoch
    value : (n,) float64, the raw reading (stage m or discharge m3 s-1)
    discharge : (n,) float64, m3 s-1 (NaN where the rating gives none)
    area_km2 : (n,) float64, km2, the area of each reading's basin
    max_discharge_m3s : plausible maximum per km2 (m3 s-1 km-2)
    spike_ratio : r of the spike test
    flatline_hours : shortest run of identical readings flagged as a stuck sensor

    Returns
    -------
    (n,) int64 bit flags: ``impossible_value`` (negative or infinite discharge),
    ``above_plausible_maximum`` (discharge > max_discharge_m3s * area), ``flat_line``
    (identical consecutive raw values of one basin spanning at least ``flatline_hours``),
    ``spike`` (among the other plausible readings of the basin, a reading whose level
    q + f differs from the level of both neighbours by more than a factor 1 + r in the same
    direction, where f = 0.001 m3 s-1 km-2 times the area).
    """
    basin = np.asarray(basin)
    t = np.asarray(seconds, dtype=float)
    v = np.asarray(value, dtype=float)
    q = np.asarray(discharge, dtype=float)
    area = np.asarray(area_km2, dtype=float)
    flags = np.zeros(q.shape, dtype=np.int64)
    flags[(q < 0) | np.isinf(q)] |= _F["impossible_value"]
    flags[q > max_discharge_m3s * area] |= _F["above_plausible_maximum"]

    # flat lines: runs of identical raw values within a basin
    if v.size:
        new_run = np.r_[True, (v[1:] != v[:-1]) | (basin[1:] != basin[:-1])]
        starts = np.flatnonzero(new_run)
        run = np.cumsum(new_run) - 1
        span = np.maximum.reduceat(t, starts) - np.minimum.reduceat(t, starts)
        long_run = (span >= flatline_hours * 3600.0) & (np.diff(np.r_[starts, v.size]) > 1)
        flags[long_run[run]] |= _F["flat_line"]

    # spikes, among plausible readings only
    ok = np.isfinite(q) & ((flags & (_F["impossible_value"] | _F["above_plausible_maximum"])) == 0)
    idx = np.flatnonzero(ok)
    if idx.size >= 3:
        level = np.log(q[idx] + SPIKE_LEVEL_FLOOR * area[idx])
        prev, nxt = _neighbours(basin[idx])
        has = (prev >= 0) & (nxt >= 0)
        d_prev = level - level[np.maximum(prev, 0)]
        d_next = level - level[np.maximum(nxt, 0)]
        limit = np.log1p(spike_ratio)
        spike = has & (np.sign(d_prev) == np.sign(d_next)) & (np.minimum(abs(d_prev), abs(d_next)) > limit)
        flags[idx[spike]] |= _F["spike"]
    return flags


# ---------------------------------------------------------------------------------- daily


def daily_means(basin, seconds, discharge, n_basin: int, first_day, n_days: int, *,
                max_gap_hours: float) -> tuple[np.ndarray, np.ndarray]:
    """Time-weighted daily means of accepted readings and the covered fraction of each day.

    Parameters
    ----------
    basin : (n,) int, basin index (readings sorted by basin, then time, all accepted)
    seconds : (n,) float64, s since 1970-01-01 UTC
    discharge : (n,) float64, m3 s-1 (finite)
    n_basin : number of basins
    first_day : datetime64 (days), first day of the output
    n_days : number of days
    max_gap_hours : the most a reading stands for on either side (see the module docstring)

    Returns
    -------
    mean : (basin, time) float64, m3 s-1, NaN where a day has no coverage at all
    coverage : (basin, time) float64, fraction of each UTC day in [0, 1]
    """
    mean = np.full((n_basin, n_days), np.nan)
    cover = np.zeros((n_basin, n_days))
    if np.size(seconds) == 0:
        return mean, cover
    basin = np.asarray(basin, dtype=np.int64)
    t = np.asarray(seconds, dtype=float)
    q = np.asarray(discharge, dtype=float)
    gap = max_gap_hours * 3600.0
    prev, nxt = _neighbours(basin)
    left = np.where(prev >= 0, np.minimum(gap, 0.5 * (t - t[np.maximum(prev, 0)])), gap)
    right = np.where(nxt >= 0, np.minimum(gap, 0.5 * (t[np.maximum(nxt, 0)] - t)), gap)
    day0 = float(np.datetime64(first_day, "D").astype("datetime64[s]").astype(np.int64))
    lo, hi = day0 - 2 * gap, day0 + n_days * 86400.0 + 2 * gap
    keep = (t + right > lo) & (t - left < hi)
    basin, t, q, left, right = basin[keep], t[keep], q[keep], left[keep], right[keep]
    # Put the basins one after another on one time axis, far enough apart that no interval
    # reaches the next basin; then one cumulative integral serves every basin and day.
    offset = (n_days + 2) * 86400.0 + 4 * gap
    shift = (t - day0) + basin * offset
    start, length = shift - left, left + right
    value_int = np.r_[0.0, np.cumsum(q * length)]
    time_int = np.r_[0.0, np.cumsum(length)]
    bounds = (np.arange(n_days + 1) * 86400.0)[None, :] + (np.arange(n_basin) * offset)[:, None]

    def integral(cum, rate, x):
        k = np.searchsorted(start, x, side="right") - 1
        kk = np.maximum(k, 0)
        part = np.clip(x - start[kk], 0.0, length[kk])
        return np.where(k >= 0, cum[kk] + rate[kk] * part, 0.0)

    ones = np.ones_like(q)
    qi = np.diff(integral(value_int, q, bounds), axis=1)
    ti = np.diff(integral(time_int, ones, bounds), axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(ti > 0, qi / ti, np.nan)
    return mean, np.clip(ti / 86400.0, 0.0, 1.0)


# ---------------------------------------------------------------------------------- PET


def potential_evaporation(method: str, weather: raw_io.Weather, latitude) -> np.ndarray:
    """PET on (basin, time), mm d-1, by ``data.pet_method``.

    Parameters
    ----------
    method : "oudin", "hargreaves" or "given"
    weather : the validated weather (tmin, tmax in degC; pet when given)
    latitude : (basin,) float64, degrees north
    """
    if method == "given":
        return weather.pet
    ra = extraterrestrial_radiation(np.asarray(latitude, dtype=float)[:, None],
                                    day_of_year(weather.dates)[None, :])
    if method == "oudin":
        return oudin(ra, 0.5 * (weather.tmin + weather.tmax))
    if method == "hargreaves":
        return hargreaves(ra, weather.tmin, weather.tmax)
    raise ConfigError(f"unknown method {method!r}", variable="data.pet_method")


# ---------------------------------------------------------------------------------- prepare


def _import_plugins(cfg: Mapping) -> None:
    for name in cfg.get("model", {}).get("plugins", []):
        try:
            importlib.import_module(name)
        except ImportError as exc:
            raise ConfigError(f"cannot import model plugin ({exc})", file=getattr(cfg, "source", None),
                              variable="model.plugins", place=name) from None


_RATING_FIELDS = ("a", "b", "h0", "stage_min_m", "stage_max_m")


def _gauge_arrays(basins: list[raw_io.Basin]) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Which basins are stage gauges, and their rating coefficients, each (basin,) (NaN
    for discharge gauges)."""
    stage = np.array([b.gauge.kind == "stage" for b in basins], dtype=bool)
    ratings = [b.gauge.rating for b in basins]
    coef = {k: np.array([np.nan if r is None else getattr(r, k) for r in ratings], dtype=float)
            for k in _RATING_FIELDS}
    return stage, coef


def _daily_observations(basins: list[raw_io.Basin], readings: raw_io.Readings, dates: np.ndarray,
                        data: Mapping):
    """Readings -> daily discharge, flags, coverage and counts on (basin, time).

    Returns
    -------
    (discharge, qc_flag, coverage, n_readings, n_rejected) : each (basin, time)
    flags : (n,) int64, the flags of each reading
    inside : (n,) bool, readings that fall on a day of ``dates``
    """
    area = np.array([b.area_km2 for b in basins])
    is_stage, rating = _gauge_arrays(basins)
    k = readings.basin
    value = readings.value
    q = value.copy()
    flags = np.zeros(value.shape, dtype=np.int64)
    st = is_stage[k]
    if st.any():
        q[st], flags[st] = rating_discharge(value[st], *(rating[n][k[st]] for n in _RATING_FIELDS))
    seconds = readings.time.astype(np.int64).astype(float)
    qc = data["qc"]
    flags |= qc_readings(k, seconds, value, q, area[k], max_discharge_m3s=qc["max_discharge_m3s"],
                         spike_ratio=qc["spike_ratio"], flatline_hours=qc["flatline_hours"])
    accepted = ((flags & REJECTED) == 0) & np.isfinite(q)
    nb, n_days = len(basins), dates.size
    mean, coverage = daily_means(k[accepted], seconds[accepted], q[accepted], nb, dates[0], n_days,
                                 max_gap_hours=data["max_reading_gap_hours"])
    day = (readings.time.astype("datetime64[D]") - dates[0]).astype(np.int64)
    inside = (day >= 0) & (day < n_days)
    at = (k[inside], day[inside])
    day_flag = np.zeros((nb, n_days), dtype=np.int64)
    n_read = np.zeros((nb, n_days), dtype=np.int64)
    n_rej = np.zeros((nb, n_days), dtype=np.int64)
    np.bitwise_or.at(day_flag, at, flags[inside])
    np.add.at(n_read, at, 1)
    np.add.at(n_rej, at, (~accepted[inside]).astype(np.int64))
    short = (coverage < data["daily_coverage"]) | (coverage <= 0)
    day_flag[short] |= _F["insufficient_coverage"]
    mean[short] = np.nan
    return (mean, day_flag, coverage, n_read, n_rej), flags, inside


def build(cfg: Mapping) -> tuple[dict[str, xr.Dataset], dict]:
    """Read and validate the raw folder and build the three prepared Datasets (no writing).

    Returns
    -------
    datasets : {"forcing", "observations", "basins"}
    stats : reading counts per QC flag and per basin, for :func:`check`

    Raises
    ------
    InputError, ConfigError
    """
    data = cfg["data"]
    folder = Path(data["raw"])
    if not folder.is_dir():
        raise InputError("raw folder not found (config data.raw)", file=folder)
    _import_plugins(cfg)
    all_basins = raw_io.read_basins_yaml(folder / raw_io.BASINS_FILE)
    basins = raw_io.read_basins_yaml(folder / raw_io.BASINS_FILE, select=data.get("basins") or ())
    ids = [b.id for b in basins]
    all_ids = [b.id for b in all_basins]
    weather = raw_io.read_weather(folder / raw_io.WEATHER_FILE, ids, need_pet=data["pet_method"] == "given",
                                  all_ids=all_ids)
    readings = raw_io.read_gauge(folder / raw_io.GAUGE_FILE, ids, all_ids=all_ids)
    lat = np.array([b.latitude for b in basins])
    lon = np.array([b.longitude for b in basins])
    area = np.array([b.area_km2 for b in basins])

    obs_arrays, flags, inside = _daily_observations(basins, readings, weather.dates, data)
    pet = potential_evaporation(data["pet_method"], weather, lat)
    forcing = prep_io.forcing_dataset(ids, weather.dates, weather.precipitation, pet, lat, lon,
                                      pet_method=data["pet_method"])
    settings = {"daily_coverage": data["daily_coverage"],
                "max_reading_gap_hours": data["max_reading_gap_hours"], **data["qc"]}
    observations = prep_io.observations_dataset(ids, weather.dates, *obs_arrays, lat, lon,
                                                settings=settings)
    levels: list[str] = []
    for b in basins:
        levels += [lv for lv in b.thresholds_m3s if lv not in levels]
    th = np.array([[b.thresholds_m3s.get(lv, np.nan) for lv in levels] for b in basins]).reshape(len(ids), len(levels))
    model = basins[0].model
    params = {p: np.array([b.parameters[p] for b in basins]) for p in basins[0].parameters}
    basins_ds = prep_io.basins_dataset(ids, [b.name for b in basins], area, lat, lon, model, params, th,
                                       levels, [b.gauge.kind for b in basins])
    folder_out = Path(data["prepared"])
    prep_io.check_forcing(forcing, folder_out / prep_io.FORCING_FILE)
    prep_io.check_observations(observations, folder_out / prep_io.OBSERVATIONS_FILE)
    prep_io.check_basins(basins_ds, folder_out / prep_io.BASINS_FILE)
    stats = {
        "flags": {name: int(((flags & m) != 0).sum()) for name, m in QC_FLAGS.items() if name != "insufficient_coverage"},
        "readings": np.bincount(readings.basin, minlength=len(ids)),
        "outside": int((~inside).sum()),
        "basins": basins,
    }
    return {"forcing": forcing, "observations": observations, "basins": basins_ds}, stats


def prepare(cfg: Mapping) -> dict[str, xr.Dataset]:
    """Prepare the raw folder ``cfg["data"]["raw"]`` into ``cfg["data"]["prepared"]``.

    Everything is read and validated before anything is written; each file is written to
    a temporary name and renamed when complete.

    Returns
    -------
    {"forcing", "observations", "basins"} : the Datasets written, each with
    ``attrs["product_path"]``.

    Raises
    ------
    InputError
        naming the file, the variable or column and the first bad place.
    ConfigError
        for a bad model plugin.
    """
    datasets, _ = build(cfg)
    out = Path(cfg["data"]["prepared"])
    writers = {"forcing": (prep_io.write_forcing, prep_io.FORCING_FILE),
               "observations": (prep_io.write_observations, prep_io.OBSERVATIONS_FILE),
               "basins": (prep_io.write_basins, prep_io.BASINS_FILE)}
    for key, (write, name) in writers.items():
        path = write(datasets[key], out / name)
        datasets[key].attrs["product_path"] = str(path)
    return datasets


def _longest_run(mask: np.ndarray) -> np.ndarray:
    """Longest run of True along the last axis of a (row, n) array, per row."""
    rows, n = mask.shape
    padded = np.zeros((rows, n + 2), dtype=np.int8)
    padded[:, 1:-1] = mask
    edges = np.diff(padded, axis=1)
    r_start, c_start = np.nonzero(edges == 1)
    _, c_end = np.nonzero(edges == -1)
    out = np.zeros(rows, dtype=np.int64)
    np.maximum.at(out, r_start, c_end - c_start)
    return out


def check(cfg: Mapping) -> str:
    """Validate the config and the inputs (raw folder, and the prepared folder if present);
    return a short summary for a person.

    Raises
    ------
    InputError, ConfigError
        on the first problem found (nothing is written).
    """
    datasets, stats = build(cfg)
    f, o = datasets["forcing"], datasets["observations"]
    days = f["time"].values.astype("datetime64[D]")
    lines = [
        f"config: {getattr(cfg, 'source', None) or '<in code>'}",
        f"raw folder {cfg['data']['raw']}: {f.sizes['basin']} basin(s), model {datasets['basins'].attrs['model']}, "
        f"{days[0]} to {days[-1]} ({days.size} days), PET {cfg['data']['pet_method']}",
    ]
    period = cfg.get("period", {})
    bounds = []
    for key, default in (("start", days[0]), ("end", days[-1])):
        text = period.get(key)
        try:
            day = np.datetime64(str(text), "D") if text else default
        except ValueError:
            raise ConfigError(f"not a date YYYY-MM-DD: {text!r}", file=getattr(cfg, "source", None),
                              variable=f"period.{key}") from None
        if not days[0] <= day <= days[-1]:
            raise ConfigError(f"{day} is outside the weather records ({days[0]} to {days[-1]})",
                              file=getattr(cfg, "source", None), variable=f"period.{key}")
        bounds.append(day)
    if bounds[1] < bounds[0]:
        raise ConfigError(f"period ends ({bounds[1]}) before it starts ({bounds[0]})",
                          file=getattr(cfg, "source", None), variable="period.end")
    lines.append(f"run period {bounds[0]} to {bounds[1]}, spin-up {period.get('spinup_days', 0)} days")
    q = o["discharge"].values
    missing = ~np.isfinite(q)
    longest = _longest_run(missing)
    for j, b in enumerate(stats["basins"]):
        lines.append(
            f"  {b.id}: {b.name}, {b.area_km2:g} km2, {b.gauge.kind} gauge, "
            f"{int(stats['readings'][j])} readings, {int((~missing[j]).sum())} days with discharge, "
            f"{int(missing[j].sum())} missing (longest gap {int(longest[j])} d)")
    flagged = ", ".join(f"{k} {v}" for k, v in stats["flags"].items())
    lines.append(f"flagged readings: {flagged}")
    short = int(((o["qc_flag"].values & QC_FLAGS["insufficient_coverage"]) != 0).sum())
    lines.append(f"days with insufficient coverage (no discharge): {short}")
    if stats["outside"]:
        lines.append(f"readings outside the weather period (not used): {stats['outside']}")
    folder = Path(cfg["data"]["prepared"])
    names = (prep_io.FORCING_FILE, prep_io.OBSERVATIONS_FILE, prep_io.BASINS_FILE)
    present = [n for n in names if (folder / n).exists()]
    if not present:
        lines.append(f"prepared folder {folder}: not written yet (run `assim prep`)")
    else:
        pf, po, pb = prep_io.read_prepared(folder)
        same = (pf["basin"].values.astype(str).tolist() == f["basin"].values.astype(str).tolist()
                and pf.sizes["time"] == f.sizes["time"])
        state = "matches the raw folder" if same else "differs from the raw folder (run `assim prep` again)"
        lines.append(f"prepared folder {folder}: valid, {pf.sizes['basin']} basin(s), "
                     f"{pf.sizes['time']} days; {state}")
    return "\n".join(lines)

