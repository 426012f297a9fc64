"""The benchmark suite behind ``make bench``: one run, one table, assim against its baselines.

``python benchmarks/run.py`` measures, in one run (the engine cases first, each in a fresh
subprocess, for their own peak memory; the rest in this process), and tabulates in this order:

1. GR4J member-steps per second at batch 100 and 100,000 (``bench_models.run``), against the
   per-member Python loop of ``baseline_loop.gr4j_step``;
2. one analysis of 10,000 basins x 128 members x 10 states x 1 observation for enkf, eakf and
   etkf (``bench_filters.run``), and the stochastic EnKF against the member loop of
   ``baseline_loop.enkf_update`` on the same arrays;
3. the engine (``bench_engine.run``): one basin of 100 members over 20 years, and the
   1,000-basin x 128-member x 3-year run (rate and peak memory), plus the same run without
   file on 1 and 2 threads and 2 processes, back to back, for the dask scaling;
4. whole assimilation runs against the baselines in the same configuration (stochastic EnKF,
   no innovation gate, one core): one basin of 100 members over 20 years and 100 basins of
   100 members over one year, for assim, ``baseline_loop.run`` and ``baseline_filterpy.run``;
5. calibration (``bench_calibration.run``): 100 basins x 10 years in one batch against one
   basin alone (``assim.calibration.search``, DE, population 40);
6. the demo workflow: ``snakemake`` on a copy of ``config/config.yaml`` in a temporary folder
   (raw data from the repository's ``sample_basin``), package installation excluded;
7. one ordinary day of operation (``bench_daily.run``): the `issue` target's commands
   (`assim prep` with the day's records appended, `assim forecast`) for 100 basins x 64
   members with a 5- and a 10-year record, to show the cost does not grow with the record;
8. the fixed-lag smoother (``bench_smoother.run``): 50 basins x 64 members x 1 year with a
   window of 5 and 10 days against the filter on the same numpy path (target <= 2x).

It prints the machine and one table, and writes the table to ``benchmarks/out/latest.md``
and every figure to ``benchmarks/out/latest.json`` (``quick.md``, ``quick.json`` for
``--quick``). ``--quick`` runs small sizes (a smoke
test of the suite, under a minute, without the demo unless ``--demo``; its figures are not
for quoting). Threads of the BLAS libraries are pinned to one: every "one core" figure runs
in one thread, and the two-worker figures use exactly two.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import platform  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from dataclasses import asdict, dataclass  # noqa: E402
from pathlib import Path  # noqa: E402

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
sys.path.insert(0, str(HERE))
sys.path.insert(1, str(REPO))

import baseline_filterpy  # noqa: E402
import baseline_loop  # noqa: E402
import bench_calibration  # noqa: E402
import bench_daily  # noqa: E402
import bench_engine  # noqa: E402
import bench_filters  # noqa: E402
import bench_models  # noqa: E402
import bench_smoother  # noqa: E402
import numba  # noqa: E402
import numpy as np  # noqa: E402
import yaml  # noqa: E402

from assim import engine, models  # noqa: E402
from assim import perturb as pt  # noqa: E402
from assim.filters import ensemble_update  # noqa: E402

OUT = HERE / "out"


# ---------------------------------------------------------------- the table


@dataclass
class Row:
    """One line of the table. ``ratio`` is assim time / baseline time for the same work."""

    measure: str
    configuration: str
    assim: str
    baseline: str = ""
    ratio: float | None = None
    target: str = ""
    met: bool | None = None

    def cells(self) -> list[str]:
        ratio = speedup = "-"
        if self.ratio is not None:
            x = 1.0 / self.ratio
            ratio = f"{self.ratio:.3g}"
            speedup = f"{x:,.0f}x" if x >= 10 else f"{x:.2g}x"
        status = "-" if self.met is None else ("met" if self.met else "MISSED")
        return [self.measure, self.configuration, self.assim, self.baseline or "-", ratio, speedup,
                self.target or "-", status]


HEADER = ["measure", "configuration", "assim", "baseline", "assim/baseline time", "speed-up",
          "target", "status"]


def markdown(rows: list[Row]) -> str:
    lines = ["| " + " | ".join(HEADER) + " |", "|" + "---|" * len(HEADER)]
    lines += ["| " + " | ".join(r.cells()) + " |" for r in rows]
    return "\n".join(lines)


def machine() -> dict[str, str]:
    """CPU model, usable cores, memory, Python and numpy versions, commit and date."""
    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        kb = int(next(ln for ln in Path("/proc/meminfo").read_text().splitlines()
                      if ln.startswith("MemTotal")).split()[1])
        memory = f"{kb / 1024**2:.1f} GiB"
    except (OSError, StopIteration):
        memory = "unknown"
    try:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=REPO, capture_output=True,
                                text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        commit = "unknown"
    return {
        "cpu": cpu,
        "cores": str(len(os.sched_getaffinity(0))),
        "memory": memory,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "numba": numba.__version__,
        "os": platform.platform(),
        "commit": commit,
        "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
    }


def _rate(x: float) -> str:
    return f"{x / 1e6:.3g} M member-steps/s" if x >= 1e5 else f"{x / 1e3:.3g} k member-steps/s"


def _log(msg: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", file=sys.stderr, flush=True)


# ---------------------------------------------------------------- 1. GR4J


def loop_gr4j_rate(members: int, n_days: int, seed: int = 1) -> float:
    """Member-steps per second of the per-member loop GR4J (one thread, CPU time)."""
    m = models.get("gr4j")
    rng = np.random.default_rng(seed)
    params = [[rng.uniform(p.low, p.high) for p in m.parameters] for _ in range(members)]
    p, e = bench_models._forcing(rng, n_days, members)
    p, e = p.tolist(), e.tolist()
    members_uh = [baseline_loop.uh_ordinates(x4) for *_, x4 in params]
    states = [baseline_loop.initial_state(x1, x3) for x1, _, x3, _ in params]
    start = time.process_time()
    for t in range(n_days):
        pt_, et = p[t], e[t]
        for i in range(members):
            x1, x2, x3, _ = params[i]
            states[i], _ = baseline_loop.gr4j_step(states[i], pt_[i], et[i], x1, x2, x3, *members_uh[i])
    return members * n_days / (time.process_time() - start)


def gr4j_rows(quick: bool, figures: dict) -> list[Row]:
    _log("GR4J (bench_models)")
    f = bench_models.run(quick=quick)
    loop_days = 60 if quick else 365
    loop = loop_gr4j_rate(100, loop_days)
    figures["gr4j"] = {**f, "loop_member_steps_per_s": loop}
    rows = []
    for batch, target in bench_models.TARGETS.items():
        rate = f[f"gr4j_batch_{batch}"]
        rows.append(Row(f"GR4J step, batch {batch:,}", f"{f'{batch:,}'} members stepped together; "
                        f"loop: 100 members x {loop_days} d, one member at a time; one core, CPU time",
                        _rate(rate), f"loop {_rate(loop)}", loop / rate,
                        f">= {target / 1e6:g} M member-steps/s", rate >= target))
    return rows


# ---------------------------------------------------------------- 2. the analysis


def _best(fn, repeat: int) -> float:
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def analysis_rows(quick: bool, figures: dict) -> list[Row]:
    _log("ensemble analysis (bench_filters)")
    if quick:
        f = {"target": {m: bench_filters.time_analysis(m, 10_000, 128, repeat=2) for m in bench_filters.METHODS}}
        if hasattr(bench_filters, "time_per_call"):
            f["per_call"] = {label: {m: bench_filters.time_per_call(m, b, calls=50, repeat=2)
                                     for m in bench_filters.METHODS}
                             for label, b in (("1x100x7", 1), ("100x100x7", 100))}
    else:
        f = bench_filters.run(quick=False)
    rows = []
    for method in ("enkf", "eakf", "etkf"):
        t = f["target"][method]
        wall, cpu = (t["wall_ms"], t["cpu_ms"]) if isinstance(t, dict) else (t, None)
        has_target = method in ("enkf", "eakf")
        rows.append(Row(f"analysis, {method}", "10,000 basins x 128 members x 10 states x 1 obs, one core",
                        f"{wall:.1f} ms wall" + ("" if cpu is None else f" ({cpu:.1f} ms CPU)"),
                        target="<= 50 ms" if has_target else "", met=(wall <= 50.0) if has_target else None))
    # the cost per call at the engine's small batches (one call a day), when bench_filters has it
    for label, what in (("1x100x7", "1 basin"), ("100x100x7", "100 basins")):
        per = f.get("per_call", {}).get(label)
        if per:
            cells = ", ".join(f"{m} {per[m]['wall_us']:.0f} us ({per[m]['cpu_us']:.0f} CPU)"
                              for m in ("enkf", "eakf", "etkf") if m in per)
            rows.append(Row(f"analysis per call, {what}", f"{what} x 100 members x 7 states x 1 obs, with the "
                            "engine's bounds, gate and inflation record; one core, best of several rounds",
                            cells))
    # The stochastic EnKF against the member loop, same arrays (the loop costs the same per basin,
    # so the quick run uses fewer basins for both).
    n_basin = 1_000 if quick else 10_000
    _log(f"EnKF analysis against the member loop, {n_basin} basins")
    states, predicted, observed, variance, noise = bench_filters._problem(n_basin, 128, 10, 1)
    t_assim = _best(lambda: ensemble_update(states, predicted, observed, variance, method="enkf",
                                            obs_noise=noise), 3)
    t_loop = _best(lambda: baseline_loop.enkf_update(states, predicted, observed, variance, noise), 1)
    figures["analysis"] = {**f, "loop_compare": {"basins": n_basin, "assim_s": t_assim, "loop_s": t_loop}}
    rows.append(Row("EnKF analysis vs member loop", f"{n_basin:,} basins x 128 x 10 x 1, same arrays and "
                    "perturbations; loop: basin by basin, member by member", f"{1e3 * t_assim:.1f} ms",
                    f"loop {t_loop:.2f} s", t_assim / t_loop))
    return rows


# ---------------------------------------------------------------- 3. the engine


def _engine(expression: str) -> dict:
    """Evaluate ``expression`` (a call into bench_engine) in a fresh, small Python process.

    bench_engine times each case in a subprocess and reads its peak memory with getrusage;
    a child forked from this process, which has held the large arrays of the analysis
    benchmark, would inherit this process's peak. A fresh launcher keeps it the case's own.
    Returns the JSON result; an error's last line becomes ``{"error": ...}``.
    """
    code = (f"import json, sys; sys.path.insert(0, {str(HERE)!r}); import bench_engine; "
            f"print(json.dumps({expression}))")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if r.returncode:
        return {"error": (r.stderr.strip().splitlines() or ["no message"])[-1][:120]}
    return json.loads(r.stdout.strip().splitlines()[-1])


def engine_rows(quick: bool, figures: dict) -> list[Row]:
    _log("engine (bench_engine): single basin, scale run, scaling")
    big = (20, 64, 0.25) if quick else (1000, 128, 3)
    scale_kw = dict(n_basin=big[0], members=big[1], years=big[2], basin_chunk=250 if not quick else 10,
                    block_days=30, write=False, states=False)
    cases = {"threads_1": dict(scheduler="threads", workers=1, **scale_kw),
             "threads_2": dict(scheduler="threads", workers=2, **scale_kw),
             "processes_2": dict(scheduler="processes", workers=2, **scale_kw)}
    if quick:
        single = [dict(n_basin=1, members=100, years=1, scheduler="synchronous", workers=1, basin_chunk=1,
                       block_days=366, write=w, states=True) for w in (False, True)]
        many = [dict(scheduler=bench_engine.SCALE_SCHEDULER, workers=2, **dict(scale_kw, write=w)) for w in (False, True)]
        code = (f"{{'single_basin': [bench_engine._in_subprocess(**k) for k in {single!r}], "
                f"'many_basins': [bench_engine._in_subprocess(**k) for k in {many!r}]}}")
    else:
        code = "bench_engine.run(quick=False)"
    f = _engine(code)
    _log("dask scaling: 1 thread, 2 threads, 2 processes, back to back")
    scaling = {name: _engine(f"bench_engine._in_subprocess(**{kw!r})") for name, kw in cases.items()}
    one, two, procs = scaling["threads_1"], scaling["threads_2"], scaling["processes_2"]
    figures["engine"] = {**f, "dask_scaling": scaling}

    rows = []
    if "error" in f:
        return [Row("engine benchmark", "bench_engine.run", f"failed: {f['error']}", met=False)]
    for r in f["single_basin"]:
        what = "with analysis.nc (states)" if r["write"] else "no file"
        best = f"; best of {r['repeat']}" if r.get("repeat", 1) > 1 else ""
        rows.append(Row(f"single basin, {what}", f"1 basin x {r['members']} members x {r['days']} d, daily "
                        f"readings, enkf; synchronous, one core{best}", f"{r['wall_s']:.2f} s wall "
                        f"({r['cpu_s']:.2f} s CPU)", target=f"<= {bench_engine.TARGET_SINGLE_S} s",
                        met=r["wall_s"] <= bench_engine.TARGET_SINGLE_S))
    labels = ["no file", "analysis.nc streamed (ensemble discharge)", "analysis.nc with states",
              "analysis.nc as quantiles"]  # the order of bench_engine's cases
    for label, r in zip(labels, f["many_basins"], strict=False):
        size = f", {r['file_mb']:.0f} MB" if r["write"] else ""
        cfg = (f"{r['basins']:,} basins x {r['members']} members x {r['days']} d, daily readings, "
               f"{r['scheduler']}, {r['workers']} workers")
        cpu = f"{r['cpu_s']:.1f} s CPU" + (f" + workers {r['cpu_workers_s']:.1f} s"
                                           if r.get("cpu_workers_s") else "")
        rows.append(Row(f"scale run, {label}{size}", cfg,
                        f"{_rate(r['member_steps_per_s'])}, {r['wall_s']:.1f} s wall ({cpu})",
                        target=">= 30 M member-steps/s" if not r["write"] else ">= 20 M member-steps/s",
                        met=r["member_steps_per_s"] >= (bench_engine.TARGET_RATE if not r["write"] else 20e6)))
    peak = max(r["peak_rss_mb"] for r in f["many_basins"])
    rows.append(Row("scale run, peak memory", "largest of the scale runs above (resident set; processes: main "
                    "+ workers x largest worker)", f"{peak:,.0f} MB", target="<= 2,000 MB",
                    met=peak <= bench_engine.TARGET_MEMORY_MB))
    if "wall_s" in one and "wall_s" in two:
        rows.append(Row("dask scaling, threads 1 -> 2 workers", f"scale run without file, back to back: "
                        f"{one['wall_s']:.1f} s on 1 worker, {two['wall_s']:.1f} s on 2",
                        f"speed-up {one['wall_s'] / two['wall_s']:.2f}x", target="2 cores (ideal 2x)"))
    if "wall_s" in one and "wall_s" in procs:
        rows.append(Row("dask scaling, processes, 2 workers", f"same run: {procs['wall_s']:.1f} s on 2 processes",
                        f"speed-up {one['wall_s'] / procs['wall_s']:.2f}x over 1 thread",
                        target="2 cores (ideal 2x)"))
    for name, r in scaling.items():
        if "error" in r:
            rows.append(Row(f"dask scaling, {name.replace('_', ' ')}", "scale run without file",
                            f"failed: {r['error']}", met=False))
    rows += scaling_rows(f.get("scaling", []))
    return rows


def scaling_rows(results: list[dict]) -> list[Row]:
    """Wall time against basins, members and years (synchronous, one core): ns per
    member-step should stay flat if the cost is linear."""
    rows = []
    base = next((r for r in results if r.get("varied") == "base"), None)
    for r in results:
        steps = r["basins"] * r["members"] * r["days"]
        ns = r["wall_s"] / steps * 1e9
        rel = "" if base is None or r is base else (
            f"; {r['wall_s'] / base['wall_s']:.2f}x the base time for "
            f"{steps / (base['basins'] * base['members'] * base['days']):.0f}x the work")
        best = f", best of {r['repeat']}" if r.get("repeat", 1) > 1 else ""
        rows.append(Row(f"scaling, {r['varied']}", f"{r['basins']} basins x {r['members']} members x {r['days']} d, "
                        f"synchronous, one core{best}", f"{r['wall_s']:.2f} s wall ({r['cpu_s']:.2f} s CPU), "
                        f"{ns:.0f} ns per member-step{rel}"))
    return rows


# ---------------------------------------------------------------- 4. whole runs against the baselines


def synthetic(n_basin: int, n_days: int, seed: int = 0):
    """Invented basins: random daily rain, seasonal PET, a reading every day from an
    unperturbed GR4J run with 10 % noise. Returns the arrays and the engine's Inputs."""
    m = models.get("gr4j")
    rng = np.random.default_rng(seed)
    p = np.where(rng.random((n_basin, n_days)) < 0.35, rng.gamma(0.8, 9.0, (n_basin, n_days)), 0.0)
    day = np.arange(n_days)
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * (day - 100) / 365.25), 0.3, None)[None].repeat(n_basin, 0)
    params = {"x1": rng.uniform(200, 600, n_basin), "x2": rng.uniform(-1, 1, n_basin),
              "x3": rng.uniform(50, 150, n_basin), "x4": rng.uniform(1.2, 3.0, n_basin)}
    area = rng.uniform(100, 2000, n_basin)
    x, prepared = m.initial_state(params), m.prepare(params)
    obs = np.empty((n_basin, n_days))
    for t in range(n_days):
        x, f = m.step(x, {"precipitation": p[:, t], "pet": e[:, t]}, prepared)
        obs[:, t] = f["runoff"] * area / 86.4
    obs = np.maximum(obs * (1 + 0.1 * rng.standard_normal(obs.shape)), 0.0)
    ids = tuple(f"basin-{i:04d}" for i in range(n_basin))
    days = np.arange(n_days, dtype=np.int64) + 10957
    arrays = (p, e, obs, area, params, ids, days)
    inputs = engine.Inputs(ids, pt.basin_keys(ids), area, days, p, e, obs, np.zeros(obs.shape, bool), params)
    return arrays, inputs


