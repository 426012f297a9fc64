"""Tests of assim.plots: every figure is drawn from the products, carries the caution and
units, and is a PNG written without a display."""

from __future__ import annotations

import re

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


def _empty_file(fig, path):
    """A stand-in for drawing: an empty file where the figure would go."""
    path.write_bytes(b"")
    return path


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
    monkeypatch.setattr(plots, "_save", _empty_file)  # rendering is tested above
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


def _plume_inputs(cfg, truth):
    """The latest forecast, observations of alder only and the assimilated ensemble of birch
    only: the two basins differ in thresholds (two / one), range, history and bands."""
    observed, names = plots._inputs(cfg)
    with open_product(paths.forecast(cfg, truth["issue_date"])) as fc:
        fc = fc.load()
    with open_product(paths.run_product(cfg, "assimilate")) as an:
        recent = an["discharge"].sel(basin=["birch"]).load()
    kw = {"history_days": 20, "names": names, "recent": recent, "note": "a note under the title"}
    return fc, observed.sel(basin=["alder"]), kw


def _pixels(path):
    return imread(path)


def test_reused_plume_figure_draws_each_basin_as_alone(study, tmp_path):
    """Common practice, no published source: the bulletin draws every basin on one reused
    figure; each PNG must be the one drawn for that basin alone on a new figure (identical
    bytes and pixels), in either order, so that no line, band, label, bar, legend entry,
    data limit or margin of one basin is left in the next one's figure."""
    cfg, truth = study
    fc, observed, kw = _plume_inputs(cfg, truth)
    alone = {b: plots.plot_plume(fc, observed, b, tmp_path / f"alone-{b}.png", **kw) for b in ("alder", "birch")}
    for order in (("alder", "birch"), ("birch", "alder")):
        reused = plots.plot_plumes(fc, observed, {b: tmp_path / f"{'-'.join(order)}-{b}.png" for b in order}, **kw)
        for b, p in zip(order, reused, strict=True):
            assert p.read_bytes() == alone[b].read_bytes(), (order, b)
    assert not np.array_equal(_pixels(alone["alder"]), _pixels(alone["birch"]))


def test_plume_figures_drawn_by_several_processes(study, tmp_path, monkeypatch):
    """Common practice, no published source: figures drawn by a spawned process beside the
    calling one are the same files as those drawn in one process."""
    cfg, truth = study
    fc, observed, kw = _plume_inputs(cfg, truth)
    one = plots.plot_plumes(fc, observed, {b: tmp_path / f"one-{b}.png" for b in ("alder", "birch")}, **kw)
    monkeypatch.setattr(plots, "PLUMES_PER_WORKER", 1)
    two = plots.plot_plumes(fc, observed, {b: tmp_path / f"two-{b}.png" for b in ("alder", "birch")}, workers=2,
                            **kw)
    assert [p.read_bytes() for p in two] == [p.read_bytes() for p in one]


def test_nothing_to_draw_is_an_input_error(tmp_path):
    """Common practice, no published source: an empty results folder is an InputError."""
    from assim.config import load_config

    cfg = load_config(None, data={"prepared": str(tmp_path / "p")}, results=str(tmp_path / "r"))
    with pytest.raises(InputError, match="nothing to draw"):
        plots.plot_results(cfg)


def test_figure_names_round_trip():
    """Common practice, no published source: the report groups figures by parsing names; a
    plain id is kept as it is, anything else gets a readable slug and a short hash."""
    name = plots.figure_name("reliability", "up/stream 1", "minor")
    assert name.startswith("reliability__up-stream-1~") and name.endswith("__minor.png")
    assert plots.parse_figure_name(name) == ("reliability", plots.name_part("up/stream 1"), "minor")
    assert plots.figure_name("skill", "alder_creek.2") == "skill__alder_creek.2.png"
    assert plots.parse_figure_name("notes.png") is None


