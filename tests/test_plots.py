"""Tests of assim.plots: every figure is drawn from the products, carries the caution and
units, and is a PNG written without a display."""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.image import imread
from test_verification import make_study  # the synthetic study shared by the product tests

import assim.plots as plots
import assim.verification as v
from assim import paths
from assim.caution import CAUTION_SHORT
from assim.errors import InputError
from assim.io.products import open_product


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    cfg, truth = make_study(tmp_path_factory.mktemp("plots"), days=120, members=8, leads=3)
    v.verify_results(cfg)
    return cfg, truth


def test_plot_results_draws_every_figure(study, monkeypatch):
    """Common practice, no published source: one hydrograph, skill, spread-skill and rank
    histogram figure per basin, a reliability diagram per threshold the basin has, and the
    plume of the latest forecast; each a PNG carrying the caution line, with a unit on
    every axis label."""
    cfg, truth = study
    drawn = []
    save = plots._save

    def spy(fig, path):
        drawn.append(fig)
        return save(fig, path)

    monkeypatch.setattr(plots, "_save", spy)
    written = plots.plot_results(cfg)
    names = sorted(p.name for p in written)
    day = truth["issue_date"]
    expected = sorted(
        [f"{k}__{b}.png" for k in ("hydrograph", "skill", "spread-skill", "rank-histogram") for b in ("alder", "birch")]
        + ["reliability__alder__minor.png", "reliability__alder__major.png", "reliability__birch__minor.png"]
        + [f"plume__alder__{day}.png", f"plume__birch__{day}.png"]
    )
    assert names == expected
    for p in written:
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        image = imread(p)
        assert image.shape[0] > 300 and image.shape[1] > 600
        assert p.parent.name == "figures"
    assert len(drawn) == len(written)
    for fig in drawn:
        assert CAUTION_SHORT in [t.get_text() for t in fig.texts]
        for ax in fig.axes:
            for label in (ax.get_xlabel(), ax.get_ylabel()):
                if label:
                    assert "(" in label and ")" in label, label  # a unit, or (-) for a ratio


def test_plot_results_restricts_basins_and_issue_date(study, monkeypatch):
    """Common practice, no published source: outputs.figures selects basins; an issue date
    without a forecast file is an InputError naming the file."""
    cfg, truth = study
    monkeypatch.setattr(plots, "_save", lambda fig, path: path)  # rendering is tested above
    cfg = dict(cfg, outputs=dict(cfg["outputs"], figures=["birch"]))
    written = plots.plot_results(cfg, issue_date=truth["issue_date"])
    assert written and all("__birch" in p.name for p in written)
    with pytest.raises(InputError, match="forecast-2000-01-01.nc"):
        plots.plot_results(cfg, issue_date="2000-01-01")


def test_plume_shows_thresholds_and_probabilities(study, tmp_path, monkeypatch):
    """Common practice, no published source: the plume names each threshold of the basin and
    its second panel shows the forecast file's exceedance probability per lead."""
    cfg, truth = study
    drawn = []
    monkeypatch.setattr(plots, "_save", lambda fig, path: drawn.append(fig) or path)
    with open_product(paths.forecast(cfg, truth["issue_date"])) as fc:
        plots.plot_plume(fc, None, "alder", tmp_path / "plume.png", history_days=5)
        top, bottom = drawn[0].axes[:2]
        texts = " ".join(t.get_text() for t in top.texts)
        assert "minor (9)" in texts and "major (12)" in texts
        heights = np.array([b.get_height() for b in bottom.patches])
        expected = fc["exceedance_probability"].sel(basin="alder").transpose("threshold", "lead").values.ravel()
        np.testing.assert_allclose(heights, expected)


def test_nothing_to_draw_is_an_input_error(tmp_path):
    """Common practice, no published source: an empty results folder is an InputError."""
    from assim.config import load_config

    cfg = load_config(None, data={"prepared": str(tmp_path / "p")}, results=str(tmp_path / "r"))
    with pytest.raises(InputError, match="nothing to draw"):
        plots.plot_results(cfg)


def test_figure_names_round_trip():
    """Common practice, no published source: the report groups figures by parsing names."""
    name = plots.figure_name("reliability", "up/stream 1", "minor")
    assert name == "reliability__up_stream_1__minor.png"
    assert plots.parse_figure_name(name) == ("reliability", "up_stream_1", "minor")
    assert plots.parse_figure_name("notes.png") is None


def test_hydrograph_from_quantile_products(study, tmp_path, monkeypatch):
    """Common practice, no published source: a run written as quantiles draws the same
    bands (the written 5..95 % quantiles) as the members would."""
    import xarray as xr

    cfg, _ = study
    drawn = []
    monkeypatch.setattr(plots, "_save", lambda fig, path: drawn.append(fig) or path)
    with open_product(paths.run_product(cfg, "openloop")) as ds:
        ds = ds.load()
    q = ds["discharge"].quantile([0.05, 0.25, 0.5, 0.75, 0.95], dim="member").transpose("basin", "time", "quantile")
    runs = {"openloop": xr.Dataset({"discharge_quantile": q}), "assimilation": ds}
    plots.plot_hydrograph(runs, None, "alder", tmp_path / "h.png")
    top, bottom = drawn[0].axes
    shown = top.lines[0].get_ydata()
    np.testing.assert_allclose(shown, q.sel(basin="alder", quantile=0.5).values[-len(shown):])
    np.testing.assert_allclose(shown, bottom.lines[0].get_ydata())  # median of the members