class _Discard:
    """A sink that receives every block (the engine builds its outputs) and keeps nothing."""

    def write_block(self, start, arrays):
        pass


MEMBERS, SEED = 100, 1


def _assim_run(inputs) -> float:
    m = models.get("gr4j")
    # the same work as the baselines: the two stores updated, the unit-hydrograph slots
    # outside the filter (the default updates every state; see README, "Filter defaults")
    settings = engine.Settings(mode="assimilate", members=MEMBERS, seed=SEED, gate_sigma=0.0,
                               update_states=("production_store", "routing_store"), scheduler="synchronous",
                               basin_chunk=inputs.n_basin, time_block_days=365)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        engine.run(m, inputs, settings, _Discard())
    return time.perf_counter() - t0


def _timed(fn, arrays, **kw) -> float:
    t0 = time.perf_counter()
    fn(*arrays, members=MEMBERS, seed=SEED, **kw)
    return time.perf_counter() - t0


def baseline_rows(quick: bool, figures: dict) -> list[Row]:
    cases = ((1, 365) if quick else (1, 365 * 20)), ((10, 90) if quick else (100, 365))
    targets = {1: 200.0, 100: 250.0}  # the fused compiled kernel's targets
    rows, out = [], []
    for n_basin, n_days in cases:
        arrays, inputs = synthetic(n_basin, n_days)
        steps = n_basin * MEMBERS * n_days
        _log(f"whole runs, {n_basin} basin(s) x {MEMBERS} members x {n_days} d: assim, loop, filterpy")
        t_assim = min(_assim_run(inputs) for _ in range(2))
        t_loop = _timed(baseline_loop.run, arrays, gate_sigma=None)
        t_fp = _timed(baseline_filterpy.run, arrays)
        out.append({"basins": n_basin, "members": MEMBERS, "days": n_days, "assim_s": t_assim,
                    "loop_s": t_loop, "filterpy_s": t_fp})
        period = f"{n_days // 365} y" if n_days % 365 == 0 else f"{n_days} d"
        cfg = (f"{n_basin} basin{'s' if n_basin > 1 else ''} x {MEMBERS} members x {period}, daily readings, "
               "stochastic EnKF, no gate; one core (assim: synchronous scheduler, fused compiled kernel)")
        assim_txt = f"{t_assim:.2f} s, {_rate(steps / t_assim)}"
        rows.append(Row("whole run vs member loop", cfg, assim_txt, f"loop {t_loop:.1f} s, {_rate(steps / t_loop)}",
                        t_assim / t_loop))
        target = targets.get(n_basin)
        rows.append(Row("whole run vs filterpy EnKF", cfg + "; filterpy: one EnsembleKalmanFilter per basin",
                        assim_txt, f"filterpy {t_fp:.1f} s, {_rate(steps / t_fp)}", t_assim / t_fp,
                        f">= {target:g}x faster" if target else "",
                        (t_fp / t_assim >= target) if target else None))
    figures["baselines"] = out
    return rows


