"""Bad input through the CLI: config, raw, prepared and restart files.

Every case runs ``python -m assim check|prep|run`` in a subprocess on its own copy of a small
good scenario (raw folder cut from ``sample_basin/``, its prepared layer, and the products of
one good run), with one thing broken. A user error must give exit status 2, exactly one line
on stderr naming the file and the variable (or column or key), no traceback, and leave every
file of the scenario as it was (hash and mtime). Common practice, no published source.

The second half fuzzes the readers with hypothesis: the config reader and the two CSV
readers either accept their input or raise the package's own error, never anything else.
"""

from __future__ import annotations

import concurrent.futures
import hashlib
import os
import shutil
import subprocess
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import _scenario
import netCDF4
import numpy as np
import pandas as pd
import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from assim.config import load_config, validate
from assim.errors import ConfigError, InputError
from assim.io import raw as raw_io

REPO = Path(__file__).resolve().parents[1]
IDS = ("velmorra", "oskerrin")
START, END = "2012-01-01", "2012-08-31"


# ------------------------------------------------------------------------------ scenario


def make_raw(folder: Path, ids=IDS, start=START, end=END) -> Path:
    """A raw folder of ``ids`` cut from sample_basin/ to the days start..end."""
    return _scenario.make_raw(folder, ids, start, end)


def config_defaults(root: Path) -> dict:
    return {
        "data": {"raw": str(root / "raw"), "prepared": str(root / "prepared")},
        "results": str(root / "results"),
        "period": {"start": "2012-01-01", "end": "2012-08-31", "spinup_days": 30},
        "ensemble": {"members": 4, "seed": 3, "scheduler": "synchronous", "progress": False},
        "hindcast": {"every_days": 20, "leads": 3},
        "forecast": {"leads": 3},
    }


def write_config(root: Path, **sections) -> Path:
    return _scenario.write_config(root, config_defaults(root), **sections)


