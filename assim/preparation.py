"""Raw records to the prepared layer: ``assim prep`` and ``assim check``.

Steps, all vectorised over readings, basins and days:

1. Read and validate basins.yaml, weather.csv and gauge.csv (:mod:`assim.io.raw`).
2. Stage readings -> discharge through each gauge's rating (:func:`rating_discharge`).
3. Quality control of readings, one bit flag per test (:func:`qc_readings`).
4. Accepted readings -> time-weighted daily means over UTC days where the day is covered
   well enough (:func:`daily_means`); nothing is ever filled in.
5. PET from temperature (:mod:`assim.evaporation`) or as given.
6. Validate the three Datasets, then write them (each atomically).

The coverage rule. A UTC day's mean depends on that day's readings only, so appending the
next day's readings never changes a day already prepared (the daily chain of forecasts relies
on it). Each accepted reading of a basin stands for the time from half-way to the previous
accepted reading of the same day to half-way to the next one of the same day, but at most
``data.max_reading_gap_hours`` on either side; the first reading of a day stands for the time
back to midnight and the last one for the time on to the next midnight, again at most that
many hours. A day's coverage is the fraction of its 24 h that these intervals cover; the
daily mean is the mean of the readings weighted by the length of their intervals. A day
covered less than ``data.daily_coverage`` has no discharge (NaN) and the flag
``insufficient_coverage``. Rejected readings are not among the accepted ones: they neither
enter the mean nor cover time. Quality control is causal in the same sense: a reading's
flags depend on readings up to the end of its own day (:func:`qc_readings`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
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
    (identical consecutive raw values of one basin spanning at least ``flatline_hours`` by
    the end of the reading's UTC day), ``spike`` (among the other plausible readings of the
    basin, a reading whose level q + f differs from the level of both neighbours by more
    than a factor 1 + r in the same direction, where f = 0.001 m3 s-1 km-2 times the area;
    the next neighbour must be on the same UTC day).

    The flags of a day's readings depend on the readings up to the end of that day only,
    so appending the next day's readings never changes them.
    """
    basin = np.asarray(basin)
    t = np.asarray(seconds, dtype=float)
    v = np.asarray(value, dtype=float)
    q = np.asarray(discharge, dtype=float)
    area = np.asarray(area_km2, dtype=float)
    flags = np.zeros(q.shape, dtype=np.int64)
    flags[(q < 0) | np.isinf(q)] |= _F["impossible_value"]
    flags[q > max_discharge_m3s * area] |= _F["above_plausible_maximum"]

    # flat lines: runs of identical raw values within a basin, each reading judged by the
    # run's span up to the end of the reading's own day (never by later days)
    day = np.floor(t / 86400.0).astype(np.int64)
    if v.size:
        new_run = np.r_[True, (v[1:] != v[:-1]) | (basin[1:] != basin[:-1])]
        starts = np.flatnonzero(new_run)
        run = np.cumsum(new_run) - 1
        new_part = new_run | np.r_[True, day[1:] != day[:-1]]
        part_starts = np.flatnonzero(new_part)
        part = np.cumsum(new_part) - 1
        part_last = (np.r_[part_starts[1:], v.size] - 1)[part]
        span = t[part_last] - t[starts[run]]
        long_run = (span >= flatline_hours * 3600.0) & (part_last > starts[run])
        flags[long_run] |= _F["flat_line"]

    # spikes, among plausible readings only
    ok = np.isfinite(q) & ((flags & (_F["impossible_value"] | _F["above_plausible_maximum"])) == 0)
    idx = np.flatnonzero(ok)
    if idx.size >= 3:
        level = np.log(q[idx] + SPIKE_LEVEL_FLOOR * area[idx])
        prev, nxt = _neighbours(basin[idx])
        # the next neighbour only within the same UTC day: a day's flags never wait for the
        # next day's readings (the last reading of a day is not tested)
        has = (prev >= 0) & (nxt >= 0) & (day[idx] == day[idx[np.maximum(nxt, 0)]])
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

    A day's mean and coverage depend on that day's readings only (see the module
    docstring), so appending the next day's readings never changes a day already prepared.

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
    day0 = float(np.datetime64(first_day, "D").astype("datetime64[s]").astype(np.int64))
    day = np.floor((t - day0) / 86400.0).astype(np.int64)
    inside = (day >= 0) & (day < n_days)
    basin, t, q, day = basin[inside], t[inside], q[inside], day[inside]
    # neighbours within the same basin and UTC day; a day's first and last readings stand
    # for the time back to midnight and on to the next midnight (at most the gap)
    prev, nxt = _neighbours(basin * n_days + day)
    start, end = day0 + day * 86400.0, day0 + (day + 1) * 86400.0
    left = np.minimum(gap, np.where(prev >= 0, 0.5 * (t - t[np.maximum(prev, 0)]), t - start))
    right = np.minimum(gap, np.where(nxt >= 0, 0.5 * (t[np.maximum(nxt, 0)] - t), end - t))
    length = left + right
    cell = basin * n_days + day
    ti = np.bincount(cell, weights=length, minlength=n_basin * n_days).reshape(n_basin, n_days)
    qi = np.bincount(cell, weights=q * length, minlength=n_basin * n_days).reshape(n_basin, n_days)
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
    discharge : (n,) float64, m3 s-1, of each reading (NaN where the rating gives none)
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
    seconds = readings.time.astype("datetime64[ms]").astype(np.int64) / 1000.0
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
    return (mean, day_flag, coverage, n_read, n_rej), flags, inside, q