# ---------------------------------------------------------------- 5. calibration


def calibration_rows(quick: bool, figures: dict) -> list[Row]:
    _log("calibration (bench_calibration): batch of basins, then one basin alone")
    f = bench_calibration.run(quick=quick)
    figures["calibration"] = f
    b, s = f["batch"], f["single"]
    what = (f"{b['basins']} basins x {b['years']} y after 1 y warm-up, GR4J, KGE, DE population 40, "
            f"{b['generations_mean']:.0f} generations on average (max {b['generations_max']}); one thread")
    return [
        Row("calibration, batch of basins", what, f"{b['wall_s']:.0f} s wall ({b['cpu_s']:.0f} s CPU)",
            target=f"<= {bench_calibration.TARGET_WALL_S:.0f} s", met=f["met_wall"]),
        Row("calibration, cost per basin-year", f"the batch above against 1 basin x {s['years']} y alone "
            f"({s['wall_s']:.1f} s wall, {s['generations_mean']:.0f} generations)",
            f"{1e3 * b['per_basin_year_s']:.0f} ms batched, {1e3 * s['per_basin_year_s']:.0f} ms alone",
            ratio=f["ratio_per_basin_year"], target=f"batched <= {bench_calibration.TARGET_RATIO:g}x alone",
            met=f["met_ratio"]),
    ]