def test_figure_names_unique_per_basin_and_threshold():
    """Issue cases (common practice, no published source): ids that the old name rule
    folded together (a/b and a_b; a_b and a__b), a non-ASCII id, thresholds differing only
    in punctuation: every one has its own file, and parsing gives back each id's part."""
    ids = ["a/b", "a_b", "a__b", "a b", "Ålvik elv", "alvik-elv", ".hidden", "x" * 300]
    names = [plots.figure_name("hydrograph", b) for b in ids]
    assert len(set(names)) == len(ids)
    for b, n in zip(ids, names, strict=True):
        assert plots.parse_figure_name(n)[1] == plots.name_part(b)
        assert "/" not in n and not n.startswith(".") and len(n) < 120 and n.isascii()
    assert plots.figure_name("hydrograph", "Ålvik elv").startswith("hydrograph__Alvik-elv~")
    thr = [plots.figure_name("reliability", "a", t) for t in ("minor!", "minor?", "minor")]
    assert len(set(thr)) == 3


def test_plot_results_keeps_basins_apart(tmp_path, monkeypatch):
    """Issue case (common practice, no published source): basins 'a/b' and 'a_b' each get
    their own figures, and the report shows each basin's in its own section."""
    import xarray as xr

    import assim.reporting as report

    cfg, _ = make_study(tmp_path, days=60, members=4, leads=2, forecast=False)
    ren = {"alder": "a/b", "birch": "a_b"}
    for f in (paths.run_product(cfg, "openloop"), paths.run_product(cfg, "assimilate"),
              paths.hindcast(cfg), paths.prepared(cfg, "observations.nc"), paths.prepared(cfg, "basins.nc")):
        ds = xr.load_dataset(f)
        key = "basin_id" if "basin_id" in ds else "basin"
        ds[key] = (ds[key].dims, [ren.get(str(b), str(b)) for b in ds[key].values], ds[key].attrs)
        ds.to_netcdf(f)
    v.verify_results(cfg)
    monkeypatch.setattr(plots, "_save", _empty_file)
    written = plots.plot_results(cfg)
    per = {b: [p for p in written if plots.parse_figure_name(p.name)[1] == plots.name_part(b)] for b in ren.values()}
    # four figures each, and a reliability diagram per threshold (a/b has two, a_b one)
    assert (len(per["a/b"]), len(per["a_b"]), len(written)) == (6, 5, 11)
    sections = report.render_report(cfg).split("<section ")[1:]
    assert len(sections) == 2
    assert [s.count("<img") for s in sections] == [len(per["a/b"]), len(per["a_b"])]


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


def test_plot_without_the_forecast_writes_nothing(tmp_path, monkeypatch):
    """Issue case (common practice, no published source): `--issue-date D` without a
    forecast for D is refused before anything is drawn (no figure, no folder), and a drawing
    that fails part-way leaves the earlier figures as they were and adds none."""
    cfg, truth = make_study(tmp_path, days=60, members=4, leads=2)
    v.verify_results(cfg)
    with pytest.raises(InputError, match="forecast-2000-01-01.nc"):
        plots.plot_results(cfg, issue_date="2000-01-01")
    assert not paths.figures(cfg).exists()
    monkeypatch.setattr(plots, "_save", _empty_file)
    first = plots.plot_results(cfg)
    before = {p.name: p.stat().st_mtime_ns for p in paths.figures(cfg).iterdir()}
    assert set(before) == {p.name for p in first}

    def fail(*args, **kwargs):
        raise InputError("drawing failed", file="x")

    monkeypatch.setattr(plots, "plot_reliability", fail)  # after hydrograph and skill figures
    with pytest.raises(InputError, match="drawing failed"):
        plots.plot_results(cfg)
    assert {p.name: p.stat().st_mtime_ns for p in paths.figures(cfg).iterdir()} == before


_KILLED_DRAWING = """
import os, signal, sys
import assim.plots as plots
from assim.config import load_config
real = plots.atomic_path
calls = []

class Killing:
    def __init__(self, path):
        self.cm = real(path)
    def __enter__(self):
        return self.cm.__enter__()
    def __exit__(self, *exc):
        calls.append(1)
        if len(calls) == 3:  # the third figure is written to its temporary file, not yet renamed
            os.kill(os.getpid(), signal.SIGKILL)
        return self.cm.__exit__(*exc)

plots.atomic_path = Killing
plots.plot_results(load_config(sys.argv[1]))
"""


