"""Tests of assim.verification: metrics against reference libraries, published values and hand
computations; verify_results on small synthetic product files."""

from __future__ import annotations

import numpy as np
import pandas as pd
import properscoring
import pytest
import scoringrules
import xarray as xr
from scipy import stats

import assim.verification as v
from assim.config import load_config
from assim.errors import InputError

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


def test_crps_skipping_nan_members_matches_scoringrules_on_finite_members():
    """Reference library: scoringrules.crps_ensemble on the finite members of each forecast
    alone (samples of varying size)."""
    obs, ens = _ensembles_with_ties(seed=5, shape=(2, 30), members=12)
    rng = np.random.default_rng(5)
    ens[rng.random(ens.shape) < 0.3] = np.nan
    ens[0, 0] = np.nan  # no member at all
    ours = v.crps_ensemble(obs, ens, skip_nan_members=True)
    assert np.isnan(ours[0, 0])
    for idx in np.ndindex(obs.shape):
        members = ens[idx][np.isfinite(ens[idx])]
        if members.size:
            assert ours[idx] == pytest.approx(float(scoringrules.crps_ensemble(obs[idx], members, estimator="nrg")),
                                              abs=1e-10)
    assert np.isnan(v.crps_ensemble(obs, ens)).sum() > np.isnan(ours).sum()


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

BASINS = ("alder", "birch")
THRESHOLDS = ("minor", "major")


def _encode_time(ds: xr.Dataset, *names: str) -> dict:
    enc = {"units": "days since 1970-01-01", "calendar": "standard", "dtype": "int32"}
    return {n: dict(enc) for n in names if n in ds.variables}


