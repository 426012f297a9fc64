"""The prepared layer: ``forcing.nc``, ``observations.nc`` and ``basins.nc`` (CF-1.8).

``assim prep`` writes these files and the engine reads only these. Layout (orthogonal
multidimensional time series, CF-1.8 section 9 and appendix H.2.1):

- ``basin``: string ids, ``cf_role: timeseries_id``; ``latitude`` and ``longitude`` are
  auxiliary coordinates on ``basin``.
- ``time``: "days since 1970-01-01", standard calendar, 00:00 UTC of each day; a day's
  value is the mean (or total per day) over that UTC day, with ``time_bnds``.
- forcing.nc: ``precipitation``, ``pet`` (mm d-1) on ``(basin, time)``.
- observations.nc: daily mean ``discharge`` (m3 s-1, NaN where missing), ``qc_flag``
  (bit flags, CF ``flag_masks``/``flag_meanings``), ``coverage``, ``n_readings`` and
  ``n_rejected`` on ``(basin, time)``.
- basins.nc: ``area`` (km2), ``name``, one variable per model parameter, ``thresholds`` on
  ``(basin, threshold)`` (m3 s-1, NaN where a basin lacks a level), global ``model``.

Every reader validates what it reads and raises one :class:`assim.errors.InputError`
naming the file, the variable and the first bad (basin, date).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import xarray as xr

from assim.conventions import CALENDAR, TIME_UNITS, iso
from assim.errors import InputError
from assim.io.common import (
    atomic_path,
    check_set,
    global_attributes,
    labels_from_file,
    labels_to_file,
    verify_digests,
)
from assim.units import CANONICAL, canonical_unit

FORCING_FILE = "forcing.nc"
OBSERVATIONS_FILE = "observations.nc"
BASINS_FILE = "basins.nc"
#: What the layer was made from (the raw files' lengths and digests, the last day prepared,
#: what quality control of later readings needs), for `assim prep` to append new days.
RECORD_FILE = "prep-record.json"


# Bit flags of gauge readings and of daily values (observations.nc ``qc_flag``). A day's flag
# is the OR of the flags of its readings plus ``insufficient_coverage``.
QC_FLAGS: dict[str, int] = {
    "impossible_value": 1,  # negative or non-finite discharge reading
    "spike": 2,  # departs from both neighbours (rate-of-change test)
    "flat_line": 4,  # identical readings for data.qc.flatline_hours or longer (stuck sensor)
    "above_plausible_maximum": 8,  # above data.qc.max_discharge_m3s per km2 of area
    "below_rating_offset": 16,  # stage at or below h0: no discharge
    "rating_extrapolated": 32,  # stage outside the rating's valid range (kept)
    "insufficient_coverage": 64,  # accepted readings cover less than data.daily_coverage
}
#: Readings with any of these flags are left out of daily means.
REJECTED = 1 | 2 | 4 | 8 | 16
#: Days with any of these flags are never used by the filter (their discharge is NaN).
UNUSABLE = QC_FLAGS["insufficient_coverage"]
FLAG_DTYPE = np.int16

_TIME_ATTRS = {"standard_name": "time", "long_name": "start of the UTC day", "axis": "T",
               "bounds": "time_bnds"}


# ---------------------------------------------------------------------------------- build


def _base(basins: Sequence[str], dates, latitude, longitude) -> xr.Dataset:
    dates = np.asarray(dates).astype("datetime64[D]").astype("datetime64[ns]")
    ds = xr.Dataset(
        coords={
            "basin": ("basin", np.asarray(list(basins), dtype=object),
                      {"cf_role": "timeseries_id", "long_name": "basin identifier"}),
            "time": ("time", dates, dict(_TIME_ATTRS)),
            "latitude": ("basin", np.asarray(latitude, dtype=float),
                         {"standard_name": "latitude", "units": "degrees_north",
                          "long_name": "latitude of the basin outlet gauge"}),
            "longitude": ("basin", np.asarray(longitude, dtype=float),
                          {"standard_name": "longitude", "units": "degrees_east",
                           "long_name": "longitude of the basin outlet gauge"}),
        }
    )
    bnds = np.stack([dates, dates + np.timedelta64(1, "D")], axis=-1)
    ds["time_bnds"] = (("time", "nv"), bnds)
    return ds


def forcing_dataset(basins, dates, precipitation, pet, latitude, longitude, *,
                    pet_method: str = "", temperature=None) -> xr.Dataset:
    """The forcing.nc Dataset.

    Parameters
    ----------
    basins : (basin,) str
    dates : (time,) datetime64, days
    precipitation, pet : (basin, time) float64, mm d-1
    latitude, longitude : (basin,) float64, degrees
    pet_method : how PET was obtained (recorded in the ``pet`` attributes)
    temperature : (basin, time) float64, degC, the daily mean air temperature (for a snow
        routine), or None
    """
    ds = _base(basins, dates, latitude, longitude)
    ds["precipitation"] = (("basin", "time"), np.asarray(precipitation, dtype=float), {
        "standard_name": "lwe_precipitation_rate", "long_name": "basin mean precipitation",
        "units": "mm d-1", "cell_methods": "time: mean",
    })
    ds["pet"] = (("basin", "time"), np.asarray(pet, dtype=float), {
        "long_name": "basin potential evaporation", "units": "mm d-1",
        "cell_methods": "time: mean", "comment": f"method: {pet_method}" if pet_method else "",
    })
    if not pet_method:
        del ds["pet"].attrs["comment"]
    if temperature is not None:
        ds["temperature"] = (("basin", "time"), np.asarray(temperature, dtype=float), {
            "standard_name": "air_temperature", "long_name": "basin mean air temperature, (tmin + tmax) / 2",
            "units": "degC", "cell_methods": "time: mean"})
    ds.attrs = global_attributes("assim prepared forcing", product=False)
    return ds


def observations_dataset(basins, dates, discharge, qc_flag, coverage, n_readings, n_rejected,
                         latitude, longitude, *, settings: Mapping | None = None) -> xr.Dataset:
    """The observations.nc Dataset.

    Parameters
    ----------
    basins : (basin,) str
    dates : (time,) datetime64, days
    discharge : (basin, time) float64, m3 s-1, NaN where missing
    qc_flag : (basin, time) int, bit flags of :data:`QC_FLAGS`
    coverage : (basin, time) float64, fraction of the day covered by accepted readings
    n_readings, n_rejected : (basin, time) int, readings in the day and how many were rejected
    latitude, longitude : (basin,) float64, degrees
    settings : the QC and aggregation settings, recorded as global attributes
    """
    ds = _base(basins, dates, latitude, longitude)
    ds["discharge"] = (("basin", "time"), np.asarray(discharge, dtype=float), {
        "standard_name": "water_volume_transport_in_river_channel",
        "long_name": "daily mean river discharge (time-weighted mean of accepted readings)",
        "units": "m3 s-1", "cell_methods": "time: mean",
        "ancillary_variables": "qc_flag coverage n_readings n_rejected",
    })
    ds["qc_flag"] = (("basin", "time"), np.asarray(qc_flag).astype(FLAG_DTYPE), {
        "standard_name": "status_flag", "long_name": "quality control flags of daily discharge",
        "flag_masks": np.array(list(QC_FLAGS.values()), dtype=FLAG_DTYPE),
        "flag_meanings": " ".join(QC_FLAGS),
        "unusable_flag_mask": np.array(UNUSABLE, dtype=FLAG_DTYPE),
        "comment": "OR of the flags of the day's readings; days with a flag in "
        "unusable_flag_mask are not used by the filter; rejected readings "
        f"(mask {REJECTED}) are left out of the daily mean",
    })
    ds["coverage"] = (("basin", "time"), np.asarray(coverage, dtype=float), {
        "long_name": "fraction of the UTC day covered by accepted readings", "units": "1",
    })
    ds["n_readings"] = (("basin", "time"), np.asarray(n_readings).astype(np.int32),
                        {"long_name": "number of gauge readings in the UTC day", "units": "1"})
    ds["n_rejected"] = (("basin", "time"), np.asarray(n_rejected).astype(np.int32),
                        {"long_name": "number of rejected gauge readings in the UTC day", "units": "1"})
    extra = {f"qc_{k}": v for k, v in (settings or {}).items()}
    ds.attrs = global_attributes("assim prepared gauge observations", product=False, **extra)
    return ds


def basins_dataset(basins, names, area_km2, latitude, longitude, model: str,
                   parameters: Mapping[str, Sequence[float]], thresholds: np.ndarray,
                   levels: Sequence[str], gauge_kind: Sequence[str]) -> xr.Dataset:
    """The basins.nc Dataset.

    Parameters
    ----------
    basins, names : (basin,) str
    area_km2 : (basin,) float64, km2
    latitude, longitude : (basin,) float64, degrees
    model : the model name (every basin the same)
    parameters : name -> (basin,) float64, in the model's units
    thresholds : (basin, threshold) float64, m3 s-1, NaN where a basin lacks a level
    levels : (threshold,) str, level names
    gauge_kind : (basin,) "stage" or "discharge"
    """
    from assim import models

    spec = {p.name: p for p in models.get(model).parameters}
    ds = xr.Dataset(coords={
        "basin": ("basin", np.asarray(list(basins), dtype=object),
                  {"cf_role": "timeseries_id", "long_name": "basin identifier"}),
        "threshold": ("threshold", np.asarray(list(levels), dtype=object),
                      {"long_name": "flood threshold level"}),
        "latitude": ("basin", np.asarray(latitude, dtype=float),
                     {"standard_name": "latitude", "units": "degrees_north"}),
        "longitude": ("basin", np.asarray(longitude, dtype=float),
                      {"standard_name": "longitude", "units": "degrees_east"}),
    })
    ds["name"] = ("basin", np.asarray(list(names), dtype=object), {"long_name": "basin name"})
    ds["area"] = ("basin", np.asarray(area_km2, dtype=float),
                  {"long_name": "basin area upstream of the gauge", "units": "km2"})
    for name, values in parameters.items():
        p = spec[name]
        unit = p.unit if p.unit not in ("", "-") else "1"
        ds[name] = ("basin", np.asarray(values, dtype=float), {
            "long_name": f"{model} parameter {name}: {p.description}", "units": unit,
            "valid_min": float(p.low), "valid_max": float(p.high),
        })
    ds["thresholds"] = (("basin", "threshold"), np.asarray(thresholds, dtype=float),
                        {"long_name": "flood threshold discharge", "units": "m3 s-1"})
    ds["gauge_kind"] = ("basin", np.asarray(list(gauge_kind), dtype=object),
                        {"long_name": "what the gauge records (stage through a rating, or discharge)"})
    ds.attrs = global_attributes("assim prepared basin description", product=False, model=model)
    ds.attrs.pop("featureType", None)
    return ds


# ---------------------------------------------------------------------------------- write


def _write(ds: xr.Dataset, path: str | Path, commit=None) -> Path:
    path = Path(path)
    ds = labels_to_file(ds)
    encoding: dict[str, dict] = {}
    for name, var in ds.variables.items():
        if var.dtype.kind == "f" and var.ndim == 2 and name != "time_bnds":
            encoding[str(name)] = {"_FillValue": np.nan, "zlib": True, "complevel": 4}
        elif var.dtype.kind == "f":
            encoding[str(name)] = {"_FillValue": np.nan if name != "time_bnds" else None}
        elif var.dtype.kind in "OUS":
            encoding[str(name)] = {"dtype": str}
        elif var.dtype.kind in "iu":
            encoding[str(name)] = {"_FillValue": None, **({"zlib": True} if var.ndim == 2 else {})}
    for name in ("latitude", "longitude"):
        if name in ds.variables:
            encoding[name] = {"_FillValue": None}
    if "time" in ds.variables:
        encoding["time"] = {"units": TIME_UNITS, "calendar": CALENDAR, "dtype": "int32"}
        if "time_bnds" in ds.variables:
            encoding["time_bnds"] = {"units": TIME_UNITS, "calendar": CALENDAR, "dtype": "int32"}
    with atomic_path(path, commit) as tmp:
        ds.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=encoding)
    return path


def write_forcing(ds: xr.Dataset, path: str | Path, commit=None) -> Path:
    """Write forcing.nc atomically (validated first); returns the path. With ``commit`` (an
    :class:`assim.io.common.FileSet`) the file is replaced when the whole set is."""
    check_forcing(ds, path)
    return _write(ds, path, commit)


def write_observations(ds: xr.Dataset, path: str | Path, commit=None) -> Path:
    """Write observations.nc atomically (validated first); returns the path. With ``commit`` (an
    :class:`assim.io.common.FileSet`) the file is replaced when the whole set is."""
    check_observations(ds, path)
    return _write(ds, path, commit)


def write_basins(ds: xr.Dataset, path: str | Path, commit=None) -> Path:
    """Write basins.nc atomically (validated first); returns the path. With ``commit`` (an
    :class:`assim.io.common.FileSet`) the file is replaced when the whole set is."""
    check_basins(ds, path)
    return _write(ds, path, commit)


# ---------------------------------------------------------------------------------- read


def _open(path: str | Path) -> xr.Dataset:
    path = Path(path)
    if not path.is_file():
        raise InputError("required file not found (run `assim prep`)", file=path)
    if path.stat().st_size == 0:
        raise InputError("the file is empty", file=path)
    try:
        with xr.open_dataset(path, engine="netcdf4") as ds:
            ds = ds.load()
    except (OSError, ValueError, RuntimeError, KeyError, TypeError) as exc:
        raise InputError(f"not a readable NetCDF file ({type(exc).__name__})", file=path) from None
    verify_digests(ds, path)
    return labels_from_file(ds)


def _require(ds, path, name, dims, unit_kind=None) -> xr.DataArray:
    if name not in ds.variables:
        raise InputError("missing variable", file=path, variable=name)
    var = ds[name]
    if tuple(var.dims) != tuple(dims):
        raise InputError(f"dimensions {tuple(var.dims)}, expected {tuple(dims)}", file=path, variable=name)
    if unit_kind is not None:
        check_units(var, path, unit_kind)
    return var


def check_units(var: xr.DataArray, path, kind: str) -> None:
    """Raise InputError naming ``path`` and the variable unless ``var`` has a ``units``
    attribute spelling the unit of ``kind`` (a key of :data:`assim.units.CANONICAL`)."""
    units = var.attrs.get("units")
    if units is None:
        raise InputError(f"no units attribute (expected {CANONICAL[kind]})", file=path, variable=var.name)
    if canonical_unit(str(units)) != CANONICAL[kind]:
        raise InputError(f"units {units!r}, expected {CANONICAL[kind]}", file=path, variable=var.name)


def _check_basin(ds, path) -> np.ndarray:
    if "basin" not in ds.variables or ds["basin"].dims != ("basin",):
        raise InputError("missing coordinate (basin ids on dimension basin)", file=path, variable="basin")
    ids = ds["basin"].values
    if ids.dtype.kind not in "OUS" or not all(isinstance(b, str) and b for b in ids.tolist()):
        raise InputError("basin ids must be non-empty strings", file=path, variable="basin")
    _, first, counts = np.unique(ids.astype(str), return_index=True, return_counts=True)
    if (counts > 1).any():
        raise InputError("duplicated basin id", file=path, variable="basin",
                         place=f"basin '{ids[first[counts > 1][0]]}'")
    if ds.sizes["basin"] == 0:
        raise InputError("no basins", file=path, variable="basin")
    return ids.astype(str)


def _check_time(ds, path) -> np.ndarray:
    if "time" not in ds.variables or ds["time"].dims != ("time",):
        raise InputError("missing coordinate", file=path, variable="time")
    t = ds["time"].values
    if t.dtype.kind != "M":
        raise InputError("cannot decode times (expected CF units 'days since ...')", file=path, variable="time")
    if t.size == 0:
        raise InputError("empty time axis", file=path, variable="time")
    days = t.astype("datetime64[D]")
    off = t != days.astype(t.dtype)
    if off.any():
        raise InputError("times must be 00:00 UTC of each day", file=path, variable="time",
                         place=str(t[off][0]))
    d = np.diff(days).astype(np.int64)
    for mask, what in ((d == 0, "duplicated date"), (d < 0, "date goes backwards"),
                       (d > 1, "missing day(s) before this date: the daily axis must be regular")):
        if mask.any():
            i = int(np.flatnonzero(mask)[0]) + 1
            raise InputError(what, file=path, variable="time", place=iso(days[i]))
    return days


def _first_bad(mask: np.ndarray, ids, days) -> str:
    b, t = np.argwhere(mask)[0]
    return f"basin '{ids[b]}', {iso(days[t])}"


def check_forcing(ds: xr.Dataset, path, start=None, end=None) -> None:
    """Validate a forcing Dataset; InputError naming file, variable and first bad place."""
    ids = _check_basin(ds, path)
    days = _check_time(ds, path)
    for name in ("precipitation", "pet"):
        var = _require(ds, path, name, ("basin", "time"), "depth_rate")
        v = var.values
        if v.dtype.kind != "f":
            raise InputError(f"must be floating point, got {v.dtype}", file=path, variable=name)
        neg = v < 0
        if neg.any():
            raise InputError("negative values", file=path, variable=name, place=_first_bad(neg, ids, days))
    lo, hi = _period_index(days, path, start, end)
    for name in ("precipitation", "pet", "temperature"):
        if name == "temperature" and name not in ds:
            continue
        nan = ~np.isfinite(ds[name].values[:, lo:hi])
        if nan.any():
            raise InputError("missing (NaN) value inside the run period", file=path, variable=name,
                             place=_first_bad(nan, ids, days[lo:hi]))


def _period_index(days, path, start, end) -> tuple[int, int]:
    lo, hi = 0, days.size
    if start is not None:
        s = np.datetime64(str(start), "D")
        if s < days[0] or s > days[-1]:
            raise InputError(f"run period start {s} is outside the forcing ({days[0]} to {days[-1]})",
                             file=path, variable="time", place=str(s))
        lo = int((s - days[0]).astype(int))
    if end is not None:
        e = np.datetime64(str(end), "D")
        if e < days[0] or e > days[-1]:
            raise InputError(f"run period end {e} is outside the forcing ({days[0]} to {days[-1]})",
                             file=path, variable="time", place=str(e))
        hi = int((e - days[0]).astype(int)) + 1
    if hi <= lo:
        raise InputError(f"run period end {days[hi - 1] if hi else end} is before its start {days[lo]}",
                         file=path, variable="time")
    return lo, hi


def check_observations(ds: xr.Dataset, path) -> None:
    """Validate an observations Dataset; InputError naming file, variable and place."""
    ids = _check_basin(ds, path)
    days = _check_time(ds, path)
    q = _require(ds, path, "discharge", ("basin", "time"), "discharge").values
    if q.dtype.kind != "f":
        raise InputError(f"must be floating point, got {q.dtype}", file=path, variable="discharge")
    neg = q < 0
    if neg.any():
        raise InputError("negative discharge", file=path, variable="discharge", place=_first_bad(neg, ids, days))
    inf = np.isinf(q)
    if inf.any():
        raise InputError("infinite discharge", file=path, variable="discharge", place=_first_bad(inf, ids, days))
    flag = _require(ds, path, "qc_flag", ("basin", "time"))
    if flag.dtype.kind not in "iu":
        raise InputError(f"flags must be integers, got {flag.dtype}", file=path, variable="qc_flag")
    for attr in ("flag_masks", "flag_meanings"):
        if attr not in flag.attrs:
            raise InputError(f"missing attribute {attr}", file=path, variable="qc_flag")
    masks = np.atleast_1d(flag.attrs["flag_masks"])
    meanings = str(flag.attrs["flag_meanings"]).split()
    if len(masks) != len(meanings):
        raise InputError("flag_masks and flag_meanings differ in length", file=path, variable="qc_flag")


def check_basins(ds: xr.Dataset, path) -> None:
    """Validate a basins Dataset (areas, coordinates, the model and its parameter ranges,
    thresholds); InputError naming file, variable and basin."""
    from assim import models

    ids = _check_basin(ds, path)
    model_name = ds.attrs.get("model")
    if not model_name:
        raise InputError("missing global attribute 'model'", file=path, variable="model")
    try:
        model = models.get(str(model_name))
    except KeyError as exc:
        raise InputError(exc.args[0], file=path, variable="model") from None

    def where(mask):
        return f"basin '{ids[int(np.flatnonzero(mask)[0])]}'"

    area = _require(ds, path, "area", ("basin",), "area").values.astype(float)
    bad = ~(area > 0)
    if bad.any():
        raise InputError("area must be > 0", file=path, variable="area", place=where(bad))
    for name, lo, hi, kind in (("latitude", -90, 90, "latitude"), ("longitude", -180, 360, "longitude")):
        v = _require(ds, path, name, ("basin",), kind).values.astype(float)
        bad = ~((v >= lo) & (v <= hi))
        if bad.any():
            raise InputError(f"must be within [{lo}, {hi}]", file=path, variable=name, place=where(bad))
    _require(ds, path, "name", ("basin",))
    for p in model.parameters:
        v = _require(ds, path, p.name, ("basin",)).values
        bad = ~((v >= p.low) & (v <= p.high))
        if bad.any():
            raise InputError(f"{v[bad][0]} is outside the valid range [{p.low}, {p.high}] of {model.name}",
                             file=path, variable=p.name, place=where(bad))
    th = _require(ds, path, "thresholds", ("basin", "threshold"), "discharge").values
    if "threshold" not in ds.variables:
        raise InputError("missing coordinate (level names)", file=path, variable="threshold")
    bad = th <= 0
    if bad.any():
        b, k = np.argwhere(bad)[0]
        raise InputError("thresholds must be > 0", file=path, variable="thresholds",
                         place=f"basin '{ids[b]}', level '{ds['threshold'].values[k]}'")


def _float64(ds: xr.Dataset, names) -> xr.Dataset:
    for n in names:
        if n in ds:
            ds[n] = ds[n].astype(np.float64)
    return ds


def read_forcing(path: str | Path, start=None, end=None) -> xr.Dataset:
    """Read and validate forcing.nc.

    Parameters
    ----------
    path : the file
    start, end : first and last day of the run (str YYYY-MM-DD or datetime64); None = the
        first or last day of the file. The result holds these days only.

    Returns
    -------
    Dataset with ``precipitation`` and ``pet`` : (basin, time) float64, mm d-1

    Raises
    ------
    InputError
        naming the file, the variable and the first bad (basin, date): missing file or
        variable, wrong units or dimensions, irregular time axis, negative precipitation,
        NaN inside [start, end], or a period outside the file.
    """
    return _read_forcing(path, start, end)[0]


def _read_forcing(path, start, end) -> tuple[xr.Dataset, np.ndarray]:
    """The forcing over [start, end] and the file's whole daily axis."""
    ds = _open(path)
    check_forcing(ds, path, start, end)
    ds = _float64(ds, ("precipitation", "pet", "temperature") if "temperature" in ds else ("precipitation", "pet"))
    days = ds["time"].values.astype("datetime64[D]")
    lo, hi = _period_index(days, path, start, end)
    return ds.isel(time=slice(lo, hi)), days


