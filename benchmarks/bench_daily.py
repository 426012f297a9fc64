"""One ordinary day of operation: the steps of the workflow's `issue` target (`assim prep`
of the raw folder with the day's records appended, then `assim forecast` of that day) for
many basins and a long record, timed as a user runs them (the CLI in a fresh process each,
start-up included).

``run(n_basin, members, years)`` writes an invented raw folder (daily weather, eight gauge
readings a day per basin), prepares it and runs the assimilation through the day before the
last (not timed), appends the last day's records, and times the two commands (prep then
appends the day to the layer; see :func:`assim.preparation.prepare`).
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

REPO = Path(__file__).resolve().parents[1]


def _raw(folder: Path, n_basin: int, n_days: int, seed: int = 0) -> None:
    """basins.yaml, weather.csv and gauge.csv of invented basins, the last day kept apart in
    weather-last.csv and gauge-last.csv."""
    rng = np.random.default_rng(seed)
    ids = [f"basin-{i:04d}" for i in range(n_basin)]
    basins = [{"id": b, "name": f"Invented basin {i}", "area_km2": float(rng.uniform(100, 2000)),
               "latitude": 50.0, "longitude": 0.0, "model": "gr4j",
               "parameters": {"x1": 350.0, "x2": 0.0, "x3": 90.0, "x4": 1.7},
               "thresholds_m3s": {"q2": 80.0}, "gauge": {"kind": "discharge"}} for i, b in enumerate(ids)]
    folder.mkdir(parents=True)
    (folder / "basins.yaml").write_text(yaml.safe_dump({"basins": basins}, sort_keys=False))
    dates = np.datetime64("2000-01-01") + np.arange(n_days)
    b = np.repeat(np.arange(n_basin), n_days)
    d = np.tile(np.arange(n_days), n_basin)
    rain = np.where(rng.random(b.size) < 0.35, np.round(rng.gamma(0.8, 9.0, b.size), 1), 0.0)
    tmin = np.round(5 + 5 * np.sin(2 * np.pi * d / 365.25) + rng.normal(0, 2, b.size), 1)
    w = pd.DataFrame({"date": dates[d].astype(str), "basin": np.array(ids)[b], "precipitation_mm": rain,
                      "tmin_c": tmin, "tmax_c": tmin + 8.0})
    last = w["date"] == str(dates[-1])
    w[~last].to_csv(folder / "weather.csv", index=False)
    w[last].to_csv(folder / "weather-last.csv", index=False, header=False)
    k = np.arange(8)
    bb, dd, kk = (np.repeat(b, 8), np.repeat(d, 8), np.tile(k, b.size))
    minutes = kk * 180 + rng.integers(0, 120, kk.size)
    stamp = (dates[dd].astype("datetime64[m]") + minutes.astype("timedelta64[m]"))
    q = np.round(20 * np.exp(0.5 * np.sin(2 * np.pi * dd / 365.25) + rng.normal(0, 0.1, bb.size)), 3)
    g = pd.DataFrame({"timestamp": np.char.add(np.datetime_as_string(stamp, unit="m"), "Z"),
                      "basin": np.array(ids)[bb], "value": q})
    last = dd == n_days - 1
    g[~last].to_csv(folder / "gauge.csv", index=False)
    g[last].to_csv(folder / "gauge-last.csv", index=False, header=False)


def _cli(*args, cwd) -> float:
    env = {k: v for k, v in os.environ.items() if k not in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                                                             "MKL_NUM_THREADS")}
    env["PYTHONPATH"] = str(REPO)
    t0 = time.perf_counter()
    r = subprocess.run([sys.executable, "-m", "assim", *args, "--config", "config.yaml"], cwd=cwd,
                       capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    if r.returncode:
        raise RuntimeError(r.stderr[-2000:])
    return wall


def run(n_basin: int = 100, members: int = 64, years: int = 10) -> dict:
    """Wall times (s) of `assim prep` and `assim forecast` on an ordinary day."""
    n_days = int(round(years * 365.25))
    with tempfile.TemporaryDirectory(prefix="assim-daily-") as tmp:
        root = Path(tmp)
        _raw(root / "raw", n_basin, n_days)
        last = str(np.datetime64("2000-01-01") + n_days - 1)
        cfg = {"data": {"raw": "raw", "prepared": "results/prepared"}, "results": "results",
               "period": {"start": "2000-01-01", "end": str(np.datetime64(last) - 1), "spinup_days": 60},
               "ensemble": {"members": members, "seed": 1, "scheduler": "synchronous", "progress": False},
               "outputs": {"ensemble": "quantiles", "states": False},
               "forecast": {"leads": 10, "forcing": "climatology"}}
        (root / "config.yaml").write_text(yaml.safe_dump(cfg))
        setup = _cli("prep", cwd=root) + _cli("run", cwd=root)
        for name in ("weather", "gauge"):
            with open(root / "raw" / f"{name}.csv", "a") as f:
                f.write((root / "raw" / f"{name}-last.csv").read_text())
        prep = _cli("prep", cwd=root)
        forecast = _cli("forecast", "--issue-date", last, cwd=root)
        rows = sum(1 for _ in open(root / "raw" / "gauge.csv")) - 1
    return {"basins": n_basin, "members": members, "years": years, "gauge_rows": rows, "setup_s": setup,
            "prep_s": prep, "forecast_s": forecast, "issue_s": prep + forecast}


if __name__ == "__main__":
    # `assim prep` appends the day to the layer (the setup's prep recorded what it was made
    # from), so the cost stays flat as the record grows: the ratio 10 y / 2 y is ~1.
    # Two years is the shortest record: climatology forcing needs another year of weather.
    times = {}
    for y in (2, 5, 10):
        r = run(years=y)
        times[y] = r["issue_s"]
        print(r, "load", os.getloadavg())
    print(f"issue 10 y / 2 y: {times[10] / times[2]:.2f}")
