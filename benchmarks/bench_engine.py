"""Engine speed and memory: assimilation runs of GR4J ensembles, with and without writing.

Run as a script (``python benchmarks/bench_engine.py [--quick]``) or call :func:`run` from a
benchmark runner. Every case runs in a fresh subprocess, so that its peak memory
(``resource.getrusage``, maximum resident set size) is its own. Inputs are synthetic
(invented basins): random daily rain, seasonal PET, and gauge readings taken from an
unperturbed GR4J run with 10 % noise, one reading every day.

Cases and targets:

1. one basin, 100 members, 20 years daily, assimilation every day: <= 1.5 s wall for the
   engine run on one core (synchronous scheduler), without and with writing analysis.nc
   (best of 3 runs in one process);
2. 1,000 basins x 128 members x 3 years daily, assimilation every day, on 2 cores
   (``SCALE_SCHEDULER``: dask's threaded scheduler with 2 workers; the fused compiled kernel
   releases the GIL), without file and with output streamed to NetCDF: >= 30 million
   member-steps per second end to end without file (every member streamed: 20 million),
   peak memory <= 2 GB;
3. scaling: wall time against basins, members and years (should be linear; best of 3).

Wall-clock and CPU times are both reported: on a shared machine the CPU time is the steadier
figure. ``cpu_s`` is the CPU time of the process that runs the engine (for the threads
scheduler it sums both workers; for the processes scheduler it is the main process, which
joins the blocks and writes the file) and ``cpu_workers_s`` that of its worker processes.
Peak memory (``peak_rss_mb``) is the main process's largest resident set, plus, for the
processes scheduler, the number of workers times the largest of a worker (an upper bound
of their sum, since the peaks need not coincide).
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import resource  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

# Run from anywhere: the repository's package first (an editable install made before
# assim/__init__.py existed resolves `assim` as a namespace package).
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

TARGET_SINGLE_S = 1.5
TARGET_RATE = 30e6  # with the fused compiled kernel
TARGET_MEMORY_MB = 2000.0
SCALE_SCHEDULER = "threads"


def _inputs(n_basin: int, n_days: int, seed: int = 0):
    from assim import engine, models
    from assim import perturb as pt

    m = models.get("gr4j")
    rng = np.random.default_rng(seed)
    p = np.where(rng.random((n_basin, n_days)) < 0.35, rng.gamma(0.8, 9.0, (n_basin, n_days)), 0.0)
    day = np.arange(n_days)
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * (day - 100) / 365.25), 0.3, None)[None].repeat(n_basin, 0)
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
    return m, engine.Inputs(ids, pt.basin_keys(ids), area, np.arange(n_days, dtype=np.int64) + 10957, p, e, obs,
                            np.zeros((n_basin, n_days), dtype=bool), params)


class _Null:
    def write_block(self, start, arrays):
        pass


def _case(n_basin, members, years, *, scheduler, workers, basin_chunk, block_days, write, states, quantiles=None,
          repeat=1, compression="none"):
    """A timed engine run, the best of ``repeat``; returns its figures (runs in the current process).

    ``wall_s`` and ``cpu_s`` are the smallest of the repeats (each its own smallest: other
    work on a shared machine only ever adds time); ``wall_all_s`` lists every repeat."""
    from assim import engine
    from assim.io.products import RunWriter

    n_days = int(round(365 * years))
    model, inputs = _inputs(n_basin, n_days)
    settings = engine.Settings(
        mode="assimilate", members=members, seed=1, spinup_days=0,
        update_states=model.default_updated_states(),
        write_states=model.reported_states(model.default_updated_states()) if states else (),
        quantiles=quantiles, basin_chunk=basin_chunk, time_block_days=block_days,
        scheduler=scheduler, workers=workers,
    )
    walls, cpus, workers_cpu = [], [], []
    for _ in range(repeat):
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / "analysis.nc"
            children0 = resource.getrusage(resource.RUSAGE_CHILDREN)
            cpu0, t0 = time.process_time(), time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                if write:
                    with RunWriter(path, basins=inputs.basin_ids, days=inputs.days, members=members,
                                   mode="assimilate", state_names=settings.write_states, quantiles=quantiles,
                                   time_chunk=block_days, compression=compression) as sink:
                        summary = engine.run(model, inputs, settings, sink)
                else:
                    summary = engine.run(model, inputs, settings, _Null())
            walls.append(time.perf_counter() - t0)
            cpus.append(time.process_time() - cpu0)
            children = resource.getrusage(resource.RUSAGE_CHILDREN)  # worker processes, once ended
            workers_cpu.append((children.ru_utime + children.ru_stime) - (children0.ru_utime + children0.ru_stime))
            size = path.stat().st_size / 1e6 if write else 0.0
    wall, cpu, cpu_workers = min(walls), min(cpus), min(workers_cpu)
    steps = n_basin * members * n_days
    return {
        "basins": n_basin, "members": members, "days": n_days, "scheduler": scheduler, "workers": workers,
        "write": write, "compression": compression, "repeat": repeat, "wall_s": wall, "wall_all_s": walls, "cpu_s": cpu,
        "cpu_workers_s": cpu_workers, "member_steps_per_s": steps / wall, "file_mb": size,
        "readings_used": int(summary.n_used.sum()),
        "peak_rss_mb": (resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
                        + (workers * resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
                           if scheduler == "processes" else 0)) / 1024.0,
        "load_average": os.getloadavg()[0],
    }


def _in_subprocess(**kw) -> dict:
    out = subprocess.run([sys.executable, __file__, "--case", json.dumps(kw)], capture_output=True, text=True,
                         check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def run(quick: bool = False) -> dict:
    """All cases; ``quick`` shrinks them (for a smoke test of the script, not for targets)."""
    years_single = 2 if quick else 20
    single = [_in_subprocess(n_basin=1, members=100, years=years_single, scheduler="synchronous", workers=1,
                             basin_chunk=1, block_days=365 * years_single + 1, write=w, states=True, repeat=3)
              for w in (False, True)]
    big = (50, 128, 0.5) if quick else (1000, 128, 3)
    many = [_in_subprocess(n_basin=big[0], members=big[1], years=big[2], scheduler=SCALE_SCHEDULER, workers=2,
                           basin_chunk=250, block_days=30, write=True, states=s, quantiles=q)
            for s, q in ((False, None), (True, None), (False, [0.05, 0.25, 0.5, 0.75, 0.95]))]
    many.insert(0, _in_subprocess(n_basin=big[0], members=big[1], years=big[2], scheduler=SCALE_SCHEDULER,
                                  workers=2, basin_chunk=250, block_days=30, write=False, states=False))
    base = (10, 32, 0.25) if quick else (50, 64, 1.0)
    scaling = []
    for factor in (1, 2, 4):
        for what, dims in (("basins", (base[0] * factor, base[1], base[2])),
                           ("members", (base[0], base[1] * factor, base[2])),
                           ("years", (base[0], base[1], base[2] * factor))):
            if factor == 1 and what != "basins":
                continue
            r = _in_subprocess(n_basin=dims[0], members=dims[1], years=dims[2], scheduler="synchronous",
                               workers=1, basin_chunk=10_000, block_days=365, write=False, states=False, repeat=3)
            r["varied"] = "base" if factor == 1 else what
            scaling.append(r)
    return {"single_basin": single, "many_basins": many, "scaling": scaling}


def _print(results: dict) -> None:
    print("1. one basin, 100 members, assimilation every day (synchronous, one core)")
    for r in results["single_basin"]:
        ok = "ok" if r["wall_s"] <= TARGET_SINGLE_S else "MISSED"
        print(f"   {r['days']} days, write={r['write']!s:5}: wall {r['wall_s']:.2f} s, cpu {r['cpu_s']:.2f} s "
              f"(target {TARGET_SINGLE_S} s wall: {ok})")
    print(f"2. many basins, 128 members, assimilation every day ({SCALE_SCHEDULER}, 2 workers)")
    for r in results["many_basins"]:
        ok = "ok" if r["member_steps_per_s"] >= TARGET_RATE and r["peak_rss_mb"] <= TARGET_MEMORY_MB else "MISSED"
        what = "no file" if not r["write"] else f"file {r['file_mb']:.0f} MB"
        print(f"   {r['basins']} x {r['members']} x {r['days']} d, {what}: wall {r['wall_s']:.1f} s, "
              f"cpu {r['cpu_s']:.1f} s (+ workers {r['cpu_workers_s']:.1f} s), "
              f"{r['member_steps_per_s'] / 1e6:.2f} M member-steps/s, peak {r['peak_rss_mb']:.0f} MB ({ok})")
    print("3. scaling (synchronous): wall time per member-step should stay constant")
    print("   varied    basins members  days   wall s   ns/member-step")
    for r in results["scaling"]:
        ns = r["wall_s"] / (r["basins"] * r["members"] * r["days"]) * 1e9
        print(f"   {r['varied']:8} {r['basins']:7} {r['members']:7} {r['days']:5} {r['wall_s']:8.2f} {ns:12.0f}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small cases (checks the script, not the targets)")
    ap.add_argument("--json", action="store_true", help="print the results as JSON")
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        print(json.dumps(_case(**json.loads(args.case))))
        return 0
    results = run(quick=args.quick)
    if args.json:
        print(json.dumps(results, indent=1))
    else:
        _print(results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
