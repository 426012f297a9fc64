"""Checksums of the products a later step reads, and the writers' compression choices.

A product's variables carry the SHA-256 checksum written with them (variable attribute
``sha256``): for streamed products one digest per day (per experiment and issue time in
hindcast.nc) recorded as each block is written, combined in day order at the close. The
outside reference is SHA-256 itself (FIPS 180-4, through hashlib) and common practice for
integrity checks (no published source): bit-identical values give an identical checksum,
one flipped bit gives another and is refused by the reader.
"""

from __future__ import annotations

import hashlib

import _scenario
import netCDF4
import numpy as np
import pytest
import xarray as xr

from assim.errors import InputError
from assim.io.common import open_netcdf, unit_digests, variable_digest, verify_digests
from assim.io.products import COMPRESSION, HindcastWriter, RunWriter

DAYS = np.arange(40, dtype=np.int64) + 18262
IDS = ("velmorra", "oskerrin")


def _blocks(rng, nb=2, nm=4):
    n_days = len(DAYS)
    return {"discharge": rng.gamma(2.0, 3.0, (nb, n_days, nm)), "discharge_analysis": rng.gamma(2.0, 3.0, (nb, n_days, nm)),
            "innovation": np.where(rng.random((nb, n_days)) < 0.3, np.nan, rng.normal(size=(nb, n_days))),
            "obs_status": rng.integers(0, 3, (nb, n_days)).astype(np.int8)}


def _write(path, arrays, cuts, *, order=1, time_chunk=365, compression="none"):
    """``arrays`` written in the blocks cut at ``cuts`` (in reverse when ``order`` is -1)."""
    edges = [0, *cuts, len(DAYS)]
    with RunWriter(path, basins=["a", "b"], days=DAYS, members=4, mode="assimilate", time_chunk=time_chunk,
                   compression=compression) as w:
        for a, b in list(zip(edges[:-1], edges[1:], strict=True))[::order]:
            w.write_block(a, {k: v[:, a:b] for k, v in arrays.items()})


def _checksums(path) -> dict[str, str]:
    with netCDF4.Dataset(path) as nc:
        return {k: v.getncattr("sha256") for k, v in nc.variables.items() if "sha256" in v.ncattrs()}


def test_unit_digest_is_sha256_of_the_values_bytes():
    """One unit's digest is hashlib's SHA-256 of the float32 values in the file's order (FIPS
    180-4 through hashlib); NaN payloads count as one NaN."""
    a = np.arange(12, dtype=np.float32).reshape(3, 4)
    assert unit_digests(a, 1) == [hashlib.sha256(a[i].tobytes()).digest() for i in range(3)]
    b = a.copy()
    b.view(np.uint32)[0, 0] = 0x7FC00001  # a NaN with another payload
    c = a.copy()
    c[0, 0] = np.nan
    assert unit_digests(b, 1) == unit_digests(c, 1)


def test_checksum_does_not_depend_on_how_the_writes_were_cut(tmp_path):
    """Bit-identical values, written in one block, in 7-day blocks backwards, day by day,
    or with other chunks on disk: identical checksums (common practice, no published source)."""
    arrays = _blocks(np.random.default_rng(3))
    ways = {"one": ([], 1, 365), "sevens_backwards": (list(range(7, 40, 7)), -1, 365),
            "days": (list(range(1, 40)), 1, 5), "zlib": ([13, 20], 1, 30)}
    sums = {}
    for name, (cuts, order, chunk) in ways.items():
        _write(tmp_path / f"{name}.nc", arrays, cuts, order=order, time_chunk=chunk,
               compression="zlib" if name == "zlib" else "none")
        sums[name] = _checksums(tmp_path / f"{name}.nc")
    assert {"discharge", "discharge_background", "observed_discharge", "innovation", "innovation_variance",
            "obs_status", "spread_before", "spread_after", "clipped_water"} <= set(sums["one"])
    assert all(s == sums["one"] for s in sums.values())
    with xr.open_dataset(tmp_path / "one.nc") as ds:  # the reader's rule gives the writer's checksum
        assert set(ds.data_vars) - {"time_bnds"} == set(sums["one"])  # every data variable has one
        for name, recorded in sums["one"].items():
            split = ("time",) if "time" in ds[name].dims else ()
            assert variable_digest(ds[name], split) == recorded, name


def test_one_flipped_bit_is_refused_naming_file_and_variable(tmp_path):
    """One exponent bit of one value flipped with netCDF4: the reader refuses the file
    (InputError naming file and variable); the untouched file passes."""
    p = tmp_path / "analysis.nc"
    _write(p, _blocks(np.random.default_rng(4)), [20])
    open_netcdf(p, load=True).close()  # untouched: read
    with netCDF4.Dataset(p, "r+") as nc:
        v = nc["discharge"]
        a = v[1, 2, 30:31].data.copy()
        a.view(np.uint32)[0] ^= np.uint32(1) << np.uint32(23)  # lowest exponent bit
        v[1, 2, 30:31] = a
    with pytest.raises(InputError, match="damaged") as info:
        open_netcdf(p, load=True)
    assert str(info.value.file) == str(p) and info.value.variable == "discharge" and "\n" not in str(info.value)
    open_netcdf(p, load=True, verify=["innovation"]).close()  # only the variables read are checked


