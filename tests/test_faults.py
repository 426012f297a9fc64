"""Faults: killed runs, full disks, unwritable folders, concurrent runs, gauge outages.

A scheduled forecast that dies, or silently writes half a file, is worse than none. Every
test here checks that ``assim`` either finishes or stops cleanly and loses nothing.
Common practice, no published source (files written to a temporary name and renamed;
PID lock files; SIGKILL of the whole process group at random, seeded moments).
"""

from __future__ import annotations

import errno
import hashlib
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import _scenario
import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml

from assim.caution import CAUTION
from assim.io.products import open_product

REPO = Path(__file__).resolve().parents[1]
SNAKEMAKE = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "workflow" / "Snakefile")]
IDS = ("velmorra", "oskerrin")

pytestmark = pytest.mark.slow

# variables each product must hold when it exists under its product name
REQUIRED = {
    "openloop.nc": ("discharge",),
    "analysis.nc": ("discharge", "discharge_analysis", "obs_status", "innovation", "clipped_water"),
    "hindcast.nc": ("discharge",),
    "skill.nc": (),
    "restart.nc": ("states", "valid_time", "collapse_days"),
    "restart-openloop.nc": ("states", "valid_time", "collapse_days"),
}


# ------------------------------------------------------------------------------ scenario


def make_raw(folder: Path, ids=IDS, start="2012-01-01", end="2012-08-31", gauge_filter=None) -> Path:
    """A raw folder of ``ids`` cut from sample_basin/; ``gauge_filter(df) -> df`` edits the
    gauge readings (outages, late readings)."""
    return _scenario.make_raw(folder, ids, start, end, gauge_filter)


def config_defaults(root: Path) -> dict:
    return {
        "data": {"raw": str(root / "raw"), "prepared": str(root / "prepared")},
        "results": str(root / "results"),
        "period": {"start": "2012-01-01", "end": "2012-08-31", "spinup_days": 30},
        "ensemble": {"members": 6, "seed": 11, "scheduler": "synchronous", "progress": False,
                     "time_block_days": 30},
        "hindcast": {"every_days": 10, "leads": 3},
        "forecast": {"leads": 3},
    }


def write_config(root: Path, **sections) -> Path:
    return _scenario.write_config(root, config_defaults(root), **sections)


def assim_cmd(*args):
    return [sys.executable, "-m", "assim", *map(str, args)]


def cli(*args, cwd=None):
    return subprocess.run(assim_cmd(*args), capture_output=True, text=True, cwd=cwd, timeout=300,
                          env={**os.environ, "PYTHONWARNINGS": "ignore"})


def data_arrays(path: Path) -> dict[str, np.ndarray]:
    with xr.open_dataset(path) as ds:
        return {k: ds[k].values for k in ds.data_vars}


def assert_same_numbers(a: Path, b: Path):
    x, y = data_arrays(a), data_arrays(b)
    assert sorted(x) == sorted(y), (a, b)
    for k in x:
        eq_nan = x[k].dtype.kind == "f"
        assert np.array_equal(x[k], y[k], equal_nan=eq_nan), f"{a.name}: {k} differs from the uninterrupted run"


def assert_whole_or_absent(folder: Path):
    """Every file under a product name opens, holds its variables and the caution; other
    files are hidden temporaries (``.name.*.part``) or lock files."""
    seen = []
    for p in sorted(folder.rglob("*")):
        if not p.is_file() or ".snakemake" in p.parts or "logs" in p.parts or "benchmarks" in p.parts:
            continue
        name = p.name
        if name.startswith("."):
            assert name.endswith((".part", ".lock", ".snakemake_timestamp")), p
            continue
        seen.append(name)
        if name.endswith(".nc"):
            with xr.open_dataset(p) as ds:  # a half-written file would not open
                want = REQUIRED.get(name, ("discharge",) if "forecast" in name else ())
                missing = [v for v in want if v not in ds.variables]
                assert not missing, f"{p}: missing {missing}"
                if p.parent.name != "prepared":
                    assert ds.attrs.get("caution") == CAUTION, p
                ds.load()
        elif name.endswith(".csv"):
            df = pd.read_csv(p)
            assert {"basin", "experiment", "lead", "metric", "value", "n"} <= set(df.columns), p
        elif name.endswith(".png"):
            assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", p
        elif name.endswith(".html"):
            assert p.read_text().rstrip().endswith("</html>"), p
    return seen


