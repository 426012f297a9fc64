"""Tests of assim.io.prepared: round trips, CF-1.8 compliance, validation on read."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from assim.config import load_config
from assim.errors import InputError
from assim.io import prepared as p

REPO = Path(__file__).resolve().parents[1]
DAYS = np.arange("2015-01-01", "2015-01-21", dtype="datetime64[D]")
IDS = ["a1", "b2"]


def forcing(**kw):
    rng = np.random.default_rng(1)
    days = kw.pop("days", DAYS)
    prec = kw.pop("precipitation", rng.gamma(0.7, 4.0, (2, days.size)))
    pet = kw.pop("pet", rng.uniform(0.2, 3.0, (2, days.size)))
    return p.forcing_dataset(IDS, days, prec, pet, [51.0, 52.0], [-1.0, -2.0], pet_method="oudin")


def observations(ids=IDS, days=DAYS):
    n = len(days)
    q = np.linspace(1, 9, 2 * n).reshape(2, n)
    q[0, 3] = np.nan
    flag = np.zeros((2, n), int)
    flag[0, 3] = p.QC_FLAGS["insufficient_coverage"] | p.QC_FLAGS["spike"]
    flag[1, 5] = p.QC_FLAGS["rating_extrapolated"]
    cover = np.ones((2, n))
    cover[0, 3] = 0.4
    return p.observations_dataset(ids, days, q, flag, cover, np.full((2, n), 8), np.zeros((2, n)),
                                  [51.0, 52.0], [-1.0, -2.0])


def basins(ids=IDS, x1=(300.0, 800.0)):
    return p.basins_dataset(ids, ["Alpha", "Beta"], [50.0, 120.0], [51.0, 52.0], [-1.0, -2.0], "gr4j",
                            {"x1": list(x1), "x2": [0.0, -1.0], "x3": [80.0, 200.0], "x4": [1.5, 3.0]},
                            np.array([[10.0, np.nan], [20.0, 40.0]]), ["minor", "major"],
                            ["stage", "discharge"])


@pytest.fixture()
def folder(tmp_path):
    p.write_forcing(forcing(), tmp_path / p.FORCING_FILE)
    p.write_observations(observations(), tmp_path / p.OBSERVATIONS_FILE)
    p.write_basins(basins(), tmp_path / p.BASINS_FILE)
    return tmp_path


def test_round_trip(folder):
    """What was written reads back equal (values, ids, dtypes, flags, thresholds)."""
    f, o, b = p.read_prepared(folder)
    ref = forcing()
    np.testing.assert_array_equal(f["precipitation"].values, ref["precipitation"].values)
    np.testing.assert_array_equal(f["pet"].values, ref["pet"].values)
    assert f["precipitation"].dtype == np.float64
    assert f["basin"].values.tolist() == IDS
    assert (f["time"].values == DAYS.astype("datetime64[ns]")).all()
    ro = observations()
    np.testing.assert_array_equal(o["discharge"].values, ro["discharge"].values)
    np.testing.assert_array_equal(o["qc_flag"].values, ro["qc_flag"].values)
    assert o["qc_flag"].attrs["flag_meanings"].split() == list(p.QC_FLAGS)
    np.testing.assert_array_equal(b["thresholds"].values, basins()["thresholds"].values)
    assert b["threshold"].values.tolist() == ["minor", "major"]
    assert b["name"].values.tolist() == ["Alpha", "Beta"]
    assert b.attrs["model"] == "gr4j"
    assert b["x4"].values.tolist() == [1.5, 3.0]
    np.testing.assert_array_equal(f["latitude"].values, [51.0, 52.0])


def test_time_encoding_on_disk(folder):
    """CF time: integer "days since 1970-01-01", standard calendar (2015-01-01 is day 16436)."""
    import netCDF4

    with netCDF4.Dataset(folder / p.FORCING_FILE) as nc:
        t = nc["time"]
        assert t.units == "days since 1970-01-01" and t.calendar == "standard"
        assert t[0] == 16436 and t.dtype.kind == "i"
        assert nc["basin_id"].cf_role == "timeseries_id"
        assert nc.featureType == "timeSeries"


def test_usable_discharge(folder):
    """Days with an unusable flag are NaN; rating-extrapolated days are kept."""
    _, o, _ = p.read_prepared(folder)
    u = p.usable_discharge(o).values
    assert np.isnan(u[0, 3])
    assert u[1, 5] == o["discharge"].values[1, 5]
    # a value on a day flagged unusable is masked even if a writer left it in
    o2 = o.copy(deep=True)
    o2["discharge"].values[0, 3] = 4.0
    assert np.isnan(p.usable_discharge(o2).values[0, 3])


def test_period_selection_and_observation_alignment(tmp_path):
    """read_prepared returns [start, end] and observations on the forcing's days (outside
    the observation file: NaN and insufficient_coverage)."""
    p.write_forcing(forcing(), tmp_path / p.FORCING_FILE)
    p.write_observations(observations(days=DAYS[5:15]), tmp_path / p.OBSERVATIONS_FILE)
    p.write_basins(basins(), tmp_path / p.BASINS_FILE)
    f, o, _ = p.read_prepared(tmp_path, "2015-01-03", "2015-01-18")
    assert f.sizes["time"] == 16 and str(f["time"].values[0])[:10] == "2015-01-03"
    assert (o["time"].values == f["time"].values).all()
    assert np.isnan(o["discharge"].values[:, :3]).all()
    assert (o["qc_flag"].values[:, :3] == p.UNUSABLE).all()
    assert o["qc_flag"].attrs["flag_masks"].tolist() == list(p.QC_FLAGS.values())


def _compliance(path: Path, tmp_path: Path) -> dict:
    from compliance_checker.runner import CheckSuite, ComplianceChecker

    CheckSuite().load_all_available_checkers()
    out = tmp_path / f"{path.stem}.json"
    ok, errors = ComplianceChecker.run_checker(str(path), ["cf:1.8"], 0, "normal",
                                               output_filename=str(out), output_format="json")
    report = json.loads(out.read_text())["cf:1.8"]
    return {"ok": ok, "errors": errors, "high": report["high_count"], "medium": report["medium_count"],
            "failures": [r for r in report["all_priorities"] if r["value"][0] < r["value"][1]]}


@pytest.fixture(scope="module")
def sample_prepared(tmp_path_factory):
    import assim.preparation

    out = tmp_path_factory.mktemp("sample")
    cfg = load_config(None, data={"raw": str(REPO / "sample_basin"), "prepared": str(out)})
    return out, assim.preparation.prepare(cfg)


@pytest.mark.filterwarnings("ignore::DeprecationWarning")
@pytest.mark.parametrize("name", [p.FORCING_FILE, p.OBSERVATIONS_FILE, p.BASINS_FILE])
def test_cf_compliance(name, sample_prepared, tmp_path):
    """compliance-checker (IOOS, checker cf:1.8) finds no failed check in the prepared
    files of the sample basins, and the checker itself raised nothing."""
    folder, _ = sample_prepared
    r = _compliance(folder / name, tmp_path)
    assert r["failures"] == [] and r["high"] == 0 and r["medium"] == 0, r
    assert r["ok"] and not r["errors"]


def test_sample_round_trip(sample_prepared):
    """The files written by prep read back equal to the Datasets prep returned."""
    folder, ds = sample_prepared
    f, o, b = p.read_prepared(folder)
    np.testing.assert_array_equal(f["precipitation"].values, ds["forcing"]["precipitation"].values)
    np.testing.assert_array_equal(f["pet"].values, ds["forcing"]["pet"].values)
    np.testing.assert_array_equal(o["discharge"].values, ds["observations"]["discharge"].values)
    np.testing.assert_array_equal(o["qc_flag"].values, ds["observations"]["qc_flag"].values)
    np.testing.assert_array_equal(b["x1"].values, ds["basins"]["x1"].values)
    assert ds["forcing"].attrs["product_path"] == str(folder / p.FORCING_FILE)


# ---------------------------------------------------------------------------------- bad files


def _msg(exc_info):
    text = str(exc_info.value)
    assert "\n" not in text
    return text


def test_missing_empty_and_corrupt(tmp_path):
    """A missing, empty or corrupt NetCDF file is one InputError naming the file."""
    with pytest.raises(InputError, match="not found"):
        p.read_forcing(tmp_path / "forcing.nc")
    (tmp_path / "forcing.nc").write_bytes(b"")
    with pytest.raises(InputError, match="empty"):
        p.read_forcing(tmp_path / "forcing.nc")
    p.write_forcing(forcing(), tmp_path / "good.nc")
    data = (tmp_path / "good.nc").read_bytes()
    (tmp_path / "forcing.nc").write_bytes(data[: len(data) // 3])
    with pytest.raises(InputError) as info:
        p.read_forcing(tmp_path / "forcing.nc")
    assert "forcing.nc" in _msg(info) and "NetCDF" in _msg(info)
    (tmp_path / "forcing.nc").write_bytes(b"date,basin\n2015-01-01,a\n")
    with pytest.raises(InputError, match="not a readable NetCDF"):
        p.read_forcing(tmp_path / "forcing.nc")


def _write_raw(ds: xr.Dataset, path: Path) -> Path:
    """Write through the package writer's on-disk layout but without its validation."""
    p._write(ds, path)
    return path