def test_raw_byte_flip_inside_an_uncompressed_chunk_is_refused(tmp_path):
    """A bit flipped in the file's bytes (not through the library), inside a chunk of an
    uncompressed variable: refused."""
    p = tmp_path / "analysis.nc"
    arrays = _blocks(np.random.default_rng(5))
    _write(p, arrays, [10])
    with netCDF4.Dataset(p) as nc:
        values = nc["discharge_background"][:].data  # (basin, member, time) float32
    data = bytearray(p.read_bytes())
    target = values[0, 1, 17].tobytes()
    at = data.find(target)
    assert at >= 0 and data.find(target, at + 1) < 0  # the value's 4 bytes, once in the file
    data[at + 3] ^= 0x01  # little-endian: the byte holding the sign and exponent
    p.write_bytes(bytes(data))
    with pytest.raises(InputError, match="damaged") as info:
        open_netcdf(p, load=True)
    assert info.value.variable == "discharge_background"


def test_product_without_checksums_is_read_as_it_is(tmp_path):
    """A product of an older version (no sha256 attributes) is read without a check, as
    restarts and the prepared layer are."""
    p = tmp_path / "analysis.nc"
    _write(p, _blocks(np.random.default_rng(6)), [])
    with netCDF4.Dataset(p, "r+") as nc:
        for v in nc.variables.values():
            if "sha256" in v.ncattrs():
                v.delncattr("sha256")
    with open_netcdf(p, load=True) as ds:
        assert "sha256" not in ds["discharge"].attrs


def test_checksum_attribute_never_reaches_what_readers_return(tmp_path):
    """The checksum describes the file's values: a dataset read from it (and anything built
    from it) carries none."""
    p = tmp_path / "analysis.nc"
    _write(p, _blocks(np.random.default_rng(7)), [])
    for load in (True, False):
        with open_netcdf(p, load=load) as ds:
            assert not any(k.endswith("sha256") for v in ds.variables.values() for k in v.attrs)


def test_hindcast_checksum_per_experiment_and_issue(tmp_path):
    """hindcast.nc: experiments written one after the other in blocks of issue times, or
    in one block each, give one checksum; a changed value is refused."""
    rng = np.random.default_rng(8)
    q = {e: rng.gamma(2.0, 1.0, (2, 9, 3, 4)) for e in ("openloop", "assimilation")}
    for name, cuts in (("a.nc", [0, 9]), ("b.nc", [0, 4, 5, 9])):
        with HindcastWriter(tmp_path / name, basins=["a", "b"], issue_days=DAYS[:9], leads=3, members=4) as w:
            for e in ("assimilation", "openloop"):
                for s, t in zip(cuts[:-1], cuts[1:], strict=True):
                    w.write_block(e, s, q[e][:, s:t])
    assert _checksums(tmp_path / "a.nc") == _checksums(tmp_path / "b.nc")
    with netCDF4.Dataset(tmp_path / "a.nc", "r+") as nc:
        nc["discharge"][1, 0, 2, 3, 8] = np.float32(nc["discharge"][1, 0, 2, 3, 8]) * 2
    with xr.open_dataset(tmp_path / "a.nc") as ds, pytest.raises(InputError, match="discharge"):
        verify_digests(ds, tmp_path / "a.nc")


@pytest.mark.parametrize("compression", sorted(COMPRESSION))
def test_every_compression_keeps_the_values_and_cf(tmp_path, compression):
    """Each ``outputs.compression`` is lossless (values read back bit for bit), passes
    compliance-checker (reference library, CF-1.8: no high or medium failure) and gives
    the same checksum."""
    from _cf import cf_failures

    arrays = _blocks(np.random.default_rng(9))
    _write(tmp_path / "none.nc", arrays, [])
    _write(tmp_path / "x.nc", arrays, [15], compression=compression)
    with xr.open_dataset(tmp_path / "x.nc") as ds:
        want = arrays["discharge_analysis"].astype(np.float32).transpose(0, 2, 1)
        np.testing.assert_array_equal(ds["discharge"].values, want)
    assert _checksums(tmp_path / "x.nc") == _checksums(tmp_path / "none.nc")
    assert cf_failures(tmp_path / "x.nc") == ([], [])


@pytest.mark.slow
def test_checksums_identical_whatever_scheduler_chunks_and_blocks(tmp_path):
    """A real run of two sample basins: the product written with the synchronous scheduler
    in one time block and one basin chunk, and with two threads, 1-basin chunks and 17-day
    blocks, holds bit-identical values (the engine's promise) and identical checksums; the
    hindcast likewise."""
    import assim

    root = tmp_path
    _scenario.make_raw(root / "raw", IDS, "2012-01-01", "2012-05-31")
    base = {"data": {"raw": str(root / "raw"), "prepared": str(root / "prepared")},
            "period": {"start": "2012-01-01", "end": "2012-05-31", "spinup_days": 20},
            "hindcast": {"every_days": 15, "leads": 3}}
    ways = {"one": {"scheduler": "synchronous", "basin_chunk": 64, "time_block_days": 365},
            "cut": {"scheduler": "threads", "workers": 2, "basin_chunk": 1, "time_block_days": 17}}
    sums = {}
    for name, ens in ways.items():
        cfg = assim.load_config(_scenario.write_config(
            root, {**base, "results": str(root / name), "ensemble": {"members": 6, "seed": 2, "progress": False, **ens}}))
        if name == "one":
            assim.prep(cfg)
        assim.run(cfg).close()
        assim.hindcast(cfg).close()
        sums[name] = {f: _checksums(root / name / f) for f in ("analysis.nc", "hindcast.nc")}
    assert sums["one"]["analysis.nc"]["discharge"].startswith("time:")
    assert sums["one"] == sums["cut"]