def _beyond_limits(basins: list[raw_io.Basin], readings: raw_io.Readings, limits: Mapping,
                   mask: np.ndarray | None = None) -> np.ndarray:
    """Per basin, the readings judged by the plausibility limits of gauge records and how
    many of them lie beyond: a discharge above ``max_median_specific_discharge`` per km2 of
    the basin's area, a stage outside its rating's valid range. (2, basin) int64, counted
    over ``mask`` (all readings when None), so that counts of records read at different
    times add up."""
    k = readings.basin if mask is None else readings.basin[mask]
    v = readings.value if mask is None else readings.value[mask]
    nb = len(basins)
    area = np.array([b.area_km2 for b in basins])
    is_q = np.array([b.gauge.kind == "discharge" for b in basins], dtype=bool)
    lo = np.array([b.gauge.rating.stage_min_m if b.gauge.rating else -np.inf for b in basins])
    hi = np.array([b.gauge.rating.stage_max_m if b.gauge.rating else np.inf for b in basins])
    with np.errstate(invalid="ignore"):
        beyond = np.where(is_q[k], v / area[k] > limits["max_median_specific_discharge"], (v < lo[k]) | (v > hi[k]))
    return np.stack([np.bincount(k, minlength=nb), np.bincount(k[beyond], minlength=nb)]).astype(np.int64)