def _kill_group(proc: subprocess.Popen):
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    proc.wait()


def _run_and_kill(cmd, at: float, cwd) -> bool:
    """Start cmd in its own process group and SIGKILL the group after ``at`` s.
    Returns True if it was killed before it finished."""
    proc = subprocess.Popen(cmd, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True, env={**os.environ, "PYTHONWARNINGS": "ignore"})
    try:
        proc.wait(timeout=at)
        return False
    except subprocess.TimeoutExpired:
        _kill_group(proc)
        return True


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    """raw/ and prepared/ of two basins over eight months."""
    root = tmp_path_factory.mktemp("scenario")
    make_raw(root / "raw")
    r = cli("prep", "--config", write_config(root))
    assert r.returncode == 0, r.stderr
    return root


def _copy_inputs(scenario: Path, root: Path) -> Path:
    root.mkdir(parents=True, exist_ok=True)
    for d in ("raw", "prepared"):
        shutil.copytree(scenario / d, root / d)
    return write_config(root)


KILLS: list[str] = []  # one entry per kill that landed before the command finished


@pytest.mark.parametrize("command, products, n_kills", [
    (("run", "--mode", "assimilate"), ("analysis.nc", "restart.nc"), 8),
    (("run", "--mode", "openloop"), ("openloop.nc", "restart-openloop.nc"), 5),
    (("hindcast",), ("hindcast.nc",), 6),
])
def test_killed_cli_leaves_whole_files_and_reruns_identically(scenario, tmp_path, command, products, n_kills):
    """SIGKILL of the whole process group at seeded random moments (drawn from the measured
    duration of an uninterrupted run): after each kill every product is whole or absent,
    the lock left behind is detected as stale and does not block the rerun, the rerun removes
    the killed run's temporaries, and the rerun's numbers equal the uninterrupted run's
    (np.array_equal). Common practice, no published
    source."""
    ref = tmp_path / "reference"
    conf = _copy_inputs(scenario, ref)
    t0 = time.monotonic()
    r = cli(*command, "--config", conf)
    duration = time.monotonic() - t0
    assert r.returncode == 0, r.stderr
    rng = np.random.default_rng(sum(map(ord, " ".join(command))))  # seeded per command
    work = tmp_path / "killed"
    conf = _copy_inputs(scenario, work)
    results = work / "results"
    landed = attempts = 0
    while landed < n_kills and attempts < n_kills + 4:  # a kill after the end (a busy machine) is retried
        attempts += 1
        at = float(rng.uniform(0.3, 0.9) * duration)
        killed = _run_and_kill(assim_cmd(*command, "--config", conf), at, work)
        if killed:
            landed += 1
            KILLS.append(f"{' '.join(command)} at {at:.2f} s of {duration:.2f} s")
        if results.exists():
            assert_whole_or_absent(results)
        # the rerun goes through, whatever the kill left (stale lock, .part files)
        r = cli(*command, "--config", conf)
        assert r.returncode == 0, r.stderr
        lock = results / f".{products[0]}.lock"
        assert not lock.exists(), "the rerun left its lock behind"
        leftovers = [p.name for name in products for p in results.glob(f".{name}.*.part")]
        assert not leftovers, f"the rerun kept temporaries of the killed run: {leftovers}"
        if killed and "stale lock" in r.stderr:
            assert "warning" in r.stderr
        for name in products:
            assert_same_numbers(ref / "results" / name, results / name)
    # temporaries of killed runs are never taken for products: no reader globs them
    assert not [p for p in results.glob("*.nc") if p.name.startswith(".")]
    assert len(KILLS) >= 1


