"""``restart.nc``: everything needed to continue a run exactly.

Contents (all float64):

- ``states`` (basin, member, state), mm, valid at the end of ``valid_time``;
- ``parameter_<name>`` (basin, member), the members' parameters;
- ``ar1_<forcing>`` (basin, member), the AR(1) log errors of the forcing perturbations on
  ``valid_time``, so the next day's multipliers continue the same series;
- ``collapse_days`` (basin,), consecutive days of collapsed spread so far;
- ``inflation_mean``, ``inflation_sd`` (basin,), the adaptive inflation after the last
  analysis (only when adaptive inflation is on);
- with the fixed-lag smoother (``filter.smoother.window_days`` W > 0), its window:
  ``window`` (basin, member, window_slot, window_column), the discharge (m3 s-1) and
  recorded states (mm) of the last W days, and ``window_day`` (window_slot,), the day each
  slot holds (days since 1970-01-01, -1 empty), so that a continued run equals a one-shot run;
- identity attributes: ``model``, ``members``, ``seed``, ``mode``, the basins (coordinate),
  and digests of the config sections that shape the numbers (``digest_perturbation``,
  ``digest_filter``, ``digest_ensemble``) and of the inputs (``digest_inputs``).

A restart whose model, members, basins, seed, mode (open loop or assimilation) or state names
differ from the run is refused
with :class:`assim.errors.RestartError`; differing perturbation, filter or input digests are
returned as warnings (the continuation is then valid but not identical to an uninterrupted
run).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from assim.conventions import CALENDAR, TIME_UNITS
from assim.errors import RestartError
from assim.io.common import atomic_path, check_set, global_attributes, set_siblings, verify_digests
from assim.io.products import dates, day_numbers


@dataclass(frozen=True)
class Restart:
    """The content of a restart file (see the module docstring)."""

    basins: tuple[str, ...]
    valid_day: int
    state_names: tuple[str, ...]
    states: np.ndarray
    parameters: dict[str, np.ndarray]
    ar1: dict[str, np.ndarray]
    collapse_days: np.ndarray
    identity: dict[str, str | int] = field(default_factory=dict)
    path: str | None = None
    inflation_mean: np.ndarray | None = None
    inflation_sd: np.ndarray | None = None
    window: np.ndarray | None = None  # (basin, member, slot, column), the smoother's window
    window_days: np.ndarray | None = None  # (slot,) int64
    window_columns: tuple[str, ...] = ()

    @property
    def members(self) -> int:
        return self.states.shape[1]


def write_restart(path, restart: Restart, commit=None) -> Path:
    """Write ``restart`` to ``path`` (atomically); returns the path.

    With ``commit`` (an :class:`assim.io.common.FileSet`, the restart and the product written
    with it) the file is replaced when the whole set is, with the checksums of its arrays
    if the set has it among its ``checksummed`` members; otherwise alone, with checksums."""
    b = np.array(restart.basins, dtype=object)
    data = {
        "states": (("basin", "member", "state"), np.asarray(restart.states, dtype=np.float64),
                   {"units": "mm", "long_name": "ensemble model states at the end of valid_time"}),
        "collapse_days": (("basin",), np.asarray(restart.collapse_days, dtype=np.int32),
                          {"long_name": "consecutive days with collapsed spread"}),
    }
    if restart.inflation_mean is not None:
        for name, what in (("inflation_mean", "mean"), ("inflation_sd", "standard deviation")):
            data[name] = (("basin",), np.asarray(getattr(restart, name), dtype=np.float64),
                          {"units": "1", "long_name": f"{what} of the adaptive prior inflation "
                           "(factor on the prior variance) after the last analysis"})
    for name, v in restart.parameters.items():
        data[f"parameter_{name}"] = (("basin", "member"), np.asarray(v, dtype=np.float64),
                                     {"long_name": f"member value of parameter {name}"})
    for name, v in restart.ar1.items():
        data[f"ar1_{name}"] = (("basin", "member"), np.asarray(v, dtype=np.float64),
                               {"long_name": f"AR(1) log error of the {name} perturbation on valid_time"})
    coords = {}
    if restart.window is not None:
        data["window"] = (("basin", "member", "window_slot", "window_column"),
                          np.asarray(restart.window, dtype=np.float64),
                          {"long_name": "the smoother's window: discharge (m3 s-1) and recorded states (mm) "
                                        "of the last days, after the last analysis"})
        data["window_day"] = (("window_slot",), np.asarray(restart.window_days, dtype=np.int32),
                              {"long_name": "day held by each window slot, days since 1970-01-01 (-1: empty)"})
        coords["window_column"] = ("window_column", np.array(restart.window_columns, dtype=object))
    ds = xr.Dataset(
        data,
        coords={
            **coords,
            "basin": ("basin", b, {"cf_role": "timeseries_id"}),
            "member": ("member", np.arange(restart.states.shape[1], dtype=np.int32),
                       {"long_name": "ensemble member"}),
            "state": ("state", np.array(restart.state_names, dtype=object)),
            "valid_time": ((), dates([restart.valid_day])[0],
                           {"long_name": "the states are valid at the end of this day"}),
        },
        attrs=global_attributes("ensemble restart", feature_type=None, **restart.identity),  # numbers stay numbers
    )
    enc = {"valid_time": {"units": TIME_UNITS, "calendar": CALENDAR, "dtype": "i4"}}
    if commit is None:
        from assim.io.common import FileSet

        with FileSet([path], checksummed=[path]) as files:
            return write_restart(path, restart, files)
    with atomic_path(path, commit) as tmp:
        ds.to_netcdf(tmp, encoding=enc, format="NETCDF4")
    return Path(path)


def read_restart(path) -> Restart:
    """Read a restart file.

    Raises
    ------
    RestartError
        if the file is missing, unreadable or lacks a variable, if its arrays no longer match
        the checksums written with them (a damaged file), or if the product written with it
        beside it (``set_members``) comes from another write (a set replaced only in part).
    """
    path = Path(path)
    with _open(path) as ds:
        for v in ("states", "valid_time", "collapse_days"):
            if v not in ds.variables:
                raise RestartError("variable missing from the restart", file=path, variable=v)
        verify_digests(ds, path, RestartError)
        check_set(set_siblings(path, ds.attrs), RestartError)
        return Restart(
            basins=tuple(str(x) for x in ds["basin"].values),
            valid_day=int(day_numbers([ds["valid_time"].values])[0]),
            state_names=tuple(str(x) for x in ds["state"].values),
            states=np.asarray(ds["states"].values, dtype=np.float64),
            parameters={k[len("parameter_"):]: np.asarray(ds[k].values, dtype=np.float64)
                        for k in ds.data_vars if k.startswith("parameter_")},
            ar1={k[len("ar1_"):]: np.asarray(ds[k].values, dtype=np.float64) for k in ds.data_vars if k.startswith("ar1_")},
            collapse_days=np.asarray(ds["collapse_days"].values, dtype=np.int64),
            identity={k: str(v) for k, v in ds.attrs.items()},
            path=str(path),
            inflation_mean=(np.asarray(ds["inflation_mean"].values, dtype=np.float64)
                            if "inflation_mean" in ds.variables else None),
            inflation_sd=(np.asarray(ds["inflation_sd"].values, dtype=np.float64)
                          if "inflation_sd" in ds.variables else None),
            **_window(ds),
        )


def _window(ds: xr.Dataset) -> dict:
    """The smoother's window of a restart, if it carries one."""
    if "window" not in ds.variables:
        return {}
    return {"window": np.asarray(ds["window"].values, dtype=np.float64),
            "window_days": np.asarray(ds["window_day"].values, dtype=np.int64),
            "window_columns": tuple(str(x) for x in ds["window_column"].values)}


