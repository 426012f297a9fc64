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


# --- adaptive prior inflation (Anderson 2009) ------------------------------------------------

from assim.filters import AdaptiveInflation, damp_inflation, update_inflation  # noqa: E402


def _anderson_by_hand(lam_p, s, var_p, var_o, d):
    """One update written out from Anderson (2009, appendix A) step by step: the likelihood
    and its derivative at the prior mean, the quadratic ``lam^2 + b lam + c = 0`` with
    ``b = l/l' - 2 lam_p`` and ``c = lam_p^2 - s^2 - l lam_p / l'``, its root nearest the
    prior mean, and the sd from the ratio of the exact posterior density one prior sd
    above the mode and at the mode."""
    import math

    theta2 = lam_p * var_p + var_o
    like = math.exp(-d * d / (2 * theta2)) / math.sqrt(2 * math.pi * theta2)
    dlike = like * var_p * (d * d / theta2 - 1) / (2 * theta2)
    b = like / dlike - 2 * lam_p
    c = lam_p**2 - s**2 - like * lam_p / dlike
    roots = [(-b + math.sqrt(b * b - 4 * c)) / 2, (-b - math.sqrt(b * b - 4 * c)) / 2]
    lam_u = min(roots, key=lambda r: abs(r - lam_p))

    def post(lam):
        th2 = lam * var_p + var_o
        return math.exp(-((lam - lam_p) ** 2) / (2 * s * s)) * math.exp(-d * d / (2 * th2)) / math.sqrt(th2)

    ratio = post(lam_u + s) / post(lam_u)
    return lam_u, math.sqrt(-s * s / (2 * math.log(ratio)))


@pytest.mark.parametrize("d", [3.0, -2.5, 0.4, 0.0])
def test_adaptive_inflation_single_update_by_hand(d):
    """One update equals the hand computation from Anderson (2009), appendix A (quadratic for
    the mode of the prior times the linearised likelihood; variance from the density ratio).
    Equations as recalled from the paper (the text could not be consulted)."""
    opts = AdaptiveInflation(lower=0.1, upper=100.0, min_sd=0.0)
    lam_p, s, var_p, var_o = 1.3, 0.5, 1.7, 0.8
    mean, sd = update_inflation(lam_p, s, d, var_p, var_o, opts)
    want_mean, want_sd = _anderson_by_hand(lam_p, s, var_p, var_o, d)
    assert mean == pytest.approx(want_mean, rel=1e-10)
    assert sd == pytest.approx(min(want_sd, s), rel=1e-10)
    # a large innovation raises the inflation, a small one lowers it
    theta2 = lam_p * var_p + var_o
    assert np.sign(mean - lam_p) == np.sign(d * d - theta2)


def test_adaptive_inflation_mode_of_the_linearised_posterior():
    """The updated mean is the mode of N(lam_p, s^2) times the likelihood linearised about
    lam_p (Anderson 2009), found independently by scipy.optimize.minimize_scalar."""
    from scipy.optimize import minimize_scalar

    lam_p, s, var_p, var_o, d = 2.0, 0.8, 0.6, 1.1, 2.9
    theta2 = lam_p * var_p + var_o
    like = np.exp(-d * d / (2 * theta2)) / np.sqrt(2 * np.pi * theta2)
    dlike = like * var_p * (d * d / theta2 - 1) / (2 * theta2)

    def neg(lam):
        return -np.exp(-((lam - lam_p) ** 2) / (2 * s * s)) * (like + dlike * (lam - lam_p))

    best = minimize_scalar(neg, bounds=(lam_p - 2 * s, lam_p + 2 * s), method="bounded",
                           options={"xatol": 1e-12})
    mean, _ = update_inflation(lam_p, s, d, var_p, var_o, AdaptiveInflation(upper=100.0))
    assert mean == pytest.approx(best.x, abs=1e-7)