# ---------------------------------------------------------------- compile times of the kernel

_COMPILE_CODE = """
import sys, time, warnings
t0 = time.perf_counter()
sys.path.insert(0, {here!r})
from assim import engine, kernels, models
t1 = time.perf_counter()
import run as R
arrays, inputs = R.synthetic(2, 30)
m = models.get("gr4j")
s = engine.Settings(mode="assimilate", members=16, seed=1, update_states=m.default_updated_states(),
                    scheduler="synchronous", kernel="compiled")
t2 = time.perf_counter()
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    engine.run(m, inputs, s, R._Discard())
print(t1 - t0, time.perf_counter() - t2)
"""


def compile_rows(quick: bool, figures: dict) -> list[Row]:
    """Cold (empty numba cache) and warm (cache filled) start of the fused kernel, each in a
    fresh process: the import of assim and numba, then the first small run (compiling, or
    loading the compiled code)."""
    _log("kernel compile times: cold and warm start")
    out = {}
    with tempfile.TemporaryDirectory(prefix="assim-numba-") as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        for name in ("cold", "warm", "warm_again"):
            r = subprocess.run([sys.executable, "-c", _COMPILE_CODE.format(here=str(HERE))], env=env,
                               capture_output=True, text=True, cwd=REPO)
            if r.returncode:
                return [Row("kernel compile time", "fresh process", f"failed: {r.stderr.strip()[-120:]}", met=False)]
            imp, first = (float(v) for v in r.stdout.split())
            out[name] = {"import_s": imp, "first_run_s": first, "load": os.getloadavg()[0]}
    figures["compile"] = out
    warm = min((out["warm"], out["warm_again"]), key=lambda v: v["import_s"] + v["first_run_s"])
    total = warm["import_s"] + warm["first_run_s"]
    return [
        Row("kernel start, cold", "fresh process, empty numba cache: import of assim (numba), first run "
            "(2 basins x 16 members x 30 d) compiling the kernel",
            f"import {out['cold']['import_s']:.2f} s + first run {out['cold']['first_run_s']:.1f} s "
            f"(load {out['cold']['load']:.1f})"),
        Row("kernel start, warm", "fresh process, numba cache filled: the same (best of 2)",
            f"import {warm['import_s']:.2f} s + first run {warm['first_run_s']:.2f} s = {total:.2f} s "
            f"(load {warm['load']:.1f})",
            target="<= 2 s", met=total <= 2.0),
    ]