def read_observations(path: str | Path) -> xr.Dataset:
    """Read and validate observations.nc.

    Returns
    -------
    Dataset with ``discharge`` : (basin, time) float64, m3 s-1 (NaN where missing) and
    ``qc_flag`` : (basin, time) int bit flags (see :data:`QC_FLAGS`).

    Raises
    ------
    InputError
        missing file or variable, wrong units, irregular time axis, negative discharge,
        flags without flag_masks/flag_meanings.
    """
    ds = _open(path)
    check_observations(ds, path)
    return _float64(ds, ("discharge",))


def usable_discharge(obs: xr.Dataset) -> xr.DataArray:
    """Daily discharge the filter may use: NaN on every day whose flag has an unusable bit.

    Readings outside the rating's valid range (``rating_extrapolated``) are kept.

    Returns
    -------
    DataArray (basin, time) float64, m3 s-1
    """
    flag = obs["qc_flag"]
    mask = int(np.asarray(flag.attrs.get("unusable_flag_mask", UNUSABLE)))
    bad = (flag.values.astype(np.int64) & mask) != 0
    return obs["discharge"].where(~bad)


def read_basins(path: str | Path) -> xr.Dataset:
    """Read and validate basins.nc.

    Returns
    -------
    Dataset on ``basin``: ``area`` (km2), ``latitude``, ``longitude``, ``name`` (str), one
    float64 variable per model parameter, ``thresholds`` (basin, threshold) m3 s-1; global
    attribute ``model``.

    Raises
    ------
    InputError
        missing file or variable, area <= 0, parameters outside the model's ranges, an
        unknown model.
    """
    ds = _open(path)
    check_basins(ds, path)
    from assim import models

    names = ["area", "latitude", "longitude", "thresholds", *models.get(ds.attrs["model"]).parameter_names]
    ds = _float64(ds, names)
    ds["name"] = ds["name"].astype(str)
    return ds


