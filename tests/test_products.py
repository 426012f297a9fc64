"""Tests of the product writers and readers (assim.io.products)."""

from __future__ import annotations

import os
import socket
import subprocess
import sys

import netCDF4
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from assim.errors import InputError, LockError
from assim.io.products import (
    HindcastWriter,
    RunWriter,
    forecast_lock,
    open_product,
    read_forcing_forecast,
    write_forecast,
)

DAYS = np.arange(18262, 18262 + 20)  # 2020-01-01 ...


def _block(rng, n, members=4, nb=2):
    ens = lambda: rng.gamma(2.0, 3.0, (nb, n, members))  # noqa: E731
    return {
        "discharge": ens(), "discharge_analysis": ens(), "production_store": ens(),
        "observed_discharge": rng.gamma(2.0, 3.0, (nb, n)), "innovation": rng.normal(size=(nb, n)),
        "innovation_variance": rng.gamma(2.0, 1.0, (nb, n)), "obs_status": rng.integers(0, 4, (nb, n)).astype(np.int8),
        "spread_before": rng.gamma(2.0, 1.0, (nb, n)), "spread_after": rng.gamma(2.0, 1.0, (nb, n)),
        "clipped_water": np.zeros((nb, n)),
    }


def _write(path, blocks, **kw):
    args = dict(basins=["alder", "birch"], days=DAYS, members=4, mode="assimilate",
                state_names=("production_store",))
    args.update(kw)
    with RunWriter(path, **args) as w:
        start = 0
        for b in blocks:
            w.write_block(start, b)
            start += b["discharge"].shape[1]
        w.set_attributes(warnings="none")


def test_run_writer_streams_blocks_into_one_cf_file(tmp_path):
    rng = np.random.default_rng(0)
    blocks = [_block(rng, 7), _block(rng, 13)]
    _write(tmp_path / "analysis.nc", blocks)
    with xr.open_dataset(tmp_path / "analysis.nc") as raw:  # on disk, time last (CF-1.8 section 2.4)
        assert raw["discharge"].dims == raw["discharge_background"].dims == ("basin", "member", "time")
        assert list(raw["basin"].values) == ["alder", "birch"]  # plain xarray: string index
        assert raw["discharge"].attrs["cell_methods"] == "time: mean"
        t0 = raw["time"].values[0]
        assert list(raw["time_bnds"].values[0]) == [t0, t0 + np.timedelta64(1, "D")]
        assert float(raw.sel(basin="birch")["discharge"].isel(member=0, time=0)) == np.float32(
            blocks[0]["discharge_analysis"][1, 0, 0])
    with open_product(tmp_path / "analysis.nc") as ds:  # read back in the same order
        # the engine's analysis is the file's `discharge`, its background `discharge_background`
        want = np.concatenate([b["discharge_analysis"] for b in blocks], axis=1).astype(np.float32)
        np.testing.assert_array_equal(ds["discharge"].transpose("basin", "time", "member").values, want)
        background = np.concatenate([b["discharge"] for b in blocks], axis=1).astype(np.float32)
        np.testing.assert_array_equal(ds["discharge_background"].values, background.transpose(0, 2, 1))
        assert ds["discharge"].dims == ("basin", "member", "time")
        assert ds["discharge"].encoding["zlib"] and ds["discharge"].dtype == np.float32
        assert ds["observed_discharge"].dtype == np.float64
        assert pd.Timestamp(ds["time"].values[0]) == pd.Timestamp("2020-01-01")
        assert ds["obs_status"].attrs["flag_values"].tolist() == [0, 1, 2, 3]
        assert ds.attrs["warnings"] == "none" and "caution" in ds.attrs
        assert list(ds["basin"].values) == ["alder", "birch"]
    assert not list(tmp_path.glob("*.part"))


def test_run_writer_passes_the_cf_checker(tmp_path):
    """compliance-checker (reference library), CF-1.8, normal criteria: no failure at high
    or medium priority (time is the last dimension on disk, section 2.4)."""
    from _cf import cf_failures

    _write(tmp_path / "analysis.nc", [_block(np.random.default_rng(1), 20)])
    assert cf_failures(tmp_path / "analysis.nc") == ([], [])


