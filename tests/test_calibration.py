"""Tests of assim.calibration: the batched differential evolution across basins."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from assim import calibration, models
from assim.verification import metrics

SAMPLE = Path(__file__).resolve().parents[1] / "sample_basin"
AREA = {"velmorra": 48.5, "oskerrin": 262.0, "tamblewyn": 915.0}
# sample_basin/README.md, "True parameters"
TRUTH = {"velmorra": (180.0, -0.6, 55.0, 1.15), "oskerrin": (950.0, 0.45, 320.0, 3.4),
         "tamblewyn": (420.0, -0.2, 130.0, 2.3)}
GR4J_BOX = ((10.0, 2000.0), (-5.0, 3.0), (10.0, 600.0), (0.5, 5.0))


def _reservoir_problem(ks, n_days=400, warmup=30, missing=(), search_c=False):
    """Linear reservoirs with known outflow fractions ``ks`` (evaporation coefficient 0.02):
    synthetic rain, exact flows. ``c`` is searched too or held at its true value."""
    m = models.get("linear_reservoir")
    nb = len(ks)
    t = np.arange(n_days)
    p = np.where((t[None, :] * (np.arange(nb)[:, None] + 3)) % 7 < 2, 12.0, 0.0)
    e = 1.0 + np.sin(t / 58.0)[None, :].repeat(nb, 0)
    c = np.full(nb, 0.02)
    truth = calibration.simulate(m, {"precipitation": p, "pet": e}, {"k": np.asarray(ks, float), "c": c})
    obs = truth.copy()
    for b, days in missing:
        obs[b, days] = np.nan
    names = ("k", "c") if search_c else ("k",)
    spec = {q.name: q for q in m.parameters}
    lo = np.tile([spec[n].low for n in names], (nb, 1))
    hi = np.tile([spec[n].high for n in names], (nb, 1))
    ids = tuple(f"b{i}" for i in range(nb))
    return m, calibration.Problem(ids, {"precipitation": p, "pet": e}, obs, warmup, names, lo, hi,
                                  {} if search_c else {"c": c})


def test_recovers_a_linear_reservoir_exactly():
    """Noise-free flows of a linear reservoir (outflow k S, evaporation c): the search finds
    both parameters.

    Reference: the generating value (a twin experiment, common practice)."""
    ks = [0.05, 0.2, 0.6]
    m, prob = _reservoir_problem(ks, search_c=True)
    r = calibration.search(m, prob, calibration.Settings(seed=3, population=20, tolerance=1e-12,
                                                          max_generations=300), metrics.nse)
    np.testing.assert_allclose(r.parameters["k"], ks, rtol=1e-4)
    np.testing.assert_allclose(r.parameters["c"], 0.02, rtol=1e-3)
    assert (r.objective > 1 - 1e-8).all()
    assert r.converged.all()


def test_missing_days_are_skipped():
    """NaN observations leave the objective: 60 % of the days missing, k still recovered."""
    ks = [0.1, 0.3]
    rng = np.random.default_rng(0)
    gone = [(b, rng.choice(np.arange(30, 400), 220, replace=False)) for b in range(2)]
    m, prob = _reservoir_problem(ks, missing=gone)
    r = calibration.search(m, prob, calibration.Settings(seed=1, population=10, tolerance=1e-10), metrics.kge)
    np.testing.assert_allclose(r.parameters["k"], ks, rtol=1e-4)


def test_result_does_not_depend_on_the_other_basins():
    """Random numbers are keyed by basin id: a basin calibrated alone, in a batch, or in
    another order gets bit-identical parameters, population and generation count."""
    ks = [0.05, 0.2, 0.6, 0.33]
    m, prob = _reservoir_problem(ks, n_days=200)
    s = calibration.Settings(seed=11, population=8, max_generations=15, tolerance=1e-12)
    together = calibration.search(m, prob, s, metrics.kge)
    order = [2, 0, 3, 1]
    shuffled = calibration.Problem(tuple(prob.basin_ids[i] for i in order),
                                   {n: v[order] for n, v in prob.forcing.items()}, prob.observed[order],
                                   prob.warmup, prob.names, prob.lower[order], prob.upper[order],
                                   {"c": prob.fixed["c"][order]})
    other = calibration.search(m, shuffled, s, metrics.kge)
    np.testing.assert_array_equal(other.population, together.population[order])
    np.testing.assert_array_equal(other.generations, together.generations[order])
    for b in (1, 3):
        one = calibration.Problem((prob.basin_ids[b],), {n: v[b:b + 1] for n, v in prob.forcing.items()},
                                  prob.observed[b:b + 1], prob.warmup, prob.names, prob.lower[b:b + 1],
                                  prob.upper[b:b + 1], {"c": prob.fixed["c"][b:b + 1]})
        alone = calibration.search(m, one, s, metrics.kge)
        np.testing.assert_array_equal(alone.population[0], together.population[b])
        assert alone.parameters["k"][0] == together.parameters["k"][b]


def test_seed_changes_the_search_and_repeats_it():
    """The same seed repeats a search bit for bit; another seed draws another population."""
    m, prob = _reservoir_problem([0.2], n_days=120)
    s = calibration.Settings(seed=5, population=6, max_generations=3, tolerance=1e-12)
    a = calibration.search(m, prob, s, metrics.kge)
    b = calibration.search(m, prob, s, metrics.kge)
    c = calibration.search(m, prob, calibration.Settings(seed=6, population=6, max_generations=3,
                                                         tolerance=1e-12), metrics.kge)
    np.testing.assert_array_equal(a.population, b.population)
    assert not np.array_equal(a.population, c.population)


def test_initial_population_is_a_latin_hypercube():
    """McKay et al. (1979): each of the N strata of every parameter holds exactly one member."""
    u = calibration._uniforms(7, np.array([1, 2, 3], dtype=np.uint64), 2 * 12 * 4, 0)
    pos = calibration._latin_hypercube(u, 12, 4)
    strata = np.sort(np.floor(pos * 12).astype(int), axis=1)
    np.testing.assert_array_equal(strata, np.broadcast_to(np.arange(12)[None, :, None], strata.shape))


@pytest.mark.parametrize("strategy", calibration.STRATEGIES)
def test_trials_stay_in_the_box_and_take_a_mutant_component(strategy):
    """Storn & Price (1997), eq. 2-3: every trial takes at least the j_rand component from the
    mutant; the bound repair keeps every component inside [0, 1]."""
    nb, npop, nd = 5, 9, 3
    keys = np.arange(nb, dtype=np.uint64)
    pos = calibration._latin_hypercube(calibration._uniforms(1, keys, 2 * npop * nd, 0), npop, nd)
    fit = -np.arange(nb * npop, dtype=float).reshape(nb, npop)
    s = calibration.Settings(seed=1, population=npop, crossover=0.0, mutation=(1.9, 2.0), strategy=strategy)
    trial = calibration._trials(pos, fit, calibration._uniforms(1, keys, calibration._draws(npop, nd), 1), s)
    assert ((trial >= 0) & (trial <= 1)).all()
    changed = (trial != pos).sum(axis=-1)
    assert (changed == 1).all()  # CR = 0: exactly the j_rand component comes from the mutant


def _sample(columns):
    t = pd.read_csv(SAMPLE / "truth.csv")
    return {c: np.stack([t.loc[t.basin == b, c].to_numpy(float) for b in AREA]) for c in columns}, \
        pd.to_datetime(t.loc[t.basin == "velmorra", "date"]).to_numpy()


@pytest.mark.slow
def test_recovers_the_sample_basins_parameters():
    """Twin experiment on the invented sample basins (truth in sample_basin/README.md): GR4J
    driven by the true forcing (truth.csv) is calibrated against the true daily discharge
    times a lognormal gauge error (sd of log 0.07, as the generator's discharge gauges) over
    2014-2017 after two years of warm-up (the slow basin needs them). Checks: KGE >= 0.95
    against the true discharge over 2018-2021 (never searched, two years of warm-up), and the identifiable parameters near the truth.

    Identifiability (found with this test): all four parameters come back within 12 % (X2
    within 0.25 mm/d) in every basin; X1 is the least well determined (velmorra about -9 %).
    With one year of warm-up the slow, groundwater-fed oskerrin does not recover X1 and X2
    (its stores are still far from their regime; the search trades the production store
    against the exchange), which is why this test warms up for two years.

    With the recorded weather instead (precipitation error CV 0.3), even the true parameters
    score only KGE 0.91-0.93 against the truth, so no calibration can reach 0.95 there:
    tests/test_calibration_study.py checks that the calibrated parameters beat the true ones
    on the recorded data instead."""
    f, dates = _sample(["precipitation_mm", "pet_mm", "discharge_m3s"])
    area = np.array(list(AREA.values()))
    noise = np.exp(0.07 * np.random.default_rng(20120101).standard_normal(f["discharge_m3s"].shape))
    q_obs = f["discharge_m3s"] * noise
    i0 = int(np.searchsorted(dates, np.datetime64("2012-01-01")))
    c0, c1 = i0 + 730, int(np.searchsorted(dates, np.datetime64("2018-01-01")))
    v1 = int(np.searchsorted(dates, np.datetime64("2022-01-01")))
    forcing = {"precipitation": f["precipitation_mm"], "pet": f["pet_mm"]}
    lo = np.tile([b[0] for b in GR4J_BOX], (3, 1))
    hi = np.tile([b[1] for b in GR4J_BOX], (3, 1))
    m = models.get("gr4j")
    prob = calibration.Problem(tuple(AREA), {n: v[:, i0:c1] for n, v in forcing.items()},
                               (q_obs * 86.4 / area[:, None])[:, i0:c1], c0 - i0, m.parameter_names, lo, hi, {})
    r = calibration.search(m, prob, calibration.Settings(seed=20261201, population=40), metrics.kge)
    q = calibration.simulate(m, {n: v[:, c1 - 730:v1] for n, v in forcing.items()}, r.parameters, first=730)
    kge = metrics.kge(q * area[:, None] / 86.4, f["discharge_m3s"][:, c1:v1])
    got = np.stack([r.parameters[n] for n in m.parameter_names], axis=1)
    assert (kge >= 0.95).all(), (kge, got)
    true = np.array(list(TRUTH.values()))
    for b in range(3):
        for j in range(4):
            tol = 0.25 if j == 1 else 0.12 * abs(true[b, j])  # x2 absolute (mm/d), others relative
            assert abs(got[b, j] - true[b, j]) <= tol, (list(AREA)[b], m.parameter_names[j], got[b, j])
