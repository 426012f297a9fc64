"""Tests of `assim calibrate` (assim.calibration_study, assim.io.calibration, prep's override)."""

from __future__ import annotations

import importlib

import numpy as np
import pytest
from _scenario import REPO, make_raw, write_config

from assim import calibration, models
from assim.cli import main
from assim.config import load_config
from assim.io import prepared as prep_io
from assim.io.calibration import read_calibration
from assim.verification import metrics

QUICK = {"start": "2013-01-01", "end": "2013-12-31", "validation_start": "2014-01-01",
         "validation_end": "2014-06-30", "warmup_days": 365, "min_days": 200, "population": 8,
         "max_generations": 4, "parameters": {"x1": [50, 1500], "x2": [-3, 2], "x3": [10, 500], "x4": [0.6, 4]}}


@pytest.fixture
def study(tmp_path):
    raw = make_raw(tmp_path / "raw", ["velmorra", "tamblewyn"], "2012-01-01", "2014-06-30")
    defaults = {"data": {"raw": str(raw), "prepared": str(tmp_path / "prepared")},
                "results": str(tmp_path / "results")}
    return tmp_path, defaults


def test_calibrate_writes_scores_and_prep_takes_the_parameters(study, capsys):
    """calibration.nc holds the best member of the final population, its scores in both
    periods (recomputed here with assim.verification.metrics), and `assim prep` with
    model.calibrated_parameters puts those values in basins.nc; basins.yaml is unchanged."""
    root, defaults = study
    cfg_path = write_config(root, defaults, calibration=QUICK)
    yaml_before = (root / "raw" / "basins.yaml").read_bytes()
    assert main(["calibrate", "--config", str(cfg_path)]) == 0
    out = capsys.readouterr().out
    assert "velmorra" in out and "CAUTION" in out
    ds = read_calibration(root / "results" / "calibration.nc")
    assert ds.attrs["caution"]
    assert list(ds["parameter"].values) == ["x1", "x2", "x3", "x4"]
    best = ds["population_objective"].values.argmax(axis=1)
    for j, name in enumerate(ds["parameter"].values):
        np.testing.assert_array_equal(ds[name].values, ds["population"].values[np.arange(2), best, j])
        assert (ds["search_lower"].values[:, j] == QUICK["parameters"][name][0]).all()
    for k, period in enumerate(("calibration", "validation")):
        sel = ds["period_flag"].values == k + 1
        sim, obs = ds["discharge_simulated"].values[:, sel], ds["discharge_observed"].values[:, sel]
        np.testing.assert_allclose(ds["score"].sel(period=period, metric="kge").values, metrics.kge(sim, obs))
        np.testing.assert_allclose(ds["score"].sel(period=period, metric="nse").values, metrics.nse(sim, obs))
    # the search's own objective is the calibration-period KGE of the best member
    np.testing.assert_allclose(ds["score"].sel(period="calibration", metric="kge").values,
                               ds["population_objective"].values.max(axis=1), rtol=1e-12)

    cfg_path = write_config(root, defaults, model={"calibrated_parameters": str(root / "results" / "calibration.nc")})
    assert main(["prep", "--config", str(cfg_path)]) == 0
    basins = prep_io.read_basins(root / "prepared" / "basins.nc")
    for name in ("x1", "x2", "x3", "x4"):
        np.testing.assert_array_equal(basins[name].values, ds[name].values)
    assert (root / "raw" / "basins.yaml").read_bytes() == yaml_before


def test_chunking_does_not_change_the_result(study):
    """Random numbers are keyed by basin id: two basins in one batch or one at a time give
    bit-identical calibrated parameters and populations."""
    root, defaults = study
    study_mod = importlib.import_module("assim.calibration_study")
    a = study_mod.run_calibration(load_config(write_config(root, defaults, calibration=QUICK)))
    b = study_mod.run_calibration(load_config(write_config(root, defaults, calibration={**QUICK, "basins_per_chunk": 1})))
    np.testing.assert_array_equal(a["population"].values, b["population"].values)
    np.testing.assert_array_equal(a["score"].values, b["score"].values)


@pytest.mark.parametrize("section, words", [
    ({**QUICK, "min_days": 400}, "basin 'velmorra'"),
    ({**QUICK, "parameters": {"x1": [0, 100]}}, "calibration.parameters.x1"),
    ({**QUICK, "parameters": {"nope": [0, 1]}}, "calibration.parameters.nope"),
    ({**QUICK, "start": "2030-01-01"}, "calibration.start"),
])
def test_bad_calibration_input_is_one_line_and_writes_nothing(study, capsys, section, words):
    """A basin with too few observed days, a range outside the model's, an unknown parameter
    or a period outside the records: exit 2, one line naming it, no calibration.nc."""
    root, defaults = study
    cfg_path = write_config(root, defaults, calibration=section)
    assert main(["calibrate", "--config", str(cfg_path)]) == 2
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(err) == 1 and words in err[0], err
    assert not (root / "results" / "calibration.nc").exists()