# ---------------------------------------------------------------- 6. the demo workflow


def demo_rows(quick: bool, figures: dict, shortened: bool = False) -> list[Row]:
    """The demo workflow's wall time; skipped by ``--quick`` (snakemake alone starts nine
    jobs, half a minute even on a shortened period) unless ``shortened`` asks for a short
    period (``--quick --demo``)."""
    if quick and not shortened:
        return [Row("demo workflow end to end", "skipped by --quick (add --demo for a shortened run)", "-")]
    quick = quick or shortened
    _log("demo workflow (snakemake)" + (", shortened" if quick else ""))
    with tempfile.TemporaryDirectory(prefix="assim-bench-") as tmp:
        root = Path(tmp)
        cfg = yaml.safe_load((REPO / "config" / "config.yaml").read_text())
        cfg["data"]["raw"] = str(REPO / "sample_basin")
        if quick:
            cfg["period"] = {"start": "2012-01-01", "end": "2012-12-31", "spinup_days": 90}
            cfg["ensemble"]["members"] = 8
            cfg["hindcast"] = {"every_days": 30, "leads": 3, "forcing": "observed"}
            cfg["forecast"]["leads"] = 3
        (root / "config").mkdir()
        for f in (REPO / "config").rglob("*"):
            if f.is_file():
                dest = root / "config" / f.relative_to(REPO / "config")
                dest.parent.mkdir(parents=True, exist_ok=True)
                dest.write_bytes(f.read_bytes())
        (root / "config" / "config.yaml").write_text(yaml.safe_dump(cfg, sort_keys=False))
        cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "workflow" / "Snakefile"),
               "--directory", str(root), "--cores", "2", "--quiet"]
        env = dict(os.environ)
        for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
            env.pop(var, None)  # the demo runs as a user would run it
        t0 = time.perf_counter()
        r = subprocess.run(cmd, capture_output=True, text=True, env=env)
        wall = time.perf_counter() - t0
        n_products = len(list((root / "results").rglob("*.nc")))
    figures["demo"] = {"wall_s": wall, "returncode": r.returncode, "netcdf_files": n_products,
                       "stderr_tail": r.stderr[-500:] if r.returncode else ""}
    members = cfg["ensemble"]["members"]
    what = (f"snakemake --cores 2 on config/config.yaml ({cfg['period']['start'][:4]}-"
            f"{cfg['period']['end'][:4]}, {members} members, 3 sample basins, every stage), "
            "temporary folder, installation excluded")
    result = f"{wall:.0f} s, {n_products} NetCDF files" if r.returncode == 0 else f"FAILED (exit {r.returncode})"
    return [Row("demo workflow end to end", what, result, met=None if r.returncode == 0 else False)]