@pytest.mark.parametrize("units, ok", [("mm/d", True), ("mm day-1", True), ("kg m-2 d-1", True),
                                       ("mm h-1", False), ("m", False)])
def test_forcing_units(tmp_path, units, ok):
    """Common spellings of mm per day are accepted; other units are errors naming the variable."""
    ds = forcing()
    ds["pet"].attrs["units"] = units
    path = _write_raw(ds, tmp_path / "forcing.nc")
    if ok:
        assert p.read_forcing(path)["pet"].dtype == np.float64
    else:
        with pytest.raises(InputError) as info:
            p.read_forcing(path)
        assert "variable 'pet'" in _msg(info) and "mm d-1" in _msg(info)


def test_forcing_validation(tmp_path):
    """Negative precipitation, NaN in the run period (not outside it), duplicated and
    reversed dates, a missing variable and a period outside the file: each an InputError
    naming the file, the variable and the first bad basin and date."""
    prec = np.ones((2, DAYS.size))
    prec[1, 4] = -0.1
    path = _write_raw(forcing(precipitation=prec), tmp_path / "f1.nc")
    with pytest.raises(InputError) as info:
        p.read_forcing(path)
    assert "f1.nc" in _msg(info) and "'precipitation'" in _msg(info) and "basin 'b2', 2015-01-05" in _msg(info)

    pet = np.ones((2, DAYS.size))
    pet[0, 2] = np.nan
    path = _write_raw(forcing(pet=pet), tmp_path / "f2.nc")
    with pytest.raises(InputError) as info:
        p.read_forcing(path)
    assert "'pet'" in _msg(info) and "basin 'a1', 2015-01-03" in _msg(info)
    assert p.read_forcing(path, start="2015-01-04").sizes["time"] == DAYS.size - 3

    days = DAYS.copy()
    days[7] = days[6]
    with pytest.raises(InputError) as info:
        p.read_forcing(_write_raw(forcing(days=days), tmp_path / "f3.nc"))
    assert "'time'" in _msg(info) and "duplicated" in _msg(info) and "2015-01-07" in _msg(info)

    days = DAYS.copy()
    days[[7, 8]] = days[[8, 7]]
    with pytest.raises(InputError) as info:
        p.read_forcing(_write_raw(forcing(days=days), tmp_path / "f4.nc"))
    assert "backwards" in _msg(info) and "2015-01-08" in _msg(info)

    with pytest.raises(InputError) as info:
        p.read_forcing(_write_raw(forcing(days=np.delete(DAYS, 9)), tmp_path / "f5.nc"))
    assert "missing day" in _msg(info) and "2015-01-11" in _msg(info)

    with pytest.raises(InputError) as info:
        p.read_forcing(_write_raw(forcing().drop_vars("pet"), tmp_path / "f6.nc"))
    assert "variable 'pet'" in _msg(info) and "missing" in _msg(info)

    with pytest.raises(InputError) as info:
        p.read_forcing(_write_raw(forcing(), tmp_path / "f7.nc"), end="2016-01-01")
    assert "outside the forcing" in _msg(info)


