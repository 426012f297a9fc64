"""Speed of one ensemble analysis (assim.filters.ensemble_update).

Target: 10,000 basins x 128 members x 10 state variables x 1 observation in at most 50 ms on
one core for "enkf" and "eakf"; "etkf" is reported too, with the scaling in members and
basins, and the cost per call at small batch (1 basin and 100 basins of 100 members and 7
states, as the engine calls it once per day). Run as ``python benchmarks/bench_filters.py
[--quick]`` or call :func:`run`. Threads are pinned to one by the environment variables set
here, which take effect only if this module is imported before numpy (as when run as a
script).

The states are laid out as the engine passes them: a model's (batch, n_state) array in
Fortran order, viewed as (basin, member, state), so the member axis is the fastest and each
state is one (basin, member) plane (``layout="planes"``); ``layout="C"`` times C-ordered
states, as a user building (basin, member, state) arrays would pass. Each figure is the best
and the median of several calls, wall-clock and CPU time (``time.process_time``), with the
load average before and after: on a shared machine the CPU time is the steadier figure, the
wall time the one the target is about.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from assim.filters import Inflation, ensemble_update  # noqa: E402

METHODS = ("enkf", "etkf", "eakf")
LAYOUTS = ("planes", "C")


def _planes(a):
    """``a`` (basin, member, state) with the member axis fastest, one plane per state."""
    return np.moveaxis(np.ascontiguousarray(np.moveaxis(a, -1, 0)), 0, -1)


def _problem(basins, members, n_state, n_obs, seed=0, layout="planes"):
    """Stores of 50-300 mm with a spread of 2-15 % of the store, predictions linear in the
    stores, readings within the ensemble's range: a typical day, bounds seldom reached.
    Returns states (in ``layout``), predicted, observed, variance, noise."""
    rng = np.random.default_rng(seed)
    centre = rng.uniform(50.0, 300.0, (basins, 1, n_state))
    spread = centre * rng.uniform(0.02, 0.15, (basins, 1, n_state))
    states = centre + spread * rng.standard_normal((basins, members, n_state))
    weights = rng.uniform(0.0, 0.02, (n_obs, n_state))
    predicted = np.einsum("bin,mn->bim", states, weights)
    observed = predicted.mean(axis=1) + predicted.std(axis=1) * rng.standard_normal((basins, n_obs))
    variance = (0.1 * np.abs(observed)) ** 2
    noise = rng.standard_normal(predicted.shape)
    if layout == "planes":
        states = _planes(states)
    return states, predicted, observed, variance, noise


def _engine_options(basins, members, n_state):
    """What the engine passes besides the arrays: full bounds arrays (0 below; an upper
    bound on all but the last column, the discharge, unbounded above), the default
    innovation gate (5 sigma) and the default inflation record (none)."""
    lower = np.zeros((basins, members, n_state))
    upper = np.full((basins, members, n_state), 1e4)
    upper[..., -1] = np.inf
    return {"lower": lower, "upper": upper, "gate_sigma": 5.0, "inflation": Inflation()}


def _timed(fn, repeat, calls=1):
    """Best and median wall and CPU time (s per call) of ``repeat`` rounds of ``calls``
    calls each."""
    wall, cpu = [], []
    for _ in range(repeat):
        start, start_cpu = time.perf_counter(), time.process_time()
        for _ in range(calls):
            fn()
        wall.append((time.perf_counter() - start) / calls)
        cpu.append((time.process_time() - start_cpu) / calls)
    return min(wall), statistics.median(wall), min(cpu), statistics.median(cpu)


def _figures(times, scale, unit):
    best_w, med_w, best_c, med_c = (round(scale * t, 1) for t in times)
    return {f"wall_{unit}": best_w, f"cpu_{unit}": best_c, f"wall_median_{unit}": med_w,
            f"cpu_median_{unit}": med_c}


def time_analysis(method, basins, members, n_state=10, n_obs=1, repeat=5, layout="planes",
                  **options):
    """Best and median wall and CPU time (ms) of one ensemble_update over ``repeat`` calls
    (after one untimed call): {"wall_ms", "cpu_ms", "wall_median_ms", "cpu_median_ms"}."""
    states, predicted, observed, variance, noise = _problem(basins, members, n_state, n_obs,
                                                            layout=layout)
    extra = {"obs_noise": noise} if method == "enkf" else {}

    def call():
        ensemble_update(states, predicted, observed, variance, method=method, **extra, **options)

    call()
    return _figures(_timed(call, repeat), 1e3, "ms")


def time_per_call(method, basins, members=100, n_state=7, engine=True, calls=1000, repeat=5):
    """Cost of one ensemble_update at small batch (µs per call, best and median of
    ``repeat`` rounds of ``calls`` calls, after 50 untimed ones), in the engine's layout;
    ``engine=True`` with the engine's bounds arrays, gate and inflation record, else bare
    arrays: {"wall_us", "cpu_us", "wall_median_us", "cpu_median_us"}."""
    states, predicted, observed, variance, noise = _problem(basins, members, n_state, 1)
    extra = {"obs_noise": noise} if method == "enkf" else {}
    if engine:
        extra.update(_engine_options(basins, members, n_state))

    def call():
        ensemble_update(states, predicted, observed, variance, method=method, **extra)

    for _ in range(50):
        call()
    return _figures(_timed(call, repeat, calls), 1e6, "us")


TARGET_MS = 50.0


def run(quick: bool = False) -> dict:
    """Time the target case, the options, the small-batch calls and the scaling.

    Returns
    -------
    dict
        Each entry {"wall_ms", "cpu_ms", "wall_median_ms", "cpu_median_ms"} (best and median
        of several calls). ``target``: {method} for 10,000 basins x 128 members x 10 states x
        1 observation in the engine's layout, with ``meets_target``; ``c_order``: the same
        with C-ordered states; ``with_bounds``: with lower and upper bounds; ``with_inflation``:
        with multiplicative inflation 1.1 and RTPS 0.5; ``per_call``: {case: {method}} in µs
        per call ({"wall_us", "cpu_us", ...}) for "1x100x7" and "100x100x7" (basins x members
        x states, one observation) with the engine's options and "1x100x7 bare" without;
        ``basins``: {method: {basins}} at 128 members; ``members``: {method: {members}} at
        10,000 basins (2,000 if quick); ``n_obs``: {method: {n_obs}} at 1,000 basins x 128
        members; ``load``: the load average before and after.
    """
    load_before = os.getloadavg()
    repeat = 3 if quick else 7
    basins_sizes = (1_000, 10_000) if quick else (1_000, 10_000, 30_000)
    member_sizes = (32, 128) if quick else (32, 64, 128, 256)
    calls = 200 if quick else 1000
    keys = ("target", "c_order", "with_bounds", "with_inflation", "per_call", "basins", "members",
            "n_obs")
    out = {key: {} for key in keys}
    cases = {"1x100x7": (1, True, calls), "100x100x7": (100, True, calls // 10),
             "1x100x7 bare": (1, False, calls)}
    for label in cases:
        out["per_call"][label] = {}
    for method in METHODS:
        out["target"][method] = t = time_analysis(method, 10_000, 128, repeat=repeat)
        t["meets_target"] = t["wall_ms"] <= TARGET_MS
        out["c_order"][method] = time_analysis(method, 10_000, 128, repeat=repeat, layout="C")
        out["with_bounds"][method] = time_analysis(
            method, 10_000, 128, repeat=repeat, lower=0.0, upper=1e4
        )
        out["with_inflation"][method] = time_analysis(
            method, 10_000, 128, repeat=repeat, inflation=Inflation(multiplicative=1.1, rtps=0.5)
        )
        for label, (basins, engine, n_calls) in cases.items():
            out["per_call"][label][method] = time_per_call(method, basins, engine=engine,
                                                           calls=n_calls, repeat=repeat)
        out["basins"][method] = {
            b: time_analysis(method, b, 128, repeat=repeat if b <= 10_000 else 3)
            for b in basins_sizes
        }
        out["members"][method] = {
            n: time_analysis(method, 2_000 if quick else 10_000, n, repeat=repeat)
            for n in member_sizes
        }
        out["n_obs"][method] = {
            m: time_analysis(method, 1_000, 128, n_obs=m, repeat=repeat) for m in (1, 3, 10)
        }
    out["load"] = {"before": [round(x, 2) for x in load_before],
                   "after": [round(x, 2) for x in os.getloadavg()]}
    return out


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer sizes and repeats")
    args = parser.parse_args()
    results = run(quick=args.quick)
    print(json.dumps(results, indent=2))


if __name__ == "__main__":
    main()