def test_forecast_and_hindcast_pass_the_cf_checker(tmp_path):
    """compliance-checker (reference library), CF-1.8, normal criteria: no failure at high
    or medium priority."""
    from _cf import cf_failures

    rng = np.random.default_rng(7)
    write_forecast(tmp_path / "forecast-2020-01-05.nc", basins=["a", "b"], issue_day=int(DAYS[4]),
                   discharge=rng.gamma(2.0, 3.0, (2, 4, 8)), quantiles=[0.1, 0.5],
                   thresholds={"minor": np.array([5.0, np.nan])}, analysis="performed")
    with HindcastWriter(tmp_path / "hindcast.nc", basins=["a", "b"], issue_days=DAYS[::5], leads=3, members=4) as w:
        for exp in ("openloop", "assimilation"):
            w.write_block(exp, 0, rng.gamma(2.0, 1.0, (2, 4, 3, 4)))
    for name in ("forecast-2020-01-05.nc", "hindcast.nc"):
        assert cf_failures(tmp_path / name) == ([], []), name
        with xr.open_dataset(tmp_path / name) as ds:  # plain xarray selects by label
            ds.sel(basin="b")
            ds.sel(threshold="minor") if "threshold" in ds.dims else ds.sel(experiment="openloop")


def test_interrupted_write_keeps_the_previous_file(tmp_path):
    """An exception inside the writer leaves the earlier complete file and no partial file."""
    rng = np.random.default_rng(2)
    _write(tmp_path / "analysis.nc", [_block(rng, 20)])
    before = xr.load_dataset(tmp_path / "analysis.nc")["discharge"].values
    with pytest.raises(KeyboardInterrupt):
        with RunWriter(tmp_path / "analysis.nc", basins=["alder", "birch"], days=DAYS, members=4,
                       mode="assimilate") as w:
            w.write_block(0, _block(rng, 5))
            raise KeyboardInterrupt
    np.testing.assert_array_equal(xr.load_dataset(tmp_path / "analysis.nc")["discharge"].values, before)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["analysis.nc"]


def test_quantile_and_open_loop_layout(tmp_path):
    rng = np.random.default_rng(3)
    q = np.sort(rng.gamma(2.0, 3.0, (2, 20, 3)), axis=-1)
    with RunWriter(tmp_path / "openloop.nc", basins=["a", "b"], days=DAYS, members=4, mode="openloop",
                   quantiles=(0.1, 0.5, 0.9), float32=False) as w:
        w.write_block(0, {"discharge_quantile": q})
    with open_product(tmp_path / "openloop.nc") as ds:
        assert ds["discharge_quantile"].dims == ("basin", "quantile", "time")
        assert ds["quantile"].values.tolist() == [0.1, 0.5, 0.9]
        assert "discharge" not in ds and "member" not in ds.dims and "obs_status" not in ds
        np.testing.assert_array_equal(ds["discharge_quantile"].values, q.transpose(0, 2, 1))


def test_hindcast_writer_layout(tmp_path):
    rng = np.random.default_rng(4)
    issues = DAYS[::5]
    with HindcastWriter(tmp_path / "hindcast.nc", basins=["a", "b"], issue_days=issues, leads=3, members=4) as w:
        for exp in ("openloop", "assimilation"):
            w.write_block(exp, 0, rng.gamma(2.0, 1.0, (2, 2, 3, 4)))
            w.write_block(exp, 2, rng.gamma(2.0, 1.0, (2, 2, 3, 4)))
    written = {}
    with HindcastWriter(tmp_path / "hindcast2.nc", basins=["a", "b"], issue_days=issues, leads=3, members=4) as w:
        for exp in ("openloop", "assimilation"):
            written[exp] = rng.gamma(2.0, 1.0, (2, 4, 3, 4))
            w.write_block(exp, 0, written[exp])
    with open_product(tmp_path / "hindcast2.nc") as ds:
        np.testing.assert_array_equal(
            ds["discharge"].sel(experiment="assimilation").transpose("basin", "issue_time", "lead", "member").values,
            written["assimilation"].astype(np.float32))
    with open_product(tmp_path / "hindcast.nc") as ds:
        assert ds["discharge"].dims == ("experiment", "basin", "lead", "member", "issue_time")
        assert ds["experiment"].values.tolist() == ["openloop", "assimilation"]
        assert ds["lead"].values.tolist() == [1, 2, 3]
        assert np.isfinite(ds["discharge"].values).all()
        assert "caution" in ds.attrs


