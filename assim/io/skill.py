"""skill.nc and skill.csv: the verification products.

``skill.nc`` holds ``skill`` and ``n`` on ``(basin, experiment, lead, metric)`` plus the
rank histograms and reliability tables the figures draw. ``skill.csv`` is the tidy table of
``skill`` and ``n`` with exactly the columns :data:`CSV_COLUMNS`.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from assim.errors import InputError
from assim.io.common import FileSet, atomic_path, labels_to_file
from assim.io.common import open_netcdf as open_product

CSV_COLUMNS = ("basin", "experiment", "lead", "metric", "value", "n")
SKILL_VARIABLES = ("skill", "n")


def write_skill(ds: xr.Dataset, nc_path: str | os.PathLike, csv_path: str | os.PathLike) -> None:
    """Write ``skill.nc`` (the whole Dataset) and ``skill.csv`` (tidy ``skill`` and ``n``).

    Parameters
    ----------
    ds : Dataset with ``skill`` and ``n`` on (basin, experiment, lead, metric)
    nc_path, csv_path : destinations; each file is written whole or not at all.
    """
    on_disk = labels_to_file(ds)
    encoding: dict[str, dict] = {}
    for name, var in on_disk.variables.items():
        if name in on_disk.data_vars:
            encoding[str(name)] = {"zlib": True, "complevel": 4}
            if var.dtype.kind in "iu":
                encoding[str(name)]["dtype"] = "int32"  # CF-1.8 section 2.2 has no 64-bit integers
        elif var.dtype.kind == "f":
            encoding[str(name)] = {"_FillValue": None}  # coordinates have no missing values
        elif var.dtype.kind in "OUS":
            encoding[str(name)] = {"dtype": str}
    with FileSet([nc_path], checksummed=[nc_path]) as files, atomic_path(nc_path, files) as tmp:
        on_disk.to_netcdf(tmp, engine="netcdf4", encoding=encoding)
    table = skill_table(ds)
    with atomic_path(csv_path) as tmp:
        table.to_csv(tmp, index=False, float_format="%.6g")


def skill_table(ds: xr.Dataset) -> pd.DataFrame:
    """The tidy table of a skill Dataset: one row per (basin, experiment, lead, metric)
    with at least one scored pair; columns :data:`CSV_COLUMNS`."""
    skill = ds["skill"].transpose("basin", "experiment", "lead", "metric")
    n = ds["n"].transpose("basin", "experiment", "lead", "metric")
    index = pd.MultiIndex.from_product(
        [skill[d].values for d in skill.dims], names=list(skill.dims)
    ).to_frame(index=False)
    index["value"] = skill.values.ravel()
    index["n"] = n.values.ravel().astype(np.int64)
    index["lead"] = index["lead"].astype(np.int64)
    table = index.loc[index["n"] > 0, list(CSV_COLUMNS)]
    return table.reset_index(drop=True)


def read_skill(path: str | os.PathLike) -> xr.Dataset:
    """Read ``skill.nc`` into memory.

    Raises
    ------
    InputError
        when the file is missing, lacks ``skill`` or ``n``, or is damaged (checksums).
    """
    return open_product(path, SKILL_VARIABLES, load=True)


def read_skill_csv(path: str | os.PathLike) -> pd.DataFrame:
    """Read ``skill.csv``; checks that its columns are exactly :data:`CSV_COLUMNS`.

    Raises
    ------
    InputError
        when the file is missing or its header differs.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError("file not found", file=path)
    table = pd.read_csv(path, dtype={"basin": str, "experiment": str, "metric": str})
    if tuple(table.columns) != CSV_COLUMNS:
        raise InputError(
            f"columns are {', '.join(table.columns)}; expected {', '.join(CSV_COLUMNS)}",
            file=path,
            place="line 1",
        )
    return table