def test_writer_refuses_bad_forcing(tmp_path):
    """write_forcing validates before it writes: nothing appears for bad data."""
    prec = np.ones((2, DAYS.size))
    prec[0, 0] = np.nan
    with pytest.raises(InputError):
        p.write_forcing(forcing(precipitation=prec), tmp_path / "forcing.nc")
    assert list(tmp_path.iterdir()) == []


def test_observation_validation(tmp_path):
    """Wrong discharge units, negative discharge and flags without flag_meanings."""
    ds = observations()
    ds["discharge"].attrs["units"] = "l/s"
    with pytest.raises(InputError) as info:
        p.read_observations(_write_raw(ds, tmp_path / "o1.nc"))
    assert "variable 'discharge'" in _msg(info) and "m3 s-1" in _msg(info)
    ds["discharge"].attrs["units"] = "m^3/s"
    assert p.read_observations(_write_raw(ds, tmp_path / "o1.nc"))["discharge"].dtype == np.float64

    ds = observations()
    ds["discharge"].values[1, 2] = -3.0
    with pytest.raises(InputError) as info:
        p.read_observations(_write_raw(ds, tmp_path / "o2.nc"))
    assert "basin 'b2', 2015-01-03" in _msg(info)

    ds = observations()
    del ds["qc_flag"].attrs["flag_meanings"]
    with pytest.raises(InputError) as info:
        p.read_observations(_write_raw(ds, tmp_path / "o3.nc"))
    assert "variable 'qc_flag'" in _msg(info) and "flag_meanings" in _msg(info)


