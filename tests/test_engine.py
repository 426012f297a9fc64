"""Tests of the time cycling (assim.engine) on arrays built in the test."""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import pytest
import scoringrules as sr
from filterpy.kalman import KalmanFilter

from assim import engine, models
from assim import perturb as pt
from assim.config import load_config
from assim.errors import RunError
from assim.settings import settings_from_config

GR4J = models.get("gr4j")
LR = models.get("linear_reservoir")


class Collect:
    """A sink that keeps every block in memory."""

    def __init__(self):
        self.blocks: dict[str, list] = {}
        self.starts: list[int] = []
        self.issues: list[np.ndarray] = []

    def write_block(self, start, arrays):
        self.starts.append(start)
        for k, v in arrays.items():
            self.blocks.setdefault(k, []).append(np.array(v))

    def write_issues(self, start, discharge):
        self.issues.append(np.array(discharge))

    def get(self, name):
        return np.concatenate(self.blocks[name], axis=1)

    @property
    def hindcast(self):
        return np.concatenate(self.issues, axis=1)


def lognormal_ar1(rng, shape, cv, phi):
    """An AR(1) lognormal multiplicative error drawn independently of assim.perturb."""
    s = np.sqrt(np.log1p(cv**2))
    e = np.empty(shape)
    e[:, 0] = rng.standard_normal(shape[0])
    for i in range(1, shape[1]):
        e[:, i] = phi * e[:, i - 1] + np.sqrt(1 - phi**2) * rng.standard_normal(shape[0])
    return np.exp(s * e - s * s / 2)


def gaussian_ar1(rng, shape, phi):
    """A stationary unit-variance Gaussian AR(1) series drawn independently of assim.perturb."""
    e = np.empty(shape)
    e[:, 0] = rng.standard_normal(shape[0])
    for i in range(1, shape[1]):
        e[:, i] = phi * e[:, i - 1] + np.sqrt(1 - phi**2) * rng.standard_normal(shape[0])
    return e


def synthetic_weather(rng, nb, nt):
    t = np.arange(nt)
    wet = rng.random((nb, nt)) < 0.35
    p = np.where(wet, rng.gamma(0.8, 9.0, (nb, nt)), 0.0)
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * (t - 100) / 365.25), 0.3, None)[None].repeat(nb, 0)
    return p, e


def make_inputs(model, params, p, e, obs=None, area=None, ids=None, day0=15000):
    nb, nt = p.shape
    ids = tuple(ids or (f"b{i}" for i in range(nb)))
    area = np.full(nb, 250.0) if area is None else np.asarray(area, dtype=float)
    obs = np.full((nb, nt), np.nan) if obs is None else obs
    return engine.Inputs(ids, pt.basin_keys(ids), area, np.arange(nt, dtype=np.int64) + day0, p, e, obs,
                         np.zeros((nb, nt), dtype=bool), {k: np.asarray(v, dtype=float) for k, v in params.items()})


# ---------------------------------------------------------------- acceptance: twin experiment


@pytest.fixture(scope="module")
def twin():
    """Synthetic truth from GR4J with true parameters on 16 invented basins; observed
    forcing = true forcing x errors from the configured error model; readings = truth +
    the configured observation error. The engine runs with the shipped defaults
    (64 members, 365 spin-up days), over 4 years after the spin-up."""
    cfg = load_config(None)
    rng = np.random.default_rng(20261201)
    nb, spin = 16, cfg["period"]["spinup_days"]
    nt = spin + 4 * 365
    p, e = synthetic_weather(rng, nb, nt)
    area = np.linspace(200, 1500, nb)
    params = {"x1": np.linspace(200, 600, nb), "x2": np.linspace(-1, 1, nb),
              "x3": np.linspace(50, 150, nb), "x4": np.linspace(1.2, 3.0, nb)}
    x = GR4J.initial_state(params)
    q = np.empty((nb, nt))
    for i in range(nt):
        x, f = GR4J.step(x, {"precipitation": p[:, i], "pet": e[:, i]}, params)
        q[:, i] = f["runoff"]
    truth = q * area[:, None] / 86.4
    per, oe = cfg["perturbation"], cfg["filter"]["obs_error"]
    po = p * lognormal_ar1(rng, (nb, nt), per["precipitation_cv"], per["precipitation_ar1"])
    eo = e * lognormal_ar1(rng, (nb, nt), per["pet_cv"], per["pet_ar1"])
    sd = np.maximum(oe["relative"] * truth, oe["floor_m3s"])
    obs = np.maximum(truth + sd * rng.standard_normal((nb, nt)), 0.0)
    inputs = make_inputs(GR4J, params, po, eo, obs, area)
    hc = cfg["hindcast"]
    out = {}
    for mode in ("openloop", "assimilate"):
        st = settings_from_config(cfg, GR4J, mode)
        run_sink, hind_sink = Collect(), Collect()
        engine.run(GR4J, inputs, st, run_sink)
        engine.run(GR4J, inputs, st, hind_sink, hindcast=(hc["every_days"], hc["leads"], "observed"))
        out[mode] = (run_sink, hind_sink)
    plan = engine.plan(inputs, settings_from_config(cfg, GR4J, "openloop"), None)
    issues = engine.issue_indices(plan, hc["every_days"], hc["leads"], nt)
    return dict(truth=truth, spin=spin, out=out, issues=issues, leads=hc["leads"])


def _crps(obs, ens):
    return float(sr.crps_ensemble(obs, ens.astype(np.float64)).mean())


def test_twin_assimilation_halves_the_crps(twin):
    """CRPS (scoringrules.crps_ensemble, reference library) of the background discharge of
    the assimilation run against the truth is at most half that of the open loop (acceptance
    criterion of the project, common practice of twin experiments)."""
    tr = twin["truth"][:, twin["spin"]:]
    c_ol = _crps(tr, twin["out"]["openloop"][0].get("discharge"))
    c_da = _crps(tr, twin["out"]["assimilate"][0].get("discharge"))
    c_an = _crps(tr, twin["out"]["assimilate"][0].get("discharge_analysis"))
    assert c_da <= 0.5 * c_ol
    assert c_an < c_da  # the update moves the ensemble towards the truth