def test_adaptive_inflation_mean_tends_to_the_exact_posterior_mode():
    """Independent derivation (the paper's text could not be consulted; its equations are
    recalled from memory): the exact posterior of lambda, N(lam_p, s^2) times the innovation
    likelihood N(d; 0, lam var_p + var_o), has its mode where x = lam - lam_p solves
    x = s^2 dlnL/dlam(lam_p + x), i.e. x = s^2 q + s^4 q L'' + O(s^6) with q = dlnL/dlam at
    lam_p; the linearised scheme gives x = s^2 q - s^4 q^3 + O(s^6). So the scheme's mean
    tends to the exact mode (found here by brute-force maximisation with
    scipy.optimize.minimize_scalar) with an error of order s^4: halving s divides it by ~16;
    and its variance, for a small s, tends to s^2 / (1 - s^2 d2lnL/dlam2), the exact
    posterior's curvature."""
    from scipy.optimize import minimize_scalar

    lam_p, var_p, var_o, d = 1.6, 0.9, 0.7, 2.6

    def log_like(lam):
        th2 = lam * var_p + var_o
        return -0.5 * np.log(th2) - 0.5 * d * d / th2

    errors = []
    for s in (0.2, 0.1, 0.05):
        best = minimize_scalar(lambda lam, s=s: 0.5 * (lam - lam_p) ** 2 / s**2 - log_like(lam),
                               bounds=(lam_p - 3 * s, lam_p + 3 * s), method="bounded",
                               options={"xatol": 1e-14})
        mean, sd = update_inflation(lam_p, s, d, var_p, var_o, AdaptiveInflation(upper=100.0, min_sd=0.0))
        assert abs(mean - lam_p) > 0.5 * abs(best.x - lam_p) > 0  # it moves, the right way
        errors.append(abs(mean - best.x))
        h = 1e-4  # the exact curvature at the mode, by central differences
        curv = (log_like(best.x + h) - 2 * log_like(best.x) + log_like(best.x - h)) / h**2
        assert sd**2 == pytest.approx(s**2 / (1 - s**2 * curv), rel=0.1 * s**2)  # (s^2 alone is 0.45 s^2 off)
    for big, small in zip(errors[:-1], errors[1:], strict=True):
        assert 10.0 < big / small < 24.0  # order 4 in s


def test_adaptive_inflation_bounds_floor_and_unused():
    """The mean is clipped to the bounds, the sd keeps its floor and never grows, and a
    basin without a usable observation keeps its prior (common practice, no published
    source for the floor)."""
    opts = AdaptiveInflation(lower=1.0, upper=1.5, min_sd=2.6)
    prior_sd = np.array([0.6, 0.6, 3.0, 0.6])
    mean, sd = update_inflation(np.array([1.0, 1.4, 1.2, 1.2]), prior_sd,
                                np.array([0.0, 30.0, 0.5, np.nan]), 1.0, 1.0, opts)
    assert mean[0] == 1.0 and mean[1] == 1.5  # pulled below / above the bounds
    assert np.all(sd <= prior_sd)
    free, _ = update_inflation(1.2, 3.0, 0.5, 1.0, 1.0, AdaptiveInflation(min_sd=0.0))
    _, free_sd = update_inflation(1.2, 3.0, 0.5, 1.0, 1.0, AdaptiveInflation(min_sd=0.0))
    assert free_sd < 2.6 and sd[2] == pytest.approx(2.6)  # narrowed below the floor: floored
    assert sd[0] == pytest.approx(0.6)  # a prior narrower than the floor stays as it is
    assert mean[3] == 1.2 and sd[3] == 0.6


def test_inflation_damping_by_hand():
    """Damping toward 1: 1 + rho (lambda - 1) (Anderson 2009)."""
    assert damp_inflation(np.array([3.0, 0.5]), 0.9) == pytest.approx([2.8, 0.55])
    assert damp_inflation(np.array([3.0]), 1.0)[0] == 3.0


def test_adaptive_options_are_validated():
    """Out-of-range adaptive options raise ConfigError naming the option."""
    for kwargs, name in [(dict(initial_mean=0.0), "initial_mean"), (dict(damping=1.2), "damping"),
                         (dict(lower=2.0, upper=1.0), "upper"), (dict(initial_sd=-1.0), "initial_sd")]:
        with pytest.raises(ConfigError) as info:
            AdaptiveInflation(**kwargs)
        assert info.value.variable == f"inflation.adaptive.{name}"


@pytest.mark.parametrize("start", [1.0, 6.0])
def test_adaptive_inflation_recovers_a_known_underdispersion(start):
    """Scalar synthetic case: the ensemble's prior variance sigma_p^2 is lambda_true = 4 times
    too small (the mean's error has variance 4 sigma_p^2), observation error known. Without
    damping and without an sd floor, the inflation of each of 40 independent basins, started
    below (1) or above (6), approaches 4 (Anderson 2009: the scheme matches the expected
    innovation variance lambda sigma_p^2 + sigma_o^2 to the observed one).

    Tolerance: with T = 20000 innovations, theta^2 = 4.5 is known to 4.5 sqrt(2 / T) = 0.045
    (one basin's lambda to 0.045 / sigma_p^2); the Gaussian posterior of the scheme narrows
    faster than the exact one, so from below the estimate still lags (measured: 3.92 for the
    mean of 40 basins at T = 20000, 3.74 at T = 3000). Asserted: the basins' mean within 0.15
    of 4 and every basin within 0.35."""
    rng = np.random.default_rng(7)
    B, T, lam_true, var_p, var_o = 40, 20000, 4.0, 1.0, 0.5
    opts = AdaptiveInflation(initial_mean=start, initial_sd=1.0, damping=1.0, lower=0.2, upper=50.0,
                             min_sd=0.0)
    mean, sd = np.full(B, opts.initial_mean), np.full(B, opts.initial_sd)
    for _ in range(T):
        d = rng.normal(0.0, np.sqrt(lam_true * var_p + var_o), B)
        mean, sd = update_inflation(damp_inflation(mean, opts.damping), sd, d, var_p, var_o, opts)
    assert abs(mean.mean() - lam_true) < 0.15
    assert np.all(np.abs(mean - lam_true) < 0.35)