def test_basins_validation(tmp_path):
    """Parameters outside the model's range, area <= 0, a missing model attribute."""
    with pytest.raises(InputError) as info:
        p.read_basins(_write_raw(basins(x1=(300.0, 4000.0)), tmp_path / "b1.nc"))
    assert "variable 'x1'" in _msg(info) and "basin 'b2'" in _msg(info) and "b1.nc" in _msg(info)
    ds = basins()
    ds["area"].values[0] = 0.0
    with pytest.raises(InputError) as info:
        p.read_basins(_write_raw(ds, tmp_path / "b2.nc"))
    assert "variable 'area'" in _msg(info) and "basin 'a1'" in _msg(info)
    ds = basins()
    del ds.attrs["model"]
    with pytest.raises(InputError, match="model"):
        p.read_basins(_write_raw(ds, tmp_path / "b3.nc"))


@pytest.mark.parametrize("which", ["observations", "basins"])
def test_mismatched_basins(folder, which):
    """read_prepared refuses files whose basins differ from forcing.nc (ids or order)."""
    name = p.OBSERVATIONS_FILE if which == "observations" else p.BASINS_FILE
    ds = observations(ids=["b2", "a1"]) if which == "observations" else basins(ids=["a1", "c3"])
    _write_raw(ds, folder / name)
    with pytest.raises(InputError) as info:
        p.read_prepared(folder)
    text = _msg(info)
    assert name in text and "variable 'basin'" in text
    assert ("different order" in text) if which == "observations" else ("'c3'" in text)


def test_observations_outside_forcing(folder):
    """Observations beyond the forcing's days are an error."""
    later = np.arange("2015-01-10", "2015-02-05", dtype="datetime64[D]")
    _write_raw(observations(days=later), folder / p.OBSERVATIONS_FILE)
    with pytest.raises(InputError, match="outside"):
        p.read_prepared(folder)


def test_atomic_write_keeps_old_file(folder, monkeypatch):
    """A write that fails leaves the previous complete file and no temporary file."""
    before = (folder / p.FORCING_FILE).read_bytes()

    def boom(self, *a, **k):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(xr.Dataset, "to_netcdf", boom)
    with pytest.raises(Exception, match="space"):
        p.write_forcing(forcing(), folder / p.FORCING_FILE)
    assert (folder / p.FORCING_FILE).read_bytes() == before
    assert sorted(x.name for x in folder.iterdir()) == sorted([p.FORCING_FILE, p.OBSERVATIONS_FILE,
                                                              p.BASINS_FILE])
    shutil.rmtree(folder)
