"""Tests of assim.verify: metrics against reference libraries, published values and hand
computations; verify_results on small synthetic product files."""

from __future__ import annotations

import numpy as np
import properscoring
import pytest
import scoringrules
from scipy import stats

import assim.verify as v

# --------------------------------------------------------------------------- CRPS


def _ensembles_with_ties(seed=1, shape=(3, 40), members=9):
    rng = np.random.default_rng(seed)
    obs = rng.gamma(2.0, 3.0, size=shape)
    ens = rng.gamma(2.0, 3.0, size=shape + (members,))
    ens[..., 0, :3] = obs[..., 0, None]  # members equal to the observation
    ens[..., 1, :] = np.round(ens[..., 1, :])  # ties among members
    ens[..., 2, :] = obs[..., 2, None]  # every member equal to the observation
    ens[..., 3, 4:] = ens[..., 3, :1]  # many tied members
    obs[..., 4] = 0.0
    ens[..., 4, :5] = 0.0  # ties at zero flow
    return obs, ens


@pytest.mark.parametrize("members", [1, 2, 9, 64])
def test_crps_matches_scoringrules_and_properscoring(members):
    """Reference libraries: scoringrules.crps_ensemble (energy form, estimator="nrg") and
    properscoring.crps_ensemble; random ensembles with ties and members equal to the
    observation, agreement to 1e-10."""
    obs, ens = _ensembles_with_ties(members=members)
    ours = v.crps_ensemble(obs, ens)
    assert ours.shape == obs.shape
    np.testing.assert_allclose(ours, scoringrules.crps_ensemble(obs, ens, estimator="nrg"), rtol=0, atol=1e-10)
    np.testing.assert_allclose(ours, properscoring.crps_ensemble(obs, ens), rtol=0, atol=1e-10)
    assert ours[..., 2] == pytest.approx(0.0, abs=1e-12)


@pytest.mark.parametrize("members", [2, 9, 64])
def test_fair_crps_matches_scoringrules_fair_estimator(members):
    """Reference library: scoringrules 0.10 crps_ensemble(..., estimator="fair") (Ferro 2014)."""
    obs, ens = _ensembles_with_ties(seed=2, members=members)
    ours = v.crps_ensemble(obs, ens, fair=True)
    ref = scoringrules.crps_ensemble(obs, ens, estimator="fair")
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-10)
    assert np.all(ours <= v.crps_ensemble(obs, ens) + 1e-12)  # the fair score subtracts more spread


def test_crps_nan_forecasts_are_missing():
    """Common practice, no published source: a missing reading or a NaN member gives NaN."""
    obs, ens = _ensembles_with_ties()
    obs[0, 5] = np.nan
    ens[1, 6, 2] = np.nan
    c = v.crps_ensemble(obs, ens)
    assert np.isnan(c[0, 5]) and np.isnan(c[1, 6])
    assert np.isfinite(np.delete(c.ravel(), [5, 40 + 6])).all()


def test_crpss_against_hand_computation():
    """Hand computation: CRPSS = 1 - mean(CRPS) / mean(CRPS_ref) over pairs both scored."""
    crps = np.array([[1.0, 2.0, np.nan, 1.0]])
    ref = np.array([[2.0, 2.0, 5.0, np.nan]])
    assert v.crpss(crps, ref)[0] == pytest.approx(1 - 3.0 / 4.0)
    assert v.crpss(ref, ref)[0] == pytest.approx(0.0)
    assert v.crpss(np.zeros((1, 3)), np.ones((1, 3)))[0] == pytest.approx(1.0)


# --------------------------------------------------------------------------- Brier, reliability


def test_brier_score_matches_scoringrules():
    """Reference library: scoringrules.brier_score(obs > threshold, fraction of members above)."""
    obs, ens = _ensembles_with_ties(seed=3, members=16)
    thr = np.array([4.0, 6.0, 9.0])[:, None]  # one threshold per basin
    ours = v.brier_score(obs, ens, thr)
    p = (ens > thr[..., None]).mean(axis=-1)
    ref = scoringrules.brier_score((obs > thr).astype(float), p)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12)


def test_brier_score_hand_example():
    """Hand computation (Brier 1950): 3 of 4 members above, event observed -> (0.75 - 1)^2."""
    ens = np.array([[1.0, 5.0, 6.0, 7.0]])
    assert v.brier_score(np.array([8.0]), ens, 4.0)[0] == pytest.approx(0.0625)
    assert v.brier_score(np.array([2.0]), ens, 4.0)[0] == pytest.approx(0.5625)
    assert np.isnan(v.brier_score(np.array([2.0]), ens, np.nan)[0])


