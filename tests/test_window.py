"""The fixed-lag smoother in the engine (assim.engine.window, the window's hook in
assim.engine.block) and the reanalysis it records."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from assim import engine, models
from assim import perturb as pt
from assim.config import load_config
from assim.engine.fused import kernel_choice
from assim.errors import ConfigError
from assim.filters import kalman_predict, kalman_update, rts_smooth
from assim.settings import settings_from_config

GR4J = models.get("gr4j")
LR = models.get("linear_reservoir")


class Positions:
    """A sink that places every block at its ``start`` (a reanalysis writes each day when it
    leaves the window, so blocks come back to earlier days)."""

    def __init__(self, n_days):
        self.n = n_days
        self.values: dict[str, np.ndarray] = {}

    def write_block(self, start, arrays):
        for k, v in arrays.items():
            v = np.asarray(v, dtype=np.float64)
            if k not in self.values:
                self.values[k] = np.full((v.shape[0], self.n) + v.shape[2:], np.nan)
            lo = max(start, 0)
            self.values[k][:, lo:start + v.shape[1]] = v[:, lo - start:]


def _inputs(model, params, p, e, obs, area, day0=15000):
    nb, nt = p.shape
    ids = tuple(f"b{i}" for i in range(nb))
    return engine.Inputs(ids, pt.basin_keys(ids), np.asarray(area, float), np.arange(nt, dtype=np.int64) + day0,
                         p, e, obs, np.zeros((nb, nt), dtype=bool), {k: np.asarray(v, float) for k, v in params.items()})


def _gr4j_case(nt=90, nb=2, seed=4):
    rng = np.random.default_rng(seed)
    p = np.where(rng.random((nb, nt)) < 0.4, rng.gamma(0.8, 9.0, (nb, nt)), 0.0)
    e = np.full((nb, nt), 2.0)
    params = {"x1": np.linspace(300, 400, nb), "x2": np.zeros(nb), "x3": np.linspace(80, 100, nb),
              "x4": np.linspace(1.5, 2.5, nb)}
    x, q = GR4J.initial_state(params), np.empty((nb, nt))
    for t in range(nt):  # readings: the model with 1.3 x the rain, plus 10 % errors
        x, f = GR4J.step(x, {"precipitation": 1.3 * p[:, t], "pet": e[:, t]}, params)
        q[:, t] = f["runoff"] * 250.0 / 86.4
    obs = q * (1.0 + 0.1 * rng.standard_normal((nb, nt)))
    obs[:, rng.random(nt) < 0.2] = np.nan
    inputs = _inputs(GR4J, params, p, e, obs, np.full(nb, 250.0))
    st = engine.Settings(mode="reanalysis", members=16, seed=3, spinup_days=10,
                         update_states=("production_store", "routing_store"),
                         write_states=("production_store", "routing_store"), float32=False,
                         scheduler="synchronous", kernel="numpy", smoother_window=4)
    return inputs, st


def test_reanalysis_equals_the_exact_fixed_lag_smoother_on_the_linear_reservoir():
    """Reanalysis of the linear reservoir (multiplicative precipitation errors, 4000 members)
    against the exact fixed-lag Kalman smoother x_s|s+W: the RTS smoother (Rauch, Tung &
    Striebel 1965; assim.filters.rts_smooth, itself checked against statsmodels) of the
    readings through s + W, with process noise variance (a P cv)^2 (the first two moments of
    the lognormal error, as in the engine's Kalman test). Means and variances agree to Monte
    Carlo accuracy, and differ from the filter's by much more (Evensen & van Leeuwen 2000)."""
    rng = np.random.default_rng(4)
    nt, cv, W = 80, 0.3, 5
    p = np.where(rng.random(nt) < 0.5, rng.gamma(1.0, 8.0, nt), 0.0)[None]
    k, c = 0.2, 0.05
    a = (1 - k) * np.exp(-c * 1.0)
    h = k / a
    s, truth = 20.0, np.zeros(nt)
    for t in range(nt):
        s = a * (s + p[0, t])
        truth[t] = h * s
    obs = (truth + rng.normal(0, 0.5, nt))[None]
    obs[0, ::3] = np.nan
    inputs = _inputs(LR, {"k": [k], "c": [c]}, p, np.ones((1, nt)), obs, [86.4])
    st = engine.Settings(mode="reanalysis", members=4000, seed=1, spinup_days=0,
                         precipitation=pt.LognormalAR1(cv, 0.0), pet=pt.LognormalAR1(0.0, 0.0),
                         update_states=("store",), write_states=("store",),
                         obs_error=engine.ObsError("absolute", 0.5), gate_sigma=0.0, float32=False,
                         scheduler="synchronous", smoother_window=W)
    sink = Positions(nt)
    engine.run(LR, inputs, st, sink)
    ens = sink.values["store"][0]
    assert np.isfinite(ens).all()

    def smoother(last):
        one = np.ones((1, 1))
        x, P = np.zeros(1), np.zeros((1, 1))
        out = [[], [], [], []]
        for t in range(last + 1):
            x, P = kalman_predict(x, P, a * one, (a * p[0, t] * cv) ** 2 * one, u=np.array([a * p[0, t]]))
            out[2].append(x)
            out[3].append(P)
            x, P = kalman_update(x, P, h * one, obs[0, t:t + 1], 0.25 * one)
            out[0].append(x)
            out[1].append(P)
        xs, Ps = rts_smooth(*(np.array(v) for v in out), a * one)
        return xs[:, 0], Ps[:, 0, 0], np.array(out[0])[:, 0]

    mean, var, filt = np.empty(nt), np.empty(nt), np.empty(nt)
    for t in range(nt):
        xs, Ps, xf = smoother(min(t + W, nt - 1))
        mean[t], var[t], filt[t] = xs[t], Ps[t], xf[t]
    np.testing.assert_allclose(ens.mean(axis=1), mean, rtol=0.03, atol=0.05)
    np.testing.assert_allclose(ens.var(axis=1, ddof=1), var, rtol=0.12, atol=0.02)
    assert np.max(np.abs(mean - filt)) > 10 * 0.05


def test_window_leaves_the_filter_unchanged():
    """A fixed-lag smoother corrects past days only: the filter's products (analysis,
    background, states, diagnostics) with a window of 4 days equal those without, to
    rounding (Evensen & van Leeuwen 2000, section 2: the smoother's estimate at the latest
    time is the filter's)."""
    inputs, st = _gr4j_case()
    base = dataclasses.replace(st, mode="assimilate", smoother_window=0)
    got = {}
    for w in (0, 4):
        sink = Positions(len(inputs.days) - st.spinup_days)
        summary = engine.run(GR4J, inputs, dataclasses.replace(base, smoother_window=w), sink)
        got[w] = (sink.values, summary.state)
    for name, v in got[0][0].items():
        np.testing.assert_allclose(got[4][0][name], v, rtol=1e-12, atol=1e-12, err_msg=name)
    np.testing.assert_allclose(got[4][1].states, got[0][1].states, rtol=1e-12)
    assert got[0][1].window is None and got[4][1].window.shape == (2, 16, 4, 3)


def test_reanalysis_is_the_same_whatever_the_blocks_and_restarts():
    """The window crosses time blocks and restarts: blocks of 7 days, and a run stopped on
    day 40 and continued from its end state, give the one-shot reanalysis bit for bit
    (common practice, no published source: a continued run equals an uninterrupted one)."""
    inputs, st = _gr4j_case()
    n = len(inputs.days) - st.spinup_days
    whole = Positions(n)
    end = engine.run(GR4J, inputs, st, whole).state
    small = Positions(n)
    engine.run(GR4J, inputs, dataclasses.replace(st, time_block_days=7), small)
    first, second = Positions(n), Positions(n)
    half = engine.run(GR4J, inputs, st, first, until_day=int(inputs.days[40])).state
    summary = engine.run(GR4J, inputs, st, _Shifted(second, 40 + 1 - st.spinup_days), state=half)
    assert half.window is not None
    for name, v in whole.values.items():
        assert np.isfinite(v).all()
        np.testing.assert_array_equal(small.values[name], v, err_msg=name)
        joined = np.where(np.isnan(second.values[name]), first.values[name], second.values[name])
        np.testing.assert_array_equal(joined, v, err_msg=name)
    np.testing.assert_array_equal(summary.state.window, end.window)
    # the last W days of the first part were rewritten, final, by the continuation
    last = 40 - st.spinup_days
    assert not np.array_equal(first.values["discharge"][:, last - 2], v_whole := whole.values["discharge"][:, last - 2])
    np.testing.assert_array_equal(second.values["discharge"][:, last - 2], v_whole)


class _Shifted:
    """A continued run's sink counts from its first day; place it in the whole run's days."""

    def __init__(self, sink, offset):
        self.sink, self.offset = sink, offset

    def write_block(self, start, arrays):
        self.sink.write_block(start + self.offset, arrays)


def test_reanalysis_window_zero_is_the_filter_analysis():
    """With W = 0 each day leaves the window as soon as it is analysed: the reanalysis is
    the filter's analysis bit for bit (the fixed-lag smoother's definition)."""
    inputs, st = _gr4j_case()
    n = len(inputs.days) - st.spinup_days
    re, an = Positions(n), Positions(n)
    engine.run(GR4J, inputs, dataclasses.replace(st, smoother_window=0), re)
    engine.run(GR4J, inputs, dataclasses.replace(st, smoother_window=0, mode="assimilate"), an)
    np.testing.assert_array_equal(re.values["discharge"], an.values["discharge_analysis"])
    np.testing.assert_array_equal(re.values["routing_store"], an.values["routing_store"])


def test_compiled_kernel_declines_the_smoother():
    """kernel: auto falls back to numpy with a window; kernel: compiled is a ConfigError
    naming the key (the project's rule for the fused kernel: it declines what it cannot run)."""
    st = engine.Settings(update_states=("production_store", "routing_store"), smoother_window=3)
    assert "smoother" in kernel_choice(GR4J, st)
    assert kernel_choice(GR4J, dataclasses.replace(st, smoother_window=0)) is None
    cfg = load_config(None, filter={"smoother": {"window_days": 3}}, ensemble={"kernel": "compiled"})
    with pytest.raises(ConfigError, match="smoother"):
        settings_from_config(cfg, GR4J, "assimilate")
    assert settings_from_config(load_config(None), GR4J, "assimilate").smoother_window == 0