def test_write_forecast(tmp_path):
    q = np.random.default_rng(5).gamma(2.0, 3.0, (2, 4, 16))
    ds = write_forecast(tmp_path / "forecast-2020-01-05.nc", basins=["a", "b"], issue_day=int(DAYS[4]),
                        discharge=q, quantiles=[0.5], thresholds={"minor": np.array([5.0, 6.0])},
                        analysis="performed: test")
    back = xr.load_dataset(tmp_path / "forecast-2020-01-05.nc")
    assert back.attrs["issue_date"] == "2020-01-05" and back.attrs["analysis"] == "performed: test"
    assert pd.Timestamp(back["valid_time"].values[0]) == pd.Timestamp("2020-01-06")
    np.testing.assert_allclose(back["discharge"].values, q.astype(np.float32))
    assert ds.attrs["product_path"].endswith("forecast-2020-01-05.nc")


def _forcing_file(path, values=None, *, units="mm d-1", lead=None, edit=None):
    rng = np.random.default_rng(6)
    pr = rng.gamma(1.0, 3.0, (2, 2, 5, 3)) if values is None else values
    dims = ("basin", "issue_time", "lead", "member")
    ds = xr.Dataset(
        {"precipitation": (dims, pr, {"units": units}), "pet": (dims, np.full(pr.shape, 2.0), {"units": "mm/day"})},
        coords={"basin": ["a", "b"], "issue_time": pd.to_datetime(["2020-01-05", "2020-01-06"]),
                "lead": np.arange(1, 6) if lead is None else lead, "member": np.arange(3)},
    )
    (ds if edit is None else edit(ds)).to_netcdf(path)
    return pr


def test_read_forcing_forecast(tmp_path):
    pr = _forcing_file(tmp_path / "ff.nc")
    got = read_forcing_forecast(tmp_path / "ff.nc", ["b", "a"], int(DAYS[5]), 4)
    np.testing.assert_array_equal(got["precipitation"], pr[::-1, 1, :4])
    with pytest.raises(InputError, match="basin.*zz"):
        read_forcing_forecast(tmp_path / "ff.nc", ["zz"], int(DAYS[5]), 4)
    with pytest.raises(InputError, match="issue_time.*2020-01-09"):
        read_forcing_forecast(tmp_path / "ff.nc", ["a"], int(DAYS[8]), 4)
    bad = np.ones((2, 2, 5, 3))
    bad[0, 0, 2, 1] = -1.0
    _forcing_file(tmp_path / "bad.nc", bad)
    with pytest.raises(InputError, match="basin a, lead 3, member 1"):
        read_forcing_forecast(tmp_path / "bad.nc", ["a"], int(DAYS[4]), 5)


def test_forcing_forecast_leads_as_time_spans_and_in_any_order(tmp_path):
    """CF time spans in days decode to timedelta64 and are taken as whole-day leads; the
    leads may be stored in any order (CF conventions 1.8, section 4.4: time coordinates with
    units)."""
    pr = _forcing_file(tmp_path / "td.nc", lead=pd.to_timedelta(np.arange(5, 0, -1), unit="D"))
    got = read_forcing_forecast(tmp_path / "td.nc", ["a"], int(DAYS[4]), 4)
    np.testing.assert_array_equal(got["precipitation"][0], pr[0, 0, ::-1][:4])


@pytest.mark.parametrize("kwargs, match", [
    ({"units": "kg m-2 s-1"}, "precipitation.*units 'kg m-2 s-1', expected mm d-1"),
    ({"units": "in d-1"}, "precipitation.*units 'in d-1'"),
    ({"edit": lambda ds: ds.assign(precipitation=ds["precipitation"].drop_attrs())}, "precipitation.*no units"),
    ({"lead": np.arange(5)}, "lead.*lead 5"),
    ({"edit": lambda ds: ds.isel(member=0, drop=True)}, "precipitation.*dimensions"),
    ({"edit": lambda ds: ds.drop_vars("pet")}, "pet.*missing"),
])
def test_forcing_forecast_refused_with_file_and_variable(tmp_path, kwargs, match):
    """A flux in kg m-2 s-1 (86,400 times mm d-1), inches, no units, leads counted from 0, no
    member dimension, a missing variable: each refused naming the file and the variable.
    Common practice, no published source."""
    _forcing_file(tmp_path / "ff.nc", **kwargs)
    with pytest.raises(InputError, match=match) as err:
        read_forcing_forecast(tmp_path / "ff.nc", ["a"], int(DAYS[4]), 5)
    assert "ff.nc" in str(err.value)
    with pytest.raises(InputError, match="not found"):
        read_forcing_forecast(tmp_path / "absent.nc", ["a"], int(DAYS[4]), 5)