def check_plausible(basins: list[raw_io.Basin], weather: raw_io.Weather, readings: raw_io.Readings,
                    limits: Mapping, folder: Path, counted: np.ndarray | None = None) -> None:
    """Refuse raw records beyond the physical plausibility limits (config ``data.limits``):
    a basin area, a day's precipitation, the median of a discharge gauge per km2 of area
    (more than half of its readings above the limit: a record in L/s), a stage record mostly
    outside its rating's range (a record in cm).

    ``counted`` : (2, basin) counts of earlier readings (:func:`_beyond_limits`) judged
    together with ``readings`` (an update by appended days judges the whole record).

    Raises
    ------
    InputError
        naming the file, the variable, the basin (and the date) and the limit.
    """
    for b in basins:
        if not b.area_km2 <= limits["max_area_km2"]:
            raise InputError(f"area {b.area_km2:g} km2 is beyond the plausible maximum "
                             f"(data.limits.max_area_km2 = {limits['max_area_km2']:g})",
                             file=folder / raw_io.BASINS_FILE, variable="area_km2", place=f"basin '{b.id}'")
    p = weather.precipitation
    bad = ~(p <= limits["max_precipitation_mm"])
    if bad.any():
        i, t = np.argwhere(bad)[0]
        raise InputError(f"{p[i, t]:g} mm in one day is beyond the plausible maximum "
                         f"(data.limits.max_precipitation_mm = {limits['max_precipitation_mm']:g})",
                         file=folder / raw_io.WEATHER_FILE, variable="precipitation_mm",
                         place=f"basin '{weather.basins[i]}', {weather.dates[t]}")
    gauge = folder / raw_io.GAUGE_FILE
    n, beyond = _beyond_limits(basins, readings, limits) + (0 if counted is None else counted)
    for i, b in enumerate(basins):
        if not n[i]:
            continue
        share = beyond[i] / n[i]
        if b.gauge.kind == "discharge":
            if 2 * beyond[i] > n[i]:  # the median is above the limit
                lim = limits["max_median_specific_discharge"]
                raise InputError(
                    f"{share:.0%} of the readings are above {lim * b.area_km2:g} m3 s-1, {lim:g} m3 s-1 per km2 "
                    f"of the basin's {b.area_km2:g} km2: a median beyond any river "
                    f"(data.limits.max_median_specific_discharge = {lim:g}): discharge in L/s instead of m3 s-1?",
                    file=gauge, variable="value", place=f"basin '{b.id}'")
        elif b.gauge.rating is not None:
            r = b.gauge.rating
            if share > limits["max_fraction_outside_rating"]:
                raise InputError(
                    f"{share:.0%} of the stage readings lie outside the rating's valid range "
                    f"{r.stage_min_m:g} to {r.stage_max_m:g} m (data.limits.max_fraction_outside_rating = "
                    f"{limits['max_fraction_outside_rating']:g}): stage in cm instead of m, or a wrong rating?",
                    file=gauge, variable="value", place=f"basin '{b.id}'")


def _read_basins(cfg: Mapping) -> tuple[Path, list[raw_io.Basin], list[str]]:
    """The raw folder, the selected basins and the ids of every basin of basins.yaml."""
    data = cfg["data"]
    folder = Path(data["raw"])
    if not folder.is_dir():
        raise InputError("raw folder not found (config data.raw)", file=folder)
    all_basins = raw_io.read_basins_yaml(folder / raw_io.BASINS_FILE)
    wanted = list(data.get("basins") or ())
    by_id = {b.id: b for b in all_basins}
    missing = [s for s in wanted if s not in by_id]
    if missing:
        raise InputError(f"selected basin {missing[0]!r} (config data.basins) is not in the file",
                         file=folder / raw_io.BASINS_FILE, variable="id")
    basins = [by_id[s] for s in wanted] if wanted else all_basins
    return folder, basins, [b.id for b in all_basins]


def _forcing_arrays(data: Mapping, basins: list[raw_io.Basin], weather: raw_io.Weather) -> dict[str, np.ndarray]:
    """precipitation, pet (and temperature with a snow routine), each (basin, time): every
    day from that day's weather alone."""
    lat = np.array([b.latitude for b in basins])
    out = {"precipitation": weather.precipitation, "pet": potential_evaporation(data["pet_method"], weather, lat)}
    if any(b.snow is not None for b in basins):
        out["temperature"] = 0.5 * (weather.tmin + weather.tmax)
    return out


def _basins_dataset(cfg: Mapping, basins: list[raw_io.Basin], calibrated: bool) -> xr.Dataset:
    ids = [b.id for b in basins]
    levels: list[str] = []
    for b in basins:
        levels += [lv for lv in b.thresholds_m3s if lv not in levels]
    th = np.array([[b.thresholds_m3s.get(lv, np.nan) for lv in levels] for b in basins]).reshape(len(ids), len(levels))
    model = basins[0].model
    params = {p: np.array([b.parameters[p] for b in basins]) for p in basins[0].parameters}
    if any(b.snow is not None for b in basins):  # one model for the run: rain-only basins switch the snow routine off
        from assim.models import snow

        model += snow.SUFFIX
        for sp in snow.PARAMETERS:
            params[sp.name] = np.array([(b.snow or {}).get(sp.name, sp.default) for b in basins], dtype=float)
        params["snow_routine"] = np.array([float(b.snow is not None) for b in basins])
    source = cfg.get("model", {}).get("calibrated_parameters")
    if calibrated and source:
        from assim.io.calibration import calibrated_parameters

        found = calibrated_parameters(source, model, list(params))
        for j, b in enumerate(ids):
            for p, v in found.get(b, {}).items():
                params[p][j] = v
    return prep_io.basins_dataset(ids, [b.name for b in basins], np.array([b.area_km2 for b in basins]),
                                  np.array([b.latitude for b in basins]), np.array([b.longitude for b in basins]),
                                  model, params, th, levels, [b.gauge.kind for b in basins])