def daily_rows(quick: bool, figures: dict) -> list[Row]:
    """One ordinary day's `issue` (prep + forecast, each a fresh CLI process) on a 5- and a
    10-year record: target <= 10 s wall on 2 cores, and flat as the record grows."""
    n_basin, members = (10, 16) if quick else (100, 64)
    out = {}
    for years in ((1, 2) if quick else (5, 10)):
        _log(f"daily issue, {n_basin} basins x {members} members, {years}-year record")
        out[years] = bench_daily.run(n_basin, members, years)
    figures["daily"] = out
    short, long_ = out[min(out)], out[max(out)]
    growth = long_["issue_s"] / short["issue_s"]
    rows = [Row(f"daily issue, {y}-year record",
                f"{n_basin} basins x {members} members, {r['gauge_rows']:,} gauge rows; `assim prep` + "
                f"`assim forecast` (climatology, 10 leads, bulletin with {r['figures']} figures), fresh processes",
                f"{r['issue_s']:.1f} s wall (prep {r['prep_s']:.1f} s, forecast {r['forecast_s']:.1f} s); "
                f"CPU {r['issue_cpu_s']:.1f} s",
                target="<= 10 s", met=r["issue_s"] <= 10.0) for y, r in out.items()]
    rows.append(Row("daily issue, growth with the record", f"{max(out)}-year / {min(out)}-year record",
                    f"{growth:.2f}x", target="flat (<= 1.2x)", met=growth <= 1.2))
    return rows