def test_stale_lock_is_reported_and_replaced(scenario, tmp_path):
    """A lock file whose PID is dead (a run killed before it could remove it) is reported in
    one warning line and replaced; the run goes through. Common practice, no published
    source."""
    conf = _copy_inputs(scenario, tmp_path)
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (tmp_path / "results").mkdir()
    import socket

    (tmp_path / "results" / ".openloop.nc.lock").write_text(f"{dead.pid} {socket.gethostname()}\n")
    r = cli("run", "--mode", "openloop", "--config", conf)
    assert r.returncode == 0, r.stderr
    assert "stale lock" in r.stderr and str(dead.pid) in r.stderr
    assert not (tmp_path / "results" / ".openloop.nc.lock").exists()


def test_killed_workflow_resumes_to_identical_products(scenario, tmp_path):
    """The Snakemake workflow killed (SIGKILL, process group) at seeded random moments: the
    results folder holds only whole products; Snakemake's own lock is detected and reported
    (it names the kill as the likely cause and --unlock as the remedy), and after --unlock the
    resumed workflow (--rerun-incomplete) gives the uninterrupted run's numbers. Common
    practice, no published source."""
    targets = ["results/analysis.nc", "results/openloop.nc", "results/hindcast.nc", "results/skill.nc"]

    def make(root: Path):
        cfg = yaml.safe_load((REPO / "config" / "config.yaml").read_text())
        cfg["data"]["raw"] = str(scenario / "raw")
        cfg["period"] = {"start": "2012-01-01", "end": "2012-08-31", "spinup_days": 30}
        cfg["ensemble"].update(members=6, seed=11)
        cfg["hindcast"] = {"every_days": 10, "leads": 3, "forcing": "observed"}
        cfg["forecast"]["leads"] = 3
        (root / "config").mkdir(parents=True)
        (root / "config" / "config.yaml").write_text(yaml.safe_dump(cfg, sort_keys=False))
        return [*SNAKEMAKE, "--directory", str(root), "--cores", "2", *targets]

    ref = tmp_path / "reference"
    cmd = make(ref)
    t0 = time.monotonic()
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    duration = time.monotonic() - t0
    assert r.returncode == 0, r.stderr[-3000:]
    work = tmp_path / "killed"
    cmd = make(work)
    rng = np.random.default_rng(7)
    kills = 0
    for _ in range(4):
        # each resumed attempt has less left to do: kill early enough to land
        at = float(rng.uniform(0.15, 0.35) * duration)
        if _run_and_kill([*cmd, "--rerun-incomplete"], at, work):
            kills += 1
            KILLS.append(f"snakemake at {at:.2f} s of {duration:.2f} s")
            if (work / "results").exists():
                assert_whole_or_absent(work / "results")
            blocked = subprocess.run([*cmd, "--rerun-incomplete"], capture_output=True, text=True, timeout=600)
            if blocked.returncode != 0:  # Snakemake's lock of the killed run: reported, then removed
                assert "cannot be locked" in blocked.stderr and "--unlock" in blocked.stderr, blocked.stderr[-2000:]
                subprocess.run([*cmd, "--unlock"], capture_output=True, timeout=300, check=True)
    r = subprocess.run([*cmd, "--rerun-incomplete"], capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-3000:]
    assert kills >= 2
    for name in ("analysis.nc", "openloop.nc", "hindcast.nc", "restart.nc"):
        assert_same_numbers(ref / "results" / name, work / "results" / name)
    assert_whole_or_absent(work / "results")


def test_kill_count():
    """At least 20 kills landed before the killed command finished, across the stages."""
    print(f"\nkills: {len(KILLS)}")
    assert len(KILLS) >= 20, KILLS


# ---------------------------------------------------------------- full disk, unwritable


def _hashes(folder: Path):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in folder.iterdir() if p.is_file()}


