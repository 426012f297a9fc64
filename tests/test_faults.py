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
    "analysis.nc": ("discharge", "discharge_background", "obs_status", "innovation", "clipped_water"),
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


# ------------------------------------------------------------------- a real full disk


def _mount_tmpfs(folder: Path, size: str) -> str | None:
    """Mount a tmpfs of ``size`` on ``folder``; None if done, else the reason it cannot be."""
    folder.mkdir(parents=True, exist_ok=True)
    if os.geteuid() != 0:
        return "mounting a tmpfs needs root"
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)],
                       capture_output=True, text=True)
    return None if r.returncode == 0 else f"mount -t tmpfs failed: {r.stderr.strip() or r.returncode}"


@pytest.fixture()
def small_disk(tmp_path):
    """A 2 MB tmpfs (a real file system that fills up), unmounted afterwards; skipped, with
    the reason printed, where it cannot be mounted (not root, no mount permission)."""
    disk = tmp_path / "disk"
    why = _mount_tmpfs(disk, "2m")
    if why is not None:
        print(f"\nSKIPPED real full-disk test: {why}")
        pytest.skip(why)
    yield disk
    subprocess.run(["umount", "-l", str(disk)], check=False)


def _fill(disk: Path, leave: int) -> None:
    """Fill ``disk`` so that about ``leave`` bytes stay free (whole pages)."""
    free = shutil.disk_usage(disk).free
    with open(disk / "filler", "ab") as f:
        f.write(b"\0" * max(0, free - leave))
        f.flush()
        os.fsync(f.fileno())


def _unfill(disk: Path) -> None:
    with __import__("contextlib").suppress(FileNotFoundError):
        (disk / "filler").unlink()


def _keep(disk: Path, folder: Path) -> None:
    """Hard links of every file of ``folder`` elsewhere on the disk: the old files' space
    stays used after they are replaced, as with a backup or a reader holding them open."""
    keep = disk / "keep" / f"{folder.name}-{time.monotonic_ns()}"
    keep.mkdir(parents=True)
    for p in folder.iterdir():
        if p.is_file():
            os.link(p, keep / p.name)


def _one_clean_line(r):
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert r.returncode == 2, r.stderr
    assert "Traceback" not in r.stderr and len(lines) == 1, r.stderr
    return lines[0]


@pytest.mark.parametrize("leave_kb", [5, 40, "between"])
def test_prep_on_a_really_full_disk_keeps_the_old_layer(scenario, small_disk, tmp_path, leave_kb):
    """The prepared folder on a real small tmpfs, the old files hard-linked elsewhere so
    their space stays used, raw precipitation changed, the disk filled to a few kB free (5,
    40, and enough for forcing.nc but not for the rest): `assim prep` exits 2 with one line
    naming the file (never netCDF's RuntimeError or a PermissionError traceback), the three
    old files are left byte for byte, no temporary remains, and a run accepts the layer
    (it is not mixed). Common practice, no published source."""
    root = tmp_path / "work"
    conf = _copy_inputs(scenario, root)
    prepared = small_disk / "prepared"
    shutil.copytree(scenario / "prepared", prepared)
    conf = write_config(root, data={"raw": str(root / "raw"), "prepared": str(prepared)})
    _keep(small_disk, prepared)
    before = _hashes(prepared)
    w = pd.read_csv(root / "raw" / "weather.csv", dtype=str)
    w["precipitation_mm"] = (w["precipitation_mm"].astype(float) * 1.1).round(2).map(str)
    w.to_csv(root / "raw" / "weather.csv", index=False)
    leave = (prepared / "forcing.nc").stat().st_size + 8192 if leave_kb == "between" else leave_kb * 1024
    _fill(small_disk, leave)
    r = cli("prep", "--config", conf)
    line = _one_clean_line(r)
    assert "prepared" in line and "earlier output left as it was" in line, line
    assert _hashes(prepared) == before
    assert not [p.name for p in prepared.iterdir() if p.name.endswith(".part")]
    _unfill(small_disk)
    r = cli("run", "--mode", "openloop", "--config", conf)
    assert r.returncode == 0, r.stderr