def test_twin_hindcast_skill_by_lead(twin):
    """Lead-1 CRPS skill score of the assimilation hindcast against the open-loop hindcast
    is at least 0.5, and skill decreases with lead (scoringrules.crps_ensemble)."""
    truth, issues = twin["truth"], twin["issues"]
    hol = twin["out"]["openloop"][1].hindcast
    hda = twin["out"]["assimilate"][1].hindcast
    assert hol.shape == (16, len(issues), twin["leads"], 64)
    skill = []
    for lead in range(1, twin["leads"] + 1):
        v = truth[:, issues + lead]
        skill.append(1 - _crps(v, hda[:, :, lead - 1]) / _crps(v, hol[:, :, lead - 1]))
    skill = np.array(skill)
    assert skill[0] >= 0.5
    assert np.all(np.diff(skill) < 0.02)  # non-increasing up to sampling noise
    assert skill[-1] < skill[0] - 0.15


def test_twin_spread_matches_error(twin):
    """Ratio of ensemble spread (sqrt of the mean ensemble variance) to the RMSE of the
    ensemble mean against the truth, pooled over basins after scaling each by its mean flow,
    is between 0.8 and 1.2 (Fortin et al. 2014, eq. 1, without the (M+1)/M factor, which is
    1.008 here)."""
    tr = twin["truth"][:, twin["spin"]:]
    w = 1.0 / tr.mean(axis=1, keepdims=True) ** 2
    for mode in ("assimilate", "openloop"):
        ens = twin["out"][mode][0].get("discharge").astype(np.float64)
        spread = np.sqrt((w * ens.var(axis=-1, ddof=1)).mean())
        rmse = np.sqrt((w * (ens.mean(axis=-1) - tr) ** 2).mean())
        assert 0.8 <= spread / rmse <= 1.2, mode


def test_openloop_hindcast_equals_the_run(twin):
    """With observed forcing perturbed as in the run, the open-loop forecast from issue t at
    lead l is the open-loop run at t + l, exactly (the numbers depend only on seed, basin,
    member and day)."""
    run = twin["out"]["openloop"][0].get("discharge")  # float32 output
    hind = twin["out"]["openloop"][1].hindcast
    idx = twin["issues"] - twin["spin"]
    for lead in (1, 5, 10):
        np.testing.assert_array_equal(hind[:, :, lead - 1].astype(np.float32), run[:, idx + lead])


# ---------------------------------------------------------------- exact references


def test_linear_reservoir_enkf_follows_the_kalman_filter():
    """On the linear reservoir with multiplicative precipitation errors, the ensemble mean
    and variance of the stochastic EnKF follow the exact Kalman filter
    (filterpy.kalman.KalmanFilter, reference library) with process noise variance
    (a P cv)^2 per day, to Monte Carlo accuracy: the filter uses only the first two moments
    and the lognormal error has mean 1 and sd cv (Burgers et al. 1998, sect. 3)."""
    rng = np.random.default_rng(4)
    nt, cv, area = 120, 0.3, 86.4  # area 86.4 km2: 1 mm d-1 = 1 m3 s-1
    p = np.where(rng.random(nt) < 0.5, rng.gamma(1.0, 8.0, nt), 0.0)[None]
    e = np.full((1, nt), 1.0)
    k, c = 0.2, 0.05
    a = (1 - k) * np.exp(-c * 1.0)
    h = k / a
    truth = np.zeros(nt)
    s = 20.0
    for t in range(nt):
        s = a * (s + p[0, t])
        truth[t] = h * s
    obs = (truth + rng.normal(0, 0.5, nt))[None]
    obs[0, ::3] = np.nan
    inputs = make_inputs(LR, {"k": [k], "c": [c]}, p, e, obs, area=[area])
    st = engine.Settings(mode="assimilate", members=4000, seed=1, spinup_days=0,
                         precipitation=pt.LognormalAR1(cv, 0.0), pet=pt.LognormalAR1(0.0, 0.0),
                         update_states=("store",), write_states=("store",),
                         obs_error=engine.ObsError("absolute", 0.5), gate_sigma=0.0, float32=False,
                         scheduler="synchronous")
    sink = Collect()
    engine.run(LR, inputs, st, sink)
    ens = sink.get("store")[0]
    kf = KalmanFilter(dim_x=1, dim_z=1)
    kf.x = np.array([[0.0]])
    kf.P = np.array([[0.0]])
    kf.F = np.array([[a]])
    kf.H = np.array([[h]])
    kf.R = np.array([[0.25]])
    means, variances = [], []
    for t in range(nt):
        kf.Q = np.array([[(a * p[0, t] * cv) ** 2]])
        kf.predict(u=np.array([[a * p[0, t]]]), B=np.array([[1.0]]))
        if np.isfinite(obs[0, t]):
            kf.update(np.array([[obs[0, t]]]))
        means.append(kf.x[0, 0])
        variances.append(kf.P[0, 0])
    means, variances = np.array(means), np.array(variances)
    np.testing.assert_allclose(ens.mean(axis=1), means, rtol=0.03, atol=0.05)
    np.testing.assert_allclose(ens.var(axis=1, ddof=1), variances, rtol=0.12, atol=0.02)


def test_no_perturbation_gives_identical_members_equal_to_the_model():
    """With zero forcing errors and no parameter or state noise, every member is the
    deterministic model run (common practice, no published source)."""
    rng = np.random.default_rng(0)
    p, e = synthetic_weather(rng, 2, 200)
    params = {"x1": [300.0, 500.0], "x2": [0.0, -0.5], "x3": [80.0, 120.0], "x4": [1.5, 2.5]}
    inputs = make_inputs(GR4J, params, p, e)
    st = engine.Settings(mode="openloop", members=3, seed=0, precipitation=pt.LognormalAR1(0.0, 0.5),
                         pet=pt.LognormalAR1(0.0, 0.5), float32=False, scheduler="synchronous")
    sink = Collect()
    engine.run(GR4J, inputs, st, sink)
    q = sink.get("discharge")
    x = GR4J.initial_state({k: np.asarray(v) for k, v in params.items()})
    for t in range(200):
        x, f = GR4J.step(x, {"precipitation": p[:, t], "pet": e[:, t]}, {k: np.asarray(v) for k, v in params.items()})
        for m in range(3):
            np.testing.assert_allclose(q[:, t, m], f["runoff"] * 250.0 / 86.4, rtol=1e-12)