def test_killed_drawing_leaves_no_temporaries_after_a_rerun(tmp_path):
    """Issue case (common practice, no published source): SIGKILL while `assim plot`
    writes a figure, then a rerun: no `.*.part` file or staging folder remains, and the
    rerun draws every figure."""
    import signal
    import subprocess
    import sys

    import yaml

    cfg, _ = make_study(tmp_path, days=60, members=4, leads=2, forecast=False)
    v.verify_results(cfg)
    conf = tmp_path / "config.yaml"
    conf.write_text(yaml.safe_dump(dict(cfg)))
    out = subprocess.run([sys.executable, "-c", _KILLED_DRAWING, str(conf)], capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == -signal.SIGKILL, out.stderr
    left = [p.name for p in paths.figures(cfg).rglob(".*")]
    assert any(n.endswith(".part") for n in left)  # the kill left a temporary behind
    with pytest.warns(Warning, match="stale lock"):
        written = plots.plot_results(cfg)
    assert not [p for p in paths.figures(cfg).rglob("*") if p.name.startswith(".")]
    assert len(written) == 11


def test_select_basins_raised_then_worst_skill():
    """Common practice, no published source: with more basins than plots.max_basins, the
    raised ones come first, then the lowest CRPSS of the assimilation at the first hindcast
    lead; unscored basins only fill what is left; the ids' order is kept."""
    import xarray as xr

    ids = [f"b{i:02d}" for i in range(30)]
    crpss = np.linspace(0.9, 0.0, 30)  # b29 worst
    crpss[3] = np.nan
    skill = xr.Dataset(
        {"skill": (("basin", "experiment", "lead", "metric"), np.broadcast_to(crpss[:, None, None, None],
                                                                            (30, 2, 2, 1)).copy()),
         "n": (("basin", "experiment", "lead", "metric"), np.where(np.isnan(crpss), 0, 50)[:, None, None, None]
               * np.ones((30, 2, 2, 1), int))},
        coords={"basin": ids, "experiment": ["openloop", "assimilation"], "lead": [0, 1], "metric": ["crpss"]})
    got = plots.select_basins(ids, max_basins=5, raised=["b05", "b00"], skill=skill)
    assert got == ["b00", "b05", "b27", "b28", "b29"]
    assert plots.select_basins(ids, max_basins=0, raised=[], skill=skill) == ids
    assert plots.select_basins(ids[:3], max_basins=5) == ids[:3]


def test_plot_results_bounded_selection_in_processes(study, tmp_path):
    """Common practice, no published source: plots.max_basins = 1 draws one basin's figures
    only; drawing in two processes gives the same files, byte for byte, as in one."""
    cfg, _ = study
    one = type(cfg)(dict(cfg, results=str(tmp_path / "one"), plots={"max_basins": 1, "workers": 1}))
    two = type(cfg)(dict(cfg, results=str(tmp_path / "two"), plots={"max_basins": 0, "workers": 2}))
    import shutil

    for c in (one, two):
        shutil.copytree(paths.results(cfg), paths.results(c), ignore=shutil.ignore_patterns("figures"))
    a = plots.plot_results(one)
    assert len({plots.parse_figure_name(p.name)[1] for p in a}) == 1
    b = plots.plot_results(two)
    assert len({plots.parse_figure_name(p.name)[1] for p in b}) == 2
    for p in a:
        assert p.read_bytes() == (paths.figures(two) / p.name).read_bytes()


def test_reliability_marks_few_events(study, monkeypatch, tmp_path):
    """Common practice, no published source: a reliability diagram built from fewer than
    FEW_EVENTS observed events says so on the figure, with the number of events."""
    cfg, _ = study
    from assim.io.skill import read_skill

    skill = read_skill(paths.skill(cfg, "nc")).load()
    drawn = []
    monkeypatch.setattr(plots, "_save", lambda fig, path: drawn.append(fig) or path)
    n = skill["reliability_count"].sel(basin="alder", threshold="minor")
    o = skill["reliability_observed_frequency"].sel(basin="alder", threshold="minor")
    for few in (True, False):
        s = skill.copy(deep=True)
        sel = {"basin": "alder", "threshold": "minor"}
        s["reliability_count"].loc[sel] = xr_where(n > 0, 40, 0)
        s["reliability_observed_frequency"].loc[sel] = xr_where(n > 0, 0.01 if few else 0.5, o)
        plots.plot_reliability(s, "alder", "minor", tmp_path / "r.png")
        texts = " ".join(t.get_text() for ax in drawn[-1].axes for t in ax.texts)
        assert ("poorly determined" in texts) == few
        if few:
            assert re.search(r"only \d+ observed event", texts)


def xr_where(cond, a, b):
    import xarray as xr

    return xr.where(cond, a, b)