def test_forecast_lock(tmp_path):
    lock = tmp_path / ".forecast-2020-01-05.lock"
    with forecast_lock(lock):
        assert lock.read_text().split()[0] == str(os.getpid())
        with pytest.raises(LockError, match="in progress"):
            with forecast_lock(lock):
                pass
    assert not lock.exists()
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    lock.write_text(f"{dead.pid} {socket.gethostname()}\n")
    with pytest.warns(RuntimeWarning, match="stale lock"):
        with forecast_lock(lock):
            assert lock.read_text().startswith(str(os.getpid()))
    lock.write_text("123 another-host\n")
    with pytest.raises(LockError, match="another-host"):
        with forecast_lock(lock):
            pass


def test_innovation_statistics_and_inflation_written_with_cf_attributes(tmp_path):
    """analysis.nc holds the daily inflation and Desroziers series and the per-basin
    innovation statistics computed from every written day (equal to
    assim.filters.consistency.innovation_statistics of the written series), each with a
    long name; compliance-checker (reference library) reports no CF failure."""
    from _cf import cf_failures

    from assim.filters.consistency import STATISTICS, innovation_statistics

    rng = np.random.default_rng(4)
    blocks = [_block(rng, 8), _block(rng, 12)]
    for b in blocks:
        n = b["discharge"].shape[1]
        b["innovation_analysis"] = 0.3 * b["innovation"]
        b["obs_error_variance"] = rng.gamma(2.0, 0.5, (2, n))
        b["inflation_mean"] = rng.uniform(1, 2, (2, n))
        b["inflation_sd"] = rng.uniform(0.1, 0.5, (2, n))
    path = tmp_path / "analysis.nc"
    with RunWriter(path, basins=["alder", "birch"], days=DAYS, members=4, mode="assimilate",
                   adaptive_inflation=True) as w:
        w.write_block(0, blocks[0])
        w.write_block(8, blocks[1])
        w.write_innovation_statistics()
    cat = {k: np.concatenate([b[k] for b in blocks], axis=1)
           for k in ("innovation", "innovation_variance", "innovation_analysis", "obs_error_variance")}
    want = innovation_statistics(cat["innovation"], cat["innovation_variance"], cat["innovation_analysis"],
                                 cat["obs_error_variance"])
    with open_product(path) as ds:
        for k in STATISTICS:
            np.testing.assert_allclose(ds[k].values, want[k], rtol=1e-12, err_msg=k)
            assert ds[k].dims == ("basin",) and ds[k].attrs["long_name"]
        np.testing.assert_array_equal(ds["inflation_mean"].values,
                                      np.concatenate([b["inflation_mean"] for b in blocks], axis=1))
        assert "Anderson 2009" in ds["inflation_mean"].attrs["long_name"]
        assert ds["innovation_analysis"].attrs["long_name"]
    assert cf_failures(path) == ([], [])


def test_forecast_values_are_day_means_bounded_by_their_lead(tmp_path):
    """CF-1.8 section 7.3 (cell methods) and 7.1 (cell boundaries): a value at lead L is the
    mean over the L-th day after the issue, so forecast and hindcast discharge say
    ``lead: mean`` with ``lead_bnds`` = [L - 1, L] days; the assimilated days of a forecast are
    day means bounded by [d, d + 1)."""
    rng = np.random.default_rng(3)
    day = int(DAYS[4])
    write_forecast(tmp_path / "f.nc", basins=["a"], issue_day=day, discharge=rng.gamma(2.0, 3.0, (1, 3, 4)),
                   quantiles=[0.5], thresholds={"minor": np.array([5.0])}, analysis="performed",
                   assimilated=(np.array([day - 1, day]), rng.gamma(2.0, 1.0, (1, 2, 4))))
    with HindcastWriter(tmp_path / "h.nc", basins=["a"], issue_days=DAYS[:2], leads=3, members=4) as w:
        w.write_block("openloop", 0, rng.gamma(2.0, 1.0, (1, 2, 3, 4)))
    for name in ("f.nc", "h.nc"):
        with netCDF4.Dataset(tmp_path / name) as nc:
            assert nc["discharge"].cell_methods == "lead: mean"
            assert nc["lead"].bounds == "lead_bnds"
            np.testing.assert_array_equal(nc["lead_bnds"][:], [[0, 1], [1, 2], [2, 3]])
    with netCDF4.Dataset(tmp_path / "f.nc") as nc:
        assert nc["discharge_analysis"].cell_methods == "time: mean"
        np.testing.assert_array_equal(np.diff(nc["time_bnds"][:], axis=1), 1)
        np.testing.assert_array_equal(nc["time_bnds"][:, 0], nc["time"][:])