def test_spinup_days_are_not_written_and_not_assimilated():
    rng = np.random.default_rng(1)
    p, e = synthetic_weather(rng, 1, 100)
    obs = np.full((1, 100), 3.0)
    inputs = make_inputs(GR4J, {"x1": [300.0], "x2": [0.0], "x3": [80.0], "x4": [1.5]}, p, e, obs)
    st = engine.Settings(mode="assimilate", members=8, spinup_days=30, update_states=("production_store",),
                         scheduler="synchronous")
    sink = Collect()
    summary = engine.run(GR4J, inputs, st, sink)
    assert sink.get("discharge").shape == (1, 70, 8)
    assert summary.n_used.sum() + summary.n_gated.sum() == 70


# ---------------------------------------------------------------- joint estimation


def test_liu_west_shrinkage_keeps_mean_and_variance():
    """Liu & West (2001), eq. 10: a theta + (1 - a) mean + N(0, (1 - a^2) Var) keeps the
    ensemble mean and, in expectation, the variance."""
    rng = np.random.default_rng(2)
    theta = rng.gamma(4.0, 1.0, (1, 20000, 1))
    z = rng.standard_normal(theta.shape)
    new = engine.liu_west_shrink(theta, 0.9, z, np.array([-np.inf]), np.array([np.inf]))
    assert new.mean() == pytest.approx(theta.mean(), abs=0.03)
    assert new.var() == pytest.approx(theta.var(), rel=0.03)
    assert np.corrcoef(new.ravel(), theta.ravel())[0, 1] == pytest.approx(0.9, abs=0.01)
    clipped = engine.liu_west_shrink(theta, 0.5, z, np.array([3.0]), np.array([5.0]))
    assert clipped.min() >= 3.0 and clipped.max() <= 5.0


def test_joint_estimation_moves_the_parameter_towards_the_truth():
    """Twin on the linear reservoir: the truth has k = 0.3, the basin file says 0.15 with a
    30 % perturbation; estimating k with the readings moves the ensemble mean of k towards
    0.3 and keeps every member in the valid range (common practice of joint
    state-parameter estimation, no published value)."""
    rng = np.random.default_rng(3)
    nt = 400
    p = np.where(rng.random((1, nt)) < 0.4, rng.gamma(1.0, 10.0, (1, nt)), 0.0)
    e = np.full((1, nt), 2.0)
    s, q = 0.0, np.empty(nt)
    for t in range(nt):
        filled = s + p[0, t]
        q[t] = 0.3 * filled
        s = (1 - 0.3) * np.exp(-0.02 * 2.0) * filled
    obs = (q + rng.normal(0, 0.05 * q + 0.05))[None]
    inputs = make_inputs(LR, {"k": [0.15], "c": [0.02]}, p, e, obs, area=[86.4])
    st = engine.Settings(mode="assimilate", members=64, seed=9, spinup_days=0, parameter_sd={"k": 0.3},
                         update_states=("store",), estimate=("k",), shrinkage=0.98,
                         obs_error=engine.ObsError("relative", relative=0.05, floor=0.05),
                         scheduler="synchronous")
    sink = Collect()
    summary = engine.run(LR, inputs, st, sink)
    traj = sink.get("k")[0]
    assert traj.shape == (nt, 64)
    assert abs(traj[-50:].mean() - 0.3) < 0.3 * abs(traj[0].mean() - 0.3)
    assert traj.min() >= 0.001 and traj.max() <= 0.95
    np.testing.assert_allclose(summary.state.parameters["k"][0], traj[-1], rtol=1e-6)


# ---------------------------------------------------------------- filter health


def test_nan_state_stops_the_run_naming_basin_and_date():
    p = np.full((3, 50), 2.0)
    p[1, 20] = np.inf  # a corrupt forcing value in basin "b1"
    inputs = make_inputs(LR, {"k": [0.1] * 3, "c": [0.0] * 3}, p, np.ones((3, 50)))
    st = engine.Settings(mode="openloop", members=4, basin_chunk=2, scheduler="synchronous")
    with pytest.raises(RunError) as info:
        engine.run(LR, inputs, st, Collect())
    text = str(info.value)
    day = np.datetime64("1970-01-01") + np.timedelta64(15020, "D")
    assert "basin b1" in text and str(day) in text and "store" in text


def test_a_genuine_error_propagates_and_the_block_is_not_run_again():
    """Only a state gone bad replays a block (checked daily, to name it); an error of the
    model with finite states is a bug and propagates at once. Common practice, no published
    source: the step is called once per day up to the failing day, never again."""
    calls = []

    def step(state, forcing, params):
        calls.append(1)
        if len(calls) == 11:
            raise ValueError("a bug in the model step")
        return LR.step(state, forcing, params)

    model = dataclasses.replace(LR, step=step)
    inputs = make_inputs(LR, {"k": [0.1] * 2, "c": [0.0] * 2}, np.full((2, 40), 2.0), np.ones((2, 40)))
    st = engine.Settings(mode="openloop", members=4, scheduler="synchronous")
    with pytest.raises(ValueError, match="a bug in the model step"):
        engine.run(model, inputs, st, Collect())
    assert len(calls) == 11


