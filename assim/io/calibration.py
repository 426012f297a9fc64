"""calibration.nc: the calibrated parameters of every basin, their scores and the series.

Written by ``assim calibrate``; ``model.calibrated_parameters`` points ``assim prep`` at it,
and prep then takes each listed basin's parameters from it instead of basins.yaml.
Layout (CF-1.8, string labels stored as variables named like their dimension: ``basin(basin)``, ...):

- one variable per model parameter on ``(basin)``: the best member's value (the same names,
  units and valid ranges as in basins.nc);
- ``search_lower``, ``search_upper`` on ``(basin, parameter)``: the box that was searched
  (equal where a parameter was held fixed);
- ``population`` on ``(basin, member, parameter)`` and ``population_objective`` on
  ``(basin, member)``: the final population of the differential evolution, a sample of
  near-optimal parameter sets (kept for parameter uncertainty; the runs use the best);
- ``score`` on ``(basin, period, metric)`` with ``period`` in {calibration, validation} and
  ``metric`` in {kge, nse, nse_log, composite}; ``n_days`` on ``(basin, period)``;
- ``discharge_simulated`` and ``discharge_observed`` (m3 s-1) on ``(basin, time)`` over the
  scored days, with ``period_flag(time)`` saying which period a day belongs to;
- ``generations`` and ``converged`` on ``(basin)``; global attributes ``model``,
  ``objective``, the periods, the seed and the search settings.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import xarray as xr

from assim.errors import InputError
from assim.io.common import atomic_path, global_attributes, labels_to_file, open_netcdf
from assim.io.prepared import CALENDAR, TIME_UNITS

PERIODS = ("calibration", "validation")
METRICS = ("kge", "nse", "nse_log", "composite")
PERIOD_FLAGS = {"outside": 0, "calibration": 1, "validation": 2}


def calibration_dataset(*, basins: Sequence[str], model, names: Sequence[str],
                        parameters: Mapping[str, np.ndarray], lower: np.ndarray, upper: np.ndarray,
                        population: np.ndarray, population_objective: np.ndarray,
                        score: np.ndarray, n_days: np.ndarray, dates, simulated: np.ndarray,
                        observed: np.ndarray, period_flag: np.ndarray, generations: np.ndarray,
                        converged: np.ndarray, attrs: Mapping[str, str]) -> xr.Dataset:
    """The calibration.nc Dataset.

    Parameters
    ----------
    basins : (basin,) ids
    model : assim.models.Model
    names : (parameter,) every model parameter, in the order of ``lower``/``upper``/``population``
    parameters : name -> (basin,) float64, the calibrated values
    lower, upper : (basin, parameter) float64, the searched box
    population : (basin, member, parameter) float64; population_objective : (basin, member)
    score : (basin, period, metric) float64; n_days : (basin, period) int
    dates : (time,) datetime64[D]; simulated, observed : (basin, time) m3 s-1
    period_flag : (time,) int, :data:`PERIOD_FLAGS`
    generations : (basin,) int; converged : (basin,) bool
    attrs : extra global attributes
    """
    spec = {p.name: p for p in model.parameters}
    ds = xr.Dataset(coords={
        "basin": ("basin", np.asarray(list(basins), dtype=object),
                  {"cf_role": "timeseries_id", "long_name": "basin identifier"}),
        "parameter": ("parameter", np.asarray(list(names), dtype=object), {"long_name": "model parameter"}),
        "period": ("period", np.asarray(PERIODS, dtype=object), {"long_name": "scored period"}),
        "metric": ("metric", np.asarray(METRICS, dtype=object), {"long_name": "skill metric"}),
        "member": ("member", np.arange(population.shape[1], dtype=np.int32),
                   {"long_name": "member of the final population"}),
        "time": ("time", np.asarray(dates, dtype="datetime64[ns]"),
                 {"standard_name": "time", "long_name": "start of the UTC day", "axis": "T"}),
    })
    for name in names:
        p = spec[name]
        ds[name] = ("basin", np.asarray(parameters[name], dtype=np.float64), {
            "long_name": f"{model.name} parameter {name}: {p.description}",
            "units": p.unit if p.unit not in ("", "-") else "1",
            "valid_min": float(p.low), "valid_max": float(p.high)})
    ds["search_lower"] = (("basin", "parameter"), lower, {"long_name": "lower end of the searched range"})
    ds["search_upper"] = (("basin", "parameter"), upper, {"long_name": "upper end of the searched range"})
    ds["population"] = (("basin", "member", "parameter"), population,
                        {"long_name": "final population of the search (parameter units)"})
    ds["population_objective"] = (("basin", "member"), population_objective,
                                  {"long_name": f"objective ({attrs.get('objective', '')}) of each member", "units": "1"})
    ds["score"] = (("basin", "period", "metric"), score, {"long_name": "skill of the calibrated parameters", "units": "1"})
    ds["n_days"] = (("basin", "period"), np.asarray(n_days, dtype=np.int32),
                    {"long_name": "days with an observed discharge in the period"})
    ds["discharge_simulated"] = (("basin", "time"), simulated, {
        "long_name": "discharge simulated with the calibrated parameters", "units": "m3 s-1"})
    ds["discharge_observed"] = (("basin", "time"), observed, {
        "long_name": "observed daily mean discharge", "units": "m3 s-1"})
    ds["period_flag"] = ("time", np.asarray(period_flag, dtype=np.int8), {
        "long_name": "scored period of the day", "flag_values": np.array(list(PERIOD_FLAGS.values()), dtype=np.int8),
        "flag_meanings": " ".join(PERIOD_FLAGS)})
    ds["generations"] = ("basin", np.asarray(generations, dtype=np.int32),
                         {"long_name": "generations of the search"})
    ds["converged"] = ("basin", np.asarray(converged, dtype=np.int8), {
        "long_name": "the search stopped by its tolerance", "flag_values": np.array([0, 1], dtype=np.int8),
        "flag_meanings": "generation_limit tolerance"})
    ds.attrs = global_attributes("assim calibrated model parameters", model=model.name, **attrs)
    return ds


def write_calibration(ds: xr.Dataset, path: str | Path) -> Path:
    """Write calibration.nc atomically; returns the path."""
    path = Path(path)
    on_disk = labels_to_file(ds)
    encoding: dict[str, dict] = {}
    for name, var in on_disk.variables.items():
        if var.dtype.kind == "f":
            encoding[str(name)] = {"_FillValue": np.nan if name in on_disk.data_vars else None,
                                   **({"zlib": True} if var.ndim >= 2 else {})}
        elif var.dtype.kind in "OUS":
            encoding[str(name)] = {"dtype": str}
        elif var.dtype.kind in "iu":
            encoding[str(name)] = {"_FillValue": None}
    encoding["time"] = {"units": TIME_UNITS, "calendar": CALENDAR, "dtype": "int32"}
    with atomic_path(path) as tmp:
        on_disk.to_netcdf(tmp, engine="netcdf4", format="NETCDF4", encoding=encoding)
    return path


def read_calibration(path: str | Path) -> xr.Dataset:
    """Read calibration.nc into memory, string labels as the index of their dimension.

    Raises
    ------
    InputError
        when the file is missing, unreadable or not a calibration file.
    """
    ds = open_netcdf(path, ("search_lower", "score"), load=True)
    if "model" not in ds.attrs:
        raise InputError("not a calibration file (no global attribute 'model')", file=path, variable="model")
    return ds


def calibrated_parameters(path: str | Path, model_name: str, parameter_names: Sequence[str]
                          ) -> dict[str, dict[str, float]]:
    """The calibrated parameters of each basin in ``path``: {basin id: {name: value}}.

    Raises
    ------
    InputError
        when the file was calibrated for another model or lacks a parameter.
    """
    ds = read_calibration(path)
    if str(ds.attrs["model"]) != model_name:
        raise InputError(f"calibrated for model {ds.attrs['model']!r}, but the basins use {model_name!r}",
                         file=path, variable="model")
    out: dict[str, dict[str, float]] = {}
    for name in parameter_names:
        if name not in ds.data_vars:
            raise InputError("parameter missing from the calibration file", file=path, variable=name)
    for j, b in enumerate(ds["basin"].values):
        out[str(b)] = {n: float(ds[n].values[j]) for n in parameter_names}
    return out
