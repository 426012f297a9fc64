"""GR4J speed: member-steps per second on one core, batches of 100 and 100,000.

Run as a script (``python benchmarks/bench_models.py [--quick]``) or call :func:`run` from a
benchmark runner. Parameters are drawn uniformly from the valid ranges, forcing is one year
of random daily rain and PET; the model is stepped exactly as the engine steps it (prepared
parameters, a new state array each day). Targets: 1.5 million member-steps/s at batch 100
and 15 million at batch 100,000.

Timings are CPU time of this (single-threaded) process, best of several repeats, so that
other work on a shared machine does not count; wall-clock figures are reported beside them.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from assim.models import get  # noqa: E402

TARGETS = {100: 1.5e6, 100_000: 15e6}


def _forcing(rng, n_days, n):
    wet = rng.random((n_days, n)) < 0.45
    p = np.where(wet, rng.gamma(0.7, 9.0, (n_days, n)), 0.0)
    day = np.arange(n_days)[:, None]
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * day / 365.25) + rng.normal(0, 0.5, (n_days, n)), 0, None)
    return p, e


def member_steps_per_second(
    batch: int, n_days: int = 365, repeat: int = 3, seed: int = 1
) -> tuple[float, float]:
    """Best of ``repeat`` timings of ``n_days`` GR4J steps of a batch of ``batch`` members.

    Parameters
    ----------
    batch : int
        Members stepped together (random parameters from the valid ranges).
    n_days : int
        Daily steps per timing.

    Returns
    -------
    cpu, wall : float
        Member-steps per second (batch * n_days / seconds), by CPU time and by wall clock.
    """
    model = get("gr4j")
    rng = np.random.default_rng(seed)
    params = model.prepare({p.name: rng.uniform(p.low, p.high, batch) for p in model.parameters})
    p, e = _forcing(rng, n_days, batch)
    forcing = [{"precipitation": p[t], "pet": e[t]} for t in range(n_days)]
    cpu = wall = np.inf
    for _ in range(repeat):
        state = model.initial_state(params)
        start_cpu, start_wall = time.process_time(), time.perf_counter()
        for f in forcing:
            state, _ = model.step(state, f, params)
        cpu = min(cpu, time.process_time() - start_cpu)
        wall = min(wall, time.perf_counter() - start_wall)
    return batch * n_days / cpu, batch * n_days / wall


def run(quick: bool = False) -> dict[str, float]:
    """Measure both batch sizes.

    Parameters
    ----------
    quick : bool
        Fewer days and one repeat (a smoke run, less precise).

    Returns
    -------
    dict
        ``gr4j_batch_100`` and ``gr4j_batch_100000``: member-steps per second by CPU time;
        ``gr4j_batch_100_wall`` and ``gr4j_batch_100000_wall``: the same by wall clock.
    """
    n_days, repeat = (60, 1) if quick else (365, 5)
    figures = {}
    for batch in TARGETS:
        cpu, wall = member_steps_per_second(batch, n_days, repeat)
        figures[f"gr4j_batch_{batch}"] = cpu
        figures[f"gr4j_batch_{batch}_wall"] = wall
    return figures


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a shorter, less precise run")
    args = parser.parse_args(argv)
    figures = run(quick=args.quick)
    for batch, target in TARGETS.items():
        cpu, wall = figures[f"gr4j_batch_{batch}"], figures[f"gr4j_batch_{batch}_wall"]
        flag = "meets" if cpu >= target else "below"
        print(f"gr4j batch {batch:>7}: {cpu / 1e6:6.2f} million member-steps/s CPU time "
              f"({wall / 1e6:.2f} wall clock); {flag} target {target / 1e6:g} million")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