def test_an_open_loop_keeps_the_parameters_it_would_estimate():
    """filter.parameters.estimate applies to the analysis only: an open loop with it set runs
    (it failed with a KeyError before) and equals the open loop without it, bit for bit.
    Common practice, no published source."""
    rng = np.random.default_rng(3)
    p, e = synthetic_weather(rng, 2, 60)
    inputs = make_inputs(LR, {"k": [0.1, 0.2], "c": [0.0, 0.0]}, p, e)
    st = engine.Settings(mode="openloop", members=6, parameter_sd={"k": 0.2}, scheduler="synchronous")
    plain, with_estimate = Collect(), Collect()
    engine.run(LR, inputs, st, plain)
    engine.run(LR, inputs, dataclasses.replace(st, estimate=("k",)), with_estimate)
    assert "k" not in with_estimate.blocks
    assert np.array_equal(plain.get("discharge"), with_estimate.get("discharge"))


def test_collapse_and_gating_are_warned():
    """No perturbation: the spread is zero, so the collapse warning fires after
    collapse_days readings; readings far from the ensemble are gated and warned about.
    Common practice, no published source."""
    p = np.full((2, 60), 2.0)
    obs = np.full((2, 60), np.nan)
    obs[0] = 1000.0  # far off: gated
    s, q = 0.0, np.empty(60)  # the unperturbed model (area 86.4 km2: mm d-1 = m3 s-1)
    for t in range(60):
        q[t] = 0.1 * (s + 2.0)
        s = 0.9 * (s + 2.0)
    obs[1, 1::2] = q[1::2]
    inputs = make_inputs(LR, {"k": [0.1, 0.1], "c": [0.0, 0.0]}, p, np.ones((2, 60)), obs, area=[86.4, 86.4])
    st = engine.Settings(mode="assimilate", members=8, precipitation=pt.LognormalAR1(0.05, 0.5),
                         pet=pt.LognormalAR1(0.0, 0.5), collapse_ratio=1e6, collapse_days=10,
                         update_states=("store",), scheduler="synchronous")
    sink = Collect()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        summary = engine.run(LR, inputs, st, sink)
    codes = {(w.code, w.basin) for w in summary.warnings}
    assert {("frequent_gating", "b0"), ("ensemble_collapse", "b1")} <= codes
    assert ("frequent_gating", "b1") not in codes
    text = " ".join(str(w) for w in summary.warnings)
    assert "basin b0: 60 of 60 readings (100%) were gated" in text
    assert "basin b1: ensemble collapse" in text
    assert not caught  # returned, never emitted: the entry layer shows each once
    status = sink.get("obs_status")
    assert np.all(status[0] == engine.OBS_GATED)
    assert np.all(status[1, 1::2] == engine.OBS_USED) and np.all(status[1, 0::2] == engine.OBS_MISSING)
    # the day after 10 readings (day index 19): first collapse
    assert summary.first_collapse[1] == 15000 + 19


def test_quantile_outputs():
    """Quantile products hold the members' sample quantiles (numpy.quantile, linear
    interpolation: Hyndman & Fan 1996, definition 7) instead of the members."""
    rng = np.random.default_rng(5)
    p, e = synthetic_weather(rng, 2, 60)
    inputs = make_inputs(GR4J, {"x1": [300.0] * 2, "x2": [0.0] * 2, "x3": [80.0] * 2, "x4": [1.5] * 2}, p, e)
    base = engine.Settings(mode="openloop", members=16, float32=False, scheduler="synchronous")
    members, quant = Collect(), Collect()
    engine.run(GR4J, inputs, base, members)
    engine.run(GR4J, inputs, dataclasses.replace(base, quantiles=(0.1, 0.5, 0.9)), quant)
    # reference: numpy.quantile, default (linear) method; the same formula, rounded in
    # another order, so equal to the last bits only
    np.testing.assert_allclose(quant.get("discharge_quantile"),
                               np.quantile(members.get("discharge"), [0.1, 0.5, 0.9], axis=2).transpose(1, 2, 0),
                               rtol=1e-13, atol=0)
    assert "discharge" not in quant.blocks


def test_climatology_index_cycles_past_years():
    """Member m takes year Y-1-(m mod n) of the record, same calendar dates; 29 February is
    read as 28 February (the documented convention)."""
    dt = np.datetime64("1970-01-01", "D")
    days = np.arange((np.datetime64("2001-01-01") - dt).astype(int), (np.datetime64("2005-01-01") - dt).astype(int))
    issue = np.array([(np.datetime64("2004-02-29") - dt).astype(int)])
    idx = engine.climatology_index(days, issue, 3, np.arange(5))
    got = (dt + days[idx[0]]).astype(str)
    assert list(got[:, 0]) == ["2003-03-01", "2003-03-02", "2003-03-03"]
    assert list(got[0]) == ["2003-03-01", "2002-03-01", "2001-03-01", "2003-03-01", "2002-03-01"]
    with pytest.raises(RunError):
        engine.climatology_index(days[:300], np.array([days[10]]), 3, np.arange(2))


def test_forecast_issue_forcings():
    """Operational forecast from an end state: with observed forcing it continues the open
    loop exactly; with a forcing file member m takes file member m mod n; with climatology
    member m takes the weather of a past year (:func:`engine.climatology_index`)."""
    rng = np.random.default_rng(6)
    nt = 3 * 365
    p, e = synthetic_weather(rng, 2, nt)
    params = {"x1": [300.0, 420.0], "x2": [0.0, 0.3], "x3": [80.0, 100.0], "x4": [1.5, 2.0]}
    inputs = make_inputs(GR4J, params, p, e, day0=11000)
    # the forecast steps on the numpy path: the run on the same path is continued bit for bit,
    # the run on the compiled kernel to rounding (numpy's SIMD exp/tanh/log against the C library's)
    st = engine.Settings(mode="openloop", members=6, seed=2, float32=False, scheduler="synchronous", kernel="numpy")
    whole = Collect()
    engine.run(GR4J, inputs, st, whole)
    issue = int(inputs.days[800])
    part = engine.run(GR4J, inputs, st, None, until_day=issue)
    q = engine.forecast_issue(GR4J, inputs, st, part.state, 7, "observed")
    np.testing.assert_array_equal(q, whole.get("discharge")[:, 801:808])
    compiled = engine.run(GR4J, inputs, dataclasses.replace(st, kernel="compiled"), None, until_day=issue)
    qk = engine.forecast_issue(GR4J, inputs, st, compiled.state, 7, "observed")
    np.testing.assert_allclose(qk, q, rtol=1e-12, atol=0)
    # identical members (no perturbation), so that members sharing forcing agree
    st0 = dataclasses.replace(st, precipitation=pt.LognormalAR1(0.0, 0.5), pet=pt.LognormalAR1(0.0, 0.5))
    same = engine.run(GR4J, inputs, st0, None, until_day=issue).state
    ff = {"precipitation": rng.gamma(1.0, 5.0, (2, 7, 4)), "pet": np.full((2, 7, 4), 2.0)}
    qf = engine.forecast_issue(GR4J, inputs, st0, same, 7, "file", ff)
    np.testing.assert_array_equal(qf[..., 1], qf[..., 5])  # members 1 and 5 take file member 1
    assert not np.array_equal(qf[..., 0], qf[..., 1])
    clim = dataclasses.replace(inputs, climatology=engine.Climatology(inputs.days, p, e))
    qc = engine.forecast_issue(GR4J, clim, st0, same, 7, "climatology")
    assert qc.shape == (2, 7, 6)
    np.testing.assert_array_equal(qc[..., 0], qc[..., 2])  # two past years in the record: cycled
    assert not np.array_equal(qc[..., 0], qc[..., 1])


