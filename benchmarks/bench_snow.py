"""The snow routine's cost: gr4j+snow on the fused kernel, against the numpy path and GR4J alone.

Run as a script (``python benchmarks/bench_snow.py [--quick]``; not part of ``run.py``'s
table). Synthetic invented basins over cold winters: random daily rain, seasonal PET and a
seasonal temperature from -8 to +12 degC with day-to-day noise (the pack builds and melts
every year), gauge readings from an unperturbed GR4J run with 10 % noise, every day. Each
case is an assimilation run (enkf, the snowpack updated with the stores, temperature error
1.5 degC) through ``assim.engine.run`` with the synchronous scheduler, one core, outputs
handed to a sink that writes nothing; the best of 3 after a first run that loads the
compiled code. Three runs per size:

- ``gr4j`` on the kernel (the rain-only run's cost);
- ``gr4j+snow`` on the kernel (every basin with snow);
- ``gr4j+snow`` on the numpy path (what a snow run cost before the kernel had its form).

Reported: wall and CPU time (each the smallest of the repeats), member-steps per second of
CPU, and the load average (``os.getloadavg``) before each case.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

SIZES = ((20, 64, 730), (100, 100, 365))
QUICK_SIZES = ((5, 16, 120),)
SNOW = {"snow_routine": 1.0, "snow_threshold": 0.5, "snow_interval": 2.0, "melt_threshold": 0.0,
        "degree_day_factor": 3.5, "water_holding": 0.1, "refreezing": 0.05}


def _inputs(n_basin: int, n_days: int, seed: int = 0):
    from assim import engine, models
    from assim import perturb as pt

    m = models.get("gr4j")
    rng = np.random.default_rng(seed)
    p = np.where(rng.random((n_basin, n_days)) < 0.35, rng.gamma(0.8, 9.0, (n_basin, n_days)), 0.0)
    day = np.arange(n_days)
    season = np.sin(2 * np.pi * (day - 100) / 365.25)
    e = np.clip(2.5 + 2.0 * season, 0.3, None)[None].repeat(n_basin, 0)
    temp = 2.0 + 10.0 * season[None] + rng.normal(0.0, 3.0, (n_basin, n_days))
    params = {"x1": rng.uniform(200, 600, n_basin), "x2": rng.uniform(-1, 1, n_basin),
              "x3": rng.uniform(50, 150, n_basin), "x4": rng.uniform(1.2, 3.0, n_basin)}
    area = rng.uniform(100, 2000, n_basin)
    x = m.initial_state(params)
    prepared = m.prepare(params)
    obs = np.empty((n_basin, n_days))
    for t in range(n_days):
        x, f = m.step(x, {"precipitation": p[:, t], "pet": e[:, t]}, prepared)
        obs[:, t] = f["runoff"] * area / 86.4
    obs *= 1 + 0.1 * rng.standard_normal(obs.shape)
    np.maximum(obs, 0.0, out=obs)
    ids = tuple(f"basin-{i:04d}" for i in range(n_basin))
    params.update({k: np.full(n_basin, v) for k, v in SNOW.items()})
    return engine.Inputs(ids, pt.basin_keys(ids), area, np.arange(n_days, dtype=np.int64) + 10957, p, e, obs,
                         np.zeros((n_basin, n_days), dtype=bool), params, temperature=temp)


class _Null:
    def write_block(self, start, arrays):
        pass


def _case(inputs, model_name: str, kernel: str, members: int, repeat: int = 3) -> dict:
    from assim import engine, models
    from assim import perturb as pt

    m = models.get(model_name)
    if model_name == "gr4j":
        inputs = engine.Inputs(inputs.basin_ids, inputs.keys, inputs.area_km2, inputs.days, inputs.precipitation,
                               inputs.pet, inputs.observed, inputs.rejected,
                               {k: inputs.parameters[k] for k in m.parameter_names})
    settings = engine.Settings(mode="assimilate", members=members, seed=1, spinup_days=0,
                               update_states=m.default_updated_states(), scheduler="synchronous",
                               time_block_days=365, kernel=kernel, temperature=pt.GaussianAR1(1.5, 0.7))
    load = os.getloadavg()[0]
    walls, cpus = [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        engine.run(m, inputs, settings, _Null())  # loads (or compiles) the kernel
        for _ in range(repeat):
            cpu0, t0 = time.process_time(), time.perf_counter()
            summary = engine.run(m, inputs, settings, _Null())
            walls.append(time.perf_counter() - t0)
            cpus.append(time.process_time() - cpu0)
    steps = inputs.n_basin * members * len(inputs.days)
    return {"model": model_name, "kernel": kernel, "wall_s": min(walls), "cpu_s": min(cpus),
            "member_steps_per_cpu_s": steps / min(cpus), "readings_used": int(summary.n_used.sum()), "load": load}


def run(quick: bool = False) -> list[dict]:
    out = []
    for nb, nm, nt in QUICK_SIZES if quick else SIZES:
        inputs = _inputs(nb, nt)
        for model_name, kernel in (("gr4j", "compiled"), ("gr4j+snow", "compiled"), ("gr4j+snow", "numpy")):
            r = _case(inputs, model_name, kernel, nm)
            r.update(basins=nb, members=nm, days=nt)
            out.append(r)
            print(f"{nb} x {nm} x {nt} d  {model_name:10s} {kernel:8s}  wall {r['wall_s']:.3f} s  "
                  f"CPU {r['cpu_s']:.3f} s  {r['member_steps_per_cpu_s'] / 1e6:.1f} M member-steps/CPU s  "
                  f"load {r['load']:.1f}", flush=True)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes (a smoke run, not for quoting)")
    run(ap.parse_args(argv).quick)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
