"""Writing every member: speed and size of the NetCDF encodings netCDF4 offers for float32
ensemble values (compression filters, shuffle, lossy quantisation).

Run as a script (``python benchmarks/bench_write.py [--quick]``). The values are those of a
real engine run (GR4J, synthetic invented basins of :mod:`bench_engine`, assimilation every
day): discharge before and after the update and the two stores, (basin, member, time) on
disk in chunks of (1, members, time block) as :class:`assim.io.products.RunWriter` writes
them, handed over in 30-day blocks. Each encoding is written ``repeat`` times; the figures
are the smallest CPU time (the process's, so other work on a shared machine adds little)
and the file size. ``M values/s`` counts float32 values written per CPU second.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

#: name -> netCDF4 createVariable keywords
ENCODINGS = {
    "none": {},
    "zlib1+shuffle": {"compression": "zlib", "complevel": 1, "shuffle": True},
    "zlib1": {"compression": "zlib", "complevel": 1, "shuffle": False},
    "zlib4+shuffle": {"compression": "zlib", "complevel": 4, "shuffle": True},
    "zstd1+shuffle": {"compression": "zstd", "complevel": 1, "shuffle": True},
    "zstd1": {"compression": "zstd", "complevel": 1, "shuffle": False},
    "zstd3+shuffle": {"compression": "zstd", "complevel": 3, "shuffle": True},
    "blosc_lz4+shuffle": {"compression": "blosc_lz4", "complevel": 5, "blosc_shuffle": 1},
    "blosc_zstd1+shuffle": {"compression": "blosc_zstd", "complevel": 1, "blosc_shuffle": 1},
    "zlib1+shuffle, 4 significant digits (lossy)": {"compression": "zlib", "complevel": 1, "shuffle": True,
                                                    "significant_digits": 4},
    "zstd1+shuffle, 4 significant digits (lossy)": {"compression": "zstd", "complevel": 1, "shuffle": True,
                                                    "significant_digits": 4},
}


def member_values(n_basin: int, members: int, days: int) -> dict[str, np.ndarray]:
    """(basin, day, member) float32 arrays of one assimilation run, as the engine hands them."""
    import warnings

    from bench_engine import _inputs

    from assim import engine

    model, inputs = _inputs(n_basin, days)
    settings = engine.Settings(mode="assimilate", members=members, seed=1, spinup_days=0,
                               update_states=model.default_updated_states(),
                               write_states=model.reported_states(model.default_updated_states()), basin_chunk=n_basin,
                               time_block_days=days, scheduler="synchronous", workers=1)
    out = {}

    class Keep:
        def write_block(self, start, arrays):
            for k, v in arrays.items():
                if np.ndim(v) == 3:
                    out[k] = np.asarray(v, dtype=np.float32)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        engine.run(model, inputs, settings, Keep())
    return out


def write(path: Path, arrays: dict[str, np.ndarray], encoding: dict, block: int = 30) -> None:
    import netCDF4

    nb, nt, nm = next(iter(arrays.values())).shape
    with netCDF4.Dataset(path, "w", format="NETCDF4") as nc:
        nc.createDimension("basin", nb)
        nc.createDimension("member", nm)
        nc.createDimension("time", nt)
        vs = {k: nc.createVariable(k, "f4", ("basin", "member", "time"), chunksizes=(1, nm, min(nt, 365)),
                                   fill_value=np.float32(np.nan), **encoding) for k in arrays}
        for t in range(0, nt, block):
            for k, v in vs.items():
                v[..., t:t + block] = arrays[k][:, t:t + block].transpose(0, 2, 1)


def run(quick: bool = False, repeat: int = 3) -> list[dict]:
    import netCDF4

    dims = (8, 64, 200) if quick else (40, 128, 365)
    arrays = member_values(*dims)
    n_values = sum(a.size for a in arrays.values())
    raw_mb = n_values * 4 / 1e6
    rows = []
    for name, enc in ENCODINGS.items():
        c = enc.get("compression", "")
        if (c.startswith("blosc") and not netCDF4.__has_blosc_support__) or \
                (c == "zstd" and not netCDF4.__has_zstandard_support__) or \
                ("significant_digits" in enc and not netCDF4.__has_quantization_support__):
            continue
        cpus, walls = [], []
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / "members.nc"
            for _ in range(repeat):
                c0, w0 = time.process_time(), time.perf_counter()
                write(path, arrays, enc)
                cpus.append(time.process_time() - c0)
                walls.append(time.perf_counter() - w0)
            size = path.stat().st_size / 1e6
            with netCDF4.Dataset(path) as nc:
                err = max(float(np.nanmax(np.abs(nc[k][:].transpose(0, 2, 1) - a) / np.maximum(np.abs(a), 1e-30)))
                          for k, a in arrays.items())
        rows.append({"encoding": name, "cpu_s": min(cpus), "wall_s": min(walls), "mvalues_per_cpu_s":
                     n_values / min(cpus) / 1e6, "file_mb": size, "ratio": size / raw_mb,
                     "max_relative_error": err, "values": n_values})
    return rows


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    rows = run(args.quick)
    if args.json:
        print(json.dumps(rows, indent=1))
        return 0
    import os

    print(f"{rows[0]['values'] / 1e6:.1f} M float32 member values; load average {os.getloadavg()[0]:.2f}")
    print(f"{'encoding':46} {'cpu s':>6} {'M values/s':>10} {'MB':>7} {'ratio':>6} {'max rel err':>11}")
    for r in rows:
        print(f"{r['encoding']:46} {r['cpu_s']:6.2f} {r['mvalues_per_cpu_s']:10.1f} {r['file_mb']:7.1f} "
              f"{r['ratio']:6.2f} {r['max_relative_error']:11.1e}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