def test_reliability_table_hand_example():
    """Hand computation: forecasts of probability 0, 0.5 and 1 with known outcomes."""
    ens = np.array([[[0, 0], [0, 9], [0, 9], [9, 9], [9, 9], [9, 9]]], dtype=float)  # (1, 6, 2)
    obs = np.array([[0, 9, 0, 9, 9, 0]], dtype=float)
    t = v.reliability_table(obs, ens, 5.0, bins=4)
    np.testing.assert_array_equal(t.count[0], [1, 0, 2, 3])
    np.testing.assert_allclose(t.forecast_probability[0], [0.0, np.nan, 0.5, 1.0])
    np.testing.assert_allclose(t.observed_frequency[0], [0.0, np.nan, 0.5, 2 / 3])


def test_reliability_of_calibrated_probabilities():
    """Common practice, no published source: when the outcome is drawn with the forecast
    probability, the observed frequency in each bin is close to the forecast probability."""
    rng = np.random.default_rng(4)
    n, members = 40000, 10
    k = rng.integers(0, members + 1, size=n)  # members above the threshold
    ens = np.where(np.arange(members) < k[:, None], 2.0, 0.0)
    obs = np.where(rng.random(n) < k / members, 2.0, 0.0)
    t = v.reliability_table(obs, ens, 1.0, bins=11)
    ok = t.count > 1000
    assert ok.sum() == 11
    np.testing.assert_allclose(t.observed_frequency[ok], t.forecast_probability[ok], atol=0.03)


# --------------------------------------------------------------------------- deterministic


def test_nse_known_values():
    """Nash & Sutcliffe (1970): the observed mean as forecast gives NSE = 0; perfect gives 1."""
    obs = np.random.default_rng(5).gamma(2.0, 5.0, size=(4, 365))
    mean = np.broadcast_to(obs.mean(axis=-1, keepdims=True), obs.shape)
    np.testing.assert_allclose(v.nse(mean, obs), 0.0, atol=1e-12)
    np.testing.assert_allclose(v.nse(obs, obs), 1.0)
    np.testing.assert_allclose(v.nse_log(obs, obs), 1.0)
    assert np.all(v.nse(obs * 1.5, obs) < 1)


def test_kge_known_values():
    """Gupta et al. (2009), eq. 9: perfect forecast KGE = KGE' = 1; Knoben, Freer & Woods
    (2019, HESS 23, 4323): the mean flow as forecast gives KGE = 1 - sqrt(2) ~ -0.41."""
    obs = np.random.default_rng(6).gamma(2.0, 5.0, size=(4, 365))
    np.testing.assert_allclose(v.kge(obs, obs), 1.0)
    np.testing.assert_allclose(v.kge_modified(obs, obs), 1.0)
    mean = np.broadcast_to(obs.mean(axis=-1, keepdims=True), obs.shape)
    np.testing.assert_allclose(v.kge(mean, obs), 1 - np.sqrt(2), atol=1e-12)
    assert v.kge(mean, obs)[0] == pytest.approx(-0.41, abs=0.005)


def test_kge_and_others_against_hand_computation():
    """Hand computation of Gupta et al. (2009) eq. 9 and Kling et al. (2012) eqs. 2-4 with
    numpy's corrcoef/std/mean; percent bias and RMSE from their definitions."""
    rng = np.random.default_rng(7)
    obs = rng.gamma(2.0, 5.0, size=200)
    sim = 0.8 * obs * rng.lognormal(0, 0.3, size=200) + 1.0
    r = np.corrcoef(sim, obs)[0, 1]
    alpha, beta = sim.std() / obs.std(), sim.mean() / obs.mean()
    gamma = (sim.std() / sim.mean()) / (obs.std() / obs.mean())
    assert v.kge(sim, obs) == pytest.approx(1 - np.sqrt((r - 1) ** 2 + (alpha - 1) ** 2 + (beta - 1) ** 2))
    assert v.kge_modified(sim, obs) == pytest.approx(1 - np.sqrt((r - 1) ** 2 + (gamma - 1) ** 2 + (beta - 1) ** 2))
    assert v.pbias(sim, obs) == pytest.approx(100 * (sim - obs).sum() / obs.sum())
    assert v.rmse(sim, obs) == pytest.approx(np.sqrt(np.mean((sim - obs) ** 2)))
    eps = obs.mean() / 100  # Pushpalatha et al. (2012): offset of one hundredth of the mean
    ls, lo = np.log(sim + eps), np.log(obs + eps)
    assert v.nse_log(sim, obs) == pytest.approx(1 - ((ls - lo) ** 2).sum() / ((lo - lo.mean()) ** 2).sum())


def test_nan_pairs_are_skipped():
    """Common practice, no published source: a metric with NaN pairs equals the metric of
    the complete pairs alone, whichever side is missing."""
    rng = np.random.default_rng(8)
    obs = rng.gamma(2.0, 5.0, size=(2, 100))
    sim = obs * rng.uniform(0.5, 1.5, size=obs.shape)
    obs_nan, sim_nan = obs.copy(), sim.copy()
    obs_nan[0, :10] = np.nan
    sim_nan[0, 50:55] = np.nan
    keep = np.ones(100, bool)
    keep[:10] = keep[50:55] = False
    for f in (v.nse, v.nse_log, v.kge, v.kge_modified, v.pbias, v.rmse):
        got = f(sim_nan, obs_nan)
        assert got[0] == pytest.approx(float(f(sim[0, keep], obs[0, keep]))), f.__name__
        assert got[1] == pytest.approx(float(f(sim[1], obs[1]))), f.__name__
    assert v.count_pairs(sim_nan, obs_nan).tolist() == [85, 100]
    assert np.isnan(v.nse(np.full(5, np.nan), np.arange(5.0)))


