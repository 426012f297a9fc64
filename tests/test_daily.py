"""Daily operation: a year of scheduled forecasts, each continuing from yesterday's restart;
the workflow's `issue` target; the user's config alone driving the workflow."""

from __future__ import annotations

import contextlib
import io
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml
from _scenario import make_raw

from assim import pipeline
from assim.config import load_config
from assim.io.restart import read_restart

REPO = Path(__file__).resolve().parents[1]
SNAKEMAKE = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "workflow" / "Snakefile")]
IDS = ("velmorra", "oskerrin")


def _sample(ids=IDS):
    w = pd.read_csv(REPO / "sample_basin" / "weather.csv", dtype=str)
    g = pd.read_csv(REPO / "sample_basin" / "gauge.csv", dtype=str)
    return w[w["basin"].isin(ids)], g[g["basin"].isin(ids)]


def _append(path: Path, rows: pd.DataFrame) -> None:
    with open(path, "a", encoding="utf-8") as f:
        rows.to_csv(f, header=False, index=False)


def _config(root: Path, **sections) -> Path:
    cfg = {
        "data": {"raw": str(root / "raw"), "prepared": str(root / "results" / "prepared")},
        "results": str(root / "results"),
        "period": {"start": "2012-01-01", "end": "2013-06-30", "spinup_days": 30},
        "ensemble": {"members": 8, "seed": 5, "scheduler": "synchronous", "progress": False},
        "forecast": {"leads": 3, "forcing": "climatology"},
        # a year of issues replayed: the pages keep their tables, drawing is tested elsewhere
        "bulletin": {"figures": False},
        **sections,
    }
    path = root / "config.yaml"
    path.write_text(yaml.safe_dump(cfg, sort_keys=False))
    return path


@pytest.mark.slow
def test_a_year_of_daily_operation(tmp_path):
    """365 scheduled days on two basins, 8 members (common practice, no published source).

    From a run through day 0 (2013-06-30), each day appends that day's weather and readings
    and runs the steps of the workflow's `issue` target (prep, forecast of the latest date),
    in-process, with the CLI on a few days. Some days are silent; the readings of one day
    arrive five days late (appended at the end of gauge.csv); one day's block comes
    unsorted; one row is sent twice. Every day's forecast exists and continues from the
    previous day's restart, except the day the late readings arrive: that forecast says once
    that it re-assimilates, from the restart of the day before the late day. Warnings do not
    grow with the days. The final restart equals a one-shot assimilation run over the whole
    period on the final files exactly (tolerance 0: a day's values depend only on readings
    up to its end, and random numbers only on seed, basin, member and day)."""
    w, g = _sample()
    day0 = np.datetime64("2013-06-30")
    days = day0 + np.arange(1, 366)
    make_raw(tmp_path / "raw", IDS, "2012-01-01", str(day0))
    raw = tmp_path / "raw"
    conf = _config(tmp_path)
    cfg = load_config(conf)
    pipeline.prep(cfg)
    pipeline.run(cfg, mode="assimilate")

    g_day = g["timestamp"].str[:10]
    silent = {str(d) for d in days[::23]}  # no readings at all on these days
    late_day, arrives = str(days[100]), str(days[105])
    unsorted_day, repeated_day = str(days[200]), str(days[250])
    cli_days = {str(days[0]), arrives, str(days[-1])}
    stderr_lines, restarts = [], {}
    for d in days:
        iso = str(d)
        _append(raw / "weather.csv", w[w["date"] == iso])
        today = g[g_day == iso]
        if iso in silent or iso == late_day:
            today = today.iloc[:0]
        if iso == arrives:
            today = pd.concat([today, g[g_day == late_day]])
        if iso == unsorted_day:
            today = today.iloc[::-1]
        if iso == repeated_day:
            today = pd.concat([today, today.iloc[[3]]])
        _append(raw / "gauge.csv", today)
        if iso in cli_days:
            for args in (("prep",), ("forecast",)):
                r = subprocess.run([sys.executable, "-m", "assim", *args, "--config", str(conf)],
                                   capture_output=True, text=True, env={**os.environ, "PYTHONPATH": str(REPO)})
                assert r.returncode == 0, r.stderr
                err = r.stderr
        else:
            buf = io.StringIO()
            with contextlib.redirect_stderr(buf):
                pipeline.prep(cfg)
                ds = pipeline.forecast(cfg)
                ds.close()
            err = buf.getvalue()
        stderr_lines.append([line for line in err.splitlines() if line.strip()])
        path = tmp_path / "results" / "forecasts" / f"forecast-{iso}.nc"
        assert path.is_file(), iso
        with xr.open_dataset(path) as f:
            restarts[iso] = (f.attrs["restart_valid_time"], f.attrs.get("warnings", ""))

    for d in days:
        iso = str(d)
        valid, warned = restarts[iso]
        if iso == arrives:
            assert valid == str(np.datetime64(late_day) - 1), (iso, valid)
            assert warned.count("re-assimilating") == 1, warned
        else:
            assert valid == str(d - 1), (iso, valid, warned)
            assert "re-assimilating" not in warned, (iso, warned)
    said = [k for k, lines in enumerate(stderr_lines) for line in lines if "re-assimilating" in line]
    assert said == [105], said
    assert max(len(lines) for lines in stderr_lines) <= 4
    assert max(len(lines) for lines in stderr_lines[-60:]) <= max(len(lines) for lines in stderr_lines[:60]) + 2

    # one shot over the same period on the final files
    final = load_config(conf, period={"end": str(days[-1])}, results=str(tmp_path / "oneshot"))
    pipeline.run(final, mode="assimilate")
    chain = read_restart(tmp_path / "results" / "forecasts" / f"restart-{days[-1]}.nc")
    shot = read_restart(tmp_path / "oneshot" / "restart.nc")
    assert chain.valid_day == shot.valid_day
    np.testing.assert_array_equal(chain.states, shot.states)
    for name in shot.ar1:
        np.testing.assert_array_equal(chain.ar1[name], shot.ar1[name])