_OBSERVATION_NAMES = ("discharge", "qc_flag", "coverage", "n_readings", "n_rejected")


def _datasets(cfg: Mapping, basins: list[raw_io.Basin], dates: np.ndarray, forcing: Mapping[str, np.ndarray],
              observations: Mapping[str, np.ndarray], calibrated: bool) -> dict[str, xr.Dataset]:
    """The three validated Datasets of the prepared layer from (basin, time) arrays."""
    data = cfg["data"]
    ids = [b.id for b in basins]
    lat = np.array([b.latitude for b in basins])
    lon = np.array([b.longitude for b in basins])
    forcing_ds = prep_io.forcing_dataset(ids, dates, forcing["precipitation"], forcing["pet"], lat, lon,
                                         pet_method=data["pet_method"], temperature=forcing.get("temperature"))
    settings = {"daily_coverage": data["daily_coverage"],
                "max_reading_gap_hours": data["max_reading_gap_hours"], **data["qc"]}
    observations_ds = prep_io.observations_dataset(ids, dates, *(observations[n] for n in _OBSERVATION_NAMES),
                                                   lat, lon, settings=settings)
    basins_ds = _basins_dataset(cfg, basins, calibrated)
    out = Path(data["prepared"])
    prep_io.check_forcing(forcing_ds, out / prep_io.FORCING_FILE)
    prep_io.check_observations(observations_ds, out / prep_io.OBSERVATIONS_FILE)
    prep_io.check_basins(basins_ds, out / prep_io.BASINS_FILE)
    return {"forcing": forcing_ds, "observations": observations_ds, "basins": basins_ds}


def build(cfg: Mapping, calibrated: bool = True) -> tuple[dict[str, xr.Dataset], dict]:
    """Read and validate the raw folder and build the three prepared Datasets (no writing).

    With ``calibrated`` (the default) and ``model.calibrated_parameters`` set, the basins
    listed in that calibration file take their parameters from it instead of basins.yaml.

    Returns
    -------
    datasets : {"forcing", "observations", "basins"}
    stats : reading counts per QC flag and per basin, for :func:`check`

    Raises
    ------
    InputError, ConfigError
    """
    datasets, stats, _ = _build(cfg, calibrated)
    return datasets, stats


def _build(cfg: Mapping, calibrated: bool = True):
    """:func:`build`, and what an update by appended days continues from (:class:`_Record`)."""
    data = cfg["data"]
    folder, basins, all_ids = _read_basins(cfg)
    ids = [b.id for b in basins]
    weather = raw_io.read_weather(folder / raw_io.WEATHER_FILE, ids, need_pet=data["pet_method"] == "given",
                                  all_ids=all_ids)
    readings = raw_io.read_gauge(folder / raw_io.GAUGE_FILE, ids, all_ids=all_ids)
    check_plausible(basins, weather, readings, data["limits"], folder)
    obs_arrays, flags, inside, q = _daily_observations(basins, readings, weather.dates, data)
    datasets = _datasets(cfg, basins, weather.dates, _forcing_arrays(data, basins, weather),
                         dict(zip(_OBSERVATION_NAMES, obs_arrays, strict=True)), calibrated)
    stats = {
        "flags": {name: int(((flags & m) != 0).sum()) for name, m in QC_FLAGS.items() if name != "insufficient_coverage"},
        "readings": np.bincount(readings.basin, minlength=len(ids)),
        "outside": int((~inside).sum()),
        "duplicates": readings.duplicates,
        "basins": basins,
    }
    last = weather.dates[-1]
    gauge = folder / raw_io.GAUGE_FILE
    raw = {n: _Raw.read(folder / n) for n in (raw_io.BASINS_FILE, raw_io.WEATHER_FILE)}
    raw[raw_io.GAUGE_FILE] = g = _Raw.read(gauge)
    through = readings.time.astype("datetime64[D]") <= last
    record = _Record(
        key=_record_key(cfg), basins=ids, last_day=str(last),
        raw={n: (r.size, r.sha256) for n, r in raw.items()},
        gauge_pending_from=g.pending_from(readings, ~through),
        carry=_carry(basins, readings, flags, q, through),
        counted=_beyond_limits(basins, readings, data["limits"], through))
    return datasets, stats, record