def make_study(tmp_path, *, days=150, members=8, leads=3, every=7, hindcast=True, forecast=True):
    """Write a small synthetic study following the product contract: prepared observations
    and basins (through assim.io.prepared), openloop.nc, analysis.nc, hindcast.nc and one
    forecast file (with xarray). Returns (cfg, truth) where truth holds the arrays written."""
    from assim.io.common import global_attributes
    from assim.io.prepared import (
        basins_dataset,
        observations_dataset,
        write_basins,
        write_observations,
    )

    rng = np.random.default_rng(20)
    nb = len(BASINS)
    start = np.datetime64("2020-01-01")
    all_days = start + np.arange(days + 40).astype("timedelta64[D]")
    t = np.arange(all_days.size)
    true = 6 + 3 * np.sin(2 * np.pi * t / 60)[None] + np.array([[0.0], [4.0]])
    true = true + 8 * (rng.random((nb, t.size)) < 0.05) * rng.random((nb, t.size))  # floods
    q_obs = true * rng.lognormal(0, 0.05, size=true.shape)
    flag = np.zeros(true.shape, dtype=np.int16)
    q_obs[0, 30:35] = np.nan  # missing days
    flag[0, 30:35] = 64
    flag[1, 50] = 64  # flagged day with a (wrong) value left in place
    q_obs[1, 50] = 1e4
    cover = np.where(flag == 0, 1.0, 0.2)
    prepared = tmp_path / "prepared"
    obs_ds = observations_dataset(BASINS, all_days, q_obs, flag, cover, np.full(flag.shape, 24),
                                  np.zeros(flag.shape, int), [45.0, 46.0], [7.0, 8.0])
    write_observations(obs_ds, prepared / "observations.nc")
    thr = np.array([[9.0, 12.0], [13.0, np.nan]])
    b_ds = basins_dataset(BASINS, ["Alder Creek", "Birch River"], [120.0, 340.0], [45.0, 46.0],
                          [7.0, 8.0], "linear_reservoir", {"k": [0.1, 0.2], "c": [0.02, 0.02]},
                          thr, THRESHOLDS, ["discharge", "discharge"])
    write_basins(b_ds, prepared / "basins.nc")

    results = tmp_path / "results"
    results.mkdir()
    run_days = all_days[10 : 10 + days]  # the run's output days (after spin-up)
    tr = true[:, 10 : 10 + days]
    q_attrs = {"standard_name": "water_volume_transport_in_river_channel", "units": "m3 s-1"}
    coords = {
        "basin": ("basin", np.array(BASINS, dtype=object), {"cf_role": "timeseries_id"}),
        "time": ("time", run_days.astype("datetime64[ns]")),
        "member": ("member", np.arange(members)),
    }
    ens_open = tr[..., None] * rng.lognormal(0.15, 0.25, size=(nb, days, members))
    ens_assim = tr[..., None] * rng.lognormal(0.0, 0.08, size=(nb, days, members))
    out = {"openloop": ens_open, "assimilation": ens_assim}
    for name, ens in (("openloop.nc", ens_open), ("analysis.nc", ens_assim)):
        ds = xr.Dataset({"discharge": (("basin", "time", "member"), ens, q_attrs)}, coords=coords,
                        attrs=global_attributes("synthetic run"))
        if name == "analysis.nc":
            ds["discharge_analysis"] = (("basin", "time", "member"), ens * 0.98, q_attrs)
            ds["observed_discharge"] = (("basin", "time"), q_obs[:, 10 : 10 + days], q_attrs)
            ds["spread_before"] = (("basin", "time"), ens.std(axis=-1), q_attrs)
            ds["spread_after"] = (("basin", "time"), 0.8 * ens.std(axis=-1), q_attrs)
        ds.to_netcdf(results / name, encoding=_encode_time(ds, "time"))
    issue = run_days[::every][:-1]
    out.update(run_days=run_days, issue=issue, q_obs=q_obs, flag=flag, all_days=all_days, thr=thr)
    if hindcast:
        lead = np.arange(1, leads + 1)
        idx = (issue - all_days[0]).astype(int)[:, None] + lead[None]  # (issue, lead) valid day
        tv = true[:, idx]  # (basin, issue, lead)
        hc = np.stack([tv[..., None] * rng.lognormal(0.15, 0.3, size=tv.shape + (members,)),
                       tv[..., None] * rng.lognormal(0.0, 0.1 * lead[:, None], size=tv.shape + (members,))])
        ds = xr.Dataset(
            {"discharge": (("experiment", "basin", "issue_time", "lead", "member"), hc, q_attrs)},
            coords={"experiment": np.array(["openloop", "assimilation"], dtype=object),
                    "basin": coords["basin"], "issue_time": issue.astype("datetime64[ns]"),
                    "lead": ("lead", lead, {"units": "days"}), "member": np.arange(members)},
            attrs=global_attributes("synthetic hindcast"))
        ds.to_netcdf(results / "hindcast.nc", encoding=_encode_time(ds, "issue_time"))
        out["hindcast"] = hc
    if forecast:
        day = run_days[-1]
        lead = np.arange(1, 11)
        base = true[:, (day - all_days[0]).astype(int) + lead]
        ens = base[..., None] * rng.lognormal(0, 0.05 * np.sqrt(lead)[None, :, None], size=(nb, 10, members))
        qs = np.array([0.05, 0.25, 0.5, 0.75, 0.95])
        p = v.exceedance_probability(ens[:, :, None, :], thr[:, None, :])  # (basin, lead, threshold)
        ds = xr.Dataset(
            {"discharge": (("basin", "lead", "member"), ens, q_attrs),
             "discharge_quantile": (("basin", "lead", "quantile"),
                                    np.quantile(ens, qs, axis=-1).transpose(1, 2, 0), q_attrs),
             "exceedance_probability": (("basin", "lead", "threshold"), p, {"units": "1"}),
             "thresholds": (("basin", "threshold"), thr, q_attrs)},
            coords={"basin": coords["basin"], "lead": ("lead", lead, {"units": "days"}),
                    "member": np.arange(members), "quantile": qs,
                    "threshold": np.array(THRESHOLDS, dtype=object),
                    "valid_time": ("lead", (day + lead.astype("timedelta64[D]")).astype("datetime64[ns]")),
                    "issue_time": day.astype("datetime64[ns]")},
            attrs=global_attributes("synthetic forecast", issue_date=str(day), analysis="performed"))
        path = results / "forecasts" / f"forecast-{day}.nc"
        path.parent.mkdir()
        ds.to_netcdf(path, encoding=_encode_time(ds, "valid_time", "issue_time"))
        out["issue_date"] = str(day)
    cfg = load_config(None, data={"prepared": str(prepared)}, results=str(results),
                      forecast={"history_days": 20}, ensemble={"members": members, "basin_chunk": 1})
    return cfg, out