def test_a_file_calibrated_for_another_model_is_refused(study, capsys):
    root, defaults = study
    assert main(["calibrate", "--config", str(write_config(root, defaults, calibration=QUICK))]) == 0
    path = root / "results" / "calibration.nc"
    ds = read_calibration(path)
    ds.attrs["model"] = "linear_reservoir"
    from assim.io.calibration import write_calibration

    write_calibration(ds, path)
    cfg_path = write_config(root, defaults, model={"calibrated_parameters": str(path)})
    assert main(["prep", "--config", str(cfg_path)]) == 2
    assert "calibrated for model 'linear_reservoir'" in capsys.readouterr().err


@pytest.mark.slow
def test_calibrated_parameters_beat_the_true_ones_on_the_recorded_data(tmp_path):
    """On the sample basins' recorded weather and gauge (invented; truth in
    sample_basin/README.md), the calibrated parameters score a calibration-period KGE at
    least that of the true parameters (the search finds the optimum of what it is given;
    with precipitation errors of CV 0.3 the truth is not that optimum), and a validation KGE
    above 0.8 (the true parameters score 0.89-0.93 there)."""
    defaults = {"data": {"raw": str(REPO / "sample_basin"), "prepared": str(tmp_path / "prepared")},
                "results": str(tmp_path)}
    section = {"start": "2013-01-01", "end": "2016-12-31", "validation_start": "2017-01-01",
               "validation_end": "2019-12-31", "parameters": QUICK["parameters"]}
    cfg = load_config(write_config(tmp_path, defaults, calibration=section))
    ds = importlib.import_module("assim.calibration_study").run_calibration(cfg)
    truth = {"x1": [180.0, 950.0, 420.0], "x2": [-0.6, 0.45, -0.2], "x3": [55.0, 320.0, 130.0],
             "x4": [1.15, 3.4, 2.3]}
    datasets, _ = importlib.import_module("assim.preparation").build(cfg, calibrated=False)
    days = datasets["forcing"]["time"].values
    c0 = int(np.searchsorted(days, np.datetime64("2013-01-01")))
    c1 = int(np.searchsorted(days, np.datetime64("2017-01-01")))
    forcing = {n: datasets["forcing"][n].values[:, c0 - 365:c1] for n in ("precipitation", "pet")}
    q = calibration.simulate(models.get("gr4j"), forcing, {k: np.array(v) for k, v in truth.items()}, first=365)
    area = datasets["basins"]["area"].values
    obs = prep_io.usable_discharge(datasets["observations"]).values[:, c0:c1]
    true_kge = metrics.kge(q * area[:, None] / 86.4, obs)
    cal_kge = ds["score"].sel(period="calibration", metric="kge").values
    assert (cal_kge >= true_kge).all(), (cal_kge, true_kge)
    assert (ds["score"].sel(period="validation", metric="kge").values > 0.8).all()


def test_figure_and_report_section(study):
    """`assim plot` draws one calibration figure per basin (with the caution line, as every
    figure) and `assim report` holds a calibration table with each basin's scores."""
    root, defaults = study
    cfg_path = write_config(root, defaults, calibration=QUICK)
    assert main(["calibrate", "--config", str(cfg_path)]) == 0
    assert main(["plot", "--config", str(cfg_path)]) == 0
    for b in ("velmorra", "tamblewyn"):
        png = root / "results" / "figures" / f"calibration__{b}.png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert main(["report", "--config", str(cfg_path)]) == 0
    html = (root / "results" / "report.html").read_text()
    ds = read_calibration(root / "results" / "calibration.nc")
    assert '<h2 id="calibration">Calibration</h2>' in html
    assert f"{ds['score'].sel(period='validation', metric='kge').values[0]:.3f}" in html
    assert "calibration__velmorra.png" in html


def test_snow_parameters_are_calibrated_where_a_basin_has_snow(study, capsys):
    """With a `snow:` block on one basin the run's model is gr4j+snow: its snow parameters
    are searched, the rain-only basin's stay fixed (search_lower == search_upper), the
    snow_routine switch is never searched; the calibrated model then runs as an ensemble."""
    import yaml

    root, defaults = study
    doc = yaml.safe_load((root / "raw" / "basins.yaml").read_text())
    doc["basins"][1]["snow"] = {"degree_day_factor": 4.0}
    (root / "raw" / "basins.yaml").write_text(yaml.safe_dump(doc, sort_keys=False))
    cfg_path = write_config(root, defaults, calibration=QUICK)
    assert main(["calibrate", "--config", str(cfg_path)]) == 0
    ds = read_calibration(root / "results" / "calibration.nc")
    assert ds.attrs["model"] == "gr4j+snow"
    lo, hi = ds["search_lower"], ds["search_upper"]
    for name in ("degree_day_factor", "snow_threshold", "melt_threshold"):
        assert float(lo.sel(basin="velmorra", parameter=name)) == float(hi.sel(basin="velmorra", parameter=name))
        assert float(lo.sel(basin="tamblewyn", parameter=name)) < float(hi.sel(basin="tamblewyn", parameter=name))
    assert (lo.sel(parameter="snow_routine") == hi.sel(parameter="snow_routine")).all()
    assert list(ds["snow_routine"].values) == [0.0, 1.0]
    assert main(["prep", "--config", str(cfg_path)]) == 0
    capsys.readouterr()
    cfg_path = write_config(root, defaults, calibration=QUICK, ensemble={"members": 4},
                            period={"start": "2013-01-01", "end": "2013-12-31", "spinup_days": 30})
    assert main(["run", "--config", str(cfg_path), "--mode", "openloop"]) == 0
