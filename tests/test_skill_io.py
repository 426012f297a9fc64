"""Tests of assim.io.skill: skill.nc / skill.csv round trip and the checked product opener."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from assim.errors import InputError
from assim.io.skill import (
    CSV_COLUMNS,
    open_product,
    read_skill,
    read_skill_csv,
    skill_table,
    write_skill,
)


def _skill_dataset():
    rng = np.random.default_rng(0)
    shape = (2, 2, 3, 2)
    value = rng.normal(size=shape)
    n = rng.integers(1, 50, size=shape)
    value[1, 1, 2, 1], n[1, 1, 2, 1] = np.nan, 0  # nothing scored
    return xr.Dataset(
        {"skill": (("basin", "experiment", "lead", "metric"), value),
         "n": (("basin", "experiment", "lead", "metric"), n)},
        coords={"basin": np.array(["alder", "birch"], dtype=object),
                "experiment": np.array(["openloop", "assimilation"], dtype=object),
                "lead": [0, 1, 2], "metric": np.array(["nse", "crps"], dtype=object)},
    )


def test_round_trip_and_tidy_csv(tmp_path):
    """Common practice, no published source (tidy data): one CSV row per scored
    (basin, experiment, lead, metric), columns exactly basin, experiment, lead, metric,
    value, n, values equal to the NetCDF ones; rows with n = 0 are left out."""
    ds = _skill_dataset()
    write_skill(ds, tmp_path / "skill.nc", tmp_path / "skill.csv")
    back = read_skill(tmp_path / "skill.nc")
    np.testing.assert_allclose(back["skill"].values, ds["skill"].values)
    assert back["basin"].values.tolist() == ["alder", "birch"]
    with open(tmp_path / "skill.csv") as f:
        assert f.readline().strip() == "basin,experiment,lead,metric,value,n"
    table = read_skill_csv(tmp_path / "skill.csv")
    assert tuple(table.columns) == CSV_COLUMNS
    assert len(table) == ds["skill"].size - 1
    row = table[(table.basin == "birch") & (table.experiment == "openloop") & (table.lead == 2)
                & (table.metric == "crps")]
    assert row["value"].iloc[0] == pytest.approx(float(ds["skill"][1, 0, 2, 1]), rel=1e-5)
    assert row["n"].iloc[0] == int(ds["n"][1, 0, 2, 1])
    assert not list(tmp_path.glob(".*.part"))
    pd.testing.assert_frame_equal(skill_table(ds)[["basin", "lead", "n"]], table[["basin", "lead", "n"]])


def test_read_skill_csv_rejects_other_columns(tmp_path):
    """Common practice, no published source: a table with other columns is an InputError."""
    path = tmp_path / "skill.csv"
    path.write_text("basin,lead,value\nalder,0,1.0\n")
    with pytest.raises(InputError, match="expected basin, experiment, lead, metric, value, n"):
        read_skill_csv(path)


def test_open_product_names_file_and_variable(tmp_path):
    """Common practice, no published source: missing file or variable -> InputError naming both."""
    path = tmp_path / "openloop.nc"
    with pytest.raises(InputError, match="openloop.nc: file not found"):
        open_product(path)
    xr.Dataset({"discharge": (("basin", "time"), np.zeros((1, 2)))}).to_netcdf(path)
    with pytest.raises(InputError, match=r"openloop.nc: variable 'member'"):
        open_product(path, ("discharge", "member"))
    with pytest.raises(InputError, match="discharge_quantile or ensemble"):
        open_product(path, any_of=("discharge_quantile", "ensemble"))
    with open_product(path, ("discharge",)) as ds:
        assert ds["discharge"].shape == (1, 2)
    (tmp_path / "bad.nc").write_text("not netcdf")
    with pytest.raises(InputError, match="cannot read as NetCDF"):
        open_product(tmp_path / "bad.nc")


def test_skill_nc_passes_the_cf_checker(tmp_path):
    """Reference tool: compliance-checker's cf:1.8 suite finds no error in the skill.nc
    that verify_results writes (warnings about feature types aside)."""
    import json

    from compliance_checker.runner import CheckSuite, ComplianceChecker
    from test_verification import make_study

    import assim.verification as v

    cfg, _ = make_study(tmp_path, forecast=False)
    path = v.verify_results(cfg).attrs["product_path"]
    CheckSuite().load_all_available_checkers()
    report = tmp_path / "cf.json"
    ComplianceChecker.run_checker(path, ["cf:1.8"], 0, "normal", output_filename=str(report), output_format="json")
    result = json.loads(report.read_text())["cf:1.8"]
    failed = [(c["name"], c["msgs"]) for c in result["high_priorities"] if c["value"][0] < c["value"][1]]
    assert failed == []