def read_restart_header(path) -> tuple[int, dict[str, str], tuple[str, ...]]:
    """The valid day, the identity attributes and the basin ids of a restart, without
    reading its states (for choosing among many restarts).

    Raises
    ------
    RestartError
        if the file is missing or unreadable or has no ``valid_time``.
    """
    path = Path(path)
    with _open(path) as ds:
        if "valid_time" not in ds.variables:
            raise RestartError("variable missing from the restart", file=path, variable="valid_time")
        basins = tuple(str(x) for x in ds["basin"].values) if "basin" in ds.variables else ()
        return (int(day_numbers([ds["valid_time"].values])[0]), {k: str(v) for k, v in ds.attrs.items()},
                basins)


def _open(path: Path) -> xr.Dataset:
    """The restart opened lazily, or RestartError naming the file."""
    if not path.exists():
        raise RestartError("restart file not found", file=path)
    try:
        return xr.open_dataset(path, engine="netcdf4")
    except (OSError, ValueError, RuntimeError) as exc:
        raise RestartError(f"cannot read restart ({exc})", file=path) from None


STRICT = ("model", "members", "seed", "mode")
LOOSE = ("digest_perturbation", "digest_filter", "digest_inputs")


def check_restart(
    restart: Restart,
    *,
    identity: Mapping[str, str],
    basins: Sequence[str],
    state_names: Sequence[str],
) -> list[str]:
    """Refuse a restart that does not fit the run; return warnings for looser differences.

    Parameters
    ----------
    identity : the run's identity attributes (``model``, ``members``, ``seed`` and digests)
    basins : the run's basin ids, in order
    state_names : the model's state names

    Raises
    ------
    RestartError
        naming the file, the variable and the mismatch (model, members, seed, basins or
        state names).
    """
    f = restart.path
    for key in STRICT:
        have, want = restart.identity.get(key), str(identity.get(key))
        if have != want:
            raise RestartError(f"restart has {key} {have!r} but the run has {want!r}", file=f, variable=key)
    if tuple(restart.basins) != tuple(basins):
        extra = sorted(set(restart.basins) - set(basins))
        lacking = sorted(set(basins) - set(restart.basins))
        what = (f"basins {lacking} not in the restart" if lacking else
                f"basins {extra} not in the run" if extra else "basins in a different order")
        raise RestartError(f"restart does not match the run: {what}", file=f, variable="basin")
    if tuple(restart.state_names) != tuple(state_names):
        raise RestartError(f"restart has states {list(restart.state_names)}, the model has {list(state_names)}",
                           file=f, variable="state")
    warnings = []
    for key in LOOSE:
        if key in identity and restart.identity.get(key) != str(identity[key]):
            section = key.removeprefix("digest_")
            warnings.append(f"{f}: the {section} settings differ from the run that wrote this restart; "
                            "the continuation is valid but not identical to an uninterrupted run")
    return warnings
