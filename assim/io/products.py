"""Product files of runs, hindcasts and forecasts (layouts: DESIGN.md, products contract).

Run and hindcast products are streamed: the writer opens the file once (under a temporary
name, :func:`assim.io.common.atomic_path`), the engine hands it one time block after another
through ``write_block``, and the file is renamed onto its final name when the writer is
closed without error. Memory therefore does not grow with the length of the run.

Dimensions are named ``basin`` (string ids, ``cf_role: timeseries_id``), ``time`` /
``issue_time`` (CF "days since 1970-01-01", standard calendar, 00:00 UTC of the day),
``member`` (0..N-1), ``lead`` (integer days), ``quantile``, ``threshold``, ``experiment``.

Each product has one dimension order, the same on disk and as :func:`open_product` (and
every entry point) returns it, with time last as CF-1.8 section 2.4 recommends:
``(basin, member, time)``, ``(basin, quantile, time)``, ``(experiment, basin, lead, member,
issue_time)``; forecasts ``(basin, lead, member)``. Readers name their dimensions
(``.transpose(...)``, ``.sel(...)``). In analysis.nc ``discharge`` is the analysis (after the
day's update) and ``discharge_background`` the background (before it).
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Mapping, Sequence
from pathlib import Path

import netCDF4
import numpy as np
import pandas as pd
import xarray as xr
from xarray.backends.netCDF4_ import NETCDF4_PYTHON_LOCK

from assim.conventions import CALENDAR, OBS_STATUS, TIME_UNITS
from assim.errors import InputError
from assim.io.common import (
    atomic_path,
    attribute_values,
    global_attributes,
    labels_from_file,
    labels_to_file,
    open_netcdf,
    output_lock,
)
from assim.members import exceedance_probability, member_quantiles

# The lock xarray takes around every netCDF/HDF5 call. The streamed writers call netCDF4
# directly, so they take it too: HDF5 is not thread-safe, and xarray may close a file from
# any thread (when a lazily opened Dataset is garbage-collected) while a block is written.
_NC_LOCK = NETCDF4_PYTHON_LOCK

DISCHARGE_ATTRS = {
    "standard_name": "water_volume_transport_in_river_channel",
    "units": "m3 s-1",
}
# Simulated discharge of a day is the mean over the day (the model's daily step), bounded by
# the variable ``time_bnds`` (CF-1.8 section 7.3).
DAILY_MEAN = {"cell_methods": "time: mean"}
# A forecast's value at lead L is the mean over the L-th day after the issue, bounded by the
# variable ``lead_bnds`` [L - 1, L] days (forecast.nc and hindcast.nc alike).
LEAD_MEAN = {"cell_methods": "lead: mean"}


def lead_bounds(leads: int) -> np.ndarray:
    """(lead, 2) int32 bounds of leads 1..``leads`` in days: the day [L - 1, L] after the issue."""
    lead = np.arange(1, int(leads) + 1, dtype=np.int32)
    return np.stack([lead - 1, lead], axis=1)
# Engine array -> variable of analysis.nc: a reader of `discharge` gets the analysis.
_ANALYSIS_NAMES = {
    "discharge": "discharge_background",
    "discharge_analysis": "discharge",
    "discharge_quantile": "discharge_background_quantile",
    "discharge_analysis_quantile": "discharge_quantile",
}
EXPERIMENTS = ("openloop", "assimilation")


def day_numbers(times) -> np.ndarray:
    """Dates (anything pandas reads) -> (n,) int64 days since 1970-01-01."""
    t = pd.DatetimeIndex(pd.to_datetime(times)).normalize()
    return ((t - pd.Timestamp("1970-01-01")) // pd.Timedelta(days=1)).to_numpy().astype(np.int64)


def dates(day_numbers_: Sequence[int] | np.ndarray) -> pd.DatetimeIndex:
    """(n,) days since 1970-01-01 -> DatetimeIndex at 00:00 UTC (tz-naive)."""
    return pd.Timestamp("1970-01-01") + pd.to_timedelta(np.asarray(day_numbers_, dtype=np.int64), unit="D")


class _StreamedFile:
    """A NetCDF file written under a temporary name and renamed when closed cleanly."""

    def __init__(self, path: str | os.PathLike, *, float32: bool, complevel: int = 1, commit=None):
        self.path = Path(path)
        self.commit = commit  # an assim.io.common.FileSet the file belongs to, or None
        self.float32 = float32
        self.complevel = complevel
        self._stack = contextlib.ExitStack()
        self.nc: netCDF4.Dataset | None = None

    def __enter__(self):
        tmp = self._stack.enter_context(atomic_path(self.path, self.commit))
        with _NC_LOCK:
            self.nc = netCDF4.Dataset(tmp, "w", format="NETCDF4")
        self._stack.callback(self._close_nc)
        try:
            with _NC_LOCK:
                self._define()
            self._after_define()
        except BaseException:
            self._stack.__exit__(None, None, None)
            raise
        return self

    def _after_define(self):
        """Work that reads other files through xarray (which takes the lock itself)."""

    def _close_nc(self):
        with _NC_LOCK:
            if self.nc is not None and self.nc.isopen():
                self.nc.close()

    def __exit__(self, exc_type, exc, tb):
        # closing the netCDF file first, then atomic_path renames (or removes on error)
        return self._stack.__exit__(exc_type, exc, tb)

    def _define(self):  # pragma: no cover - overridden
        raise NotImplementedError

    # helpers
    def _basin(self, basins):
        # string labels named like their dimension (assim.io.common.LABELS)
        v = self.nc.createVariable("basin", str, ("basin",))
        v[:] = np.array([str(b) for b in basins], dtype=object)
        v.cf_role = "timeseries_id"
        v.long_name = "basin identifier"

    def _days(self, name, days, long_name):
        v = self.nc.createVariable(name, "i4", (name,))
        v[:] = np.asarray(days, dtype=np.int32)
        v.units = TIME_UNITS
        v.calendar = CALENDAR
        v.standard_name = "time" if name == "time" else "forecast_reference_time"
        v.long_name = long_name
        v.axis = "T" if name == "time" else ""
        if not v.axis:
            del v.axis

    def _int_coord(self, name, values, **attrs):
        v = self.nc.createVariable(name, "i4", (name,))
        v[:] = np.asarray(values, dtype=np.int32)
        v.setncatts(attrs)

    def _float_var(self, name, dims, chunks, attrs, ensemble=True):
        dtype = "f4" if (self.float32 and ensemble) else "f8"
        v = self.nc.createVariable(
            name,
            dtype,
            dims,
            zlib=self.float32,
            complevel=self.complevel,
            shuffle=self.float32,
            chunksizes=chunks,
            fill_value=np.float32(np.nan) if dtype == "f4" else np.nan,
        )
        v.setncatts(attrs)
        return v


class RunWriter(_StreamedFile):
    """Sink of an open-loop, assimilation or reanalysis run: ``openloop.nc``,
    ``analysis.nc`` or ``reanalysis.nc``.

    Parameters
    ----------
    path : output file
    basins : basin ids
    days : (time,) int, the output days (after spin-up), days since 1970-01-01
    members : number of members
    mode : "openloop", "assimilate" or "reanalysis" (``reanalysis.nc``: the fixed-lag
        smoothed ``discharge`` and states, members only; a day is written when it leaves the
        smoother's window, so ``start`` may come back to earlier days)
    state_names : states written per member
    parameter_names : estimated parameters whose trajectories are written (joint estimation)
    quantiles : write ``discharge_quantile`` at these probabilities instead of members
    float32 : float32 and zlib compression for ensemble values
    time_chunk : days per NetCDF chunk along time
    state_noise : write ``state_noise_water`` (basin, time), mm (runs with additive state noise)
    adaptive_inflation : write ``inflation_mean`` and ``inflation_sd`` (basin, time), the
        adaptive inflation after each day's analysis
    earlier : a product of the same run ending the day before ``days[0]`` (a run being
        continued from its restart); its days are copied in front, block by block, and
        ``write_block`` indices count from the first of ``days``
    attrs : extra global attributes

    ``write_block(start, arrays)`` writes the engine's arrays covering output days
    ``start .. start + n - 1``: ``discharge``, ``discharge_analysis`` and the states and
    parameters (basin, n, member), or ``discharge_quantile`` (and
    ``discharge_analysis_quantile``) (basin, n, quantile), and the diagnostics (basin, n).
    In an assimilation run's file the analysis is ``discharge`` and the engine's
    ``discharge`` (the background) is ``discharge_background`` (:data:`_ANALYSIS_NAMES`).
    """

    def __init__(
        self,
        path,
        *,
        basins: Sequence[str],
        days,
        members: int,
        mode: str,
        state_names: Sequence[str] = (),
        state_units: Mapping[str, str] | None = None,
        parameter_names: Sequence[str] = (),
        quantiles: Sequence[float] | None = None,
        float32: bool = True,
        time_chunk: int = 365,
        state_noise: bool = False,
        adaptive_inflation: bool = False,
        earlier: str | os.PathLike | None = None,
        attrs: Mapping[str, str] | None = None,
        commit=None,
    ):
        super().__init__(path, float32=float32, commit=commit)
        self.state_noise = bool(state_noise)
        self.adaptive_inflation = bool(adaptive_inflation)
        self.earlier = None if earlier is None else Path(earlier)
        self.offset = 0
        if self.earlier is not None:
            # xarray, not a second netCDF4 handle: xarray may hold this file open already
            with xr.open_dataset(self.earlier, decode_times=False, mask_and_scale=False) as old:
                before = np.asarray(old["time"].values, dtype=np.int64)
            days = np.concatenate([before, np.asarray(days, dtype=np.int64)])
            self.offset = len(before)
        self.basins = list(basins)
        self.days = np.asarray(days, dtype=np.int64)
        self.members = int(members)
        self.mode = mode
        self.state_names = tuple(state_names)
        self.state_units = dict(state_units or {})
        self.parameter_names = tuple(parameter_names)
        self.quantiles = None if quantiles is None else tuple(float(q) for q in quantiles)
        self.time_chunk = max(1, min(int(time_chunk), len(self.days) or 1))
        self.attrs = dict(attrs or {})
        self.written = 0

    @property
    def assimilate(self) -> bool:
        return self.mode == "assimilate"

    @property
    def reanalysis(self) -> bool:
        return self.mode == "reanalysis"

    def _define(self):
        nc = self.nc
        nb, nt = len(self.basins), len(self.days)
        title = ("ensemble reanalysis (fixed-lag smoother)" if self.reanalysis else
                 "ensemble assimilation run" if self.assimilate else "ensemble open-loop run")
        nc.setncatts(global_attributes(title, **self.attrs))
        nc.createDimension("basin", nb)
        nc.createDimension("time", nt)
        self._basin(self.basins)
        self._days("time", self.days, "day of the simulated discharge")
        nc.createDimension("nv", 2)
        nc.variables["time"].bounds = "time_bnds"
        v = nc.createVariable("time_bnds", "i4", ("time", "nv"))
        v[:] = np.stack([self.days, self.days + 1], axis=1).astype(np.int32)  # the UTC day [d, d + 1)
        cb = max(1, min(nb, 64))
        diag_chunks = (cb, self.time_chunk)
        if self.quantiles is None:
            nc.createDimension("member", self.members)
            self._int_coord("member", np.arange(self.members), long_name="ensemble member")
            ens_dims = ("basin", "member", "time")  # on disk: time last (CF-1.8 section 2.4)
            chunks = (1, self.members, self.time_chunk)
            if self.assimilate:
                self._float_var(
                    "discharge_background",
                    ens_dims,
                    chunks,
                    {**DISCHARGE_ATTRS, **DAILY_MEAN,
                     "long_name": "background discharge (before the day's reading is assimilated)"},
                )
            self._float_var(
                "discharge",
                ens_dims,
                chunks,
                {**DISCHARGE_ATTRS, **DAILY_MEAN,
                 "long_name": "discharge after the day's update" if self.assimilate else
                 "smoothed discharge (fixed-lag smoother)" if self.reanalysis else "simulated discharge"},
            )
            for s in self.state_names:
                when = ("after the update" if self.assimilate else "smoothed (fixed-lag smoother)" if self.reanalysis
                        else "at the end of the day")
                self._float_var(s, ens_dims, chunks,
                                {"units": self.state_units.get(s, "mm"), "long_name": f"model state {s} {when}"})
            for p in self.parameter_names:
                self._float_var(p, ens_dims, chunks, {"long_name": f"estimated parameter {p} after the update"})
        else:
            nc.createDimension("quantile", len(self.quantiles))
            v = nc.createVariable("quantile", "f8", ("quantile",))
            v[:] = np.asarray(self.quantiles)
            v.long_name = "probability of non-exceedance"
            chunks = (cb, len(self.quantiles), self.time_chunk)  # small rows: several basins a chunk
            if self.assimilate:
                self._float_var("discharge_background_quantile", ("basin", "quantile", "time"), chunks,
                                {**DISCHARGE_ATTRS, **DAILY_MEAN,
                                 "long_name": "quantiles of the background discharge"})
            self._float_var("discharge_quantile", ("basin", "quantile", "time"), chunks,
                            {**DISCHARGE_ATTRS, **DAILY_MEAN, "long_name": "quantiles of the discharge after the update"
                             if self.assimilate else "quantiles of the simulated discharge"})
        if self.assimilate:
            d2 = ("basin", "time")
            self._float_var("observed_discharge", d2, diag_chunks,
                            {**DISCHARGE_ATTRS, "long_name": "gauge reading used (NaN when none)"}, ensemble=False)
            self._float_var("innovation", d2, diag_chunks,
                            {"long_name": "observed minus mean predicted discharge, in assimilation space"},
                            ensemble=False)
            self._float_var("innovation_variance", d2, diag_chunks,
                            {"long_name": "expected innovation variance HPH'+R, in assimilation space"},
                            ensemble=False)
            v = nc.createVariable("obs_status", "i1", d2, zlib=True, complevel=1, chunksizes=diag_chunks)
            v.flag_values = np.array(list(OBS_STATUS.values()), dtype=np.int8)
            v.flag_meanings = " ".join(OBS_STATUS)
            v.long_name = "status of the day's gauge reading"
            for name, ln in (("spread_before", "ensemble standard deviation of discharge before the update"),
                             ("spread_after", "ensemble standard deviation of discharge after the update")):
                self._float_var(name, d2, diag_chunks, {**DISCHARGE_ATTRS, "long_name": ln}, ensemble=False)
            self._float_var("clipped_water", d2, diag_chunks,
                            {"units": "mm", "long_name": "water added (positive) or removed by clipping states "
                             "to their bounds after the update, ensemble mean"}, ensemble=False)
            self._float_var("innovation_analysis", d2, diag_chunks,
                            {"long_name": "observed minus mean analysed discharge, in assimilation space "
                             "(NaN when no reading was used)"}, ensemble=False)
            self._float_var("obs_error_variance", d2, diag_chunks,
                            {"long_name": "observation error variance R used by the analysis, in assimilation "
                             "space (NaN when no reading was used)"}, ensemble=False)
            if self.adaptive_inflation:
                for name, what in (("inflation_mean", "mean"), ("inflation_sd", "standard deviation")):
                    self._float_var(name, d2, diag_chunks,
                                    {"units": "1", "long_name": f"{what} of the adaptive prior inflation (factor on "
                                     "the prior variance, Anderson 2009) after the day's analysis"}, ensemble=False)
            from assim.filters.consistency import STATISTICS

            for name, ln in STATISTICS.items():
                if name == "innovation_count":
                    v = self.nc.createVariable(name, "i4", ("basin",))
                    v.setncatts({"long_name": ln, "units": "1"})
                else:
                    v = self.nc.createVariable(name, "f8", ("basin",), fill_value=np.nan)
                    v.setncatts({"long_name": ln + " (over the run, in assimilation space)"})
        if self.state_noise:
            self._float_var("state_noise_water", ("basin", "time"), diag_chunks,
                            {"units": "mm", "long_name": "water added by the additive state noise, ensemble mean"},
                            ensemble=False)

    def _after_define(self):
        if self.earlier is not None:
            self._copy_earlier()

    def _copy_earlier(self):
        with xr.open_dataset(self.earlier, decode_times=False, mask_and_scale=False) as old:
            names = [n for n, v in self.nc.variables.items() if "time" in v.dimensions and n not in ("time", "time_bnds")
                     and n in old.variables]
            step = self.time_chunk
            for name in names:
                src, dst = old[name].transpose(*self.nc.variables[name].dimensions), self.nc.variables[name]
                for t in range(0, self.offset, step):
                    sl = slice(t, min(t + step, self.offset))
                    values = np.asarray(src.isel(time=sl).values)
                    with _NC_LOCK:
                        dst[..., sl] = values

    def write_block(self, start: int, arrays: Mapping[str, np.ndarray]) -> None:
        """Write output days ``start .. start + n - 1`` (see the class docstring)."""
        with _NC_LOCK:
            self._write_block(start, arrays)

    def _write_block(self, start: int, arrays: Mapping[str, np.ndarray]) -> None:
        start += self.offset
        if start < 0:  # days before the file (a reanalysis continued without its earlier days)
            arrays = {k: np.asarray(v)[:, -start:] for k, v in arrays.items()}
            start = 0
        n = None
        names = _ANALYSIS_NAMES if self.assimilate else {}
        for name, values in arrays.items():
            name = names.get(name, name)
            if name not in self.nc.variables:
                continue
            values = np.asarray(values)
            n = values.shape[1]
            if values.ndim == 3:  # ensemble and quantile values are finite, or the run is wrong
                _require_finite(values, self.path, name, self.basins, self.days[start:start + n])
            if values.ndim == 3:  # (basin, n, member) -> (basin, member, n) on disk
                values = values.transpose(0, 2, 1)
            self.nc.variables[name][..., start:start + n] = values
        if n is not None:
            self.written = max(self.written, start + n)

    def set_attributes(self, **attrs) -> None:
        """Global attributes known only at the end (diagnostics, warnings)."""
        with _NC_LOCK:
            self.nc.setncatts(attribute_values(attrs))

    def write_innovation_statistics(self) -> None:
        """Per-basin innovation statistics over every day of the file
        (:func:`assim.filters.consistency.innovation_statistics`), from the daily diagnostics
        written (a continued run's earlier days included). Assimilation runs only."""
        if not self.assimilate:
            return
        from assim.filters.consistency import innovation_statistics

        with _NC_LOCK:
            series = [np.ma.filled(self.nc.variables[n][:, :self.written].astype(np.float64), np.nan)
                      for n in ("innovation", "innovation_variance", "innovation_analysis", "obs_error_variance")]
            for name, values in innovation_statistics(*series).items():
                self.nc.variables[name][:] = values


def _require_finite(values: np.ndarray, path, name: str, basins, days) -> None:
    """RunError naming the product, the variable, the first basin and day of a non-finite
    value in ``values`` (basin, day, ...): an overflow (an implausible area or forcing) must
    stop the run, never reach a product."""
    from assim.errors import RunError

    bad = ~np.isfinite(values)
    if bad.any():
        b, t = np.argwhere(bad)[0][:2]
        raise RunError("non-finite value computed (overflow: check the basin's area and forcing); "
                       "the product is not written", file=path, variable=name,
                       place=f"basin '{basins[b]}', {dates([days[t]])[0].date()}")


class HindcastWriter(_StreamedFile):
    """Sink of a hindcast: ``discharge`` (experiment, basin, issue_time, lead, member).

    ``write_block(experiment, start, discharge)`` writes issue times ``start .. start+n-1``
    of one experiment; ``discharge`` is (basin, n, lead, member) m3 s-1.
    """

    def __init__(self, path, *, basins, issue_days, leads: int, members: int, float32=True,
                 attrs: Mapping[str, str] | None = None):
        super().__init__(path, float32=float32)
        self.basins = list(basins)
        self.issue_days = np.asarray(issue_days, dtype=np.int64)
        self.leads = int(leads)
        self.members = int(members)
        self.attrs = dict(attrs or {})

    def _define(self):
        nc = self.nc
        nc.setncatts(global_attributes("ensemble hindcast: open loop and assimilation", **self.attrs))
        nc.createDimension("experiment", len(EXPERIMENTS))
        nc.createDimension("basin", len(self.basins))
        nc.createDimension("issue_time", len(self.issue_days))
        nc.createDimension("lead", self.leads)
        nc.createDimension("member", self.members)
        v = nc.createVariable("experiment", str, ("experiment",))
        v[:] = np.array(EXPERIMENTS, dtype=object)
        v.long_name = "origin of the initial states"
        self._basin(self.basins)
        self._days("issue_time", self.issue_days, "issue time: the forecast starts from the end of this day")
        self._int_coord("lead", np.arange(1, self.leads + 1), units="days", long_name="lead time; valid day = issue_time + lead",
                        bounds="lead_bnds")
        nc.createDimension("nv", 2)
        nc.createVariable("lead_bnds", "i4", ("lead", "nv"))[:] = lead_bounds(self.leads)
        self._int_coord("member", np.arange(self.members), long_name="ensemble member")
        # on disk: issue_time last (CF-1.8 section 2.4); read back in contract order by open_product
        chunks = (1, 1, self.leads, self.members, max(1, min(len(self.issue_days), 64)))
        self._float_var("discharge", ("experiment", "basin", "lead", "member", "issue_time"), chunks,
                        {**DISCHARGE_ATTRS, **LEAD_MEAN, "long_name": "forecast discharge"})

    def write_block(self, experiment: str, start: int, discharge: np.ndarray) -> None:
        e = EXPERIMENTS.index(experiment)
        n = discharge.shape[1]
        with _NC_LOCK:
            self.nc.variables["discharge"][e, :, :, :, start:start + n] = discharge.transpose(0, 2, 3, 1)

    def set_attributes(self, **attrs) -> None:
        with _NC_LOCK:
            self.nc.setncatts(attribute_values(attrs))


def write_forecast(
    path,
    *,
    basins: Sequence[str],
    issue_day: int,
    discharge: np.ndarray,
    quantiles: Sequence[float],
    thresholds: Mapping[str, np.ndarray],
    analysis: str,
    float32: bool = True,
    attrs: Mapping[str, str] | None = None,
    commit=None,
    assimilated: tuple[np.ndarray, np.ndarray] | None = None,
    states: Mapping[str, np.ndarray] | None = None,
    state_units: Mapping[str, str] | None = None,
) -> xr.Dataset:
    """Write ``forecast-YYYY-MM-DD.nc`` and return it.

    Parameters
    ----------
    discharge : (basin, lead, member) m3 s-1, leads 1..L after ``issue_day``
    quantiles : probabilities of ``discharge_quantile``
    thresholds : name -> (basin,) m3 s-1 (NaN where a basin has no such level)
    analysis : "performed ..." or "not performed: ..."
    commit : the :class:`assim.io.common.FileSet` the file belongs to (with its restart)
    assimilated : (days, values) of the days assimilated before the issue: (n,) day numbers
        and (basin, n, member) m3 s-1, the ensemble after each day's update; written as
        ``discharge_analysis`` on (basin, time, member) (absent when None or n = 0), so that
        the assimilated history of daily forecasts can be pieced together
    states : name -> (basin, lead, member) model states at the end of every lead (mm, or as
        ``state_units`` says), the states the run writes (``outputs.states``), e.g. the
        snowpack of a snow basin
    """
    nb, nl, nm = discharge.shape
    _require_finite(discharge, path, "discharge", basins, issue_day + np.arange(1, nl + 1))
    names = list(thresholds)
    thr = np.stack([np.asarray(thresholds[k], dtype=np.float64) for k in names], axis=1) if names else np.zeros((nb, 0))
    q = np.asarray(quantiles, dtype=np.float64)
    dq = member_quantiles(discharge, q) if len(q) else np.zeros((nb, nl, 0))
    issue = dates([issue_day])[0]
    lead = np.arange(1, nl + 1)
    ds = xr.Dataset(
        {
            "discharge": (("basin", "lead", "member"), discharge,
                          {**DISCHARGE_ATTRS, **LEAD_MEAN, "long_name": "forecast discharge"}),
            "discharge_quantile": (("basin", "lead", "quantile"), dq,
                                   {**DISCHARGE_ATTRS, **LEAD_MEAN, "long_name": "quantiles of the forecast discharge"}),
            "exceedance_probability": (("basin", "lead", "threshold"), exceedance_probability(discharge[:, :, None, :], thr[:, None, :]),
                                       {"units": "1", "long_name": "fraction of members above the threshold"}),
            "thresholds": (("basin", "threshold"), thr, {**DISCHARGE_ATTRS, "long_name": "named discharge thresholds"}),
        },
        coords={
            "basin": ("basin", np.array([str(b) for b in basins], dtype=object), {"cf_role": "timeseries_id"}),
            "lead": ("lead", lead, {"units": "days", "long_name": "lead time after the issue date", "bounds": "lead_bnds"}),
            "lead_bnds": (("lead", "nv"), lead_bounds(nl)),
            "member": ("member", np.arange(nm), {"long_name": "ensemble member"}),
            "quantile": ("quantile", q, {"long_name": "probability of non-exceedance"}),
            "threshold": ("threshold", np.array(names, dtype=object), {"long_name": "threshold name"}),
            "valid_time": ("lead", dates(issue_day + lead), {"long_name": "day the lead is valid for"}),
            "issue_time": ((), issue, {"long_name": "issue date; the forecast starts from the end of this day"}),
        },
        attrs=global_attributes(
            "ensemble streamflow forecast",
            issue_date=issue.strftime("%Y-%m-%d"),
            analysis=analysis,
            **dict(attrs or {}),
        ),
    )
    for name, values in (states or {}).items():
        ds[name] = (("basin", "lead", "member"), np.asarray(values, dtype=np.float64),
                    {"units": (state_units or {}).get(name, "mm"),
                     "long_name": f"model state {name} at the end of the lead day"})
    if assimilated is not None and len(assimilated[0]):
        a_days, a_values = assimilated
        ds["discharge_analysis"] = (("basin", "time", "member"), np.asarray(a_values, dtype=np.float64),
                                    {**DISCHARGE_ATTRS, **DAILY_MEAN, "long_name": "assimilated discharge before the issue "
                                     "(ensemble after each day's update)"})
        ds = ds.assign_coords(time=("time", dates(a_days), {"standard_name": "time", "axis": "T", "bounds": "time_bnds",
                                                            "long_name": "day assimilated before the issue"}))
        a_days = np.asarray(a_days, dtype=np.int64)
        ds["time_bnds"] = (("time", "nv"), np.stack([dates(a_days), dates(a_days + 1)], axis=1))  # UTC day [d, d + 1)
    ds.attrs.pop("featureType", None)  # one issue: no time series (CF-1.8 section 9)
    enc_t = {"units": TIME_UNITS, "calendar": CALENDAR, "dtype": "i4"}
    encoding = {"valid_time": enc_t, "issue_time": enc_t, "lead": {"dtype": "i4"}, "member": {"dtype": "i4"},
                "quantile": {"_FillValue": None}, "lead_bnds": {"dtype": "i4", "_FillValue": None}}
    if "time_bnds" in ds:
        encoding["time_bnds"] = {**enc_t, "_FillValue": None}
    fdtype = "f4" if float32 else "f8"
    for v in ("discharge", "discharge_quantile", "discharge_analysis", *(states or {})):
        if v in ds:
            encoding[v] = {"dtype": fdtype, "zlib": float32, "_FillValue": np.nan}
    if "time" in ds.coords:
        encoding["time"] = enc_t
    encoding.update({d: {"dtype": str} for d in ("basin", "threshold")})
    on_disk = labels_to_file(ds)
    if "discharge_analysis" in on_disk:  # time last on disk (CF-1.8 section 2.4), as in run products
        on_disk["discharge_analysis"] = on_disk["discharge_analysis"].transpose("basin", "member", "time")
    with atomic_path(path, commit) as tmp:
        on_disk.to_netcdf(tmp, encoding=encoding, format="NETCDF4")
    ds.attrs["product_path"] = str(path)
    return ds


def open_product(path, variables=(), *, any_of=(), load=False) -> xr.Dataset:
    """Open a written product lazily, in its one dimension order (the order on disk, time
    last as CF-1.8 section 2.4 recommends: ``(basin, member, time)``,
    ``(experiment, basin, lead, member, issue_time)``, forecasts ``(basin, lead, member)``),
    string labels as the index of ``basin``, ``experiment``, ``threshold``, with
    ``attrs["product_path"]`` set; see :func:`assim.io.common.open_netcdf`."""
    return open_netcdf(path, variables, any_of=any_of, load=load)


def background(ds: xr.Dataset, *, quantile: bool = False) -> str:
    """Name of the variable of a run product holding each day's discharge simulated before
    that day's reading: ``discharge_background`` in analysis.nc, ``discharge`` in
    openloop.nc (``*_quantile`` for a quantile product). Skill at lead 0 and the
    hydrographs use it, so the assimilation is never scored on the readings it took in."""
    suffix = "_quantile" if quantile else ""
    name = f"discharge_background{suffix}"
    return name if name in ds.variables else f"discharge{suffix}"


def read_run_extent(path) -> dict | None:
    """What a run product covers: ``config_digest``, ``results_digest`` (the settings that
    change its numbers), ``set_generation`` (the write it shares with its restart),
    ``basins`` (ids), ``members`` (None for a quantile product), ``n_time``, ``first_day``
    and ``last_day`` (day numbers); None when the file is absent or unreadable."""
    if not Path(path).is_file():
        return None
    try:
        with xr.open_dataset(path, decode_times=False) as raw:
            ds = labels_from_file(raw)
            days = np.asarray(ds["time"].values)
            return {
                "config_digest": ds.attrs.get("config_digest"),
                "results_digest": ds.attrs.get("results_digest"),
                "set_generation": ds.attrs.get("set_generation"),
                "basins": [str(b) for b in ds["basin"].values],
                "members": ds.sizes.get("member"),
                "n_time": int(days.size),
                "first_day": int(days[0]) if days.size else None,
                "last_day": int(days[-1]) if days.size else None,
            }
    except (OSError, KeyError, ValueError, IndexError):
        return None


def _whole_days(lead) -> np.ndarray:
    """Lead coordinate values as days (integers or CF-decoded time spans); NaN if neither."""
    lead = np.asarray(lead)
    if lead.dtype.kind == "m":
        return lead / np.timedelta64(1, "D")
    return lead.astype(np.float64) if lead.dtype.kind in "iuf" else np.full(lead.shape, np.nan)


def read_forcing_forecast(path, basins: Sequence[str], issue_day: int, leads: int,
                          names: Sequence[str] = ("precipitation", "pet")) -> dict[str, np.ndarray]:
    """Forcing forecast of one issue from a NetCDF file with a member dimension.

    Layout: ``precipitation`` and ``pet`` (``units`` mm d-1, or a spelling of it), and
    ``temperature`` (degC) when ``names`` asks for it (a model with a snow routine), on
    ``(basin, issue_time, lead, member)`` in any order (``issue_time`` optional when the file
    holds one issue), ``basin`` string ids, ``lead`` days 1..L (integers, or CF time spans in
    days), ``issue_time`` CF-encoded days.

    Returns
    -------
    dict name -> (basin, lead, file_member) float64, mm d-1 (temperature degC)

    Raises
    ------
    InputError
        if the file, a variable, a basin, the issue time or a lead is missing, a variable has
        other dimensions or units, or values are not finite or (but temperature) negative.
    """
    from assim.io.prepared import check_units

    if not Path(path).is_file():
        raise InputError("forcing forecast file not found", file=path)
    try:
        ds = xr.open_dataset(path)
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot read forcing forecast ({exc})", file=path) from None
    with ds:
        out = {}
        ids = [str(b) for b in ds["basin"].values] if "basin" in ds else []
        missing = [b for b in basins if b not in ids]
        if missing:
            raise InputError("basin not in the forcing forecast", file=path, variable="basin", place=missing[0])
        sel = {"basin": [ids.index(b) for b in basins]}
        have = _whole_days(ds["lead"].values) if "lead" in ds.coords and ds["lead"].ndim == 1 else np.array([])
        lacking = np.setdiff1d(np.arange(1, leads + 1), have)
        if lacking.size:
            raise InputError(f"leads 1..{leads} (days) needed", file=path, variable="lead",
                             place=f"lead {int(lacking[0])}")
        lead_index = [int(np.flatnonzero(have == k)[0]) for k in range(1, leads + 1)]
        for name in names:
            if name not in ds:
                raise InputError("variable missing from the forcing forecast", file=path, variable=name)
            dims = set(ds[name].dims)
            if not {"basin", "lead", "member"} <= dims <= {"basin", "issue_time", "lead", "member"}:
                raise InputError(f"dimensions {tuple(ds[name].dims)}, expected (basin, [issue_time,] lead, member)",
                                 file=path, variable=name)
            check_units(ds[name], path, "temperature" if name == "temperature" else "depth_rate")
            da = ds[name].isel(sel)
            if "issue_time" in da.dims:
                days = day_numbers(da["issue_time"].values)
                hit = np.flatnonzero(days == issue_day)
                if not hit.size:
                    raise InputError("issue time not in the forcing forecast", file=path, variable="issue_time",
                                     place=dates([issue_day])[0].strftime("%Y-%m-%d"))
                da = da.isel(issue_time=int(hit[0]))
            da = da.isel(lead=lead_index).transpose("basin", "lead", "member")
            values = np.asarray(da.values, dtype=np.float64)
            bad = ~np.isfinite(values) | ((values < 0) & (name != "temperature"))
            if bad.any():
                b, lead_i, m = (int(i[0]) for i in np.nonzero(bad))
                raise InputError("missing value" if name == "temperature" else "negative or missing value",
                                 file=path, variable=name,
                                 place=f"basin {basins[b]}, lead {lead_i + 1}, member {m}")
            out[name] = values
    return out


def forecast_lock(path, written=()):
    """Hold the lock file of one issue date's forecast (see
    :func:`assim.io.common.output_lock`: a live holder is refused, a stale lock of a dead
    process is reported and replaced, temporaries left beside ``written`` are removed)."""
    return output_lock(path, "a forecast for this date", written)