def read_prepared(folder: str | Path, start=None, end=None) -> tuple[xr.Dataset, xr.Dataset, xr.Dataset]:
    """Read the three prepared files and check they fit together.

    Parameters
    ----------
    folder : the prepared folder (config ``data.prepared``)
    start, end : the run period (see :func:`read_forcing`)

    Returns
    -------
    forcing, observations, basins : Datasets; observations are on the forcing's time axis
        (days outside the observation file have NaN discharge and the
        ``insufficient_coverage`` flag).

    Raises
    ------
    InputError
        from each reader (a file whose values no longer match the checksums written with it
        is refused), when the files come from different runs of ``assim prep`` (a layer
        replaced only in part), when the basins differ (ids or order) between the files, or
        the observations run outside the forcing's days.
    """
    folder = Path(folder)
    forcing, full = _read_forcing(folder / FORCING_FILE, start, end)
    obs = read_observations(folder / OBSERVATIONS_FILE)
    basins = read_basins(folder / BASINS_FILE)
    check_set({folder / name: ds.attrs for name, ds in
               ((FORCING_FILE, forcing), (OBSERVATIONS_FILE, obs), (BASINS_FILE, basins))})
    f_ids = forcing["basin"].values.astype(str).tolist()
    for ds, name in ((obs, OBSERVATIONS_FILE), (basins, BASINS_FILE)):
        ids = ds["basin"].values.astype(str).tolist()
        if ids != f_ids:
            extra = [b for b in ids if b not in f_ids]
            missing = [b for b in f_ids if b not in ids]
            detail = (f"basin '{extra[0]}' is not in {FORCING_FILE}" if extra else
                      f"basin '{missing[0]}' of {FORCING_FILE} is missing" if missing else
                      f"same basins in a different order ({', '.join(ids)} against {', '.join(f_ids)})")
            raise InputError(f"basins differ from {FORCING_FILE}: {detail}", file=folder / name,
                             variable="basin")
    o_days = obs["time"].values.astype("datetime64[D]")
    if o_days[0] < full[0] or o_days[-1] > full[-1]:
        raise InputError(f"observations ({iso(o_days[0])} to {iso(o_days[-1])}) run outside "
                         f"the forcing ({iso(full[0])} to {iso(full[-1])})",
                         file=folder / OBSERVATIONS_FILE, variable="time")
    t = forcing["time"]
    flag_attrs = dict(obs["qc_flag"].attrs)
    obs = obs.reindex(time=t, fill_value={"qc_flag": UNUSABLE, "n_readings": 0, "n_rejected": 0,
                                          "coverage": 0.0})
    obs["qc_flag"] = obs["qc_flag"].astype(FLAG_DTYPE)
    obs["qc_flag"].attrs = flag_attrs
    return forcing, obs, basins
