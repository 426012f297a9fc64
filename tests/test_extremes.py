"""Extreme but valid data: a 1-in-1000-year storm, a decade of drought, a basin of 0.5 km2
and one of 50,000 km2, in one run.

The prepared layer is built in the test from GR4J driven by invented forcing; the runs go
through :mod:`assim.pipeline` as the CLI does. Common practice, no published source, except
the GR4J water balance (Perrin et al. 2003, eqs. 1-19: storage change = P + F - E - Q).
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

from assim import models, pipeline
from assim.config import load_config
from assim.io import prepared as prep_io

IDS = ["storm-beck", "dry-wash", "tiny-rill", "vast-river"]
AREA = np.array([120.0, 300.0, 0.5, 50_000.0])
START, END = "2000-01-01", "2011-12-31"
STORM_DAY = "2006-07-15"
STORM_MM = 400.0
PARAMS = {"x1": np.full(4, 350.0), "x2": np.full(4, 0.3), "x3": np.full(4, 90.0), "x4": np.full(4, 1.8)}


def _forcing():
    dates = pd.date_range(START, END, freq="D")
    nt = len(dates)
    rng = np.random.default_rng(1000)
    p = np.where(rng.random((4, nt)) < 0.35, rng.gamma(0.8, 8.0, (4, nt)), 0.0)
    p[2:] = p[2]  # the tiny and the vast basin share forcing and parameters
    p[0, dates.get_loc(pd.Timestamp(STORM_DAY))] = STORM_MM
    p[1, dates < pd.Timestamp("2010-01-01")] = 0.0  # ten years without rain
    t = np.arange(nt)
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * (t - 100) / 365.25), 0.2, None)[None].repeat(4, 0)
    return dates, p, e


def _truth(p, e):
    """GR4J integrated directly, one member per basin; returns runoff (basin, time) mm d-1,
    states and the water-balance residual of the whole run (mm)."""
    m = models.get("gr4j")
    params = m.prepare(dict(PARAMS)) if m.prepare else PARAMS
    x = m.initial_state(params)
    start = x.sum(axis=1)
    net = np.zeros(4)
    q = np.empty(p.shape)
    lowest = np.inf
    for i in range(p.shape[1]):
        x, f = m.step(x, {"precipitation": p[:, i], "pet": e[:, i]}, params)
        net += sum(f[k] for k in m.balance.inputs) - sum(f[k] for k in m.balance.outputs)
        q[:, i] = f["runoff"]
        lowest = min(lowest, float(x.min()))
    return q, x, x.sum(axis=1) - start - net, lowest


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    folder = tmp_path_factory.mktemp("extreme")
    dates, p, e = _forcing()
    q, _, residual, lowest = _truth(p, e)
    rng = np.random.default_rng(3)
    obs = q * AREA[:, None] / 86.4 * (1 + 0.1 * rng.standard_normal(q.shape))
    obs = np.abs(obs)
    obs[:, rng.random(q.shape[1]) < 0.1] = np.nan
    flags = np.where(np.isnan(obs), prep_io.QC_FLAGS["insufficient_coverage"], 0)
    lat, lon = np.array([45.0, 40.0, 50.0, 10.0]), np.array([5.0, 20.0, 6.0, 30.0])
    prep_io.write_forcing(prep_io.forcing_dataset(IDS, dates.values, p, e, lat, lon), folder / "forcing.nc")
    prep_io.write_observations(
        prep_io.observations_dataset(IDS, dates.values, obs, flags, np.where(np.isnan(obs), 0.0, 1.0),
                                     np.full(q.shape, 24), np.zeros(q.shape), lat, lon), folder / "observations.nc")
    prep_io.write_basins(
        prep_io.basins_dataset(IDS, ["Storm Beck", "Dry Wash", "Tiny Rill", "Vast River"], AREA, lat, lon, "gr4j",
                               PARAMS, np.array([[50.0], [5.0], [0.5], [5000.0]]), ["major"], ["discharge"] * 4),
        folder / "basins.nc")
    return folder, dates, p, q, residual, lowest


def _cfg(world, results, **over):
    sections = dict(
        data={"prepared": str(world[0])}, results=str(results),
        period={"start": START, "end": END, "spinup_days": 365},
        ensemble={"members": 8, "scheduler": "synchronous", "progress": False},
    )
    sections.update(over)
    return load_config(None, **sections)


def test_model_water_balance_through_storm_and_drought(world):
    """GR4J over 12 years with a 400 mm day and a ten-year drought: the water balance of the
    whole run closes to 1e-8 mm (Perrin et al. 2003: storage change = P + F - E - Q), no
    storage goes negative, the drought basin's flow recedes towards zero without going
    below it, and the storm's runoff peak follows the storm."""
    _, dates, p, q, residual, lowest = world
    assert np.abs(residual).max() < 1e-8
    assert lowest >= 0.0
    assert np.isfinite(q).all() and (q >= 0).all()
    dry = q[1, (dates >= pd.Timestamp("2008-01-01")) & (dates < pd.Timestamp("2010-01-01"))]
    assert dry.max() < 0.05 and dry.min() >= 0.0
    k = dates.get_loc(pd.Timestamp(STORM_DAY))
    assert q[0, k:k + 5].max() > 10 * q[0, k - 30:k].max()