def _documented(block_start: str) -> str:
    """The first line of config/README.md's daily-operation section starting with
    ``block_start``, as written."""
    text = (REPO / "config" / "README.md").read_text()
    section = text[text.index("## Daily operation"):]
    return next(line for line in section.splitlines() if line.startswith(block_start))


def _operational_root(root: Path) -> Path:
    """A folder laid out like the repository for the documented commands: workflow/,
    .venv/bin/snakemake, config/config.yaml (2 basins, 8 members, run through 2013-03-31
    already done), raw records through 2013-03-31."""
    (root / "workflow").symlink_to(REPO / "workflow")
    (root / ".venv" / "bin").mkdir(parents=True)
    exe = root / ".venv" / "bin" / "snakemake"
    exe.write_text(f"#!/bin/sh\nexec {sys.executable} -m snakemake \"$@\"\n")
    exe.chmod(0o755)
    make_raw(root / "raw", IDS, "2012-01-01", "2013-03-31")
    (root / "config").mkdir()
    cfg = {"data": {"raw": "raw", "prepared": "results/prepared"}, "results": "results",
           "period": {"start": "2012-01-01", "end": "2013-03-31", "spinup_days": 30},
           "ensemble": {"members": 8, "seed": 3}, "forecast": {"leads": 3}}
    (root / "config" / "config.yaml").write_text(yaml.safe_dump(cfg))
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    for args in (("prep",), ("run", "--mode", "assimilate")):
        r = subprocess.run([sys.executable, "-m", "assim", *args, "--config", "config/config.yaml"],
                           cwd=root, capture_output=True, text=True, env=env)
        assert r.returncode == 0, r.stderr
    (root / "results" / "logs").mkdir(parents=True, exist_ok=True)
    return root


def _append_day(root: Path, day: str) -> None:
    w, g = _sample()
    _append(root / "raw" / "weather.csv", w[w["date"] == day])
    _append(root / "raw" / "gauge.csv", g[g["timestamp"].str[:10] == day])