# ------------------------------------------------------------------ update by appended days
#
# The daily chain appends each day's weather and readings to the raw files. Preparing all
# of the record again would cost time in proportion to its length, so `assim prep` keeps,
# beside the layer (prep-record.json, a member of the layer's file set), what it was made
# from: the length and SHA-256 of each raw file, the last day prepared, from which byte of
# gauge.csv rows may still belong to later days, and, per basin, the little the quality
# control of later readings needs from earlier ones (the last reading and the start of its
# run of identical values, the last plausible reading, the counts of the plausibility
# limits). When every raw file still begins with the bytes the layer was made from, and
# only the new rows are read, the new days are computed from them and that record, and
# appended to the layer's arrays: the result is what preparing the whole record gives,
# variable by variable. Anything else (an edited or shortened file, a reading for a day
# already prepared, other data settings, a damaged or missing layer or record) prepares the
# whole record as before.


@dataclass(frozen=True)
class _Raw:
    """A raw file as read: its bytes, length and SHA-256."""

    data: bytes
    size: int
    sha256: str

    @classmethod
    def read(cls, path: Path) -> _Raw:
        import hashlib

        try:
            data = path.read_bytes()
        except OSError:
            return cls(b"", -1, "")
        return cls(data, len(data), hashlib.sha256(data).hexdigest())

    def line_offsets(self, start: int = 0) -> np.ndarray:
        """Byte offset of each line of ``data[start:]`` (its first line first)."""
        buf = np.frombuffer(self.data, dtype=np.uint8, offset=start)
        return start + np.r_[0, np.flatnonzero(buf == 10) + 1]

    def pending_from(self, readings: raw_io.Readings, pending: np.ndarray, start: int = 0) -> int:
        """The byte from which rows may belong to days not prepared yet: the line of the first
        ``pending`` reading in file order (``readings.line`` counted in ``data[start:]``
        after one header line), else the end of the file."""
        if not pending.any():
            return self.size
        if b"\r" in self.data[start:] and self.data.count(b"\r", start) != self.data.count(b"\r\n", start):
            return 0  # old Mac line ends: line numbers are not byte lines
        offsets = self.line_offsets(start)
        line = int(readings.line[pending].min())
        return int(offsets[line - 1]) if start == 0 else int(offsets[line - 2])


@dataclass(frozen=True)
class _Record:
    """What the prepared layer was made from (see the comment above)."""

    key: str
    basins: list[str]
    last_day: str
    raw: dict[str, tuple[int, str]]
    gauge_pending_from: int
    carry: dict[str, list]
    counted: np.ndarray  # (2, basin) int64, see _beyond_limits

    def to_json(self, generation: str) -> str:
        import json

        return json.dumps({"set_generation": generation, "key": self.key, "basins": self.basins,
                           "last_day": self.last_day, "raw": {k: list(v) for k, v in self.raw.items()},
                           "gauge_pending_from": self.gauge_pending_from, "carry": self.carry,
                           "counted": self.counted.tolist()}, indent=1)

    @classmethod
    def from_json(cls, text: str) -> tuple[_Record, str]:
        import json

        d = json.loads(text)
        return cls(key=str(d["key"]), basins=[str(b) for b in d["basins"]], last_day=str(d["last_day"]),
                   raw={k: (int(v[0]), str(v[1])) for k, v in d["raw"].items()},
                   gauge_pending_from=int(d["gauge_pending_from"]),
                   carry={k: list(v) for k, v in d["carry"].items()},
                   counted=np.asarray(d["counted"], dtype=np.int64).reshape(2, len(d["basins"]))), str(d["set_generation"])