def _usable(truth):
    q = truth["q_obs"].copy()
    q[(truth["flag"] & 64) != 0] = np.nan
    return q


def test_verify_results_writes_tidy_csv_and_counts_usable_readings(tmp_path):
    """Common practice, no published source: skill.csv has exactly the columns basin,
    experiment, lead, metric, value, n; n counts only usable readings (missing and flagged
    days skipped), and lead-0 CRPS equals the reference CRPS (properscoring.crps_ensemble)
    averaged over the usable days alone."""
    cfg, truth = make_study(tmp_path)
    ds = v.verify_results(cfg)
    table = pd.read_csv(cfg["results"] + "/skill.csv")
    assert list(table.columns) == ["basin", "experiment", "lead", "metric", "value", "n"]
    assert ds.attrs["product_path"].endswith("skill.nc")
    assert set(ds["metric"].values) >= {"nse", "kge", "kge_modified", "nse_log", "pbias", "rmse", "crps",
                                         "crps_fair", "crpss", "spread_skill", "brier_minor", "brier_major"}
    assert ds["lead"].values.tolist() == [0, 1, 2, 3]

    usable = _usable(truth)
    day0 = (truth["run_days"] - truth["all_days"][0]).astype(int)
    obs0 = usable[:, day0]
    n_usable = np.isfinite(obs0).sum(axis=-1)
    assert n_usable.tolist() == [len(day0) - 5, len(day0) - 1]
    got_n = ds["n"].sel(experiment="openloop", lead=0, metric="crps").values
    np.testing.assert_array_equal(got_n, n_usable)
    row = table[(table.basin == "birch") & (table.experiment == "openloop") & (table.lead == 0)
                & (table.metric == "nse")]
    assert int(row["n"].iloc[0]) == n_usable[1]
    ref = properscoring.crps_ensemble(obs0, truth["openloop"])
    expected = np.nanmean(np.where(np.isfinite(obs0), ref, np.nan), axis=-1)
    np.testing.assert_allclose(ds["skill"].sel(experiment="openloop", lead=0, metric="crps").values,
                               expected, rtol=1e-5)

    # leads: n counts the issue times whose valid day has a usable reading
    idx = (truth["issue"] - truth["all_days"][0]).astype(int)
    for lead in (1, 3):
        expected_n = np.isfinite(usable[:, idx + lead]).sum(axis=-1)
        np.testing.assert_array_equal(ds["n"].sel(experiment="assimilation", lead=lead, metric="rmse").values,
                                      expected_n)
    # CRPSS of the open loop against itself is 0; the sharper assimilation has positive skill
    np.testing.assert_allclose(ds["skill"].sel(experiment="openloop", metric="crpss_openloop").values, 0.0,
                               atol=1e-12)
    assert np.all(ds["skill"].sel(experiment="assimilation", metric="crpss_openloop", lead=0).values > 0.3)
    assert np.isfinite(ds["skill"].sel(metric="crpss").values).all()
    # birch has no "major" level: no Brier score for it
    assert ds["n"].sel(basin="birch", metric="brier_major").values.sum() == 0
    assert np.isfinite(ds["skill"].sel(basin="alder", metric="brier_major").values).all()
    assert not ((table.basin == "birch") & (table.metric == "brier_major")).any()


def test_verify_results_matches_metric_functions_on_hindcast(tmp_path):
    """Common practice, no published source: a hindcast lead is scored on valid day
    issue_time + lead; NSE of the median equals assim.verification.nse on those pairs."""
    cfg, truth = make_study(tmp_path)
    ds = v.verify_results(cfg)
    usable = _usable(truth)
    idx = (truth["issue"] - truth["all_days"][0]).astype(int)
    lead = 2
    obs = usable[:, idx + lead]
    med = np.median(truth["hindcast"][0][:, :, lead - 1], axis=-1)
    np.testing.assert_allclose(ds["skill"].sel(experiment="openloop", lead=lead, metric="nse").values,
                               v.nse(med, obs), rtol=1e-5)
    hist = ds["rank_histogram"].sel(experiment="openloop", lead=lead).values
    np.testing.assert_allclose(hist.sum(axis=-1), np.isfinite(obs).sum(axis=-1))