@pytest.mark.parametrize("leave_kb", [12, "half", "between"])
def test_run_on_a_really_full_disk_keeps_product_and_restart_together(scenario, small_disk, tmp_path, leave_kb):
    """The results folder on a real small tmpfs, the first run's analysis.nc and restart.nc
    hard-linked elsewhere, the disk filled to 12 kB, half the product's size, and enough for
    analysis.nc but not its restart: `assim run --set ensemble.seed=12` exits 2 with one line, and
    analysis.nc and restart.nc are both the old ones (seed 11), never a new product beside
    an old restart. Common practice, no published source."""
    conf = _copy_inputs(scenario, tmp_path / "work")
    results = small_disk / "results"
    conf = write_config(tmp_path / "work", results=str(results))
    r = cli("run", "--config", conf)
    assert r.returncode == 0, r.stderr
    _keep(small_disk, results)
    before = _hashes(results)
    size = (results / "analysis.nc").stat().st_size
    leave = {"between": size + 16384, "half": size // 2}.get(leave_kb, leave_kb * 1024)
    _fill(small_disk, leave)
    r = cli("run", "--config", conf, "--set", "ensemble.seed=12")
    line = _one_clean_line(r)
    assert "results" in line and ("No space" in line or "HDF" in line or "kB free" in line), line
    assert _hashes(results) == before
    for name in ("analysis.nc", "restart.nc"):
        with xr.open_dataset(results / name) as ds:
            assert int(ds.attrs["seed"]) == 11


# --------------------------------------------------------- continued runs keep their days


@pytest.mark.parametrize("extra", [["--set", "ensemble.scheduler=threads", "--set", "ensemble.workers=2"],
                                   ["--set", "period.end=2012-08-31", "--set", "ensemble.time_block_days=7"]])
def test_continued_run_keeps_the_earlier_days(scenario, tmp_path, extra):
    """`run --until D` then `run --restart-from restart.nc` with settings that do not change
    results (scheduler, workers, block size) or a later period.end: the product holds every
    day, equal to the uninterrupted run's (it used to shrink to the continued days). Common
    practice, no published source."""
    ref = _copy_inputs(scenario, tmp_path / "ref")
    assert cli("run", "--config", ref).returncode == 0
    conf = _copy_inputs(scenario, tmp_path / "split")
    results = tmp_path / "split" / "results"
    first_end = "2012-06-30"
    args = ["--set", f"period.end={first_end}"] if "period.end=2012-08-31" in extra else ["--until", first_end]
    r = cli("run", "--config", conf, *args)
    assert r.returncode == 0, r.stderr
    r = cli("run", "--config", conf, "--restart-from", results / "restart.nc", *extra)
    assert r.returncode == 0, r.stderr
    with xr.open_dataset(tmp_path / "ref" / "results" / "analysis.nc") as a, xr.open_dataset(results / "analysis.nc") as b:
        assert b.sizes["time"] == a.sizes["time"]
        np.testing.assert_array_equal(a["discharge"].values, b["discharge"].values)


def test_continued_run_that_cannot_keep_its_days_is_refused(scenario, tmp_path):
    """A continuation with settings that change results cannot keep the product's earlier
    days: it is refused with one line naming the product, which is left as it was. Common
    practice, no published source."""
    conf = _copy_inputs(scenario, tmp_path)
    results = tmp_path / "results"
    assert cli("run", "--config", conf, "--until", "2012-06-30").returncode == 0
    before = _hashes(results)
    r = cli("run", "--config", conf, "--restart-from", results / "restart.nc", "--set", "outputs.float32=false")
    line = _one_clean_line(r)
    assert "analysis.nc" in line and "cannot keep" in line
    assert _hashes(results) == before


# ----------------------------------------------------------------------------- locks


def test_lock_of_an_unrelated_live_process_does_not_block(scenario, tmp_path):
    """A lock naming the PID of a live process that is not the run that wrote it (another
    start time, or an old lock without one naming a process that is not assim): reported
    as stale and replaced, the run goes through. Common practice, no published source."""
    import socket

    from assim.io.common import _start_time

    conf = _copy_inputs(scenario, tmp_path)
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        (tmp_path / "results").mkdir()
        lock = tmp_path / "results" / ".openloop.nc.lock"
        for content in (f"{sleeper.pid} {socket.gethostname()} {int(_start_time(sleeper.pid)) - 5}\n",
                        f"{sleeper.pid} {socket.gethostname()}\n", f"1 {socket.gethostname()} 1\n"):
            lock.write_text(content)
            r = cli("run", "--mode", "openloop", "--config", conf)
            assert r.returncode == 0, r.stderr
            assert "stale lock" in r.stderr and not lock.exists()
    finally:
        sleeper.kill()
        sleeper.wait()


def test_prep_waits_for_a_run_reading_the_layer(scenario, tmp_path):
    """A reader holds the prepared layer's shared lock (as `assim run` does while it reads)
    for 3 s: a concurrent `assim prep` does not replace any file until it lets go, so the
    reader sees the same layer at the start and the end of its hold. Common practice, no
    published source."""
    conf = _copy_inputs(scenario, tmp_path)
    prepared = tmp_path / "prepared"
    reader = subprocess.Popen([sys.executable, "-c", (
        "import hashlib, pathlib, sys, time\n"
        "from assim.io.common import layer_lock\n"
        f"p = pathlib.Path({str(prepared)!r})\n"
        "h = lambda: [hashlib.sha256((p / n).read_bytes()).hexdigest() for n in ('forcing.nc', 'observations.nc', 'basins.nc')]\n"
        "with layer_lock(p, exclusive=False):\n"
        "    print('held', flush=True); a = h(); time.sleep(3); b = h()\n"
        "print('same' if a == b else 'changed', time.time(), flush=True)\n")],
        stdout=subprocess.PIPE, text=True)
    assert reader.stdout.readline().strip() == "held"
    w = pd.read_csv(tmp_path / "raw" / "weather.csv", dtype=str)
    w["precipitation_mm"] = (w["precipitation_mm"].astype(float) + 0.5).map(str)
    w.to_csv(tmp_path / "raw" / "weather.csv", index=False)
    r = cli("prep", "--config", conf)
    assert r.returncode == 0, r.stderr
    verdict, released = reader.stdout.readline().split()
    reader.wait()
    assert verdict == "same"
    # replaced (renamed into place: the inode's change time) only after the reader let go;
    # its contents may have been written to the temporary before
    assert (prepared / "forcing.nc").stat().st_ctime >= float(released) - 0.5


# ----------------------------------------------------------------------- closed stdout


def test_closed_stdout_ends_cleanly_after_the_files_are_written(scenario, tmp_path):
    """`assim forecast ... | (exit 0)`: the reader of stdout is gone before the summary is
    printed; the forecast and its restart are written and the command exits 0 without a
    traceback. Common practice, no published source."""
    conf = _copy_inputs(scenario, tmp_path)
    conf = write_config(tmp_path, period={"end": "2012-08-20"}, forecast={"leads": 3, "forcing": "observed"})
    assert cli("run", "--config", conf).returncode == 0
    cmd = " ".join(map(str, assim_cmd("forecast", "--issue-date", "2012-08-25", "--config", conf)))
    r = subprocess.run(f"{cmd} | (exit 0)", shell=True, capture_output=True, text=True, timeout=300,
                       env={**os.environ, "PYTHONWARNINGS": "ignore"})
    assert "Traceback" not in r.stderr, r.stderr
    folder = tmp_path / "results" / "forecasts"
    assert (folder / "forecast-2012-08-25.nc").exists() and (folder / "restart-2012-08-25.nc").exists(), r.stderr
    p = subprocess.Popen(assim_cmd("forecast", "--issue-date", "2012-08-25", "--config", conf),
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    p.stdout.close()
    err = p.stderr.read()
    assert p.wait(timeout=300) == 0 and "Traceback" not in err, err


def test_set_accepts_a_date(scenario, tmp_path):
    """`--set period.end=2012-06-30` (a date as YAML would read it) is accepted as the
    string the schema expects. Common practice, no published source."""
    conf = _copy_inputs(scenario, tmp_path)
    r = cli("run", "--mode", "openloop", "--config", conf, "--set", "period.end=2012-06-30")
    assert r.returncode == 0, r.stderr
    with xr.open_dataset(tmp_path / "results" / "openloop.nc") as ds:
        assert str(ds["time"].values[-1])[:10] == "2012-06-30"
