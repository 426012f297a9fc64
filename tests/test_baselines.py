"""The benchmark baselines compute what assim computes, so their speed ratios are honest.

``benchmarks/baseline_loop.py`` is an independent member-by-member implementation of GR4J
(Perrin, Michel & Andréassian 2003, J. Hydrol. 279, appendix) and of the stochastic EnKF
with perturbed observations (Burgers, van Leeuwen & Evensen 1998, Mon. Wea. Rev. 126); these
tests hold it to ``assim``'s vectorised model, filter and engine. ``benchmarks/
baseline_filterpy.py`` drives the same model with filterpy's EnsembleKalmanFilter
(reference library, ``filterpy.kalman.EnsembleKalmanFilter``).
"""

import sys
from pathlib import Path

import numpy as np
import pytest

from assim import engine, models
from assim import perturb as pt
from assim.filters import ensemble_update
from assim.models import gr4j

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

import baseline_filterpy  # noqa: E402
import baseline_loop  # noqa: E402

# x1, x2, x3, x4: the paper's median set, and sets reaching the ends of the valid ranges
# (short and long unit hydrographs, gains and losses, small and large stores).
PARAMETER_SETS = [
    (350.0, 0.0, 90.0, 1.7),
    (120.0, -3.0, 30.0, 0.7),
    (900.0, 1.5, 250.0, 2.3),
    (500.0, -0.8, 60.0, 7.9),
    (2500.0, 4.0, 15.0, 10.0),
    (60.0, -8.0, 500.0, 4.5),
]


def _year_of_forcing(seed=11, n_days=365):
    """Daily rain (45 % wet days, gamma amounts, a few storms) and seasonal PET, mm d-1."""
    rng = np.random.default_rng(seed)
    p = np.where(rng.random(n_days) < 0.45, rng.gamma(0.7, 12.0, n_days), 0.0)
    p[[40, 41, 200]] = [85.0, 60.0, 120.0]
    day = np.arange(n_days)
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * (day - 100) / 365.25) + rng.normal(0, 0.5, n_days), 0, None)
    return p, e


def test_loop_gr4j_matches_assim_over_a_year():
    """Perrin et al. (2003), appendix, transcribed twice: the scalar loop and assim's batched
    GR4J give the same daily discharge and end-of-day states to 1e-10 over a year."""
    m = models.get("gr4j")
    p, e = _year_of_forcing()
    params = {k: np.array([s[i] for s in PARAMETER_SETS]) for i, k in enumerate(("x1", "x2", "x3", "x4"))}
    n = len(PARAMETER_SETS)
    x = m.initial_state(params)
    prepared = m.prepare(params)
    states = [baseline_loop.initial_state(s[0], s[2]) for s in PARAMETER_SETS]
    uh = [baseline_loop.uh_ordinates(s[3]) for s in PARAMETER_SETS]
    q_loop = np.empty((len(p), n))
    q_assim = np.empty((len(p), n))
    for t in range(len(p)):
        x, fluxes = m.step(x, {"precipitation": np.full(n, p[t]), "pet": np.full(n, e[t])}, prepared)
        q_assim[t] = fluxes["runoff"]
        for j, (x1, x2, x3, _) in enumerate(PARAMETER_SETS):
            states[j], q_loop[t, j] = baseline_loop.gr4j_step(states[j], p[t], e[t], x1, x2, x3, *uh[j])
        np.testing.assert_allclose(np.array(states), x, rtol=1e-10, atol=1e-10, err_msg=f"day {t}")
    np.testing.assert_allclose(q_loop, q_assim, rtol=1e-10, atol=1e-12)
    assert (q_assim.sum(axis=0) > 10.0).all()  # every set produced real flow


def test_loop_unit_hydrographs_match_assim():
    """Perrin et al. (2003), appendix, SH1/SH2: the loop's ordinates (shares before the 90/10
    split) equal assim's for X4 of 0.7, 2.3 and 7.9, and sum to 1."""
    for x4 in (0.7, 2.3, 7.9):
        uh1, uh2 = baseline_loop.uh_ordinates(x4)
        a1, a2 = gr4j.uh_ordinates(np.array([x4]))
        np.testing.assert_allclose(uh1, a1[0, : len(uh1)], rtol=1e-13, atol=1e-15)
        np.testing.assert_allclose(uh2, a2[0, : len(uh2)], rtol=1e-13, atol=1e-15)
        assert not a1[0, len(uh1):].any() and not a2[0, len(uh2):].any()
        assert abs(sum(uh1) - 1.0) < 1e-12 and abs(sum(uh2) - 1.0) < 1e-12


