"""Cost of the fixed-lag smoother's window against the filter alone.

Run as a script (``python benchmarks/bench_smoother.py [--quick]``) or call :func:`run`.
Target (issue 17): the smoother adds at most 2x the cost of the filter for W <= 10, i.e. an
assimilation run keeping a window of W <= 10 days takes at most 2x the wall time of the same
run without it, on the same (numpy) path; the ratio to the fused compiled filter is reported
beside it. Inputs: the synthetic GR4J basins of ``bench_engine`` (readings every day), the
production and routing stores updated and recorded (the window keeps discharge and both
stores: 3 columns a day), synchronous scheduler, one core, best of 3, no file.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

TARGET_RATIO = 2.0
WINDOWS = (0, 5, 10)


class _Null:
    def write_block(self, start, arrays):
        pass


def _time(model, inputs, settings, repeat: int) -> float:
    from assim import engine

    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            engine.run(model, inputs, settings, _Null())
        best = min(best, time.perf_counter() - t0)
    return best


def run(quick: bool = False) -> dict:
    """Wall times (s) of the filter (numpy and compiled) and of the window W in ``WINDOWS``,
    in assimilation and reanalysis mode; ratios to the numpy filter."""
    from bench_engine import _inputs

    from assim import engine

    nb, nm, years = (10, 32, 0.25) if quick else (50, 64, 1.0)
    model, inputs = _inputs(nb, int(round(365 * years)))
    states = model.default_updated_states()  # (every GR4J state; the two stores written and kept)
    base = engine.Settings(mode="assimilate", members=nm, seed=1, spinup_days=0, update_states=states,
                           write_states=model.reported_states(states), basin_chunk=10_000, time_block_days=365, scheduler="synchronous",
                           workers=1, kernel="numpy")
    repeat = 1 if quick else 3
    out = {"basins": nb, "members": nm, "days": len(inputs.days), "load_start": os.getloadavg()[0]}
    _time(model, inputs, base, 1)  # warm-up (imports, caches)
    out["filter_numpy_s"] = _time(model, inputs, base, repeat)
    from dataclasses import replace

    _time(model, inputs, replace(base, kernel="auto"), 1)  # compile or load the kernel
    out["filter_compiled_s"] = _time(model, inputs, replace(base, kernel="auto"), repeat)
    for w in WINDOWS:
        for mode in ("assimilate", "reanalysis"):
            if w == 0 and mode == "assimilate":
                continue
            out[f"{mode}_W{w}_s"] = _time(model, inputs, replace(base, mode=mode, smoother_window=w), repeat)
    out["load_end"] = os.getloadavg()[0]
    return out


def ratios(r: dict) -> dict[str, float]:
    """Each smoother run's wall time over the numpy filter's."""
    return {k.removesuffix("_s"): v / r["filter_numpy_s"] for k, v in r.items()
            if k.endswith("_s") and k.startswith(("assimilate", "reanalysis"))}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    r = run(args.quick)
    if args.json:
        print(json.dumps({**r, "ratios": ratios(r)}, indent=1))
        return 0
    print(f"{r['basins']} basins x {r['members']} members x {r['days']} days, readings every day, one core "
          f"(load {r['load_start']:.1f} -> {r['load_end']:.1f})")
    print(f"  filter, numpy path:    {r['filter_numpy_s']:.2f} s")
    print(f"  filter, compiled path: {r['filter_compiled_s']:.2f} s")
    for k, v in ratios(r).items():
        ok = "ok" if v <= TARGET_RATIO else "MISSED"
        print(f"  {k:16} {r[k + '_s']:.2f} s = {v:.2f}x the numpy filter "
              f"({r[k + '_s'] / r['filter_compiled_s']:.2f}x the compiled one); target <= {TARGET_RATIO}x: {ok}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