@pytest.mark.slow
def test_issue_target_cron_line_and_timer_as_documented(tmp_path):
    """The documented cron line and systemd ExecStart, run as written (the path replaced):
    on an ordinary day (a day's records appended after the full run) Snakemake's dry run of
    `issue` lists prep and the forecast only (no long run, hindcast, verification, figures
    or report), and each documented command issues the forecast of the last weather day
    from the previous day's restart (common practice, no published source)."""
    root = _operational_root(tmp_path)
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    _append_day(root, "2013-04-01")
    r = subprocess.run([*SNAKEMAKE, "--directory", str(root), "--configfile", "config/config.yaml",
                        "--cores", "2", "--dry-run", "--", "issue"], cwd=root, capture_output=True, text=True,
                       env=env)
    assert r.returncode == 0, r.stderr
    table = r.stdout[r.stdout.index("Job stats:"):].split("total")[0]
    jobs = {line.split()[0] for line in table.splitlines()[3:] if line.strip()}
    assert jobs == {"prep", "forecast", "issue"}, r.stdout

    before = (root / "results" / "analysis.nc").stat().st_mtime
    cron = _documented("0 6 * * *").split(None, 5)[5].replace("/path/to/assim", str(root))
    r = subprocess.run(["sh", "-c", cron], capture_output=True, text=True, env=env)
    assert r.returncode == 0, (root / "results" / "logs" / "daily.log").read_text()[-3000:]
    with xr.open_dataset(root / "results" / "forecasts" / "forecast-2013-04-01.nc") as f:
        assert f.attrs["restart_valid_time"] == "2013-03-31"
        assert f.attrs["analysis"].startswith("performed")
    assert (root / "results" / "analysis.nc").stat().st_mtime == before  # the long run untouched

    _append_day(root, "2013-04-02")
    start = _documented("ExecStart=").removeprefix("ExecStart=").replace("/path/to/assim", str(root))
    r = subprocess.run(["sh", "-c", start], cwd=root, capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr[-3000:]
    with xr.open_dataset(root / "results" / "forecasts" / "forecast-2013-04-02.nc") as f:
        assert f.attrs["restart_valid_time"] == "2013-04-01"
        assert "performed: " in f.attrs["analysis"] and "over the 1 days" in f.attrs["analysis"]
    # the workflow's prep keeps the layer (an `update` output) and appends the day to it
    assert "appended 1 day(s)" in (root / "results" / "logs" / "prep.log").read_text()


@pytest.mark.slow
def test_a_minimal_user_config_drives_the_workflow(tmp_path):
    """A user's config with only data, results and period (no config/ folder beside it, so
    nothing of the demo config can leak in) runs the whole workflow, and `assim check`
    accepts the same file (common practice, no published source)."""
    make_raw(tmp_path / "raw", IDS, "2012-01-01", "2013-03-31")
    mine = {"data": {"raw": "raw", "prepared": "out/prepared"}, "results": "out",
            "period": {"start": "2012-01-01", "end": "2013-03-31", "spinup_days": 30}}
    (tmp_path / "my.yaml").write_text(yaml.safe_dump(mine))
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    r = subprocess.run([sys.executable, "-m", "assim", "check", "--config", "my.yaml"], cwd=tmp_path,
                       capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr
    r = subprocess.run([*SNAKEMAKE, "--directory", str(tmp_path), "--configfile", "my.yaml", "--cores", "2"],
                       cwd=tmp_path, capture_output=True, text=True, env=env)
    assert r.returncode == 0, r.stderr[-3000:]
    for name in ("analysis.nc", "openloop.nc", "hindcast.nc", "skill.csv", "report.html",
                 "forecasts/forecast-2013-03-31.nc"):
        assert (tmp_path / "out" / name).is_file(), name
    with xr.open_dataset(tmp_path / "out" / "analysis.nc") as a:
        assert str(a["time"].values[-1])[:10] == "2013-03-31"


def _forecast(cfg, day):
    """The forecast's attributes and its operator notices, one line each (the pipeline emits
    them once as AssimWarning; the CLI prints each as one line)."""
    import warnings

    from assim.errors import AssimWarning

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        ds = pipeline.forecast(cfg, day)
    attrs = dict(ds.attrs)
    ds.close()
    return attrs, "".join(f"{w.message}\n" for w in caught if issubclass(w.category, AssimWarning))


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    root = tmp_path_factory.mktemp("choice")
    make_raw(root / "raw", ("oskerrin",), "2012-01-01", "2013-01-31")
    conf = _config(root, period={"start": "2012-01-01", "end": "2012-12-31", "spinup_days": 30},
                   forecast={"leads": 2, "forcing": "observed"})
    pipeline.prep(load_config(conf))
    return root, conf


def test_restart_choice_after_the_members_change(small, tmp_path):
    """Issue 13 item 6: after the config moves from 8 to 10 members and `assim run` writes a
    fresh restart.nc, the next forecast continues from it, passing over the newer 8-member
    forecast restart with one line saying why (common practice, no published source)."""
    root, conf = small
    cfg = load_config(conf, results=str(tmp_path))
    pipeline.run(cfg, mode="assimilate")
    assert _forecast(cfg, "2013-01-05")[0]["restart_valid_time"] == "2012-12-31"
    cfg10 = load_config(conf, results=str(tmp_path), ensemble={"members": 10})
    pipeline.run(cfg10, mode="assimilate")
    attrs, err = _forecast(cfg10, "2013-01-08")
    assert attrs["restart"] == str(tmp_path / "restart.nc") and attrs["restart_valid_time"] == "2012-12-31"
    assert attrs["members"] == 10
    assert err.count("passed over") == 1 and "restart-2013-01-05.nc" in err and "members 8" in err, err


def test_restart_choice_after_run_until_then_a_full_run(small, tmp_path):
    """`run --until` then a full `run` leaves restart.nc valid after the next issue date: the
    forecast continues from the newest earlier forecast restart instead of refusing. A
    damaged older restart is never opened; a damaged newer one is passed over for the
    newest good one, and the forecast says so once (common practice, no published source)."""
    root, conf = small
    cfg = load_config(conf, results=str(tmp_path))
    pipeline.run(cfg, mode="assimilate", until="2012-11-30")
    assert _forecast(cfg, "2012-12-10")[0]["restart_valid_time"] == "2012-11-30"
    pipeline.run(cfg, mode="assimilate")
    attrs, err = _forecast(cfg, "2012-12-15")
    assert attrs["restart_valid_time"] == "2012-12-10" and err == "", err
    assert _forecast(cfg, "2012-12-16")[0]["restart_valid_time"] == "2012-12-15"
    folder = tmp_path / "forecasts"
    older = folder / "restart-2012-12-10.nc"
    older.write_bytes(older.read_bytes()[:500])  # truncated
    attrs, err = _forecast(cfg, "2012-12-17")
    assert attrs["restart_valid_time"] == "2012-12-16" and err == "", err
    newest = folder / "restart-2012-12-17.nc"
    newest.write_bytes(newest.read_bytes()[:500])
    attrs, err = _forecast(cfg, "2012-12-18")
    assert attrs["restart_valid_time"] == "2012-12-16", attrs
    assert err.count("\n") == 1 and "unreadable" in err and "restart-2012-12-17.nc" in err, err