def test_open_loop_without_perturbation_is_the_model(world, tmp_path):
    """With every perturbation set to zero, the open-loop members are the model itself:
    discharge equals the direct GR4J integration times area / 86.4 (to float32 rounding),
    for the 0.5 km2 and the 50,000 km2 basin alike (the same flow in mm d-1), so no water is
    lost or invented anywhere between the files and the kernel."""
    cfg = _cfg(world, tmp_path, perturbation={"precipitation_cv": 0.0, "pet_cv": 0.0})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ds = pipeline.run(cfg, mode="openloop").load()
    _, dates, _, q, _, _ = world
    sim = ds["discharge"].transpose("basin", "time", "member").values.astype(np.float64)
    keep = dates >= pd.Timestamp(ds["time"].values[0])
    want = q[:, keep] * AREA[:, None] / 86.4
    assert np.isfinite(sim).all() and (sim >= 0).all()
    np.testing.assert_allclose(sim, np.repeat(want[:, :, None], sim.shape[2], axis=2), rtol=2e-6, atol=1e-6)
    per_mm = sim[:, :, 0] * 86.4 / AREA[:, None]
    np.testing.assert_allclose(per_mm[2], per_mm[3], rtol=2e-6, atol=1e-7)


@pytest.mark.parametrize("method", ["enkf", "etkf"])
def test_assimilation_through_extremes(world, tmp_path, method):
    """Assimilation (and open loop) with the default error model through the storm, the
    drought and both basin sizes: no NaN, no negative discharge, the stores within their
    bounds [0, x1] and [0, x3] after every analysis, and the water the bounds clipped is
    reported per day (finite), never silently dropped."""
    cfg = _cfg(world, tmp_path, filter={"method": method})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ol = pipeline.run(cfg, mode="openloop").load()
        da = pipeline.run(cfg, mode="assimilate").load()
    for ds in (ol, da):
        q = ds["discharge"].values
        assert np.isfinite(q).all() and (q >= 0).all()
        for name, cap in (("production_store", "x1"), ("routing_store", "x3")):
            s = ds[name].transpose("basin", "time", "member").values
            assert np.isfinite(s).all() and (s >= 0).all(), name
            assert (s <= PARAMS[cap][:, None, None] * (1 + 1e-6)).all(), name
    assert np.isfinite(da["discharge"].values).all()
    clipped = da["clipped_water"].values
    assert np.isfinite(clipped).all()
    assert int(da.attrs["readings_used"]) > 0
    storm = da["discharge"].sel(basin="storm-beck", time=slice(STORM_DAY, "2006-07-20")).values
    before = da["discharge"].sel(basin="storm-beck", time=slice("2006-06-01", "2006-07-10")).values
    assert storm.mean(axis=0).max() > 5 * before.mean(axis=0).max()  # (member, time)  # the flood is not filtered away


def test_clipped_water_is_the_water_the_bounds_moved():
    """A storm-sized innovation (observed 400 mm d-1 against predictions near 1 mm d-1)
    pushes members past their bounds: the analysis reports as ``clipped`` exactly the water
    the clipping moved, i.e. the bounded minus the unbounded analysis summed over members
    (same random draws), so the bounds lose nothing unreported."""
    from assim.filters import ensemble_update

    rng = np.random.default_rng(4)
    n_member = 16
    states = np.stack([rng.uniform(0, 40, (2, n_member)), rng.uniform(0, 5, (2, n_member))], axis=-1)
    predicted = (0.02 * states[..., :1] + 0.5 * states[..., 1:]) + 0.1 * rng.standard_normal((2, n_member, 1))
    observed = np.array([[400.0], [0.0]])
    var = np.array([[4.0], [0.01]])
    free = ensemble_update(states, predicted, observed, var, rng=np.random.default_rng(9))
    lower, upper = np.zeros(2), np.array([50.0, 10.0])
    bounded = ensemble_update(states, predicted, observed, var, rng=np.random.default_rng(9), lower=lower,
                              upper=upper)
    assert ((free.states < lower) | (free.states > upper)).any()  # the case does clip
    assert (bounded.states >= lower).all() and (bounded.states <= upper).all()
    np.testing.assert_allclose(np.asarray(bounded.clipped),
                               (bounded.states - free.states).sum(axis=-2), atol=1e-9)