def test_full_disk_is_one_line_and_keeps_earlier_outputs(scenario, tmp_path, monkeypatch, capsys):
    """ENOSPC while a product is being written (simulated in-process: the writer's block
    write raises OSError(ENOSPC), as netCDF does on a full disk — a real full disk cannot be
    made without privileges): exit 2, one stderr line naming the file, the earlier complete
    product and restart left unchanged, no temporary left. Common practice, no published
    source."""
    from assim.cli import main
    from assim.io import products

    conf = _copy_inputs(scenario, tmp_path)
    assert main(["run", "--config", str(conf)]) == 0
    before = _hashes(tmp_path / "results")
    capsys.readouterr()
    calls = {"n": 0}
    real = products.RunWriter.write_block

    def full(self, start, arrays):
        calls["n"] += 1
        if calls["n"] > 1:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(self, start, arrays)

    monkeypatch.setattr(products.RunWriter, "write_block", full)
    assert main(["run", "--config", str(conf), "--set", "ensemble.seed=12"]) == 2
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(err) == 1 and "analysis.nc" in err[0] and "No space left" in err[0], err
    assert _hashes(tmp_path / "results") == before
    assert not list((tmp_path / "results").glob(".*.part"))


def test_unwritable_results_folder(scenario, tmp_path):
    """An unwritable results folder: exit 2, one line naming it, nothing written. As root
    (CI) chmod does not stop writes, so the results path is put under a regular file;
    otherwise a folder of mode 0o500 is tried too. Common practice, no published source."""
    conf = _copy_inputs(scenario, tmp_path)
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("x")
    targets = [blocker / "results"]
    if os.geteuid() != 0:
        ro = tmp_path / "readonly"
        ro.mkdir(mode=0o500)
        targets.append(ro / "results")
    for target in targets:
        for command in (("run",), ("hindcast",)):
            r = cli(*command, "--config", conf, "--set", f"results={target}")
            lines = [line for line in r.stderr.splitlines() if line.strip()]
            assert r.returncode == 2 and len(lines) == 1, r.stderr
            assert "Traceback" not in r.stderr and str(target.parent) in lines[0]
    assert blocker.read_text() == "x"


def test_concurrent_runs_on_the_same_outputs(scenario, tmp_path):
    """A second run on the same product while the first is writing it is refused: exit 2,
    one line naming the lock; the first finishes and its product is the uninterrupted one.
    Runs on different products (open loop and assimilation, as the workflow does) go side
    by side. Common practice, no published source."""
    conf = _copy_inputs(scenario, tmp_path)
    first = subprocess.Popen(assim_cmd("run", "--config", conf), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                             text=True)
    lock = tmp_path / "results" / ".analysis.nc.lock"
    deadline = time.monotonic() + 60
    while not lock.exists() and first.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    assert lock.exists(), "the first run never took its lock"
    second = cli("run", "--config", conf)
    other = cli("run", "--mode", "openloop", "--config", conf)
    out, err = first.communicate(timeout=300)
    assert first.returncode == 0, err
    lines = [line for line in second.stderr.splitlines() if line.strip()]
    assert second.returncode == 2 and len(lines) == 1, second.stderr
    assert ".analysis.nc.lock" in lines[0] and "another run" in lines[0]
    assert other.returncode == 0, other.stderr
    assert not lock.exists()
    with xr.open_dataset(tmp_path / "results" / "analysis.nc") as ds:
        assert ds.attrs["caution"] == CAUTION and np.isfinite(ds["discharge"].values).all()


# ------------------------------------------------------------------------ gauge outages


def _outages(df: pd.DataFrame) -> pd.DataFrame:
    """velmorra silent 2012-04-10..04-14 (days) and 2012-06-01..08-15 (months); oskerrin
    never reports (no row at all)."""
    day = df["timestamp"].str[:10]
    gap = ((day >= "2012-04-10") & (day <= "2012-04-14")) | ((day >= "2012-06-01") & (day <= "2012-08-15"))
    return df[(df["basin"] == "velmorra") & ~gap]