def _record_key(cfg: Mapping) -> str:
    """Digest of what the layer's values depend on besides the raw files: the data
    settings and the version of assim."""
    import hashlib
    import json

    from assim._version import __version__

    data = {k: v for k, v in cfg["data"].items() if k != "prepared"}
    return hashlib.sha256(json.dumps([__version__, data], sort_keys=True, default=str).encode()).hexdigest()


_CARRY = ("last_ms", "last_value", "run_start_ms", "plausible_ms", "plausible_value")


def _carry(basins, readings: raw_io.Readings, flags: np.ndarray, q: np.ndarray, through: np.ndarray) -> dict[str, list]:
    """Per basin, what quality control of later readings needs from the readings marked
    ``through`` (those on prepared days): the last reading (time in ms, raw value), the
    start of its run of identical raw values (the flat-line test), and the last plausible
    reading (the spike test's previous neighbour). None where a basin has none."""
    nb = len(basins)
    k, v = readings.basin, readings.value
    ms = readings.time.astype("datetime64[ms]").astype(np.int64)
    idx = np.arange(k.size)
    new_run = np.r_[True, (v[1:] != v[:-1]) | (k[1:] != k[:-1])] if k.size else np.zeros(0, dtype=bool)
    run_start = idx[new_run][np.cumsum(new_run) - 1] if k.size else idx
    ok = np.isfinite(q) & ((flags & (_F["impossible_value"] | _F["above_plausible_maximum"])) == 0)
    last = np.full(nb, -1)
    np.maximum.at(last, k[through], idx[through])
    plausible = np.full(nb, -1)
    np.maximum.at(plausible, k[through & ok], idx[through & ok])
    out: dict[str, list] = {n: [None] * nb for n in _CARRY}
    for b in range(nb):
        if last[b] >= 0:
            out["last_ms"][b] = int(ms[last[b]])
            out["last_value"][b] = float(v[last[b]])
            out["run_start_ms"][b] = int(ms[run_start[last[b]]])
        if plausible[b] >= 0:
            out["plausible_ms"][b] = int(ms[plausible[b]])
            out["plausible_value"][b] = float(v[plausible[b]])
    return out