def test_collapse_counts_equal_the_day_by_day_counter():
    """The block-end collapse counters equal the day-by-day rule (a reading with a low spread
    adds one, a reading with a normal spread resets, no reading keeps the count; the warning
    day is the first whose count equals the limit) on random cases. Common practice, no
    published source."""
    rng = np.random.default_rng(0)
    for _ in range(200):
        nb, nd = int(rng.integers(1, 6)), int(rng.integers(0, 40))
        has = rng.random((nb, nd)) < rng.uniform(0.2, 1.0)
        low = has & (rng.random((nb, nd)) < rng.uniform(0.0, 1.0))
        c0, limit, days = rng.integers(0, 8, nb), int(rng.integers(1, 6)), 100 + 2 * np.arange(nd)
        c, first = c0.copy(), np.full(nb, -1)
        for k in range(nd):
            c = np.where(has[:, k], np.where(low[:, k], c + 1, 0), c)
            first = np.where((c == limit) & (first < 0), days[k], first)
        got_c, got_first = engine.collapse_counts(c0, has, low, days, limit)
        np.testing.assert_array_equal(got_c, c)
        np.testing.assert_array_equal(got_first, first)


# ---------------------------------------------------------------- adaptive inflation


def _adaptive_case(**changes):
    rng = np.random.default_rng(5)
    nb, nt = 3, 150
    p, e = synthetic_weather(rng, nb, nt)
    params = {"x1": np.array([300.0, 350.0, 420.0]), "x2": np.zeros(nb), "x3": np.full(nb, 80.0),
              "x4": np.full(nb, 1.8)}
    obs = np.where(rng.random((nb, nt)) < 0.85, rng.gamma(3.0, 1.5, (nb, nt)), np.nan)
    inputs = make_inputs(GR4J, params, p, e, obs=obs)
    settings = engine.Settings(mode="assimilate", members=16, seed=3, gate_sigma=0.0, method="etkf",
                               update_states=("production_store", "routing_store"), time_block_days=40,
                               scheduler="synchronous", adaptive_inflation=True, adaptive_damping=0.95,
                               adaptive_initial_mean=1.1, adaptive_initial_sd=0.5, adaptive_min_sd=0.05,
                               **changes)
    return inputs, settings


@pytest.mark.parametrize("kernel", ["numpy", "auto"])
def test_adaptive_inflation_trajectory_replays_from_the_recorded_innovations(kernel):
    """The engine's daily inflation (Anderson 2009) equals the scheme replayed by hand from
    the diagnostics it records: each day the mean is damped, then updated by the day's
    innovation with the background spread and the observation error variance used
    (update_inflation); days without a reading keep it. The compiled kernel declines the
    run, so "auto" gives the same numbers."""
    from assim.filters import AdaptiveInflation, damp_inflation, update_inflation

    inputs, settings = _adaptive_case(kernel=kernel)
    sink = Collect()
    summary = engine.run(GR4J, inputs, settings, sink)
    d, r = sink.get("innovation"), sink.get("obs_error_variance")
    sp = sink.get("spread_before")
    status = sink.get("obs_status")
    opts = AdaptiveInflation(1.1, 0.5, 0.95, 1.0, 10.0, 0.05)
    mean, sd = np.full(3, 1.1), np.full(3, 0.5)
    want = np.empty_like(d)
    for t in range(d.shape[1]):
        mean = damp_inflation(mean, opts.damping)
        mean, sd = update_inflation(mean, sd, d[:, t], sp[:, t] ** 2, r[:, t], opts,
                                    use=status[:, t] == engine.OBS_USED)
        want[:, t] = mean
    np.testing.assert_allclose(sink.get("inflation_mean"), want, rtol=1e-9)
    np.testing.assert_allclose(summary.state.inflation_mean, want[:, -1], rtol=1e-9)
    assert np.ptp(want) > 0.05  # the inflation moved
    # the recorded expected innovation variance carries the updated inflation
    np.testing.assert_allclose(sink.get("innovation_variance"), want * sp**2 + r, rtol=1e-9)


def test_adaptive_inflation_kernel_declines_and_default_writes_nothing():
    """The compiled kernel declines adaptive inflation with a reason (ensemble.kernel
    "compiled" is then a config error); without it no inflation trajectory is recorded.
    Common practice, no published source."""
    from assim.engine.fused import kernel_choice

    inputs, settings = _adaptive_case()
    assert "adaptive" in kernel_choice(GR4J, settings)
    assert kernel_choice(GR4J, dataclasses.replace(settings, adaptive_inflation=False)) is None
    cfg = load_config(ensemble={"kernel": "compiled"}, filter={"inflation": {"adaptive": {"enabled": True}}})
    from assim.errors import ConfigError

    with pytest.raises(ConfigError, match="adaptive"):
        settings_from_config(cfg, GR4J, "assimilate")
    sink = Collect()
    engine.run(GR4J, inputs, dataclasses.replace(settings, adaptive_inflation=False), sink)
    assert "inflation_mean" not in sink.blocks and "innovation_analysis" in sink.blocks