# ---------------------------------------------------------------- main


def smoother_rows(quick: bool, figures: dict) -> list[Row]:
    _log("smoother (bench_smoother): window of 5 and 10 days against the filter")
    r = figures["smoother"] = bench_smoother.run(quick)
    conf = f"{r['basins']} basins x {r['members']} members x {r['days']} d, readings daily, one core"
    rows = []
    for name, ratio in bench_smoother.ratios(r).items():
        if name.endswith("_W0"):
            continue
        rows.append(Row(f"smoother cost, {name.replace('_W', ', W = ')} days", conf,
                        f"{r[name + '_s']:.2f} s (filter {r['filter_numpy_s']:.2f} s numpy, "
                        f"{r['filter_compiled_s']:.2f} s compiled)", ratio=None,
                        target=f"<= {bench_smoother.TARGET_RATIO:g}x the filter: {ratio:.2f}x",
                        met=ratio <= bench_smoother.TARGET_RATIO))
    return rows


def run(quick: bool = False, demo: bool = False) -> tuple[dict, list[Row]]:
    """Every measurement of the suite; returns the raw figures and the table's rows.

    ``quick``: small sizes, demo skipped unless ``demo`` (then on a shortened period)."""
    figures: dict = {"quick": quick, "machine": machine()}
    rows: list[Row] = []
    load = figures["load_average"] = {}
    parts = {}
    # The engine first, while this process is small (see _engine); the table keeps the
    # order of the module docstring.
    for section in (engine_rows, gr4j_rows, analysis_rows, baseline_rows, calibration_rows, compile_rows):
        name = section.__name__.removesuffix("_rows")
        load[name] = os.getloadavg()[0]
        parts[name] = section(quick, figures)
    load["demo"] = os.getloadavg()[0]
    parts["demo"] = demo_rows(quick, figures, shortened=quick and demo)
    load["daily"] = os.getloadavg()[0]
    parts["daily"] = daily_rows(quick, figures)
    load["smoother"] = os.getloadavg()[0]
    parts["smoother"] = smoother_rows(quick, figures)
    load["end"] = os.getloadavg()[0]
    for name in ("gr4j", "analysis", "engine", "baseline", "compile", "calibration", "demo", "daily", "smoother"):
        rows += parts[name]
    if quick:  # small sizes: the targets are not judged
        for r in rows:
            r.met = None
    figures["rows"] = [asdict(r) for r in rows]
    return figures, rows


