"""``assim run --mode reanalysis``: the fixed-lag smoothed ensemble in reanalysis.nc
(assim.pipeline.run, assim.io.products.RunWriter, the CLI), on a twin experiment."""

from __future__ import annotations

import shutil
import warnings

import numpy as np
import pytest
import scoringrules as sr
from _cf import cf_failures
from _scenario import twin_arrays, write_twin_layer

from assim import pipeline
from assim.caution import CAUTION
from assim.cli import main
from assim.config import load_config
from assim.errors import RestartError

START, END = "2002-01-01", "2002-12-31"
W = 5


@pytest.fixture(scope="module")
def twin(tmp_path_factory):
    """Two invented basins: the truth is GR4J driven by the true rain; the prepared rain has
    lognormal errors (cv 0.3), the readings 10 % errors, one day in five missing."""
    arrays = twin_arrays(START, END, seed=21, x4=[2.5, 3.5], rain_cv=0.3, missing=0.2)
    folder = write_twin_layer(tmp_path_factory.mktemp("prepared"), arrays)
    return folder, arrays["truth"], arrays["dates"]


def _cfg(prepared, results):
    return load_config(None, data={"prepared": str(prepared)}, results=str(results),
                       period={"start": START, "end": END, "spinup_days": 60},
                       ensemble={"members": 24, "scheduler": "synchronous", "time_block_days": 40,
                                 "progress": False},
                       filter={"method": "etkf", "smoother": {"window_days": W}},
                       outputs={"states": True})


@pytest.fixture(scope="module")
def products(twin, tmp_path_factory):
    prepared, truth, dates = twin
    results = tmp_path_factory.mktemp("results")
    cfg = _cfg(prepared, results)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        an = pipeline.run(cfg, mode="assimilate").load()
        re = pipeline.run(cfg, mode="reanalysis").load()
    return cfg, an, re, truth[:, 60:]


def test_reanalysis_beats_the_filter_analysis_on_the_smoothed_days(products):
    """Twin experiment (known truth): on the days that left the window, the reanalysis's
    CRPS (scoringrules.crps_ensemble, reference library) and the RMSE of its mean against
    the truth are lower than the filter analysis's: later readings inform a day's discharge
    through the routing (Evensen & van Leeuwen 2000; common practice of twin experiments)."""
    _, an, re, truth = products
    n = re.sizes["time"]
    assert n == an.sizes["time"] == truth.shape[1]
    days = slice(0, n - W)
    scores = {}
    for name, ds in (("analysis", an), ("reanalysis", re)):
        ens = ds["discharge"].transpose("basin", "time", "member").values[:, days].astype(np.float64)
        crps = float(sr.crps_ensemble(truth[:, days], ens).mean())
        rmse = float(np.sqrt(np.mean((ens.mean(axis=-1) - truth[:, days]) ** 2)))
        scores[name] = (crps, rmse)
    assert scores["reanalysis"][0] < 0.95 * scores["analysis"][0], scores
    assert scores["reanalysis"][1] < 0.95 * scores["analysis"][1], scores
    # the last day is the filter's analysis (no later reading)
    np.testing.assert_array_equal(re["discharge"].isel(time=-1).values, an["discharge"].isel(time=-1).values)


def test_reanalysis_file_is_cf_and_says_what_it_is(products):
    """reanalysis.nc passes compliance-checker's CF-1.8 suite (reference tool) with no
    failed high- or medium-priority check, carries the caution, the window and the note
    on its last days, and has analysis.nc's time bounds and cell methods."""
    cfg, an, re, _ = products
    path = re.attrs["product_path"]
    assert path.endswith("reanalysis.nc")
    failures, raised = cf_failures(path)
    assert not failures and not raised, (failures, raised)
    assert re.attrs["caution"] == CAUTION
    assert int(re.attrs["smoother_window_days"]) == W
    assert f"the last {W} days" in re.attrs["smoothing"]
    assert re["discharge"].attrs["cell_methods"] == an["discharge"].attrs["cell_methods"] == "time: mean"
    assert "time_bnds" in re and re["time"].attrs.get("bounds", re["time"].encoding.get("bounds")) == "time_bnds"
    assert set(re["discharge"].dims) == {"basin", "member", "time"}
    assert "production_store" in re and "innovation" not in re


def test_continued_reanalysis_equals_the_one_shot_run(twin, products, tmp_path):
    """run --mode reanalysis --until D, then --restart-from its restart: the file equals the
    uninterrupted reanalysis bit for bit, its last W days rewritten with their final values
    (the restart carries the smoother's window; common practice, no published source)."""
    whole = products[2]
    cfg = _cfg(twin[0], tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        first = pipeline.run(cfg, mode="reanalysis", until="2002-07-13").load()
        shutil.copy(tmp_path / "restart-reanalysis.nc", tmp_path / "restart-first.nc")
        # a restart without a window of the run's W days cannot continue a reanalysis
        other = load_config(None, **{**{k: cfg[k] for k in ("data", "period", "ensemble", "outputs")},
                                     "results": str(tmp_path / "other"),
                                     "filter": {"method": "etkf", "smoother": {"window_days": W - 2}}})
        with pytest.raises(RestartError, match="window of 3 days"):
            pipeline.run(other, mode="reanalysis", restart_from=tmp_path / "restart-first.nc")
        second = pipeline.run(cfg, mode="reanalysis", restart_from=tmp_path / "restart-first.nc").load()
    assert first.sizes["time"] < whole.sizes["time"] == second.sizes["time"]
    for v in ("discharge", "routing_store"):
        np.testing.assert_array_equal(second[v].values, whole[v].values, err_msg=v)
    k = first.sizes["time"] - 2  # a day still in the window when the first run stopped
    assert not np.array_equal(first["discharge"].isel(time=k).values, whole["discharge"].isel(time=k).values)


def test_cli_runs_the_reanalysis(products, tmp_path, capsys):
    """`assim run --mode reanalysis` writes reanalysis.nc and says so (exit 0); the caution
    is printed as for every subcommand."""
    cfg = products[0]
    conf = tmp_path / "c.yaml"
    import yaml

    doc = {"data": {"prepared": str(cfg["data"]["prepared"])}, "results": str(tmp_path / "r"),
           "period": {"start": START, "end": "2002-04-30", "spinup_days": 30},
           "ensemble": {"members": 8, "scheduler": "synchronous", "progress": False},
           "filter": {"smoother": {"window_days": 3}}}
    conf.write_text(yaml.safe_dump(doc))
    assert main(["run", "--config", str(conf), "--mode", "reanalysis"]) == 0
    out = capsys.readouterr()
    assert "reanalysis.nc" in out.out + out.err
    assert (tmp_path / "r" / "reanalysis.nc").is_file()