# ---------------------------------------------------------------- snow: temperature through the engine

SNOW = models.get("gr4j+snow")
LR_SNOW = models.get("linear_reservoir+snow")
# snow parameters of the hand-worked days of tests/test_snow.py
SNOW_PARAMS = {"snow_routine": 1.0, "snow_threshold": 0.0, "snow_interval": 2.0, "melt_threshold": 0.5,
               "degree_day_factor": 3.0, "water_holding": 0.1, "refreezing": 0.05}


def cold_temperature(rng, nb, nt):
    """Daily mean air temperature (degC) of invented cold basins: winters near -10 degC,
    summers near +8 degC, with day-to-day noise."""
    t = np.arange(nt)
    season = -1.0 + 9.0 * np.sin(2 * np.pi * (t - 110) / 365.25)
    return season[None, :] + rng.normal(0.0, 2.5, (nb, nt))


def snow_inputs(model, params, p, e, temp, **kw):
    return dataclasses.replace(make_inputs(model, params, p, e, **kw), temperature=temp)


def snow_params(nb, **gr4j):
    base = {"x1": np.linspace(250, 450, nb), "x2": np.linspace(-0.5, 0.5, nb), "x3": np.linspace(60, 120, nb),
            "x4": np.linspace(1.3, 2.5, nb)}
    base.update(gr4j)
    return {**base, **{k: np.full(nb, v) for k, v in SNOW_PARAMS.items()}}


def test_snow_hand_worked_days_through_the_engine():
    """Three days through engine.run of linear_reservoir+snow, one basin, no perturbation:
    two days of 10 mm at -5 degC build a 10 then 20 mm pack (all snow, no melt); a dry day
    at 4 degC melts DDF (T - Tm) = 3 x 3.5 = 10.5 mm (Hock 2003, eq. 1), the pack keeps
    9.5 mm and holds 0.95 mm of liquid (the hand-worked days of tests/test_snow.py)."""
    p = np.array([[10.0, 10.0, 0.0]])
    temp = np.array([[-5.0, -5.0, 4.0]])
    params = {"k": np.array([0.2]), "c": np.array([0.02]), **{k: np.array([v]) for k, v in SNOW_PARAMS.items()}}
    inputs = snow_inputs(LR_SNOW, params, p, np.zeros((1, 3)), temp)
    st = engine.Settings(mode="openloop", members=2, precipitation=pt.LognormalAR1(0.0, 0.5),
                         pet=pt.LognormalAR1(0.0, 0.5), float32=False, scheduler="synchronous",
                         write_states=LR_SNOW.state_names)
    sink = Collect()
    engine.run(LR_SNOW, inputs, st, sink)
    np.testing.assert_array_equal(sink.get("snowpack")[0, :, 0], [10.0, 20.0, 9.5])
    np.testing.assert_allclose(sink.get("snow_liquid")[0, :, 0], [0.0, 0.0, 0.95], atol=1e-12)
    np.testing.assert_array_equal(sink.get("store")[0, :2, 0], [0.0, 0.0])  # nothing reached the store


def test_snow_open_loop_without_perturbation_equals_the_model_loop():
    """With zero forcing errors (temperature_sd 0) every member is a plain loop of
    gr4j+snow's model.step with the same temperature: snowpack exactly, discharge to 1e-12
    (common practice, no published source)."""
    rng = np.random.default_rng(11)
    nb, nt = 2, 500
    p, e = synthetic_weather(rng, nb, nt)
    temp = cold_temperature(rng, nb, nt)
    params = snow_params(nb)
    inputs = snow_inputs(SNOW, params, p, e, temp)
    st = engine.Settings(mode="openloop", members=3, seed=0, precipitation=pt.LognormalAR1(0.0, 0.5),
                         pet=pt.LognormalAR1(0.0, 0.5), temperature=pt.GaussianAR1(0.0, 0.7), float32=False,
                         scheduler="synchronous", write_states=("snowpack",))
    sink = Collect()
    engine.run(SNOW, inputs, st, sink)
    q, pack = sink.get("discharge"), sink.get("snowpack")
    prepared = SNOW.prepare(params)
    x = SNOW.initial_state(params)
    k = SNOW.state_index("snowpack")
    for t in range(nt):
        x, f = SNOW.step(x, {"precipitation": p[:, t], "pet": e[:, t], "temperature": temp[:, t]}, prepared)
        for m in range(3):
            np.testing.assert_array_equal(pack[:, t, m], x[:, k])
            np.testing.assert_allclose(q[:, t, m], f["runoff"] * 250.0 / 86.4, rtol=1e-12)
    assert pack.max() > 50.0  # the winters build a pack


def test_temperature_error_is_an_additive_gaussian_ar1():
    """The perturbed temperature minus the recorded one has mean 0, the configured sd and
    lag-one autocorrelation phi (a stationary Gaussian AR(1); common practice, no published
    source); sd 0 leaves the temperature bit for bit; the precipitation and PET errors are
    the same with or without a temperature in the run (their own streams)."""
    from assim.engine.block import perturbed_forcing

    rng = np.random.default_rng(3)
    nb, nt, nm = 2, 3000, 40
    p, e = synthetic_weather(rng, nb, nt)
    temp = cold_temperature(rng, nb, nt)
    inputs = snow_inputs(SNOW, snow_params(nb), p, e, temp)
    st = engine.Settings(members=nm, seed=5, temperature=pt.GaussianAR1(1.5, 0.6))
    state = engine.initial_ensemble(SNOW, inputs, st)
    assert set(state.ar1) == {"precipitation", "pet", "temperature"}
    members = np.arange(nm)
    forcing, _, _ = perturbed_forcing(inputs, state.ar1, st, members, 0, nt, False)
    err = forcing["temperature"].reshape(nt, nb, nm) - temp.T[:, :, None]
    assert abs(err.mean()) < 0.03
    assert err.std() == pytest.approx(1.5, rel=0.02)
    lag1 = (err[1:] * err[:-1]).mean() / err.var()
    assert lag1 == pytest.approx(0.6, abs=0.02)
    still = dataclasses.replace(st, temperature=pt.GaussianAR1(0.0, 0.6))
    f0, _, _ = perturbed_forcing(inputs, state.ar1, still, members, 0, nt, False)
    np.testing.assert_array_equal(f0["temperature"].reshape(nt, nb, nm), np.broadcast_to(temp.T[:, :, None], err.shape))
    rain = engine.initial_ensemble(GR4J, inputs, st)
    assert set(rain.ar1) == {"precipitation", "pet"}
    fr, _, _ = perturbed_forcing(inputs, rain.ar1, st, members, 0, nt, False)
    for name in ("precipitation", "pet"):
        np.testing.assert_array_equal(fr[name], forcing[name])