def cli(*args, cwd=None, timeout=120):
    env = {**os.environ, "PYTHONWARNINGS": "ignore"}
    return subprocess.run([sys.executable, "-m", "assim", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, timeout=timeout, env=env)


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    """raw/, prepared/ and results/ (analysis.nc, restart.nc) of a good small run."""
    root = tmp_path_factory.mktemp("good")
    make_raw(root / "raw")
    conf = write_config(root)
    for args in (("prep",), ("run", "--mode", "assimilate")):
        r = cli(*args, "--config", conf)
        assert r.returncode == 0, r.stderr
    assert (root / "results" / "analysis.nc").exists() and (root / "results" / "restart.nc").exists()
    return root


def snapshot(root: Path) -> dict[str, tuple[str, int]]:
    """{relative path: (sha256, mtime_ns)} of every file under root."""
    out = {}
    for p in sorted(root.rglob("*")):
        if p.is_file():
            out[str(p.relative_to(root))] = (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
    return out


# ------------------------------------------------------------------------------- the cases


@dataclass(frozen=True)
class Case:
    name: str
    command: tuple[str, ...]           # CLI subcommand and its options (without --config)
    break_it: Callable[[Path], object]  # mutates the scenario copy; may return extra CLI args
    expect: tuple[str, ...]            # substrings the one stderr line must contain


def _edit_yaml(path: Path, fn):
    doc = yaml.safe_load(path.read_text())
    fn(doc)
    path.write_text(yaml.safe_dump(doc, sort_keys=False))


def _config(**sections):
    def f(root):
        write_config(root, **sections)
    return f


def _config_text(text: str | bytes):
    def f(root):
        p = root / "config.yaml"
        p.write_bytes(text if isinstance(text, bytes) else text.encode())
    return f


def _basin(key, value, k=0):
    def f(root):
        def g(doc):
            doc["basins"][k][key] = value
        _edit_yaml(root / "raw" / "basins.yaml", g)
    return f


def _basins_text(fn):
    def f(root):
        p = root / "raw" / "basins.yaml"
        p.write_bytes(fn(p.read_bytes()))
    return f


def _csv(name, fn):
    """fn(DataFrame of strings) -> DataFrame, written back."""
    def f(root):
        p = root / "raw" / name
        fn(pd.read_csv(p, dtype=str)).to_csv(p, index=False)
    return f


def _set(col, value, row=5):
    def fn(df):
        df = df.copy()
        df.loc[df.index[row], col] = value
        return df
    return fn


def _bytes(name, fn):
    def f(root):
        p = root / "raw" / name
        p.write_bytes(fn(p.read_bytes()))
    return f


def _nc(name, fn):
    """fn(netCDF4.Dataset opened r+) on a prepared or results file."""
    def f(root):
        with netCDF4.Dataset(root / name, "r+") as ds:
            fn(ds)
    return f


def _nc_bytes(name, fn):
    def f(root):
        p = root / name
        p.write_bytes(fn(p.read_bytes()))
    return f


def _var_set(var, fn):
    def g(ds):
        v = ds[var]
        v.set_auto_maskandscale(False)
        a = v[:]
        v[:] = fn(a)
    return g


def _attr(var, key, value):
    def g(ds):
        ds[var].setncattr(key, value)
    return g


def _restart_members(root):
    """A restart of another ensemble size."""
    r = cli("run", "--config", write_config(root, ensemble={"members": 6}, results=str(root / "other")))
    assert r.returncode == 0, r.stderr
    write_config(root)
    return ["--restart-from", root / "other" / "restart.nc"]


def _restart_garbage(root):
    p = root / "junk-restart.nc"
    p.write_bytes(b"\x89HDF\r\n\x1a\n" + bytes(range(256)) * 8)
    return ["--restart-from", p]


def _restart_truncated(root):
    src = (root / "results" / "restart.nc").read_bytes()
    p = root / "cut-restart.nc"
    p.write_bytes(src[: len(src) // 2])
    return ["--restart-from", p]


def _restart_no_states(root):
    p = root / "nostates.nc"
    shutil.copy(root / "results" / "restart.nc", p)
    with netCDF4.Dataset(p, "r+") as ds:
        ds.renameVariable("states", "something_else")
    return ["--restart-from", p]


def _args(*extra):
    def f(root):
        return list(extra)
    return f


def _forcing_forecast(defect: str):
    """A forcing-forecast file for the forecast of 2012-08-31 (leads 1..3, 4 members), with
    one ``defect``, and the config that reads it."""
    def f(root):
        import xarray as xr

        dims = ("basin", "issue_time", "lead", "member")
        shape = (len(IDS), 1, 3, 4)
        ds = xr.Dataset(
            {"precipitation": (dims, np.full(shape, 4.0), {"units": "kg m-2 s-1" if defect == "flux" else "mm d-1"}),
             "pet": (dims, np.full(shape, 2.0), {"units": "mm d-1"})},
            coords={"basin": list(IDS), "issue_time": pd.to_datetime(["2012-08-31"]),
                    "lead": np.arange(3) if defect == "from zero" else np.arange(1, 4), "member": np.arange(4)},
        )
        if defect == "one basin":
            ds = ds.isel(basin=[0])
        if defect != "absent":
            ds.to_netcdf(root / "ff.nc")
        write_config(root, forecast={"leads": 3, "forcing": "file", "forcing_file": str(root / "ff.nc")})
    return f


def _run_other(root, *args, results="other"):
    """A run of the same scenario into another results folder (its files become part of
    the scenario); returns that folder."""
    r = cli(*args, "--config", write_config(root, results=str(root / results)))
    assert r.returncode == 0, r.stderr
    write_config(root)
    return root / results


def _restart_openloop(root):
    """An open-loop restart given to an assimilation run."""
    r = cli("run", "--mode", "openloop", "--config", root / "config.yaml")
    assert r.returncode == 0, r.stderr
    return ["--restart-from", root / "results" / "restart-openloop.nc"]


def _restart_edit(name: str, var: str, fn):
    """A copy of restart.nc named ``name`` whose variable ``var`` is changed by ``fn`` on its
    raw values (netCDF4, the attributes and checksums left as written)."""
    def f(root):
        p = root / name
        shutil.copy(root / "results" / "restart.nc", p)
        with netCDF4.Dataset(p, "r+") as ds:
            _var_set(var, fn)(ds)
        return ["--restart-from", p]
    return f


def _flip_exponent_bit(a):
    """The lowest exponent bit of the first value flipped (a store doubled or halved)."""
    a = np.array(a, dtype=np.float64)
    flat = a.reshape(-1).view(np.uint64)
    flat[0] ^= np.uint64(1) << np.uint64(52)
    return a


def _flip_one(a):
    """The lowest exponent bit of one finite value (the middle one) flipped: float32 or
    float64, whatever the file holds."""
    a = np.array(a)
    flat = a.reshape(-1)
    i = np.flatnonzero(np.isfinite(flat))
    bits = flat.view(np.uint32 if a.dtype == np.float32 else np.uint64)
    bits[i[len(i) // 2]] ^= bits.dtype.type(1) << bits.dtype.type(23 if a.dtype == np.float32 else 52)
    return a


def _raw_flip(name: str, var: str):
    """One bit flipped in the file's bytes (not through the library), inside an uncompressed
    chunk of ``var``: the exponent byte of a value whose bytes occur once in the file."""
    def f(root):
        p = root / name
        with netCDF4.Dataset(p) as nc:
            values = np.ravel(nc[var][:].data)
        data = bytearray(p.read_bytes())
        for x in values[np.isfinite(values)][::-1]:
            at = data.find(x.tobytes())
            if at >= 0 and data.find(x.tobytes(), at + 1) < 0:
                data[at + x.itemsize - 1] ^= 0x01
                p.write_bytes(bytes(data))
                return
        raise AssertionError(f"no unique value of {var} found in the bytes of {name}")
    return f


def _made(*args):
    """The scenario's own CLI command run first (its outputs become part of the scenario)."""
    def f(root):
        r = cli(*args, "--config", root / "config.yaml", cwd=root)
        assert r.returncode == 0, r.stderr
    return f


def _global_attr(name: str, key: str, value: str):
    def f(root):
        with netCDF4.Dataset(root / name, "r+") as ds:
            ds.setncattr(key, value)
    return f


def _lock_dir(rel: str):
    def f(root):
        (root / rel).mkdir(parents=True)
    return f


def _then(*fns):
    def f(root):
        extra = []
        for fn in fns:
            out = fn(root)
            if isinstance(out, list):
                extra += out
        return extra
    return f


def _scale_gauge(factor: float, basin: str):
    def fn(df):
        df = df.copy()
        m = df["basin"] == basin
        df.loc[m, "value"] = (df.loc[m, "value"].astype(float) * factor).map(repr)
        return df
    return fn


CHECK, PREP = ("check",), ("prep",)
FORECAST = ("forecast", "--issue-date", "2012-08-31")
RUN = ("run", "--mode", "assimilate")
VERIFY, REPORT, PLOT = ("verify",), ("report",), ("plot",)
LONG = "x" * 5000

CASES = [
    # ---- config (types, ranges, unknown keys, encodings, structure)
    Case("config members is a word", CHECK, _config(ensemble={"members": "eight"}), ("config.yaml", "ensemble.members")),
    Case("config unknown section", CHECK, _config(extras={"a": 1}), ("config.yaml", "extras")),
    Case("config filter method unknown", CHECK, _config(filter={"method": "magic"}), ("config.yaml", "filter.method")),
    Case("config start is not a date", CHECK, _config(period={"start": "2012-13-45"}), ("config.yaml", "period.start")),
    Case("config end before start", CHECK, _config(period={"end": "2011-06-30"}), ("config.yaml", "period.end")),
    Case("config period beyond the weather", CHECK, _config(period={"end": "2030-01-01"}), ("config.yaml", "period.end")),
    Case("config not valid YAML", CHECK, _config_text("data: {raw: [unclosed\nresults: x\n"), ("config.yaml", "line")),
    Case("config non-UTF-8 bytes", CHECK, _config_text(b"results: \xff\xfe\xfa\n"), ("config.yaml",)),
    Case("config is a list", CHECK, _config_text("- data\n- results\n"), ("config.yaml", "mapping")),
    Case("config raw folder is a file", CHECK, lambda r: write_config(r, data={"raw": str(r / "raw" / "weather.csv")}),
         ("weather.csv", "raw folder")),
    Case("config results path has a newline", RUN, lambda r: write_config(r, results=str(r / "res\nults") + "/\x00"),
         ("config.yaml", "results")),
    Case("--set without a value", CHECK, _args("--set", "ensemble.members"), ("--set", "ensemble.members")),
    Case("--set with bad YAML", CHECK, _args("--set", "ensemble.members=[1,"), ("--set", "ensemble.members")),
    # ---- basins.yaml
    Case("basins area negative", CHECK, _basin("area_km2", -12.0), ("basins.yaml", "area_km2", "velmorra")),
    Case("basins area is text", CHECK, _basin("area_km2", "big"), ("basins.yaml", "area_km2", "velmorra")),
    Case("basins latitude 95", CHECK, _basin("latitude", 95.0), ("basins.yaml", "latitude", "velmorra")),
    Case("basins id with a newline", CHECK, _basin("id", "vel\nmorra"), ("basins.yaml", "id")),
    Case("basins id with a comma", CHECK, _basin("id", "a,b"), ("basins.yaml", "id", "basins[0]")),
    Case("basins duplicated id", CHECK, _basin("id", "oskerrin"), ("basins.yaml", "id", "oskerrin")),
    Case("basins gauge kind unknown", CHECK, _basin("gauge", {"kind": "level"}), ("basins.yaml", "gauge", "velmorra")),
    Case("basins rating exponent 50", CHECK,
         _basin("gauge", {"kind": "stage", "rating": {"a": 14.0, "b": 50.0, "h0": 0.1, "stage_min_m": 0.2,
                                                     "stage_max_m": 1.3}}), ("basins.yaml", "rating", "velmorra")),
    Case("basins parameter out of range", CHECK, _basin("parameters", {"x1": -5.0, "x2": 0.0, "x3": 40.0, "x4": 1.2}),
         ("basins.yaml", "x1", "velmorra")),
    Case("basins threshold is text", CHECK, _basin("thresholds_m3s", {"minor": "high"}),
         ("basins.yaml", "thresholds_m3s.minor", "velmorra")),
    Case("basins non-UTF-8 bytes", CHECK, _basins_text(lambda b: b.replace(b"Velmorra", b"Velm\xf6\xff\xfea")),
         ("basins.yaml",)),
    Case("basins truncated mid-file", CHECK, _basins_text(lambda b: b[: len(b) // 2] + b"\n  - {id: ["),
         ("basins.yaml", "line")),
    Case("basins unknown model", CHECK, lambda r: _edit_yaml(r / "raw" / "basins.yaml",
                                                            lambda d: [b.update(model="hbv-x") for b in d["basins"]]),
         ("basins.yaml", "model", "velmorra")),
    # ---- weather.csv
    Case("weather negative rain", CHECK, _csv("weather.csv", _set("precipitation_mm", "-3.0")),
         ("weather.csv", "precipitation_mm", "line")),
    Case("weather bad date", CHECK, _csv("weather.csv", _set("date", "2012/13/01")), ("weather.csv", "date")),
    Case("weather missing column", CHECK, _csv("weather.csv", lambda d: d.drop(columns="tmax_c")),
         ("weather.csv", "tmax_c")),
    Case("weather duplicated day", CHECK, _csv("weather.csv", lambda d: pd.concat([d.iloc[:10], d.iloc[9:]])),
         ("weather.csv", "date", "velmorra")),
    Case("weather missing day", CHECK, _csv("weather.csv", lambda d: d.drop(d.index[20])), ("weather.csv", "date", "velmorra")),
    Case("weather unknown basin ../ with newline", CHECK, _csv("weather.csv", _set("basin", "../..\n/etc")),
         ("weather.csv", "basin", "line")),
    Case("weather very long basin id", CHECK, _csv("weather.csv", _set("basin", LONG)), ("weather.csv", "basin", "line")),
    Case("weather truncated mid-row", CHECK, _bytes("weather.csv", lambda b: b[: len(b) // 2].rsplit(b",", 2)[0]),
         ("weather.csv",)),
    Case("weather random binary", CHECK, _bytes("weather.csv", lambda b: bytes(np.random.default_rng(5).integers(0, 256, 4000, dtype=np.uint8))),
         ("weather.csv",)),
    Case("weather UTF-16", CHECK, _bytes("weather.csv", lambda b: b.decode().encode("utf-16")), ("weather.csv",)),
    Case("weather tmin above tmax", CHECK, _csv("weather.csv", lambda d: _set("tmin_c", "40.0")(_set("tmax_c", "-40.0")(d))),
         ("weather.csv", "tm", "line")),
    # ---- gauge.csv
    Case("gauge timestamp not ISO", CHECK, _csv("gauge.csv", _set("timestamp", "yesterday noon")),
         ("gauge.csv", "timestamp", "line")),
    Case("gauge unknown basin with quotes", CHECK, _csv("gauge.csv", _set("basin", 'o"sk\'errin')),
         ("gauge.csv", "basin", "line")),
    Case("gauge empty file", CHECK, _bytes("gauge.csv", lambda b: b""), ("gauge.csv",)),
    Case("gauge NUL bytes", CHECK, _bytes("gauge.csv", lambda b: b[:200] + b"\x00" * 50 + b[200:]), ("gauge.csv",)),
    Case("gauge missing file", CHECK, lambda r: (r / "raw" / "gauge.csv").unlink(), ("gauge.csv",)),
    # ---- prepared layer (check reads it when present; run reads only it)
    Case("prepared forcing truncated", RUN, _nc_bytes("prepared/forcing.nc", lambda b: b[: len(b) // 3]),
         ("forcing.nc",)),
    Case("prepared forcing is text", CHECK, _nc_bytes("prepared/forcing.nc", lambda b: b"date,basin\n1,2\n"),
         ("forcing.nc",)),
    Case("prepared precipitation in inches", RUN, _nc("prepared/forcing.nc", _attr("precipitation", "units", "in d-1")),
         ("forcing.nc", "precipitation")),
    Case("prepared precipitation negative", RUN,
         _nc("prepared/forcing.nc", _var_set("precipitation", lambda a: np.where(np.arange(a.size).reshape(a.shape) == 77, -5.0, a))),
         ("forcing.nc", "precipitation")),
    Case("prepared pet missing", RUN, _nc("prepared/forcing.nc", lambda ds: ds.renameVariable("pet", "pet_old")),
         ("forcing.nc", "pet")),
    Case("prepared area negative", RUN, _nc("prepared/basins.nc", _var_set("area", lambda a: -a)), ("basins.nc", "area")),
    Case("prepared discharge negative", RUN,
         _nc("prepared/observations.nc", _var_set("discharge", lambda a: np.where(np.isfinite(a), -abs(a) - 1, a))),
         ("observations.nc", "discharge")),
    # ---- restart and run options
    Case("restart of another ensemble size", RUN, _restart_members, ("restart.nc", "members")),
    Case("restart is garbage", RUN, _restart_garbage, ("junk-restart.nc",)),
    Case("restart truncated", RUN, _restart_truncated, ("cut-restart.nc",)),
    Case("restart without states", RUN, _restart_no_states, ("nostates.nc", "states")),
    Case("--until not a date", RUN, _args("--until", "tomorrow"), ("--until",)),
    Case("--until after the period", RUN, _args("--until", "2013-05-01"), ("until", "at 2013-05-01", "2012-08-31")),
    # ---- forecast inputs
    Case("forecast forcing file in kg m-2 s-1", FORECAST, _forcing_forecast("flux"), ("ff.nc", "precipitation", "units")),
    Case("forecast forcing file lacks a basin", FORECAST, _forcing_forecast("one basin"), ("ff.nc", "basin", "oskerrin")),
    Case("forecast forcing file leads from 0", FORECAST, _forcing_forecast("from zero"), ("ff.nc", "lead")),
    Case("forecast forcing file absent", FORECAST, _forcing_forecast("absent"), ("ff.nc", "not found")),
    Case("--issue-date not a date", ("forecast", "--issue-date", "31/08/2012"), _args(), ("--issue-date",)),
    Case("--issue-date before the restart", ("forecast", "--issue-date", "2012-05-01"), _args(),
         ("restart.nc", "valid_time", "2012-08-31")),
    # ---- duplicate YAML keys (PyYAML keeps the last silently)
    Case("config key given twice", CHECK,
         _config_text("ensemble:\n  members: 16\n  members: 3\n"), ("config.yaml", "members", "line 3")),
    Case("config section given twice", CHECK, _config_text("filter: {method: enkf}\nfilter: {method: etkf}\n"),
         ("config.yaml", "filter", "line 2")),
    Case("config key twice in a flow mapping", CHECK, _config_text("ensemble: {seed: 1, seed: 2}\n"),
         ("config.yaml", "seed", "line 1")),
    Case("basins area given twice", CHECK,
         _basins_text(lambda b: b.replace(b"area_km2: 48.5", b"area_km2: 48.5\n  area_km2: 4850.0")),
         ("basins.yaml", "area_km2", "line 5")),
    Case("basins id given twice in one basin", CHECK,
         _basins_text(lambda b: b.replace(b"- id: velmorra", b"- id: velmorra\n  id: other")),
         ("basins.yaml", "'id'", "line 3")),
    Case("basins list given twice", CHECK, _basins_text(lambda b: b + b"\nbasins: []\n"), ("basins.yaml", "basins", "line")),
    Case("--set mapping with a key twice", CHECK, _args("--set", "ensemble={members: 3, members: 4}"),
         ("--set", "ensemble")),
    # ---- --set values: errors blame --set, not the config file
    Case("--set seed beyond 64 bits", RUN, _args("--set", "ensemble.seed=99999999999999999999999"),
         ("--set", "ensemble.seed")),
    Case("--set seed negative", CHECK, _args("--set", "ensemble.seed=-1"), ("--set", "ensemble.seed")),
    Case("--set one member", CHECK, _args("--set", "ensemble.members=1"), ("--set", "ensemble.members")),
    Case("--set unknown key", CHECK, _args("--set", "ensemble.membres=8"), ("--set", "ensemble")),
    Case("--set spin-up negative", CHECK, _args("--set", "period.spinup_days=-1"), ("--set", "period.spinup_days")),
    Case("--set filter method unknown", RUN, _args("--set", "filter.method=magic"), ("--set", "filter.method")),
    # ---- dates on the command line
    Case("--issue-date 9999-12-31", ("forecast", "--issue-date", "9999-12-31"), _args(), ("--issue-date", "9999")),
    Case("--issue-date 0000-01-01", ("forecast", "--issue-date", "0000-01-01"), _args(), ("--issue-date", "0000")),
    Case("--issue-date 30 February", ("forecast", "--issue-date", "2012-02-30"), _args(), ("--issue-date",)),
    Case("--until 0000-01-01", RUN, _args("--until", "0000-01-01"), ("--until",)),
    Case("--until 9999-12-31", RUN, _args("--until", "9999-12-31"), ("--until",)),
    # ---- lock paths that are folders
    Case("run lock path is a folder", RUN, _lock_dir("results/.analysis.nc.lock"), (".analysis.nc.lock", "not a plain file")),
    Case("open-loop lock path is a folder", ("run", "--mode", "openloop"), _lock_dir("results/.openloop.nc.lock"),
         (".openloop.nc.lock",)),
    Case("prep lock path is a folder", PREP, _lock_dir("prepared/.prepared.lock"), (".prepared.lock",)),
    Case("forecast lock path is a folder", FORECAST, _lock_dir("results/forecasts/.forecast-2012-08-31.lock"),
         (".forecast-2012-08-31.lock",)),
    Case("hindcast lock path is a folder", ("hindcast",), _lock_dir("results/.hindcast.nc.lock"), (".hindcast.nc.lock",)),
    # ---- spin-up, limits, units
    Case("spin-up longer than the period", RUN, _args("--set", "period.spinup_days=4000"), ("period.spinup_days",)),
    Case("spin-up as long as the period", RUN, _config(period={"spinup_days": 244}), ("config.yaml", "period.spinup_days")),
    Case("spin-up too long for the open loop", ("run", "--mode", "openloop"), _args("--set", "period.spinup_days=4000"),
         ("period.spinup_days",)),
    Case("basins area 1e308", CHECK, _basin("area_km2", 1.0e308), ("basins.yaml", "area_km2", "velmorra")),
    Case("basins area 1e308 at prep", PREP, _basin("area_km2", 1.0e308), ("basins.yaml", "area_km2", "velmorra")),
    Case("basins area infinite", CHECK, _basin("area_km2", float("inf")), ("basins.yaml", "area_km2", "velmorra")),
    Case("weather rain 1e12 mm", CHECK, _csv("weather.csv", _set("precipitation_mm", "1e12")),
         ("weather.csv", "precipitation_mm", "velmorra")),
    Case("weather rain 1e12 mm at prep", PREP, _csv("weather.csv", _set("precipitation_mm", "1e12")),
         ("weather.csv", "precipitation_mm")),
    Case("weather rain 3000 mm in a day", CHECK, _csv("weather.csv", _set("precipitation_mm", "3000")),
         ("weather.csv", "precipitation_mm")),
    Case("gauge discharge in L/s", CHECK, _csv("gauge.csv", _scale_gauge(1000.0, "oskerrin")),
         ("gauge.csv", "value", "oskerrin", "L/s")),
    Case("gauge discharge in L/s at prep", PREP, _csv("gauge.csv", _scale_gauge(1000.0, "oskerrin")),
         ("gauge.csv", "value", "oskerrin")),
    Case("gauge stage in cm", CHECK, _csv("gauge.csv", _scale_gauge(100.0, "velmorra")),
         ("gauge.csv", "value", "velmorra", "cm")),
    Case("gauge stage in mm at prep", PREP, _csv("gauge.csv", _scale_gauge(1000.0, "velmorra")),
         ("gauge.csv", "value", "velmorra")),
    Case("limit set to zero", CHECK, _config(data={"limits": {"max_area_km2": 0}}), ("config.yaml", "data.limits")),
    # ---- restarts: mode, damage, validity
    Case("open-loop restart for assimilation", RUN, _restart_openloop, ("restart-openloop.nc", "mode")),
    Case("assimilation restart for the open loop", ("run", "--mode", "openloop"),
         _args("--restart-from", "results/restart.nc"), ("restart.nc", "mode")),
    Case("restart states exponent bit flipped", RUN, _restart_edit("flipped.nc", "states", _flip_exponent_bit),
         ("flipped.nc", "states", "damaged")),
    Case("restart parameter changed", RUN, _restart_edit("param.nc", "parameter_x1", lambda a: a * 1.01),
         ("param.nc", "parameter_x1", "damaged")),
    Case("restart collapse days changed", RUN, _restart_edit("collapse.nc", "collapse_days", lambda a: a + 1),
         ("collapse.nc", "collapse_days", "damaged")),
    Case("restart AR(1) error changed", RUN, _restart_edit("ar1.nc", "ar1_precipitation", lambda a: -a),
         ("ar1.nc", "ar1_precipitation", "damaged")),
    Case("restart checksum attribute garbled", RUN,
         _then(_nc("results/restart.nc", _attr("states", "sha256", ":00")),
               _args("--restart-from", "results/restart.nc")), ("restart.nc", "damaged")),
    Case("restart valid after period.end", RUN, _args("--restart-from", "results/restart.nc", "--set",
                                                      "period.end=2012-06-30"), ("restart.nc", "valid_time")),
    Case("restart valid long before the period", RUN,
         _then(lambda r: _run_other(r, "run", "--until", "2012-02-15"),
               _args("--restart-from", "other/restart.nc", "--set", "period.start=2012-04-01")),
         ("other/restart.nc", "valid_time")),
    Case("restart and product from different writes", RUN,
         _then(_global_attr("results/analysis.nc", "set_generation", "0" * 32),
               _args("--restart-from", "results/restart.nc")), ("restart.nc", "analysis.nc", "different writes")),
    Case("continuation would drop the product's days", RUN,
         _args("--restart-from", "results/restart.nc", "--set", "outputs.float32=false"),
         ("analysis.nc", "cannot keep")),
    # ---- prepared layer: mixed or damaged
    Case("prepared layer mixed", RUN, _global_attr("prepared/forcing.nc", "set_generation", "f" * 32),
         ("forcing.nc", "observations.nc", "different writes")),
    Case("prepared basins from another prep", RUN, _global_attr("prepared/basins.nc", "set_generation", "e" * 32),
         ("basins.nc", "different writes")),
    Case("prepared precipitation changed", RUN,
         _nc("prepared/forcing.nc", _var_set("precipitation", lambda a: a * 1.5)), ("forcing.nc", "precipitation", "damaged")),
    Case("prepared area changed", RUN, _nc("prepared/basins.nc", _var_set("area", lambda a: a * 100)),
         ("basins.nc", "area", "damaged")),
    Case("prepared discharge changed", RUN,
         _nc("prepared/observations.nc", _var_set("discharge", lambda a: np.where(np.isfinite(a), a * 2, a))),
         ("observations.nc", "discharge", "damaged")),
    Case("prepared day bounds changed", RUN, _nc("prepared/forcing.nc", _var_set("time_bnds", lambda a: a + 1)),
         ("forcing.nc", "time_bnds", "damaged")),
    Case("prepared checksums garbled", CHECK, _nc("prepared/basins.nc", _attr("area", "sha256", "x")),
         ("basins.nc", "damaged")),
    # ---- products a later step reads: damaged
    Case("analysis discharge bit flipped, verify", VERIFY, _nc("results/analysis.nc", _var_set("discharge", _flip_one)),
         ("analysis.nc", "discharge", "damaged")),
    Case("analysis byte flipped in the file, verify", VERIFY,
         _raw_flip("results/analysis.nc", "discharge_background"), ("analysis.nc", "discharge_background", "damaged")),
    Case("analysis innovation bit flipped, plot", PLOT, _nc("results/analysis.nc", _var_set("innovation", _flip_one)),
         ("analysis.nc", "innovation", "damaged")),
    Case("analysis damaged under a continuation", RUN,
         _then(_nc("results/analysis.nc", _var_set("discharge", _flip_one)), _args("--restart-from", "results/restart.nc")),
         ("analysis.nc", "discharge", "damaged")),
    Case("openloop bit flipped, verify", VERIFY,
         _then(_made("run", "--mode", "openloop"), _nc("results/openloop.nc", _var_set("discharge", _flip_one))),
         ("openloop.nc", "discharge", "damaged")),
    Case("hindcast bit flipped, verify", VERIFY,
         _then(_made("hindcast"), _nc("results/hindcast.nc", _var_set("discharge", _flip_one))),
         ("hindcast.nc", "discharge", "damaged")),
    Case("analysis innovation statistic changed, report", REPORT,
         _nc("results/analysis.nc", _var_set("innovation_chi2", lambda a: a * 0.5)), ("analysis.nc", "innovation_chi2", "damaged")),
    Case("skill bit flipped, report", REPORT,
         _then(_made("verify"), _nc("results/skill.nc", _var_set("skill", _flip_one))), ("skill.nc", "skill", "damaged")),
    Case("forecast bit flipped, plot", ("plot", "--issue-date", "2012-08-31"),
         _then(_forcing_forecast("none"), _made(*FORECAST),
               _nc("results/forecasts/forecast-2012-08-31.nc", _var_set("discharge", _flip_one))),
         ("forecast-2012-08-31.nc", "discharge", "damaged")),
    # ---- forecasts
    Case("forecast climatology without another year", FORECAST, _config(forecast={"leads": 3, "forcing": "climatology"}),
         ("forcing.nc", "forecast.forcing")),
]

RESULTS: dict[str, str] = {}  # case name -> "pass" or the reason it failed


def _prepare_case(case: Case, good: Path, base: Path) -> tuple[Path, list, dict]:
    """A copy of the good scenario broken as the case says: (root, extra CLI args, snapshot)."""
    root = base / case.name.replace(" ", "_").replace("/", "_")
    shutil.copytree(good, root, copy_function=shutil.copy2)
    write_config(root)
    # break_it may run the CLI itself (a restart of another run): its outputs are part of the
    # scenario whose files must not change afterwards.
    extra = case.break_it(root)
    return root, extra if isinstance(extra, list) else [], snapshot(root)


def _judge_case(case: Case, root: Path, extra: list, before: dict) -> str:
    r = cli(*case.command, "--config", root / "config.yaml", *extra, cwd=root)
    after = snapshot(root)
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    problems = []
    if r.returncode != 2:
        problems.append(f"exit {r.returncode}")
    if "Traceback" in r.stderr:
        problems.append("traceback")
    if len(lines) != 1:
        problems.append(f"{len(lines)} stderr lines")
    text = " ".join(lines)
    problems += [f"{s!r} not named" for s in case.expect if s.lower() not in text.lower()]
    if before != after:
        changed = sorted(set(before) ^ set(after) | {k for k in before if k in after and before[k] != after[k]})
        problems.append(f"files changed: {changed}")
    return "pass" if not problems else "; ".join(problems) + f" | stderr: {r.stderr[-600:]!r}"


def test_battery_of_bad_inputs(good, tmp_path):
    """At least 100 distinct bad inputs across config, raw, prepared and restart files; each
    one through the CLI in a subprocess: exit 2, one stderr line naming file and variable,
    no traceback, nothing written or changed. Common practice, no published source."""
    assert len({c.name for c in CASES}) == len(CASES)
    # The scenarios are broken one after the other in this process (HDF5, behind netCDF4 and
    # xarray, is not thread-safe); only the CLI subprocesses run two at a time.
    prepared = {c.name: _prepare_case(c, good, tmp_path) for c in CASES}
    with concurrent.futures.ThreadPoolExecutor(max_workers=2) as pool:
        futures = {c.name: pool.submit(_judge_case, c, *prepared[c.name]) for c in CASES}
        for name, fut in futures.items():
            RESULTS[name] = fut.result()
    failed = {k: v for k, v in RESULTS.items() if v != "pass"}
    assert not failed, "\n".join(f"{k}: {v}" for k, v in failed.items())


def test_battery_summary():
    """Summary of the battery: count tried and count passing (at least 100, all passing)."""
    tried = len(RESULTS)
    passing = sum(v == "pass" for v in RESULTS.values())
    print(f"\nbad inputs: {tried} tried, {passing} passing")
    assert tried >= 100 and passing == tried


# ------------------------------------------------------------------------------- fuzzing

_scalars = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True),
                     st.text(max_size=12))
_keys = st.sampled_from(["data", "results", "period", "ensemble", "filter", "hindcast", "forecast", "outputs",
                         "members", "seed", "start", "end", "method", "raw", "prepared", "inflation",
                         "perturbation", "spinup_days", "leads", "every_days", "x"]) | st.text(max_size=8)
_values = st.recursive(_scalars, lambda kids: st.lists(kids, max_size=4) | st.dictionaries(_keys, kids, max_size=4),
                       max_leaves=12)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.dictionaries(_keys, _values, max_size=5))
def test_config_reader_fuzz(raw):
    """Random nested YAML-able values: validate() gives a Config or a ConfigError, nothing
    else. Common practice, no published source."""
    try:
        cfg = validate(raw, "fuzz.yaml")
    except ConfigError as exc:
        assert "\n" not in str(exc)
    else:
        assert isinstance(cfg, dict) and "ensemble" in cfg


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(st.binary(max_size=400))
def test_config_file_fuzz(tmp_path, data):
    """Random bytes as a config file: ConfigError or a Config, nothing else. Common practice,
    no published source."""
    p = tmp_path / "c.yaml"
    p.write_bytes(data)
    try:
        load_config(p)
    except ConfigError as exc:
        assert "\n" not in str(exc)


_cell = st.one_of(st.sampled_from(["", "0", "-1", "1e400", "nan", "inf", "2012-01-01", "2012-01-02", "2012-02-30",
                                   "2012-01-01T06:00Z", "2012-01-01T25:00", "velmorra", "oskerrin", "a\"b",
                                   "../x", "3.5", " 4 ", "\u00e9", "1,5"]),
                  st.text(max_size=6), st.floats(allow_nan=True).map(str))


def _rows(ncols):
    return st.lists(st.lists(_cell, min_size=ncols - 1, max_size=ncols + 1), max_size=8)


def _write_rows(path: Path, header, rows):
    import csv

    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(header)
        w.writerows(rows)


_READERS = {  # file -> (columns, reader, what a successful read must hold)
    "weather.csv": (raw_io.WEATHER_COLUMNS, raw_io.read_weather,
                    lambda w: np.all(np.isfinite(w.precipitation)) and np.all(w.precipitation >= 0)),
    "gauge.csv": (raw_io.GAUGE_COLUMNS, raw_io.read_gauge, lambda g: np.all(np.isfinite(g.value))),
}


@pytest.mark.parametrize("name", list(_READERS))
@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_csv_reader_fuzz(tmp_path, name, data):
    """Random bytes or rows as weather.csv or gauge.csv: InputError or success (finite,
    non-negative rain; finite readings), never another exception. Common practice, no
    published source."""
    columns, read, holds = _READERS[name]
    content = data.draw(st.one_of(st.binary(max_size=300), _rows(len(columns))))
    p = tmp_path / name
    if isinstance(content, bytes):
        p.write_bytes(content)
    else:
        _write_rows(p, columns, content)
    try:
        result = read(p, ["velmorra", "oskerrin"])
    except InputError as exc:
        assert "\n" not in str(exc)
    else:
        assert holds(result)
