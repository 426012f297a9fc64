"""Tests of assim.models.linear_reservoir against the closed-form solutions of its linear
recurrence S_{t+1} = a_t S_t + b_t (geometric decay, steady state, geometric sum)."""

import numpy as np
import pytest

from assim.models import get, linear_reservoir

MODEL = get("linear_reservoir")


def _run(state, p, e, params):
    states, fluxes = [], []
    for t in range(p.shape[0]):
        state, f = MODEL.step(state, {"precipitation": p[t], "pet": e[t]}, params)
        states.append(state[:, 0])
        fluxes.append(f)
    return np.array(states), fluxes


def test_recession_without_forcing_is_geometric():
    """Closed form of S_{t+1} = (1 - k) S_t (common practice, no published source):
    S_t = S_0 (1 - k)^t and Q_t = k S_{t-1}."""
    k = np.array([0.01, 0.1, 0.5, 0.95])
    params = {"k": k, "c": np.full(4, 0.05)}
    s0 = np.array([[100.0], [50.0], [10.0], [1.0]])
    zeros = np.zeros((40, 4))
    states, fluxes = _run(s0, zeros, zeros, params)
    t = np.arange(1, 41)[:, None]
    np.testing.assert_allclose(states, s0[:, 0] * (1 - k) ** t, rtol=1e-12)
    np.testing.assert_allclose(fluxes[9]["runoff"], k * states[8], rtol=1e-12)


def test_constant_rain_reaches_the_steady_state():
    """Fixed point of S = (1 - k)(S + P) (common practice, no published source):
    S* = (1 - k) P / k, where the runoff equals the rain."""
    k = np.array([0.2, 0.5, 0.9])
    params = {"k": k, "c": np.full(3, 0.3)}
    rain = np.full((400, 3), 7.0)
    states, fluxes = _run(MODEL.initial_state(params), rain, np.zeros_like(rain), params)
    np.testing.assert_allclose(states[-1], (1 - k) * 7.0 / k, rtol=1e-12)
    np.testing.assert_allclose(fluxes[-1]["runoff"], 7.0, rtol=1e-12)


def test_random_forcing_matches_the_geometric_sum():
    """Solution of the linear recurrence S_{t+1} = a_t S_t + b_t (common practice, no published
    source): S_T = (prod_t a_t) S_0 + sum_t (prod_{j>t} a_j) b_t, with a_t and b_t from
    ``transition``; a_t = (1 - k) exp(-c PET_t), b_t = a_t P_t as the module documents."""
    rng = np.random.default_rng(11)
    n, n_days = 5, 50
    params = {"k": rng.uniform(0.05, 0.6, n), "c": rng.uniform(0.0, 0.2, n)}
    p = rng.gamma(0.6, 8.0, (n_days, n))
    e = rng.uniform(0.0, 6.0, (n_days, n))
    s0 = rng.uniform(0, 80, (n, 1))
    states, _ = _run(s0, p, e, params)
    a = (1 - params["k"]) * np.exp(-params["c"] * e)
    b = a * p
    ta, tb = linear_reservoir.transition({"precipitation": p, "pet": e}, params)
    np.testing.assert_allclose(ta, a, rtol=1e-15)
    np.testing.assert_allclose(tb, b, rtol=1e-15)
    later = np.concatenate([np.cumprod(a[::-1], axis=0)[::-1][1:], np.ones((1, n))])
    expected = np.prod(a, axis=0) * s0[:, 0] + (later * b).sum(axis=0)
    np.testing.assert_allclose(states[-1], expected, rtol=1e-12)


def test_runoff_is_linear_in_the_new_state():
    """The observation operator h = k / a maps the end-of-step store to the day's runoff
    exactly (algebra of the documented step: Q = k (S + P), S_new = a (S + P))."""
    rng = np.random.default_rng(12)
    n = 50
    params = {"k": rng.uniform(0.001, 0.95, n), "c": rng.uniform(0, 1, n)}
    forcing = {"precipitation": rng.gamma(0.6, 8.0, n), "pet": rng.uniform(0, 8, n)}
    state = rng.uniform(0, 200, (n, 1))
    new, f = MODEL.step(state, forcing, params)
    h = linear_reservoir.observation(forcing, params)
    np.testing.assert_allclose(f["runoff"], h * new[:, 0], rtol=1e-12)


def test_water_balance_and_positivity():
    """Conservation of mass (common practice, no published source): S_new - S = P - E - Q,
    with E and Q non-negative and the store never negative for non-negative forcing."""
    rng = np.random.default_rng(13)
    n = 200
    params = {p.name: rng.uniform(p.low, p.high, n) for p in MODEL.parameters}
    state = MODEL.initial_state(params)
    for _ in range(300):
        forcing = {"precipitation": rng.gamma(0.5, 10.0, n), "pet": rng.uniform(0, 30, n)}
        new, f = MODEL.step(state, forcing, params)
        change = new[:, 0] - state[:, 0]
        inputs = sum(f[k] for k in MODEL.balance.inputs)
        outputs = sum(f[k] for k in MODEL.balance.outputs)
        np.testing.assert_allclose(change, inputs - outputs, atol=1e-9)
        assert (new >= 0).all() and (f["runoff"] >= 0).all()
        assert (f["actual_evaporation"] >= -1e-12).all()
        state = new


def test_step_returns_a_new_state():
    """The filter keeps the prior: step must not modify its input (DESIGN.md protocol)."""
    params = MODEL.default_parameters()
    params = {k: np.full(3, v) for k, v in params.items()}
    state = np.array([[10.0], [20.0], [30.0]])
    new, _ = MODEL.step(state, {"precipitation": np.ones(3), "pet": np.ones(3)}, params)
    assert state[:, 0].tolist() == [10.0, 20.0, 30.0]
    assert not np.shares_memory(new, state)
    assert new[0, 0] == pytest.approx(0.9 * np.exp(-0.02) * 11.0, rel=1e-14)
