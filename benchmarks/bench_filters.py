"""Speed of one ensemble analysis (assim.filters.ensemble_update).

Target: 10,000 basins x 128 members x 10 state variables x 1 observation in at most 50 ms on
one core for "enkf" and "eakf"; "etkf" is reported too, with the scaling in members and
basins. Run as ``python benchmarks/bench_filters.py [--quick]`` or call :func:`run`.
Threads are pinned to one (set before numpy is imported).
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from assim.filters import ensemble_update  # noqa: E402

METHODS = ("enkf", "etkf", "eakf")


def _problem(basins, members, n_state, n_obs, seed=0):
    """Stores of 50-300 mm with a spread of 2-15 % of the store, predictions linear in the
    stores, readings within the ensemble's range: a typical day, bounds seldom reached."""
    rng = np.random.default_rng(seed)
    centre = rng.uniform(50.0, 300.0, (basins, 1, n_state))
    spread = centre * rng.uniform(0.02, 0.15, (basins, 1, n_state))
    states = centre + spread * rng.standard_normal((basins, members, n_state))
    weights = rng.uniform(0.0, 0.02, (n_obs, n_state))
    predicted = np.einsum("bin,mn->bim", states, weights)
    observed = predicted.mean(axis=1) + predicted.std(axis=1) * rng.standard_normal((basins, n_obs))
    variance = (0.1 * np.abs(observed)) ** 2
    noise = rng.standard_normal(predicted.shape)
    return states, predicted, observed, variance, noise


def _best_of(fn, repeat):
    best = np.inf
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def time_analysis(method, basins, members, n_state=10, n_obs=1, repeat=5, **options):
    """Best wall time (s) of one ensemble_update over ``repeat`` calls."""
    states, predicted, observed, variance, noise = _problem(basins, members, n_state, n_obs)
    extra = {"obs_noise": noise} if method == "enkf" else {}
    return _best_of(
        lambda: ensemble_update(
            states, predicted, observed, variance, method=method, **extra, **options
        ),
        repeat,
    )


def run(quick: bool = False) -> dict:
    """Time the target case, the options and the scaling.

    Returns
    -------
    dict
        ``target``: {method: ms} for 10,000 x 128 x 10 x 1; ``with_bounds``: the same with
        lower/upper bounds; ``basins`` and ``members``: {method: {size: ms}}; ``n_obs``:
        {method: {n_obs: ms}} at 1,000 basins x 128 members.
    """
    repeat = 2 if quick else 5
    basins_sizes = (1_000, 10_000) if quick else (1_000, 10_000, 100_000)
    member_sizes = (32, 128) if quick else (32, 128, 512)
    out = {"target": {}, "with_bounds": {}, "basins": {}, "members": {}, "n_obs": {}}
    for method in METHODS:
        out["target"][method] = 1e3 * time_analysis(method, 10_000, 128, repeat=repeat)
        out["with_bounds"][method] = 1e3 * time_analysis(
            method, 10_000, 128, repeat=repeat, lower=0.0, upper=1e4
        )
        out["basins"][method] = {
            b: 1e3 * time_analysis(method, b, 128, repeat=max(1, repeat // (b // 10_000 or 1)))
            for b in basins_sizes
        }
        out["members"][method] = {
            n: 1e3 * time_analysis(method, 10_000 if not quick else 2_000, n, repeat=repeat)
            for n in member_sizes
        }
        out["n_obs"][method] = {
            m: 1e3 * time_analysis(method, 1_000, 128, n_obs=m, repeat=repeat) for m in (1, 3, 10)
        }
    return out


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer sizes and repeats")
    args = parser.parse_args()
    results = run(quick=args.quick)
    print(json.dumps(results, indent=2))


if __name__ == "__main__":
    main()
