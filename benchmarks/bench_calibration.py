"""Calibration speed: 100 basins x 10 years in one batch, against one basin alone.

Run as a script (``python benchmarks/bench_calibration.py [--quick]``) or call :func:`run`.
Synthetic basins: GR4J with parameters drawn from typical ranges, random daily rain and a
seasonal PET, 10 % multiplicative noise on the flows; each basin is calibrated by
``assim.calibration.search`` (KGE, population 40, the default DE settings, search box
x1 10-2000 mm, x2 -5-3 mm/d, x3 10-600 mm, x4 0.5-5 d) over 10 years after one year of
warm-up, exactly as ``assim calibrate`` calls it. Targets: 100 basins x 10 years in at
most 5 minutes of wall time, and a batched cost per basin-year at most 3x that of one basin
calibrated alone (the population of every basin is one batch). One thread; wall time.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from assim import calibration, models  # noqa: E402
from assim.verification import metrics  # noqa: E402

TARGET_WALL_S = 300.0
TARGET_RATIO = 3.0
BOX = ((10.0, 2000.0), (-5.0, 3.0), (10.0, 600.0), (0.5, 5.0))


def synthetic(n_basin: int, years: int, seed: int = 1) -> calibration.Problem:
    """A calibration problem of ``n_basin`` synthetic GR4J basins over 1 + ``years`` years."""
    m = models.get("gr4j")
    rng = np.random.default_rng(seed)
    n_days = 365 * (years + 1)
    p = np.where(rng.random((n_basin, n_days)) < 0.4, rng.gamma(0.8, 9.0, (n_basin, n_days)), 0.0)
    day = np.arange(n_days)
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * (day - 100) / 365.25), 0.3, None)[None].repeat(n_basin, 0)
    truth = {"x1": rng.uniform(150, 900, n_basin), "x2": rng.uniform(-1, 0.5, n_basin),
             "x3": rng.uniform(40, 300, n_basin), "x4": rng.uniform(1.1, 3.5, n_basin)}
    q = calibration.simulate(m, {"precipitation": p, "pet": e}, truth)
    obs = q * np.exp(0.1 * rng.standard_normal(q.shape))
    lo = np.tile([b[0] for b in BOX], (n_basin, 1))
    hi = np.tile([b[1] for b in BOX], (n_basin, 1))
    ids = tuple(f"basin-{i:04d}" for i in range(n_basin))
    return calibration.Problem(ids, {"precipitation": p, "pet": e}, obs, 365, m.parameter_names, lo, hi, {})


def time_search(n_basin: int, years: int, seed: int = 20261201) -> dict:
    """Wall and CPU time of calibrating ``n_basin`` basins over ``years`` years."""
    problem = synthetic(n_basin, years)
    settings = calibration.Settings(seed=seed, population=40)
    t0, c0 = time.perf_counter(), time.process_time()
    r = calibration.search(models.get("gr4j"), problem, settings, metrics.kge)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    return {"basins": n_basin, "years": years, "wall_s": wall, "cpu_s": cpu,
            "generations_mean": float(r.generations.mean()), "generations_max": int(r.generations.max()),
            "converged": int(r.converged.sum()), "kge_median": float(np.median(r.objective)),
            "per_basin_year_s": wall / (n_basin * years)}


def run(quick: bool = False) -> dict:
    """The batched run and the single basin, with the load average before each."""
    n_basin, years = (10, 2) if quick else (100, 10)
    out = {"load_before_batch": os.getloadavg()[0]}
    out["batch"] = time_search(n_basin, years)
    out["load_before_single"] = os.getloadavg()[0]
    out["single"] = time_search(1, years)
    out["ratio_per_basin_year"] = out["batch"]["per_basin_year_s"] / out["single"]["per_basin_year_s"]
    out["met_wall"] = out["batch"]["wall_s"] <= TARGET_WALL_S
    out["met_ratio"] = out["ratio_per_basin_year"] <= TARGET_RATIO
    return out


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    print(json.dumps(run(quick=parser.parse_args().quick), indent=1))
