"""Tests of assim.filters.inflation: multiplicative inflation, RTPS and RTPP."""

import numpy as np
import pytest

from assim.errors import ConfigError
from assim.filters import (
    Inflation,
    ensemble_update,
    inflate,
    kalman_update,
    relax_to_prior_perturbations,
    relax_to_prior_spread,
)


def _problem(seed, B=4, N=12, n=3, m=1):
    rng = np.random.default_rng(seed)
    X = rng.normal(20.0, 4.0, (B, N, n)) + rng.normal(0, 3, (B, N, 1))
    H = rng.normal(size=(B, m, n))
    Y = np.einsum("bmn,bin->bim", H, X)
    y = Y.mean(axis=1) + rng.normal(0, 3, (B, m))
    r = rng.uniform(0.5, 4.0, (B, m))
    return X, H, Y, y, r


def _perturbations(X):
    return X - X.mean(axis=-2, keepdims=True)


def test_options_are_validated():
    """Out-of-range options raise assim.errors.ConfigError naming the option."""
    for kwargs, variable in [
        (dict(multiplicative=0.9), "inflation.multiplicative"),
        (dict(multiplicative=np.inf), "inflation.multiplicative"),
        (dict(rtps=1.5), "inflation.rtps"),
        (dict(rtpp=-0.1), "inflation.rtpp"),
    ]:
        with pytest.raises(ConfigError) as info:
            Inflation(**kwargs)
        assert info.value.variable == variable
    assert not Inflation().active and Inflation(rtps=0.3).active


def test_inflate_scales_perturbations_by_the_factor():
    """x' <- r x' (Anderson & Anderson 1999): hand computation."""
    p = np.array([[-1.0, 2.0], [1.0, -2.0]])
    np.testing.assert_array_equal(inflate(p, 1.5), [[-1.5, 3.0], [1.5, -3.0]])


def test_rtpp_hand_computation():
    """RTPP: perturbations become (1 - a) X'a + a X'b (Zhang, Snyder & Sun 2004)."""
    xa = np.array([[1.0], [-1.0]])
    xb = np.array([[3.0], [-3.0]])
    np.testing.assert_allclose(relax_to_prior_perturbations(xa, xb, 0.25), [[1.5], [-1.5]])


def test_rtps_hand_computation():
    """RTPS: perturbations scaled by a (sb - sa) / sa + 1, so that the spread becomes
    a sb + (1 - a) sa (Whitaker & Hamill 2012); zero analysis spread is left alone."""
    xa = np.array([[[1.0, 0.0], [-1.0, 0.0]]])  # sa = (sqrt 2, 0)
    sb = np.array([[4.0, 1.0]])
    sa = np.array([[np.sqrt(2.0), 0.0]])
    out = relax_to_prior_spread(xa, sb, sa, 0.5)
    np.testing.assert_allclose(out.std(axis=1, ddof=1), [[0.5 * 4.0 + 0.5 * np.sqrt(2.0), 0.0]])
    np.testing.assert_array_equal(out[..., 1], 0.0)


@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_multiplicative_inflation_is_an_inflated_prior(method):
    """Multiplicative inflation r equals the plain analysis of a prior whose state and
    predicted perturbations were multiplied by r (Anderson & Anderson 1999)."""
    X, H, Y, y, r = _problem(1, m=2)
    z = np.random.default_rng(2).standard_normal(Y.shape)
    a = ensemble_update(
        X, Y, y, r, method=method, obs_noise=z, inflation=Inflation(multiplicative=1.4)
    )
    Xi = X.mean(axis=1, keepdims=True) + 1.4 * _perturbations(X)
    Yi = Y.mean(axis=1, keepdims=True) + 1.4 * _perturbations(Y)
    b = ensemble_update(Xi, Yi, y, r, method=method, obs_noise=z)
    np.testing.assert_allclose(a.states, b.states, rtol=1e-11, atol=1e-11)
    np.testing.assert_allclose(a.innovation_variance, b.innovation_variance, rtol=1e-12)


def test_multiplicative_inflation_square_root_moments():
    """ETKF with inflation r: analysis moments are the Kalman update of (mean, r^2 P)
    (Anderson & Anderson 1999; Hunt et al. 2007, eqs. 22-23)."""
    X, H, Y, y, r = _problem(3, m=1)
    a = ensemble_update(X, Y, y, r, method="etkf", inflation=Inflation(multiplicative=1.2))
    mean = X.mean(axis=1)
    dev = _perturbations(X)
    P = 1.44 * np.einsum("bin,bik->bnk", dev, dev) / (X.shape[1] - 1)
    xk, Pk = kalman_update(mean, P, H, y, r[..., None])
    da = _perturbations(a.states)
    np.testing.assert_allclose(a.states.mean(axis=1), xk, atol=1e-10 * np.abs(xk).max())
    np.testing.assert_allclose(
        np.einsum("bin,bik->bnk", da, da) / (X.shape[1] - 1), Pk, atol=1e-10 * np.abs(P).max()
    )


@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_rtps_in_the_analysis(method):
    """With RTPS a, the analysis spread of each state is a sb + (1 - a) sa and the mean is
    that of the plain analysis (Whitaker & Hamill 2012)."""
    X, H, Y, y, r = _problem(4)
    z = np.random.default_rng(5).standard_normal(Y.shape)
    plain = ensemble_update(X, Y, y, r, method=method, obs_noise=z)
    relaxed = ensemble_update(X, Y, y, r, method=method, obs_noise=z, inflation=Inflation(rtps=0.7))
    target = 0.7 * plain.spread_before + 0.3 * plain.spread_after
    np.testing.assert_allclose(relaxed.spread_after, target, rtol=1e-10)
    np.testing.assert_allclose(relaxed.states.mean(axis=1), plain.states.mean(axis=1), rtol=1e-12)


@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_rtpp_in_the_analysis(method):
    """With RTPP a, analysis perturbations are (1 - a) X'a + a X'b around the plain analysis
    mean (Zhang, Snyder & Sun 2004)."""
    X, H, Y, y, r = _problem(6)
    z = np.random.default_rng(7).standard_normal(Y.shape)
    plain = ensemble_update(X, Y, y, r, method=method, obs_noise=z)
    relaxed = ensemble_update(X, Y, y, r, method=method, obs_noise=z, inflation=Inflation(rtpp=0.4))
    expected = plain.states.mean(axis=1, keepdims=True) + (
        0.6 * _perturbations(plain.states) + 0.4 * _perturbations(X)
    )
    np.testing.assert_allclose(relaxed.states, expected, rtol=1e-12, atol=1e-12)


def test_rtps_uses_the_inflated_prior_spread():
    """When multiplicative inflation r is combined with RTPS, the prior spread relaxed to is
    the inflated one, r sb (the prior that entered the update)."""
    X, H, Y, y, r = _problem(8)
    infl = ensemble_update(X, Y, y, r, method="etkf", inflation=Inflation(multiplicative=1.3))
    both = ensemble_update(
        X, Y, y, r, method="etkf", inflation=Inflation(multiplicative=1.3, rtps=1.0)
    )
    np.testing.assert_allclose(both.spread_after, 1.3 * infl.spread_before, rtol=1e-10)