def test_snow_runs_need_their_temperature_and_skip_the_compiled_kernel():
    """A snow model without temperature in the inputs is refused; the compiled kernel has no
    form for <model>+snow, so kernel auto runs numpy and kernel compiled is a ConfigError."""
    from assim.engine import fused
    from assim.errors import ConfigError

    rng = np.random.default_rng(2)
    p, e = synthetic_weather(rng, 1, 30)
    inputs = make_inputs(SNOW, snow_params(1), p, e)
    with pytest.raises(ValueError, match="temperature"):
        engine.run(SNOW, inputs, engine.Settings(members=2, scheduler="synchronous"), None)
    assert fused.kernel_choice(SNOW, engine.Settings()) == "model 'gr4j+snow' has no compiled form"
    assert not fused.applicable(SNOW, engine.Settings(kernel="auto"))
    with pytest.raises(ConfigError, match="no compiled form"):
        settings_from_config(load_config(ensemble={"kernel": "compiled"}), SNOW, "assimilate")


def test_snow_continued_run_and_forecast_leads():
    """With the temperature perturbed: a run continued from its end state (snowpack and the
    temperature error included) equals the one-shot run bit for bit; an observed-forcing
    forecast continues the run exactly (discharge and the snowpack of every lead); climatology and file forecasts take their
    temperature from the same source as their precipitation (colder leads, more snow, less
    discharge)."""
    rng = np.random.default_rng(8)
    nb, nt = 2, 3 * 365
    p, e = synthetic_weather(rng, nb, nt)
    temp = cold_temperature(rng, nb, nt)
    inputs = snow_inputs(SNOW, snow_params(nb), p, e, temp, day0=11000)
    st = engine.Settings(members=6, seed=4, float32=False, scheduler="synchronous", time_block_days=100,
                         temperature=pt.GaussianAR1(1.0, 0.7), write_states=("snowpack",),
                         obs_error=engine.ObsError("relative", 1.0, 0.1, 0.05))
    obs = np.where(rng.random((nb, nt)) < 0.8, 0.5 + rng.gamma(2.0, 1.0, (nb, nt)), np.nan)
    inputs = dataclasses.replace(inputs, observed=obs)
    for mode in ("openloop", "assimilate"):
        sm = dataclasses.replace(st, mode=mode)
        whole = Collect()
        one = engine.run(SNOW, inputs, sm, whole)
        cut = int(inputs.days[500])
        first, rest = Collect(), Collect()
        part = engine.run(SNOW, inputs, sm, first, until_day=cut)
        assert set(part.state.ar1) == {"precipitation", "pet", "temperature"}
        two = engine.run(SNOW, inputs, sm, rest, state=part.state)
        for name in ("discharge", "snowpack"):
            np.testing.assert_array_equal(np.concatenate([first.get(name), rest.get(name)], axis=1), whole.get(name))
        np.testing.assert_array_equal(two.state.states, one.state.states)
        np.testing.assert_array_equal(two.state.ar1["temperature"], one.state.ar1["temperature"])
    ol = dataclasses.replace(st, mode="openloop")
    whole = Collect()
    engine.run(SNOW, inputs, ol, whole)
    issue = int(inputs.days[800])
    part = engine.run(SNOW, inputs, ol, None, until_day=issue)
    q, kept = engine.forecast_issue(SNOW, inputs, ol, part.state, 7, "observed",
                                    keep_states=(SNOW.state_index("snowpack"),))
    np.testing.assert_array_equal(q, whole.get("discharge")[:, 801:808])
    np.testing.assert_array_equal(kept[..., 0], whole.get("snowpack")[:, 801:808])
    # a winter issue with a pack: leads at +15 degC melt it, leads at -15 degC keep it
    winter = int(np.flatnonzero((np.arange(nt) % 365 > 330) & (np.arange(nt) > 400))[0])
    part = engine.run(SNOW, inputs, ol, None, until_day=int(inputs.days[winter]))
    assert part.state.states[..., SNOW.state_index("snowpack")].min() > 10.0
    qs = {}
    for t in (-15.0, 15.0):
        ff = {"precipitation": np.full((nb, 7, 3), 2.0), "pet": np.full((nb, 7, 3), 0.5),
              "temperature": np.full((nb, 7, 3), t)}
        qs[t] = engine.forecast_issue(SNOW, inputs, ol, part.state, 7, "file", ff)
        clim = engine.Climatology(inputs.days, p, e, np.full_like(temp, t))
        qc = engine.forecast_issue(SNOW, dataclasses.replace(inputs, climatology=clim), ol, part.state, 7,
                                   "climatology")
        assert np.isfinite(qc).all()
        qs[("clim", t)] = qc
    assert (qs[15.0][:, -1] > qs[-15.0][:, -1]).all()
    assert (qs[("clim", 15.0)][:, -1] > qs[("clim", -15.0)][:, -1]).all()