@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
@pytest.mark.parametrize("m", [1, 2])
def test_adaptive_inflation_is_a_per_basin_multiplicative_inflation(method, m):
    """With adaptive inflation, each basin's analysis equals the analysis with a fixed
    multiplicative factor sqrt(lambda) (Anderson & Anderson 1999) at that basin's updated
    inflation lambda, and lambda equals update_inflation on the basin's innovation (Anderson
    2009): the per-basin factor enters the shared stages exactly where the fixed one does."""
    X, _, Y, y, r = _problem(3, B=5, N=10, n=3, m=m)
    y = y + np.array([0.0, 8.0, -6.0, 0.5, 3.0])[:, None]  # innovations of different sizes
    noise = np.random.default_rng(1).standard_normal(Y.shape)
    opts = AdaptiveInflation(initial_mean=1.2, initial_sd=0.5, lower=1.0, upper=20.0)
    prior = (np.linspace(1.0, 1.6, 5), np.full(5, 0.5))
    infl = Inflation(multiplicative=1.1, rtps=0.3, adaptive=opts)
    a = ensemble_update(X, Y, y, r, method=method, inflation=infl, obs_noise=noise,
                        inflation_state=prior)
    for b in range(5):
        factor = 1.1 * np.sqrt(a.inflation_mean[b])
        one = ensemble_update(X[b], Y[b], y[b], r[b], method=method, obs_noise=noise[b],
                              inflation=Inflation(multiplicative=factor, rtps=0.3))
        np.testing.assert_allclose(a.states[b], one.states, rtol=1e-10, atol=1e-10)
        np.testing.assert_allclose(a.innovation_variance[b], one.innovation_variance, rtol=1e-12)
    # the inflation update itself, observation by observation
    Yc = Y - Y.mean(axis=1, keepdims=True)
    var_y = (Yc**2).sum(axis=1) / (Y.shape[1] - 1)
    d = y - Y.mean(axis=1)
    mean, sd = prior
    for j in range(m):
        mean, sd = update_inflation(mean, sd, d[:, j], 1.1**2 * var_y[:, j], r[:, j], opts)
    np.testing.assert_allclose(a.inflation_mean, mean, rtol=1e-12)
    np.testing.assert_allclose(a.inflation_sd, sd, rtol=1e-12)


def test_adaptive_inflation_needs_its_state():
    """Adaptive inflation without the prior inflation state is an input error."""
    from assim.errors import InputError

    X, _, Y, y, r = _problem(0)
    with pytest.raises(InputError):
        ensemble_update(X, Y, y, r, method="etkf", inflation=Inflation(adaptive=AdaptiveInflation()))


def test_adaptive_inflation_recovers_underdispersion_through_the_analysis():
    """The same synthetic case through ensemble_update with 30-member ensembles whose spread
    is half the true error sd (lambda_true = 4; members rescaled to sample sd 1 each day): the
    inflation returned by the analysis approaches 4 (Anderson 2009). Tolerance as in the
    scalar test for T = 10000 (measured lag there about 0.1), 0.25 for the mean of 12 basins."""
    rng = np.random.default_rng(11)
    B, N, T, lam_true, var_o = 12, 30, 10000, 4.0, 0.5
    opts = AdaptiveInflation(initial_mean=1.0, initial_sd=1.0, damping=1.0, lower=0.2, upper=50.0,
                             min_sd=0.0)
    state = (np.full(B, 1.0), np.full(B, 1.0))
    for _ in range(T):
        pert = rng.standard_normal((B, N, 1))
        pert = (pert - pert.mean(axis=1, keepdims=True)) / pert.std(axis=1, ddof=1, keepdims=True)
        truth = rng.normal(0.0, np.sqrt(lam_true), B)  # the ensemble mean is 0, sd 1
        y = (truth + rng.normal(0.0, np.sqrt(var_o), B))[:, None]
        a = ensemble_update(pert, pert, y, np.full((B, 1), var_o), method="etkf",
                            inflation=Inflation(adaptive=opts), inflation_state=state)
        state = (a.inflation_mean, a.inflation_sd)
    assert abs(state[0].mean() - lam_true) < 0.25