def _context(carry: Mapping[str, list]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Readings standing for the prepared days in the quality control of later ones
    (basin, time in ms, raw value): the start and the end of each basin's last run of
    identical values, and its last plausible reading when that came before the run (a run
    is plausible or not as a whole, its readings having one value)."""
    rows = []
    for b, (last, value, start, p_ms, p_value) in enumerate(zip(*(carry[n] for n in _CARRY), strict=True)):
        if p_ms is not None and (start is None or p_ms < start):
            rows.append((b, p_ms, p_value))
        if last is not None:  # the run's end adds nothing: same value, and no test needs its time
            rows.append((b, start, value))
    if not rows:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64), np.zeros(0)
    b, t, v = zip(*rows, strict=True)
    return np.array(b, dtype=np.int64), np.array(t, dtype=np.int64), np.array(v, dtype=float)


class _Rebuild(Exception):
    """The layer cannot be updated by appended days: prepare the whole record (the reason)."""


def _text(raw: _Raw, start: int) -> str | None:
    """The header line and the rows from byte ``start`` of a CSV file, or None when there
    are no rows there."""
    tail = raw.data[start:]
    if not tail.strip():
        return None
    head = raw.data[: raw.data.find(b"\n") + 1]
    try:
        return head.decode("utf-8-sig") + tail.decode("utf-8")
    except UnicodeDecodeError:
        raise _Rebuild("not UTF-8") from None


def _update(cfg: Mapping, calibrated: bool):
    """(datasets, record, days appended) of an update of the prepared layer by the days
    appended to the raw files; raises _Rebuild when only preparing the whole record will do."""
    data = cfg["data"]
    out = Path(data["prepared"])
    try:
        old, generation = _Record.from_json((out / prep_io.RECORD_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError, KeyError, TypeError, IndexError):
        raise _Rebuild("no record of what the layer was made from") from None
    if old.key != _record_key(cfg):
        raise _Rebuild("other data settings or another version of assim")
    folder, basins, all_ids = _read_basins(cfg)
    ids = [b.id for b in basins]
    if ids != old.basins:
        raise _Rebuild("other basins")
    raw = {}
    for name in (raw_io.BASINS_FILE, raw_io.WEATHER_FILE, raw_io.GAUGE_FILE):
        r = raw[name] = _Raw.read(folder / name)
        size, sha = old.raw[name]
        if r.size < size or (r.size == size and r.sha256 != sha):
            raise _Rebuild(f"{name} changed")
        if r.size > size:
            import hashlib

            if name == raw_io.BASINS_FILE or hashlib.sha256(r.data[:size]).hexdigest() != sha \
                    or (size and r.data[size - 1:size] != b"\n"):
                raise _Rebuild(f"{name} changed before its end")
    try:
        forcing, obs, _ = prep_io.read_prepared(out)
    except InputError as exc:
        raise _Rebuild(f"the layer is unreadable ({exc})") from None
    if forcing.attrs.get("set_generation") != generation or [str(b) for b in forcing["basin"].values] != ids:
        raise _Rebuild("the record is not the layer's")
    old_last = np.datetime64(old.last_day, "D")
    if forcing["time"].values[-1].astype("datetime64[D]") != old_last:
        raise _Rebuild("the record is not the layer's")

    old_size = old.raw[raw_io.WEATHER_FILE][0]
    text = _text(raw[raw_io.WEATHER_FILE], old_size)
    if text is not None:
        weather = raw_io.read_weather(folder / raw_io.WEATHER_FILE, ids, need_pet=data["pet_method"] == "given",
                                      all_ids=all_ids, text=text)
        if weather.dates[0] != old_last + 1:
            raise _Rebuild("weather rows for other days than the next ones")
    else:
        weather = raw_io.Weather(tuple(ids), np.zeros(0, dtype="datetime64[D]"), *(np.zeros((len(ids), 0)),) * 3,
                                 None if data["pet_method"] != "given" else np.zeros((len(ids), 0)))
    new_last = weather.dates[-1] if weather.dates.size else old_last

    g = raw[raw_io.GAUGE_FILE]
    start = old.gauge_pending_from
    text = _text(g, start)
    if text is not None:
        readings = raw_io.read_gauge(folder / raw_io.GAUGE_FILE, ids, all_ids=all_ids, text=text)
        day = readings.time.astype("datetime64[D]")
        if readings.line.size and b"\r" in g.data[start:] and g.data.count(b"\r", start) != g.data.count(b"\r\n", start):
            raise _Rebuild("gauge.csv has old Mac line ends")
        offsets = g.line_offsets(start)
        in_new = offsets[readings.line - 2] >= old.raw[raw_io.GAUGE_FILE][0]
        if (in_new & (day <= old_last)).any():
            raise _Rebuild("a reading for a day already prepared (a late or corrected reading)")
        keep = day > old_last
        readings = raw_io.Readings(readings.basins, readings.basin[keep], readings.time[keep], readings.value[keep],
                                   readings.line[keep], readings.duplicates)
    else:
        readings = raw_io.Readings(tuple(ids), *(np.zeros(0, dtype=t) for t in (np.int64, "datetime64[ms]", float,
                                                                                     np.int64)))
    check_plausible(basins, weather, readings, data["limits"], folder, counted=old.counted)

    # the quality control of the new readings continues from the record's
    cb, ct, cv = _context(old.carry)
    k = np.r_[cb, readings.basin]
    t = np.r_[ct.astype("datetime64[ms]"), readings.time]
    v = np.r_[cv, readings.value]
    order = np.lexsort((t, k))
    both = raw_io.Readings(tuple(ids), k[order], t[order], v[order], np.r_[np.full(cb.size, -1), readings.line][order])
    real = np.r_[np.zeros(cb.size, dtype=bool), np.ones(readings.basin.size, dtype=bool)][order]
    dates = weather.dates
    through = both.time.astype("datetime64[D]") <= new_last
    if dates.size:
        obs_new, flags, _, q = _daily_observations(basins, both, dates, data)
        carry = _carry(basins, both, flags, q, through)
    else:  # no new day: the new readings wait for their weather
        obs_new = tuple(np.zeros((len(ids), 0)) for _ in _OBSERVATION_NAMES)
        carry = old.carry
    forcing_new = _forcing_arrays(data, basins, weather)
    names = ["precipitation", "pet", *(["temperature"] if "temperature" in forcing else [])]
    if set(names) != set(forcing_new):
        raise _Rebuild("the layer's forcing variables differ")
    all_dates = np.r_[forcing["time"].values.astype("datetime64[D]"), dates]
    datasets = _datasets(
        cfg, basins, all_dates,
        {n: np.concatenate([forcing[n].values, forcing_new[n]], axis=1) for n in names},
        {n: np.concatenate([obs[n].values, new], axis=1) for n, new in zip(_OBSERVATION_NAMES, obs_new, strict=True)},
        calibrated)
    record = _Record(
        key=old.key, basins=ids, last_day=str(new_last),
        raw={n: (r.size, r.sha256) for n, r in raw.items()},
        gauge_pending_from=g.pending_from(both, real & ~through, start),
        carry=carry,
        counted=old.counted + _beyond_limits(basins, both, data["limits"], real & through))
    return datasets, record, int(dates.size)


def prepare(cfg: Mapping) -> dict[str, xr.Dataset]:
    """Prepare the raw folder ``cfg["data"]["raw"]`` into ``cfg["data"]["prepared"]``.

    When the raw files only grew by rows appended since the layer was written, only those
    rows are read and the new days appended to the layer (see the comment above
    :class:`_Raw`); otherwise the whole record is prepared. Either way the result is the
    same, variable by variable.

    Everything is read and validated before anything is written; the three files (and the
    record of what they were made from, ``prep-record.json``) are written to temporary names
    and renamed together when all are complete (:class:`assim.io.common.FileSet`), each
    NetCDF file stamped with the write's ``set_generation`` and the checksums of its
    variables, so that a failed write (a full disk) leaves the old layer whole and a layer
    replaced only in part is refused by its readers.

    Returns
    -------
    {"forcing", "observations", "basins"} : the Datasets written, each with
    ``attrs["product_path"]``; ``attrs["prepared"]`` says whether days were appended or
    the whole record prepared, and why.

    Raises
    ------
    InputError
        naming the file, the variable or column and the first bad place.
    """
    from functools import partial

    from assim.errors import ConfigError
    from assim.io.common import FileSet, layer_lock

    try:
        datasets, record, n_days = _update(cfg, calibrated=True)
        how = f"appended {n_days} day(s) to the layer"
    except (_Rebuild, InputError, ConfigError) as exc:
        # a bad appended row is reported as a full read reports it (with its line)
        datasets, _, record = _build(cfg)
        how = f"prepared the whole record ({exc if isinstance(exc, _Rebuild) else 'appended rows unusable'})"
    out = Path(cfg["data"]["prepared"])
    writers = {"forcing": (prep_io.write_forcing, prep_io.FORCING_FILE),
               "observations": (prep_io.write_observations, prep_io.OBSERVATIONS_FILE),
               "basins": (prep_io.write_basins, prep_io.BASINS_FILE)}
    paths = [out / name for _, name in writers.values()]
    # what the layer was made from: the SHA-256 of each raw file
    made_from = " ".join(f"{n}:{record.raw[n][1]}" for n in (raw_io.BASINS_FILE, raw_io.WEATHER_FILE,
                                                             raw_io.GAUGE_FILE))
    # the three files and the record are one set: all replaced or none, never while a run reads them
    with FileSet([*paths, out / prep_io.RECORD_FILE], checksummed=paths, attrs={"raw_sha256": made_from},
                 guard=partial(layer_lock, out, exclusive=True)) as files:
        for key, (write, name) in writers.items():
            path = write(datasets[key], out / name, commit=files)
            datasets[key].attrs["product_path"] = str(path)
        files.part(out / prep_io.RECORD_FILE).write_text(record.to_json(files.generation), encoding="utf-8")
    for ds in datasets.values():
        ds.attrs["prepared"] = how
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
    if stats["duplicates"]:
        lines.append(f"gauge rows repeating another exactly (dropped): {stats['duplicates']}")
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