def report(figures: dict, rows: list[Row]) -> str:
    mc = figures["machine"]
    head = [
        "# assim benchmarks" + (" (quick smoke run: small sizes, not for quoting)" if figures["quick"] else ""),
        "",
        f"Machine: {mc['cpu']}, {mc['cores']} cores, {mc['memory']} memory; Python {mc['python']}, "
        f"numpy {mc['numpy']}, numba {mc.get('numba', '?')}; {mc['os']}; commit {mc['commit']}; {mc['date']}.",
        "",
        "Every figure is from the same run of `benchmarks/run.py`. Speed-up = baseline time / assim "
        "time for the same work (baselines: `benchmarks/baseline_loop.py`, a per-member Python loop "
        "checked against assim by `tests/test_baselines.py`, and `benchmarks/baseline_filterpy.py`, "
        "filterpy's EnsembleKalmanFilter driving the same GR4J). \"one core\": BLAS threads pinned to 1, "
        "one thread.",
        "",
        "Load average (1 min) at the start of each section, a sign of other work on the machine: "
        + ", ".join(f"{k} {v:.1f}" for k, v in figures["load_average"].items()) + ".",
        "",
    ]
    return "\n".join(head) + "\n" + markdown(rows) + "\n"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes: a smoke run under a minute")
    parser.add_argument("--demo", action="store_true", help="with --quick: also time a shortened demo")
    args = parser.parse_args(argv)
    t0 = time.perf_counter()
    figures, rows = run(quick=args.quick, demo=args.demo)
    figures["total_s"] = time.perf_counter() - t0
    text = report(figures, rows)
    print(text)
    print(f"(benchmark suite took {figures['total_s']:.0f} s)")
    OUT.mkdir(exist_ok=True)
    name = "quick" if args.quick else "latest"  # a smoke run never replaces the full table
    (OUT / f"{name}.md").write_text(text)
    (OUT / f"{name}.json").write_text(json.dumps(figures, indent=1, default=str))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