# --------------------------------------------------------------------------- ensemble shape


def test_rank_histogram_flat_for_exchangeable_ensemble():
    """Hamill (2001): ensembles drawn from the observation's distribution give a flat rank
    histogram; chi-square goodness of fit against uniform at the 0.1 % level (scipy.stats.chi2),
    while an under-dispersive ensemble fails the same test (U shape)."""
    rng = np.random.default_rng(9)
    n, members = 20000, 9
    centre = rng.normal(0, 3, size=(2, n))
    obs = centre + rng.normal(size=(2, n))
    ens = centre[..., None] + rng.normal(size=(2, n, members))
    h = v.rank_histogram(obs, ens)
    assert h.shape == (2, members + 1)
    np.testing.assert_allclose(h.sum(axis=-1), n)
    expected = n / (members + 1)
    chi2 = ((h - expected) ** 2 / expected).sum(axis=-1)
    assert np.all(chi2 < stats.chi2.ppf(0.999, members))
    narrow = v.rank_histogram(obs, centre[..., None] + 0.3 * rng.normal(size=(2, n, members)))
    assert np.all(((narrow - expected) ** 2 / expected).sum(axis=-1) > stats.chi2.ppf(0.999, members))
    assert np.all(narrow[:, 0] > 2 * expected) and np.all(narrow[:, -1] > 2 * expected)


def test_rank_histogram_shares_ties():
    """Hamill (2001) recommends random tie-breaking; its expectation shares a tie equally."""
    obs = np.array([[1.0, 0.0]])
    ens = np.array([[[1.0, 1.0, 1.0], [0.0, 2.0, 3.0]]])  # 3 ties; 1 tie below 2 members
    h = v.rank_histogram(obs, ens)
    np.testing.assert_allclose(h[0], [0.25 + 0.5, 0.25 + 0.5, 0.25, 0.25])


def test_pit_uniform_and_consistent_with_ranks():
    """Gneiting et al. (2007) PIT: uniform for a calibrated ensemble (scipy.stats.kstest on
    the mid-class values, and mean 1/2)."""
    rng = np.random.default_rng(10)
    n, members = 5000, 19
    obs = rng.normal(size=n)
    ens = rng.normal(size=(n, members))
    p = v.pit(obs, ens)
    assert p.mean() == pytest.approx(0.5, abs=0.02)
    jitter = p + rng.uniform(-0.5, 0.5, size=n) / (members + 1)  # spread each class uniformly
    assert stats.kstest(jitter, "uniform").pvalue > 0.001
    rank = np.round(p * (members + 1) - 0.5).astype(int)
    np.testing.assert_array_equal(np.bincount(rank, minlength=members + 1),
                                  v.rank_histogram(obs[None], ens[None])[0])


def test_spread_skill_near_one_after_fortin_correction():
    """Fortin et al. (2014): for a calibrated ensemble of N members,
    sqrt((N+1)/N) * spread / RMSE(ensemble mean) -> 1; without the factor it would be
    sqrt(N/(N+1)) ~ 0.91 for N = 5."""
    rng = np.random.default_rng(11)
    n, members = 100000, 5
    centre = rng.normal(0, 2, size=n)
    obs = centre + rng.normal(size=n)
    ens = centre[:, None] + rng.normal(size=(n, members))
    ratio = float(v.spread_skill(obs, ens))
    assert ratio == pytest.approx(1.0, abs=0.015)
    assert abs(ratio * np.sqrt(members / (members + 1)) - 1) > 0.06
    assert float(v.spread_skill(obs, centre[:, None] + 0.5 * rng.normal(size=(n, members)))) < 0.6


def test_metrics_vectorise_over_leading_dimensions():
    """Common practice, no published source: a batch (basin, lead, time) gives the same
    values as each series alone."""
    rng = np.random.default_rng(12)
    obs = rng.gamma(2.0, 5.0, size=(3, 2, 50))
    ens = obs[..., None] * rng.uniform(0.5, 1.5, size=(3, 2, 50, 8))
    batch = v.spread_skill(obs, ens)
    hist = v.rank_histogram(obs, ens)
    for b in range(3):
        for k in range(2):
            assert batch[b, k] == pytest.approx(float(v.spread_skill(obs[b, k], ens[b, k])))
            np.testing.assert_allclose(hist[b, k], v.rank_histogram(obs[b, k][None], ens[b, k][None])[0])


# --------------------------------------------------------------------------- verify_results