def test_snow_twin_assimilation_improves_the_one_day_crps():
    """Twin experiment with snow: a truth of gr4j+snow on 4 invented cold basins; recorded
    precipitation and PET carry the configured lognormal errors, the recorded temperature an
    additive Gaussian AR(1) error of 1.5 degC drawn here (not by assim.perturb); readings =
    truth + the configured observation error. The ensemble runs with the shipped defaults and
    temperature_sd_c 1.5. The one-day-ahead (background) CRPS of the assimilation run
    (scoringrules.crps_ensemble, reference library) is below 0.6 of the open loop's, over
    the whole period and over the snowmelt days; the filter updates the snowpack (by
    default), which stays >= 0 after every analysis; clipped water is reported, not lost
    (common practice of twin experiments)."""
    cfg = load_config(None, perturbation={"temperature_sd_c": 1.5})
    rng = np.random.default_rng(20261205)
    nb, spin = 4, cfg["period"]["spinup_days"]
    nt = spin + 2 * 365
    p, e = synthetic_weather(rng, nb, nt)
    temp = cold_temperature(rng, nb, nt)
    area = np.linspace(150, 900, nb)
    params = snow_params(nb)
    prepared = SNOW.prepare(params)
    x = SNOW.initial_state(params)
    q, melt = np.empty((nb, nt)), np.empty((nb, nt))
    for i in range(nt):
        x, f = SNOW.step(x, {"precipitation": p[:, i], "pet": e[:, i], "temperature": temp[:, i]}, prepared)
        q[:, i], melt[:, i] = f["runoff"], f["melt"]
    truth = q * area[:, None] / 86.4
    per, oe = cfg["perturbation"], cfg["filter"]["obs_error"]
    po = p * lognormal_ar1(rng, (nb, nt), per["precipitation_cv"], per["precipitation_ar1"])
    eo = e * lognormal_ar1(rng, (nb, nt), per["pet_cv"], per["pet_ar1"])
    t_err = 1.5 * gaussian_ar1(rng, (nb, nt), per["temperature_ar1"])
    sd = np.maximum(oe["relative"] * truth, oe["floor_m3s"])
    obs = np.maximum(truth + sd * rng.standard_normal((nb, nt)), 0.0)
    inputs = snow_inputs(SNOW, params, po, eo, temp + t_err, obs=obs, area=area)
    out = {}
    for mode in ("openloop", "assimilate"):
        st = dataclasses.replace(settings_from_config(cfg, SNOW, mode), write_states=("snowpack",))
        assert mode == "openloop" or "snowpack" in st.update_states
        out[mode] = Collect()
        engine.run(SNOW, inputs, st, out[mode])
    tr = truth[:, spin:]
    c_ol = sr.crps_ensemble(tr, out["openloop"].get("discharge").astype(np.float64))
    c_da = sr.crps_ensemble(tr, out["assimilate"].get("discharge").astype(np.float64))
    melting = melt[:, spin:] > 1.0
    assert melting.sum() > 50
    assert c_da.mean() < 0.6 * c_ol.mean()  # 0.38 measured
    assert c_da[melting].mean() < 0.6 * c_ol[melting].mean()
    assert out["assimilate"].get("snowpack").min() >= 0.0
    assert np.isfinite(out["assimilate"].get("clipped_water")).all()


def test_snowpack_state_noise_stays_in_bounds_and_is_reported():
    """perturbation.state_noise on the snowpack: members spread, the pack never goes below
    0 (clipped to its bound), and the water the noise added is reported (common practice,
    no published source)."""
    rng = np.random.default_rng(9)
    nb, nt = 2, 400
    p, e = synthetic_weather(rng, nb, nt)
    temp = cold_temperature(rng, nb, nt)
    inputs = snow_inputs(SNOW, snow_params(nb), p, e, temp)
    st = engine.Settings(mode="openloop", members=8, seed=1, scheduler="synchronous", float32=False,
                         state_noise={"snowpack": 2.0}, write_states=("snowpack",))
    sink = Collect()
    engine.run(SNOW, inputs, st, sink)
    pack = sink.get("snowpack")
    assert pack.min() >= 0.0 and (pack == 0.0).any()  # clipped at its bound in summer
    assert pack.std(axis=-1).max() > 1.0
    assert np.isfinite(sink.get("state_noise_water")).all() and np.abs(sink.get("state_noise_water")).max() > 0


def test_forecast_leads_of_several_issues_equal_each_issue_alone():
    """Issues that share their parameters (none estimated) are advanced with the parameters
    prepared once and repeated: every issue's leads equal that issue run alone, bit for bit
    (np.array_equal), as GR4J's prepared values are element-wise (common practice, no
    published source: a batch's elements are independent)."""
    from assim.engine.forecast import forecast_leads

    rng = np.random.default_rng(7)
    ni, nb, nm, nl = 3, 4, 6, 5
    params = {"x1": rng.uniform(200, 600, nb), "x2": rng.uniform(-1, 1, nb),
              "x3": rng.uniform(50, 150, nb), "x4": rng.uniform(1.2, 3.0, nb)}
    par = {k: np.broadcast_to(v[None, :, None], (ni, nb, nm)).copy() for k, v in params.items()}
    x0 = GR4J.initial_state({k: np.repeat(v, nm) for k, v in params.items()}).reshape(nb, nm, -1)
    states = np.stack([x0 * rng.uniform(0.5, 1.5, x0.shape) for _ in range(ni)])
    forcing = {"precipitation": rng.gamma(0.8, 9.0, (nl, ni, nb, nm)), "pet": rng.uniform(0.5, 4, (nl, ni, nb, nm))}
    s = engine.Settings(mode="openloop", members=nm, seed=1)
    keys = pt.basin_keys(tuple(f"b{i}" for i in range(nb)))
    area = rng.uniform(100, 900, nb)
    days = np.arange(nl)[:, None] + np.arange(ni)[None] + 17000
    both = forecast_leads(GR4J, states, par, forcing, area, s, keys, np.arange(nm), days)
    for i in range(ni):
        one = forecast_leads(GR4J, states[i:i + 1], {k: v[i:i + 1] for k, v in par.items()},
                             {k: v[:, i:i + 1] for k, v in forcing.items()}, area, s, keys, np.arange(nm), days[:, i:i + 1])
        np.testing.assert_array_equal(both[:, i:i + 1], one)
    assert np.all(both > 0)