def test_verify_results_skips_absent_hindcast_and_needs_a_product(tmp_path):
    """Common practice, no published source: an absent hindcast is noted, not an error;
    with no product at all verify_results raises InputError naming the results folder."""
    cfg, _ = make_study(tmp_path, hindcast=False, forecast=False)
    ds = v.verify_results(cfg)
    assert ds["lead"].values.tolist() == [0]
    assert "hindcast.nc absent" in ds.attrs["notes"]
    for name in ("openloop.nc", "analysis.nc"):
        (tmp_path / "results" / name).unlink()
    with pytest.raises(InputError, match="no product to verify"):
        v.verify_results(cfg)


def test_entry_point_and_module_have_distinct_names(tmp_path):
    """Common practice, no published source: `assim.verify` is the entry point whatever was
    imported before it (the metrics live in `assim.verification`, a module of another
    name), so `from assim import verify` never returns a module."""
    import types

    import assim
    import assim.verification
    from assim import pipeline, verify

    assert verify is pipeline.verify and not isinstance(verify, types.ModuleType)
    assert isinstance(assim.verification, types.ModuleType)
    cfg, _ = make_study(tmp_path, hindcast=False, forecast=False)
    ds = assim.verify(cfg)
    assert ds.attrs["product_path"].endswith("skill.nc")


def _to_quantiles(path, qs=(0.05, 0.25, 0.5, 0.75, 0.95)):
    """Rewrite a member run product as outputs.ensemble = quantiles would write it."""
    with xr.open_dataset(path) as ds:
        ds = ds.load()
    q = ds["discharge"].quantile(list(qs), dim="member").transpose("basin", "time", "quantile")
    out = xr.Dataset({"discharge_quantile": q.drop_vars("member", errors="ignore")}, attrs=ds.attrs)
    out.to_netcdf(path, encoding=_encode_time(out, "time"))
    return out


def test_verify_results_on_quantile_products(tmp_path):
    """Common practice, no published source: a run written as quantiles is scored by its
    median (deterministic metrics equal assim.verification.nse of the 0.5 quantile); ensemble
    metrics are not scored (n = 0) and leave no CSV row."""
    cfg, truth = make_study(tmp_path, hindcast=False, forecast=False)
    q = _to_quantiles(tmp_path / "results" / "openloop.nc")
    ds = v.verify_results(cfg)
    usable = _usable(truth)
    obs0 = usable[:, (truth["run_days"] - truth["all_days"][0]).astype(int)]
    median = q["discharge_quantile"].sel(quantile=0.5).transpose("basin", "time").values
    np.testing.assert_allclose(ds["skill"].sel(experiment="openloop", lead=0, metric="nse").values,
                               v.nse(median, obs0), rtol=1e-6)
    assert ds["n"].sel(experiment="openloop", metric="crps").values.sum() == 0
    assert ds["n"].sel(experiment="assimilation", metric="crps").values.min() > 0
    table = pd.read_csv(cfg["results"] + "/skill.csv")
    assert not ((table.experiment == "openloop") & (table.metric == "crps")).any()


def test_climatology_crps_against_hand_built_sample():
    """Reference library: properscoring.crps_ensemble of the sample of every usable value
    within 15 days of the day of year (all years), built by hand with pandas."""
    from assim.verification.results import climatology_crps

    rng = np.random.default_rng(13)
    days = pd.date_range("2001-01-01", "2004-12-31", freq="D")
    values = rng.gamma(2.0, 3.0, size=(2, len(days)))
    values[0, 100:130] = np.nan
    got = climatology_crps(values, days.values, half_window=15)
    doy = days.day_of_year.to_numpy() - 1
    for b, t in [(0, 5), (1, 400), (0, 1000), (1, 1460), (0, 131)]:
        dist = np.abs(doy - doy[t])
        near = np.minimum(dist, 366 - dist) <= 15
        sample = values[b, near & np.isfinite(values[b])]
        assert got[b, t] == pytest.approx(float(properscoring.crps_ensemble(values[b, t], sample)), rel=1e-10)
    assert np.isnan(got[0, 110])