def test_gauge_outages_run_through(tmp_path):
    """Outages of days and months and a gauge that never reports: prep, the assimilation
    run and the hindcast go through; on silent days obs_status says 'missing', the
    innovation is NaN and the filter leaves the spread as it was; the silent basin equals
    its open loop. Common practice, no published source."""
    make_raw(tmp_path / "raw", gauge_filter=_outages)
    conf = write_config(tmp_path)
    for command in (("prep",), ("run", "--mode", "openloop"), ("run",), ("hindcast",)):
        r = cli(*command, "--config", conf)
        assert r.returncode == 0, (command, r.stderr)
    with open_product(tmp_path / "results" / "analysis.nc") as da, \
            open_product(tmp_path / "results" / "openloop.nc") as ol:
        meanings = da["obs_status"].attrs["flag_meanings"].split()
        missing = int(da["obs_status"].attrs["flag_values"][meanings.index("missing")])
        used = int(da["obs_status"].attrs["flag_values"][meanings.index("used")])
        status = da["obs_status"].sel(basin="velmorra").to_series()
        for lo, hi in (("2012-04-10", "2012-04-14"), ("2012-06-01", "2012-08-15")):
            assert (status[lo:hi] == missing).all()
            assert da["innovation"].sel(basin="velmorra", time=slice(lo, hi)).isnull().all()
            sb = da["spread_before"].sel(basin="velmorra", time=slice(lo, hi)).values
            sa = da["spread_after"].sel(basin="velmorra", time=slice(lo, hi)).values
            assert np.allclose(sa, sb, equal_nan=True)
        assert (status["2012-03-01":"2012-04-09"] == used).sum() > 20  # readings before the outage are used
        assert (da["obs_status"].sel(basin="oskerrin") == missing).all()
        assert np.isfinite(da["discharge"].values).all()
        np.testing.assert_array_equal(da["discharge"].sel(basin="oskerrin").values,
                                      ol["discharge"].sel(basin="oskerrin").values)
    with open_product(tmp_path / "results" / "hindcast.nc") as hc:
        assert np.isfinite(hc["discharge"].values).all()


def test_late_reading_is_picked_up_by_the_next_forecast(tmp_path):
    """The gauge readings of day d arrive after the forecast of day d was issued: that
    forecast says no reading was assimilated for d; after the late rows are appended and the
    raw folder prepared again, the forecast of day d+1 assimilates them (its analysis note
    counts the readings of d and d+1). Common practice, no published source."""
    d, d1 = "2012-08-20", "2012-08-21"
    gauge = lambda df: df[(df["basin"] == "velmorra") & (df["timestamp"].str[:10] < d)]  # noqa: E731
    make_raw(tmp_path / "raw", ids=("velmorra",), gauge_filter=gauge)
    conf = write_config(tmp_path, period={"end": "2012-08-19"}, forecast={"forcing": "observed"})
    for command in (("prep",), ("run",)):
        r = cli(*command, "--config", conf)
        assert r.returncode == 0, r.stderr
    r = cli("forecast", "--issue-date", d, "--config", conf)
    assert r.returncode == 0, r.stderr
    with xr.open_dataset(tmp_path / "results" / "forecasts" / f"forecast-{d}.nc") as f:
        assert f.attrs["analysis"].startswith("not performed")
    # the readings of d (late) and d+1 arrive; prep again
    full = make_raw(tmp_path / "full", ids=("velmorra",))
    late = pd.read_csv(full / "gauge.csv", dtype=str)
    late = late[late["timestamp"].str[:10].isin([d, d1])]
    with open(tmp_path / "raw" / "gauge.csv", "a") as f:
        late.to_csv(f, header=False, index=False)
    r = cli("prep", "--config", conf)
    assert r.returncode == 0, r.stderr
    r = cli("forecast", "--issue-date", d1, "--config", conf)
    assert r.returncode == 0, r.stderr
    assert r.stderr.count("re-assimilating from") == 1, r.stderr  # said once
    assert f"restart-{d}.nc was written" in r.stderr and "restart.nc\n" in r.stderr, r.stderr
    with xr.open_dataset(tmp_path / "results" / "forecasts" / f"forecast-{d1}.nc") as f:
        note, warned = f.attrs["analysis"], f.attrs.get("warnings", "")
    assert note.startswith("performed: 2 gauge readings"), note
    assert f"restart-{d}.nc was written" in warned and "re-assimilating" in warned
    # with no further change, the next forecast continues from the newest restart (d+1)
    r = cli("forecast", "--issue-date", "2012-08-22", "--config", conf)
    assert r.returncode == 0 and "re-assimilating" not in r.stderr, r.stderr
    with xr.open_dataset(tmp_path / "results" / "forecasts" / "forecast-2012-08-22.nc") as f:
        assert f"valid at {d1}" in f.attrs["analysis"], f.attrs["analysis"]