@pytest.mark.parametrize("n_obs", [1, 2])
def test_loop_enkf_matches_ensemble_update(n_obs):
    """Burgers et al. (1998), perturbed observations (centred): the member loop and
    assim.filters.ensemble_update(method="enkf", obs_noise=...) give the same analysis from
    the same standard normal perturbations, with a missing reading, a gated one and bounds."""
    rng = np.random.default_rng(5)
    B, N, n = 6, 24, 5
    X = rng.normal(100.0, 12.0, (B, N, n))
    Y = X[..., :n_obs] * rng.uniform(0.2, 0.8, n_obs) + rng.normal(0.0, 1.0, (B, N, n_obs))
    y = Y.mean(axis=1) + rng.normal(0.0, 4.0, (B, n_obs))
    y[1, 0] = np.nan  # missing
    y[2, -1] += 1e3  # gated at 5 sigma
    r = rng.uniform(1.0, 9.0, (B, n_obs))
    z = rng.standard_normal((B, N, n_obs))
    lower, upper = np.full(X.shape, 85.0), np.full(X.shape, 118.0)
    a = ensemble_update(X, Y, y, r, method="enkf", obs_noise=z, gate_sigma=5.0, lower=lower, upper=upper)
    b = baseline_loop.enkf_update(X, Y, y, r, z, gate_sigma=5.0, lower=lower, upper=upper)
    np.testing.assert_allclose(b, a.states, rtol=1e-10, atol=1e-10)
    assert np.abs(a.states - X).max() > 1.0  # the analysis moved the states
    if n_obs == 1:
        np.testing.assert_array_equal(b[[1, 2]], X[[1, 2]])  # no usable reading: unchanged


class _Collect:
    def __init__(self):
        self.blocks = []

    def write_block(self, start, arrays):
        self.blocks.append({k: np.array(v) for k, v in arrays.items()})

    def __getitem__(self, name):
        return np.concatenate([b[name] for b in self.blocks], axis=1)


def _synthetic_basins(n_basin=2, n_days=150, seed=2):
    rng = np.random.default_rng(seed)
    p = np.where(rng.random((n_basin, n_days)) < 0.4, rng.gamma(0.8, 10.0, (n_basin, n_days)), 0.0)
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * np.arange(n_days) / 365.25), 0.3, None)[None].repeat(n_basin, 0)
    params = {"x1": rng.uniform(200, 600, n_basin), "x2": rng.uniform(-1, 1, n_basin),
              "x3": rng.uniform(40, 150, n_basin), "x4": np.array([0.7, 2.3, 7.9][:n_basin])}
    area = rng.uniform(100, 2000, n_basin)
    m = models.get("gr4j")
    x, q = m.initial_state(params), np.empty((n_basin, n_days))
    for t in range(n_days):
        x, f = m.step(x, {"precipitation": p[:, t], "pet": e[:, t]}, params)
        q[:, t] = f["runoff"] * area / 86.4
    obs = q * (1 + 0.15 * rng.standard_normal(q.shape)) + 0.3  # a biased, noisy gauge
    obs[rng.random(obs.shape) < 0.25] = np.nan
    ids = tuple(f"basin-{i}" for i in range(n_basin))
    days = np.arange(n_days, dtype=np.int64) + 16000
    return p, e, obs, area, params, ids, days


def test_loop_run_matches_engine():
    """The whole assimilation run of the loop baseline equals assim.engine.run (mode
    assimilate, the two stores updated as the baseline does, gate at 5 sigma, same seed): prior and analysed
    discharge on every day and the end states, to 1e-9. Common practice, no published
    source: a baseline must compute the same result to make its time comparable."""
    p, e, obs, area, params, ids, days = _synthetic_basins()
    m = models.get("gr4j")
    inputs = engine.Inputs(ids, pt.basin_keys(ids), area, days, p, e, obs, np.zeros(obs.shape, bool), params)
    settings = engine.Settings(mode="assimilate", members=12, seed=9, update_states=("production_store", "routing_store"),
                               float32=False, scheduler="synchronous", time_block_days=40, gate_sigma=5.0)
    sink = _Collect()
    summary = engine.run(m, inputs, settings, sink)
    loop = baseline_loop.run(p, e, obs, area, params, ids, days, members=12, seed=9, gate_sigma=5.0)
    np.testing.assert_allclose(loop["discharge"], sink["discharge"], rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(loop["discharge_analysis"], sink["discharge_analysis"], rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(loop["states"], summary.state.states, rtol=1e-9, atol=1e-9)
    assert summary.n_used.sum() > 100
    assert np.abs(sink["discharge_analysis"] - sink["discharge"]).max() > 0.1  # analyses happened


def test_filterpy_baseline_is_the_same_filter():
    """filterpy.kalman.EnsembleKalmanFilter (reference library) driving the loop GR4J:
    without readings it is the loop's open loop to rounding (same model, same forcing
    perturbations, members advanced in order); with readings its own perturbed observations
    differ, but its analysis fits the gauge as closely as the loop EnKF's does (within 15 %)
    and better than the open loop."""
    p, e, obs, area, params, ids, days = _synthetic_basins(n_basin=1, n_days=200, seed=4)
    nan = np.full(obs.shape, np.nan)
    kw = dict(members=40, seed=3)
    fp = baseline_filterpy.run(p, e, nan, area, params, ids, days, **kw)
    lp = baseline_loop.run(p, e, nan, area, params, ids, days, **kw)
    np.testing.assert_allclose(fp["discharge"], lp["discharge"], rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(fp["states"], lp["states"], rtol=1e-10, atol=1e-10)

    fa = baseline_filterpy.run(p, e, obs, area, params, ids, days, **kw)
    la = baseline_loop.run(p, e, obs, area, params, ids, days, gate_sigma=None, **kw)
    seen = np.isfinite(obs)

    def misfit(q):
        return np.abs(q.mean(axis=2) - obs)[seen].mean()

    assert misfit(fa["discharge_analysis"]) < 1.15 * misfit(la["discharge_analysis"])
    assert misfit(la["discharge_analysis"]) < 1.15 * misfit(fa["discharge_analysis"])
    assert misfit(fa["discharge_analysis"]) < 0.9 * misfit(lp["discharge"])
