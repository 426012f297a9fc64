"""Runs, restarts, hindcasts and operational forecasts through files (assim.pipeline, CLI)."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import warnings

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml
from _scenario import TWIN_IDS as IDS
from _scenario import twin_arrays, write_twin_layer

from assim import models, pipeline
from assim.cli import main
from assim.config import load_config
from assim.errors import LockError, RestartError
from assim.io import prepared as prep_io
from assim.io.common import _start_time

START, END = "2001-01-01", "2003-12-31"


@pytest.fixture(scope="module")
def prepared(tmp_path_factory):
    """A prepared layer of two invented basins, three years, built from GR4J in the test."""
    arrays = twin_arrays(START, END, seed=8, x4=[1.5, 2.2])
    arrays["obs"][1, 500] = np.nan
    arrays["flags"][1, 500] = prep_io.QC_FLAGS["spike"] | prep_io.QC_FLAGS["insufficient_coverage"]
    return write_twin_layer(tmp_path_factory.mktemp("prepared"), arrays)


def _cfg(prepared, results, **over):
    sections = dict(
        data={"prepared": str(prepared)},
        results=str(results),
        period={"start": "2002-01-01", "end": "2003-06-30", "spinup_days": 60},
        ensemble={"members": 8, "scheduler": "synchronous", "time_block_days": 50, "progress": False},
        hindcast={"every_days": 10, "leads": 5},
        forecast={"leads": 5},
    )
    for k, v in over.items():
        sections[k] = {**sections.get(k, {}), **v} if isinstance(v, dict) else v
    return load_config(None, **sections)


@pytest.fixture(scope="module")
def runs(prepared, tmp_path_factory):
    results = tmp_path_factory.mktemp("results")
    cfg = _cfg(prepared, results)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ol = pipeline.run(cfg, mode="openloop").load()
        da = pipeline.run(cfg, mode="assimilate").load()
        hc = pipeline.hindcast(cfg).load()
    return cfg, ol, da, hc


def test_run_products_follow_the_contract(runs):
    """Layout of openloop.nc and analysis.nc (products contract): dims, CF time, caution,
    diagnostics and QC status flags."""
    cfg, ol, da, _ = runs
    for ds in (ol, da):
        assert ds["discharge"].dims == ("basin", "member", "time")  # one order: on disk, returned, README
        assert ds["discharge"].attrs["standard_name"] == "water_volume_transport_in_river_channel"
        assert ds["discharge"].dtype == np.float32
        assert ds.attrs["Conventions"] == "CF-1.8" and "official flood warnings" in ds.attrs["caution"]
        assert list(ds["basin"].values) == IDS
        assert ds["basin"].attrs["cf_role"] == "timeseries_id"
        assert pd.Timestamp(ds["time"].values[0]) == pd.Timestamp("2002-03-02")  # 60 spin-up days
        assert pd.Timestamp(ds["time"].values[-1]) == pd.Timestamp("2003-06-30")
        assert list(ds["member"].values) == list(range(8))
        assert {"production_store", "routing_store"} <= set(ds.data_vars)
        # outputs.states writes the updated states (every state by default) but the internal
        # unit-hydrograph slots, which only outputs.all_states writes
        gr4j = models.get("gr4j")
        assert {n for n in gr4j.state_names if n in ds} == {"production_store", "routing_store"}
    assert "discharge_background" in da and "discharge_background" not in ol
    assert da["discharge"].dims == ol["discharge"].dims == ("basin", "member", "time")  # as on disk
    for v in ("observed_discharge", "innovation", "innovation_variance", "obs_status", "spread_before",
              "spread_after", "clipped_water"):
        assert da[v].dims == ("basin", "time"), v
    status = da["obs_status"].values
    obs = da["observed_discharge"].values
    assert da["obs_status"].attrs["flag_meanings"] == "used missing gated rejected"
    assert np.all(np.isnan(obs[status == 1]))
    assert np.all(np.isfinite(obs[status == 0]))
    day = int(np.flatnonzero(da["time"].values == np.datetime64("2002-05-16"))[0])  # 2001-01-01 + 500 d
    assert status[1, day] == 3
    with xr.open_dataset(cfg.results / "openloop.nc", decode_times=False) as raw:
        assert raw["time"].attrs["units"].startswith("days since 1970-01-01")
        assert raw["time"].attrs["calendar"] == "standard"


def test_assimilation_run_is_closer_to_the_readings(runs):
    """Common practice, no published source: the analysis ensemble mean is closer to the
    readings it used than the open loop."""
    _, ol, da, _ = runs
    obs = da["observed_discharge"].values
    ok = np.isfinite(obs)
    err_ol = np.abs(ol["discharge"].mean("member").values - obs)[ok].mean()
    err_an = np.abs(da["discharge"].mean("member").values - obs)[ok].mean()
    assert err_an < 0.5 * err_ol


def test_hindcast_layout_and_open_loop_consistency(runs):
    """hindcast.nc layout (products contract), and the open-loop experiment with observed
    forcing equals the open-loop run on the valid days."""
    _, ol, _, hc = runs
    assert hc["discharge"].dims == ("experiment", "basin", "lead", "member", "issue_time")
    assert list(hc["experiment"].values) == ["openloop", "assimilation"]
    assert list(hc["lead"].values) == [1, 2, 3, 4, 5]
    assert pd.Timestamp(hc["issue_time"].values[0]) == pd.Timestamp("2002-03-02")
    assert "caution" in hc.attrs
    issue = hc["issue_time"].values[3]
    for lead in (1, 5):
        valid = issue + np.timedelta64(lead, "D")
        np.testing.assert_array_equal(hc["discharge"].sel(experiment="openloop", lead=lead, issue_time=issue).values,
                                      ol["discharge"].sel(time=valid).values)
    assert not np.array_equal(hc["discharge"].sel(experiment="assimilation").values,
                              hc["discharge"].sel(experiment="openloop").values)


@pytest.mark.parametrize("until", ["2002-02-15", "2002-04-10", "2002-05-01"])
def test_restarted_run_equals_the_whole_run(prepared, tmp_path, runs, until):
    """``run --until D`` then ``run --restart-from restart.nc`` gives, joined, the files of the
    uninterrupted run (split in the spin-up, inside and at the edge of a time block)."""
    whole = runs[2]
    cfg = _cfg(prepared, tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        first = pipeline.run(cfg, mode="assimilate", until=until).load()
        shutil.copy(tmp_path / "restart.nc", tmp_path / "restart-first.nc")
        second = pipeline.run(cfg, mode="assimilate", restart_from=tmp_path / "restart-first.nc").load()
    # the second run keeps the first run's days in front: the file equals the whole run
    assert second.sizes["time"] == whole.sizes["time"] > first.sizes["time"]
    for v in ("discharge", "discharge_background", "routing_store", "innovation", "obs_status", "spread_after"):
        np.testing.assert_array_equal(second[v].values, whole[v].values, err_msg=v)
    np.testing.assert_array_equal(second["time"].values, whole["time"].values)


def test_restart_without_the_earlier_product_writes_the_continuation(prepared, tmp_path, runs):
    whole = runs[2]
    cfg = _cfg(prepared, tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        first = pipeline.run(cfg, mode="assimilate", until="2002-04-10").load()
        (tmp_path / "analysis.nc").unlink()
        second = pipeline.run(cfg, mode="assimilate", restart_from=tmp_path / "restart.nc").load()
    joined = xr.concat([first, second], dim="time")
    for v in ("discharge", "discharge_background", "routing_store", "innovation", "obs_status"):
        np.testing.assert_array_equal(joined[v].values, whole[v].values, err_msg=v)


def test_mismatched_restart_is_refused_by_run_and_cli(prepared, tmp_path, runs, capsys):
    cfg = runs[0]
    other = _cfg(prepared, tmp_path, ensemble={"members": 6})
    with pytest.raises(RestartError, match="members"):
        pipeline.run(other, mode="assimilate", restart_from=cfg.results / "restart.nc")
    conf = tmp_path / "config.yaml"
    conf.write_text(yaml.safe_dump(dict(other)))
    code = main(["run", "--config", str(conf), "--restart-from", str(cfg.results / "restart.nc")])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and "restart.nc" in err and "members" in err


def test_a_health_warning_is_printed_once_and_kept_in_the_product(prepared, tmp_path):
    """The engine returns its warnings; the CLI prints each once (it printed every one twice)
    and the product keeps it. A spread ratio no ensemble can reach makes both basins'
    collapse warnings fire. Common practice, no published source."""
    cfg = _cfg(prepared, tmp_path / "results", period={"end": "2002-06-30"},
               filter={"collapse_ratio": 1e6, "collapse_days": 5})
    conf = tmp_path / "config.yaml"
    conf.write_text(yaml.safe_dump(dict(cfg)))
    out = subprocess.run([sys.executable, "-m", "assim", "run", "--config", str(conf), "--mode", "assimilate"],
                         capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    lines = out.stderr.splitlines()
    for b in IDS:
        hits = [ln for ln in lines if f"basin {b}: ensemble collapse" in ln]
        assert len(hits) == 1, out.stderr
        assert hits[0].startswith("assim run: warning: ")
    with xr.open_dataset(cfg.results / "analysis.nc") as ds:
        assert all(f"basin {b}: ensemble collapse" in ds.attrs["warnings"] for b in IDS)


# ---------------------------------------------------------------- operational forecasts


@pytest.fixture()
def operational(prepared, tmp_path):
    cfg = _cfg(prepared, tmp_path, period={"end": "2003-06-20"})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        pipeline.run(cfg, mode="assimilate")
    return cfg


def test_forecast_products_and_rerun(operational):
    """forecast-D.nc layout (products contract); exceedance probability is the fraction of
    members above each threshold; the forecast restart feeds the next day's forecast; a
    rerun of a finished date gives the same numbers."""
    cfg = operational
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ds = pipeline.forecast(cfg, "2003-06-25").load()
    assert ds.attrs["product_path"].endswith("forecast-2003-06-25.nc")
    assert (cfg.results / "forecasts" / "restart-2003-06-25.nc").exists()
    assert ds.attrs["analysis"].startswith("performed")
    assert ds.attrs["issue_date"] == "2003-06-25" and "caution" in ds.attrs
    assert ds["discharge"].dims == ("basin", "lead", "member")
    assert ds["exceedance_probability"].dims == ("basin", "lead", "threshold")
    assert list(ds["threshold"].values) == ["minor", "major"]
    assert pd.Timestamp(ds["valid_time"].values[0]) == pd.Timestamp("2003-06-26")
    q = ds["discharge"].values
    thr = ds["thresholds"].values
    np.testing.assert_allclose(ds["exceedance_probability"].values[..., 0], (q > thr[:, None, None, 0]).mean(-1))
    assert np.isnan(ds["exceedance_probability"].values[1, :, 1]).all()
    np.testing.assert_allclose(ds["discharge_quantile"].sel(quantile=0.5).values, np.median(q, axis=-1), rtol=1e-6)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        again = pipeline.forecast(cfg, "2003-06-25").load()
        nxt = pipeline.forecast(cfg, "2003-06-26").load()
    np.testing.assert_array_equal(again["discharge"].values, q)
    assert "restart-2003-06-25.nc" in nxt.attrs["restart"]


def test_forecast_without_gauge_readings_says_so(prepared, tmp_path):
    """A day without readings: the forecast still runs, without an analysis, and says so."""
    cfg = _cfg(prepared, tmp_path, period={"end": "2003-06-20"})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        pipeline.run(cfg, mode="assimilate")
        ds = pipeline.forecast(cfg, "2003-06-20")
    assert ds.attrs["analysis"].startswith("not performed")
    # readings blanked after the restart: the CLI prints it too
    folder = tmp_path / "prep2"
    shutil.copytree(prepared, folder)
    obs = xr.load_dataset(folder / "observations.nc")
    t = obs["time"].values
    obs["discharge"] = obs["discharge"].where(t <= np.datetime64("2003-06-20"))
    obs.to_netcdf(folder / "observations.nc")
    conf = tmp_path / "config.yaml"
    conf.write_text(yaml.safe_dump({**dict(cfg), "data": {**cfg["data"], "prepared": str(folder)}}))
    out = subprocess.run([sys.executable, "-m", "assim", "forecast", "--config", str(conf), "--issue-date",
                          "2003-06-23"], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert "analysis not performed: no gauge reading since the last restart" in out.stdout
    assert "CAUTION" in out.stdout


def test_forecast_lock_held_and_stale(operational):
    """A lock held by a live process is refused; a stale lock (dead PID) is reported and
    replaced."""
    cfg = operational
    lock = cfg.results / "forecasts" / ".forecast-2003-06-22.lock"
    lock.parent.mkdir(parents=True, exist_ok=True)
    import socket

    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        # a lock records the holder's start time, so a reused PID is not taken for the run
        lock.write_text(f"{sleeper.pid} {socket.gethostname()} {_start_time(sleeper.pid)}\n")
        with pytest.raises(LockError, match=str(sleeper.pid)):
            pipeline.forecast(cfg, "2003-06-22")
    finally:
        sleeper.kill()
        sleeper.wait()
    assert lock.exists()
    with pytest.warns(RuntimeWarning, match="stale lock"):
        ds = pipeline.forecast(cfg, "2003-06-22")
    assert ds.attrs["analysis"].startswith("performed")
    assert not lock.exists()
    assert os.path.exists(ds.attrs["product_path"])


@pytest.mark.parametrize("call, product", [
    (lambda cfg: pipeline.run(cfg, mode="openloop"), "openloop.nc"),
    (lambda cfg: pipeline.run(cfg, mode="assimilate"), "analysis.nc"),
    (pipeline.hindcast, "hindcast.nc"),
])
def test_run_and_hindcast_hold_their_product_lock(prepared, tmp_path, call, product):
    """The lock is taken by the pipeline itself, not only by the command line: a caller of
    the Python API is refused while a live process writes the product, and nothing of the
    product is written; the temporaries a killed run left are removed once the lock is held.
    Common practice, no published source."""
    import socket

    cfg = _cfg(prepared, tmp_path / "results")
    (tmp_path / "results").mkdir()
    lock = tmp_path / "results" / f".{product}.lock"
    leftover = tmp_path / "results" / f".{product}.x1y2.part"
    leftover.write_bytes(b"half a file")
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        lock.write_text(f"{sleeper.pid} {socket.gethostname()} {_start_time(sleeper.pid)}\n")
        with pytest.raises(LockError, match=f"writing {product}.*pid {sleeper.pid}"):
            call(cfg)
        assert not (tmp_path / "results" / product).exists() and leftover.exists()
    finally:
        sleeper.kill()
        sleeper.wait()
    lock.unlink()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        call(cfg).close()
    assert (tmp_path / "results" / product).exists()
    assert not leftover.exists() and not lock.exists()


def test_forecast_from_a_forcing_file_uses_its_weather(prepared, tmp_path):
    """forecast.forcing = file: the members take the file's weather (member m the file's
    member m mod n). GR4J's discharge never falls when only the rain rises (production and
    routing stores, unit hydrographs: every flux is non-decreasing in P; Perrin et al. 2003,
    appendix), so 40 mm d-1 of forecast rain gives at least the discharge of a dry forecast,
    more by the last lead, from the same analysed states."""
    issue = "2003-06-22"
    out = {}
    for rain in (0.0, 40.0):
        dims = ("basin", "issue_time", "lead", "member")
        shape = (2, 1, 5, 3)
        xr.Dataset(
            {"precipitation": (dims, np.full(shape, rain), {"units": "mm d-1"}),
             "pet": (dims, np.full(shape, 3.0), {"units": "mm d-1"})},
            coords={"basin": IDS[::-1], "issue_time": pd.to_datetime([issue]), "lead": np.arange(1, 6),
                    "member": np.arange(3)},
        ).to_netcdf(tmp_path / f"ff-{rain:g}.nc")
        cfg = _cfg(prepared, tmp_path / f"r{rain:g}", period={"end": "2003-06-20"},
                   forecast={"forcing": "file", "forcing_file": str(tmp_path / f"ff-{rain:g}.nc")})
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            pipeline.run(cfg, mode="assimilate").close()
            out[rain] = pipeline.forecast(cfg, issue).load()
    dry, wet = out[0.0]["discharge"].values, out[40.0]["discharge"].values
    assert out[0.0].attrs["forcing"] == "file"
    assert (wet >= dry).all() and (wet[:, -1] > dry[:, -1]).all()


def test_forecast_writes_its_bulletin_and_counts_weather_traces(operational, capsys):
    """The forecast writes its bulletin beside it (page, PNG per basin, alert files). With
    climatology forcing from a three-year record, member m takes the year Y-1-(m mod n)
    among the n = 2 other years (the rule documented in config.schema.yaml, counted here by
    hand), so 8 members share 2 traces: the product, the bulletin and the CLI say so."""
    import json

    from assim import paths

    cfg = operational
    conf = cfg.results / "config.yaml"
    conf.write_text(yaml.safe_dump(dict(cfg)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        code = main(["forecast", "--config", str(conf), "--issue-date", "2003-06-22"])
    out = capsys.readouterr().out
    assert code == 0
    with xr.open_dataset(paths.forecast(cfg, "2003-06-22")) as ds:
        assert ds.attrs["forcing_traces"] == "2"
        assert "Only 2 distinct past years" in ds.attrs["forcing_note"]
        assert ds["discharge_analysis"].sizes["time"] == 2  # the two days since the restart
    assert "note: Only 2 distinct past years" in out and "bulletin written:" in out
    page = paths.bulletin(cfg, "2003-06-22").read_text()
    assert "Only 2 distinct past years" in page and "restart.nc" in page
    # each gauge's latest reading is the latest the forecast could use (none after the issue)
    import re

    ages = re.findall(r"(\d{4}-\d{2}-\d{2}) \((\d+) days? (before|after) the issue\)", page)
    assert ("2003-12-31", "192", "after") in ages  # the weather on record
    gauges = [a for a in ages if a[0] != "2003-12-31"]
    assert len(gauges) == 2 and all(a[2] == "before" and a[0] <= "2003-06-22" for a in gauges)
    assert len(list(paths.bulletin_figures(cfg, "2003-06-22").glob("*.png"))) == 2
    doc = json.loads(paths.alerts(cfg, "2003-06-22", "json").read_text())
    assert doc["issue_date"] == "2003-06-22" and doc["raised"] == len(doc["alerts"])


# ---------------------------------------------------------------- a snow basin through the CLI


@pytest.fixture(scope="module")
def snow_study(tmp_path_factory):
    """The invented cold basin of tests/_scenario.py (a gr4j+snow truth) beside velmorra
    (rain only), 2012-2014, prepared once; configs written per test."""
    from _scenario import make_cold_raw

    root = tmp_path_factory.mktemp("snow")
    raw, truth = make_cold_raw(root / "raw", "2012-01-01", "2014-12-31", with_rain_basin=True)
    return root, raw, truth


def _snow_config(root, raw, name, **over):
    from _scenario import write_config

    folder = root / name
    folder.mkdir(exist_ok=True)
    defaults = {"data": {"raw": str(raw), "prepared": str(folder / "prepared")}, "results": str(folder / "results"),
                "period": {"start": "2012-01-01", "end": "2014-12-31", "spinup_days": 365},
                "ensemble": {"members": 16, "scheduler": "synchronous", "progress": False, "kernel": "numpy"},
                "perturbation": {"temperature_sd_c": 1.0}, "outputs": {"states": True},
                "hindcast": {"every_days": 5, "leads": 3}, "forecast": {"leads": 3}}
    return write_config(folder, defaults, **over), folder


def test_snow_basin_runs_end_to_end_through_the_cli(snow_study, capsys):
    """prep, open loop, assimilation, hindcast and forecast of a run holding a snow basin:
    the snowpack (mm) is written and stays >= 0, builds in the cold basin's winters and is 0
    in the rain-only basin; the restart carries it and the temperature error; lead-1 CRPS of
    the assimilation hindcast against the truth (scoringrules.crps_ensemble, reference
    library) is below the open loop's (twin experiment; common practice)."""
    import scoringrules as sr
    from _scenario import COLD

    root, raw, truth = snow_study
    cfg, folder = _snow_config(root, raw, "e2e", forecast={"leads": 3, "forcing": "climatology"})
    for cmd in (["prep"], ["run", "--mode", "openloop"], ["run", "--mode", "assimilate", "--until", "2014-12-20"],
                ["hindcast"], ["forecast", "--issue-date", "2014-12-28"]):
        assert main([*cmd, "--config", str(cfg)]) == 0, cmd
    capsys.readouterr()
    res = folder / "results"
    with xr.open_dataset(res / "analysis.nc") as da:
        assert da.attrs["model"] == "gr4j+snow" and da["snowpack"].attrs["units"] == "mm"
        pack = da["snowpack"].load()
    assert float(pack.min()) >= 0.0
    assert float(pack.sel(basin=COLD["id"]).max()) > 20.0
    assert float(abs(pack.sel(basin="velmorra")).max()) == 0.0
    with xr.open_dataset(res / "restart.nc") as r:
        assert "ar1_temperature" in r and "snowpack" in [str(s) for s in r["state"].values]
    with xr.open_dataset(res / "forecasts" / "forecast-2014-12-28.nc") as fc:
        assert fc.attrs["analysis"].startswith("performed") and fc.attrs["caution"]
        assert fc["snowpack"].dims == ("basin", "lead", "member") and fc["snowpack"].attrs["units"] == "mm"
        assert float(fc["snowpack"].sel(basin=COLD["id"]).min()) > 0.0  # December: a pack
        assert float(abs(fc["snowpack"].sel(basin="velmorra")).max()) == 0.0
    with xr.open_dataset(res / "hindcast.nc") as hc:
        q = hc["discharge"].sel(basin=COLD["id"], lead=1).transpose("experiment", "issue_time", "member").load()
        days = ((hc["issue_time"].values - np.datetime64("2012-01-01")) // np.timedelta64(1, "D")).astype(int) + 1
    crps = {e: float(sr.crps_ensemble(truth[days], q.sel(experiment=e).values.astype(np.float64)).mean())
            for e in ("openloop", "assimilation")}
    assert crps["assimilation"] < 0.7 * crps["openloop"]  # 0.54 measured


def test_snow_run_continued_from_its_restart_equals_the_whole_run(snow_study):
    """``run --until`` then ``--restart-from`` (snowpack and temperature error in the file)
    gives the uninterrupted run's analysis.nc bit for bit."""
    root, raw, _ = snow_study
    cfg_path, folder = _snow_config(root, raw, "restart")
    cfg = load_config(cfg_path)
    pipeline.prep(cfg)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        whole = pipeline.run(cfg, mode="assimilate").load()
        shutil.copy(folder / "results" / "analysis.nc", folder / "whole.nc")
        pipeline.run(cfg, mode="assimilate", until="2013-03-10")
        shutil.copy(folder / "results" / "restart.nc", folder / "restart-first.nc")
        second = pipeline.run(cfg, mode="assimilate", restart_from=folder / "restart-first.nc").load()
    for v in ("discharge", "discharge_background", "snowpack", "production_store", "clipped_water"):
        np.testing.assert_array_equal(second[v].values, whole[v].values, err_msg=v)


def test_rain_only_basin_is_bit_identical_beside_a_snow_basin(snow_study):
    """velmorra run alone (model gr4j) and beside the cold basin (model gr4j+snow, its
    snow_routine 0): open loop and assimilation discharge equal bit for bit on the numpy
    path (random numbers keyed by basin id, the snow routine passes rain unchanged, the
    analysis basin by basin; the filter's snowpack column of a rain-only basin has no
    spread, so no increment). With ``ensemble.kernel: auto`` the rain-only run alone takes
    the compiled kernel and agrees to rounding only (DEVELOPERS.md, Kernels)."""
    root, raw, _ = snow_study
    both, f_both = _snow_config(root, raw, "both")
    alone, f_alone = _snow_config(root, raw, "alone", data={"raw": str(raw), "prepared": str(root / "alone" / "prepared"),
                                                            "basins": ["velmorra"]})
    for cfg in (both, alone):
        for cmd in (["prep"], ["run", "--mode", "openloop"], ["run", "--mode", "assimilate"]):
            assert main([*cmd, "--config", str(cfg)]) == 0
    for name in ("openloop.nc", "analysis.nc"):
        with xr.open_dataset(f_both / "results" / name) as a, xr.open_dataset(f_alone / "results" / name) as b:
            assert a.attrs["model"] == "gr4j+snow" and b.attrs["model"] == "gr4j"
            for v in ("discharge", "production_store", "routing_store"):
                np.testing.assert_array_equal(a[v].sel(basin="velmorra").values, b[v].sel(basin="velmorra").values,
                                              err_msg=f"{name} {v}")
