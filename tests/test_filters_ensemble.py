"""Tests of assim.filters.ensemble: one ensemble Kalman analysis for many basins."""

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from assim.errors import InputError
from assim.filters import (
    Inflation,
    Transform,
    ensemble_update,
    kalman_predict,
    kalman_update,
)
from assim.filters import ensemble as ens
from assim.models import get
from assim.models.linear_reservoir import observation, transition


def _stats(X):
    """Sample mean (..., n) and covariance (..., n, n), ddof = 1, over the member axis."""
    mean = X.mean(axis=-2)
    dev = X - mean[..., None, :]
    return mean, np.einsum("...in,...ik->...nk", dev, dev) / (X.shape[-2] - 1)


def _bits(a):
    return np.ascontiguousarray(a).view(np.int64)


def _linear_problem(rng, B, N, n, m):
    X = rng.normal(10.0, 3.0, (B, N, n)) + rng.normal(0, 1, (B, 1, n)) * rng.normal(0, 2, (B, N, 1))
    H = rng.normal(size=(B, m, n))
    Y = np.einsum("bmn,bin->bim", H, X)
    y = np.einsum("bmn,bn->bm", H, X.mean(axis=1)) + rng.normal(0, 2.0, (B, m))
    r = rng.uniform(0.3, 3.0, (B, m))
    return X, H, Y, y, r


# --- the deterministic square-root property ------------------------------------------------


@pytest.mark.parametrize("method", ["etkf", "eakf"])
@pytest.mark.parametrize("N", [2, 3, 5, 40])
@pytest.mark.parametrize("m", [1, 3])
def test_square_root_filters_reproduce_the_kalman_update(method, N, m):
    """Analysis mean and sample covariance equal the exact Kalman update of the forecast
    ensemble's own mean and sample covariance, to 1e-10, for any ensemble size, batched.

    References: Hunt, Kostelich & Szunyogh (2007), eqs. 22-23 (mean and covariance of the
    transformed ensemble); Anderson (2001), the adjusted ensemble has the Kalman posterior
    moments; reference numbers from assim.filters.kalman_update (checked against filterpy).
    """
    rng = np.random.default_rng(100 + N + 10 * m)
    X, H, Y, y, r = _linear_problem(rng, 6, N, 4, m)
    a = ensemble_update(X, Y, y, r, method=method)
    mean, P = _stats(X)
    xk, Pk = kalman_update(mean, P, H, y, r[..., None] * np.eye(m))
    xa, Pa = _stats(a.states)
    np.testing.assert_allclose(xa, xk, rtol=0, atol=1e-10 * np.abs(xk).max())
    np.testing.assert_allclose(Pa, Pk, rtol=0, atol=1e-10 * np.abs(P).max())
    assert a.used.all() and a.updated.all()


def test_general_path_equals_one_observation_path():
    """The n_obs = 1 formulas are the general ones written for a scalar: the general
    eigen/solve path and the serial adjustment give the same weights and states to 1e-12
    (Hunt et al. 2007, eqs. 20 and 24; Anderson 2001)."""
    rng = np.random.default_rng(7)
    B, N, g = 5, 9, 1.3
    Ypw = rng.normal(size=(B, 1, N))
    Ypw -= Ypw.mean(axis=2, keepdims=True)
    A = g**2 * np.einsum("bmi,bki->bmk", Ypw, Ypw) / (N - 1)
    dw = rng.normal(size=(B, 1))
    z = rng.normal(size=(B, 1, N))
    for method in ("enkf", "etkf"):
        general, P, mean_w = ens._weights(method, dw, Ypw, A, z, g)
        one, p, mean_one = ens._weights_one(method, dw[:, 0], Ypw[:, 0], A[:, 0, 0], z[:, 0], g)
        np.testing.assert_allclose(general[:, 0], one, rtol=1e-12, atol=1e-14)
        if method == "etkf":
            np.testing.assert_allclose(P[:, 0, 0], p, rtol=1e-12)
            np.testing.assert_allclose(mean_w[:, 0], mean_one, rtol=1e-12)
            np.testing.assert_allclose(one.mean(axis=1), mean_one, rtol=1e-12, atol=1e-14)

    for m in (1, 3):
        X, H, Y, y, r = _linear_problem(rng, 5, 12, 3, m)
        y[2, 0] = np.nan
        fast = ensemble_update(X, Y, y, r, method="eakf", inflation=Inflation(multiplicative=g))
        reference = _sequential_eakf(X, Y, y, r, g)
        np.testing.assert_allclose(fast.states, reference, rtol=1e-11, atol=1e-11)


def _sequential_eakf(X, Y, y, r, gamma):
    """The serial ensemble adjustment written out plainly, one observation at a time and
    the states updated at each (Anderson 2001, scalar adjustment; Anderson 2003, linear
    regression onto the states and the remaining predicted observations)."""
    N = X.shape[1]
    g = np.where(np.isnan(y).all(axis=1), 1.0, gamma)[:, None, None]  # no reading: as is
    X = np.where(
        g == 1.0, X, X.mean(axis=1, keepdims=True) + g * (X - X.mean(axis=1, keepdims=True))
    )
    Y = Y.mean(axis=1, keepdims=True) + g * (Y - Y.mean(axis=1, keepdims=True))
    for b in range(X.shape[0]):
        for j in range(Y.shape[2]):
            if np.isnan(y[b, j]):
                continue
            yj = Y[b, :, j].copy()
            mean, var = yj.mean(), yj.var(ddof=1)
            post_var = 1.0 / (1.0 / var + 1.0 / r[b, j])
            post_mean = post_var * (mean / var + y[b, j] / r[b, j])
            dy = post_mean + np.sqrt(post_var / var) * (yj - mean) - yj
            dev = yj - mean
            X[b] += np.outer(dy, dev @ (X[b] - X[b].mean(axis=0)) / (N - 1) / var)
            Y[b] += np.outer(dy, dev @ (Y[b] - Y[b].mean(axis=0)) / (N - 1) / var)
    return X


def test_etkf_and_serial_eakf_agree_on_moments_with_many_observations():
    """With several observations the serial adjustment (Anderson 2001) and the ensemble
    transform (Hunt et al. 2007) are different ensembles with the same Kalman moments."""
    rng = np.random.default_rng(21)
    X, H, Y, y, r = _linear_problem(rng, 4, 30, 5, 4)
    a = ensemble_update(X, Y, y, r, method="etkf")
    b = ensemble_update(X, Y, y, r, method="eakf")
    ma, Pa = _stats(a.states)
    mb, Pb = _stats(b.states)
    np.testing.assert_allclose(ma, mb, atol=1e-10 * np.abs(ma).max())
    np.testing.assert_allclose(Pa, Pb, atol=1e-10 * np.abs(Pa).max())
    assert not np.allclose(a.states, b.states)


# --- the stochastic EnKF -----------------------------------------------------------------


def test_enkf_large_ensemble_matches_the_exact_update():
    """Stochastic EnKF, N = 4000, scalar linear-Gaussian problem in 8 basins: analysis mean
    and variance lie within 5 Monte Carlo standard errors of the exact update.

    Reference: Burgers, van Leeuwen & Evensen (1998): with perturbed observations the
    analysis ensemble has the Kalman posterior moments in expectation. Tolerances (delta
    method, k = sf^2 / (sf^2 + R), centred perturbations so xa = xf + k^ (y - xf)):
    mean error (1 - k)(xf - mu) + (k^ - k)(y - xf) with sd
    sqrt((1-k)^2 sf^2 / N + (k (1-k))^2 (2 / (N-1)) (y - mu)^2);
    variance error from the prior sample variance, (1 - k)^2 sf^2 sqrt(2 / (N-1)), plus
    the perturbations, k^2 R sqrt(2 / (N-1)) and 2 k (1-k) sf sqrt(R) / sqrt(N-1), in
    quadrature.
    """
    rng = np.random.default_rng(4000)
    B, N = 8, 4000
    mu = rng.uniform(50, 150, B)
    sf = rng.uniform(2, 20, B)
    R = sf**2 * rng.uniform(0.2, 2.0, B)  # gains between 1/3 and 5/6
    y = mu + rng.normal(0, np.sqrt(sf**2 + R))
    X = mu[:, None, None] + sf[:, None, None] * rng.standard_normal((B, N, 1))
    a = ensemble_update(X, X.copy(), y[:, None], R[:, None], method="enkf", rng=rng)
    k = sf**2 / (sf**2 + R)
    mean_exact = mu + k * (y - mu)
    var_exact = (1 - k) * sf**2
    sd_mean = np.sqrt((1 - k) ** 2 * sf**2 / N + (k * (1 - k)) ** 2 * 2 / (N - 1) * (y - mu) ** 2)
    sd_var = np.sqrt(
        ((1 - k) ** 2 * sf**2) ** 2 * 2 / (N - 1)
        + (k**2 * R) ** 2 * 2 / (N - 1)
        + (2 * k * (1 - k) * sf * np.sqrt(R)) ** 2 / (N - 1)
    )
    mean_a = a.states[:, :, 0].mean(axis=1)
    var_a = a.states[:, :, 0].var(axis=1, ddof=1)
    assert np.all(np.abs(mean_a - mean_exact) < 5 * sd_mean)
    assert np.all(np.abs(var_a - var_exact) < 5 * sd_var)
    # Without the perturbed observations the variance would be (1 - k)^2 sf^2: far outside.
    assert np.all(np.abs((1 - k) ** 2 * sf**2 - var_exact) > 5 * sd_var)


def test_enkf_centred_perturbations_give_the_exact_mean_update():
    """With centred perturbations the EnKF mean is the Kalman update of the ensemble mean
    with the ensemble gain, exactly; uncentred, it moves by K times the perturbation mean
    (Burgers et al. 1998; centring: common practice, no published source)."""
    rng = np.random.default_rng(3)
    X, H, Y, y, r = _linear_problem(rng, 5, 20, 3, 2)
    z = rng.standard_normal(Y.shape)
    mean, P = _stats(X)
    xk, _ = kalman_update(mean, P, H, y, r[..., None] * np.eye(2))
    a = ensemble_update(X, Y, y, r, method="enkf", obs_noise=z)
    np.testing.assert_allclose(a.states.mean(axis=1), xk, atol=1e-10 * np.abs(xk).max())
    b = ensemble_update(X, Y, y, r, method="enkf", obs_noise=z, centre_noise=False)
    S = np.einsum("bmn,bnk,blk->bml", H, P, H) + r[..., None] * np.eye(2)
    K = np.einsum("bnk,bmk->bnm", P, H) @ np.linalg.inv(S)
    shift = np.einsum("bnm,bm->bn", K, np.sqrt(r) * z.mean(axis=1))
    np.testing.assert_allclose(b.states.mean(axis=1), xk + shift, atol=1e-10 * np.abs(xk).max())


def test_obs_noise_is_the_rng_draw_and_basins_are_independent():
    """Passing obs_noise equal to the generator's standard normal draw gives the same
    numbers as passing the generator; a basin's result does not depend on the other basins
    of the batch (DESIGN.md, Determinism)."""
    rng = np.random.default_rng(1)
    X, H, Y, y, r = _linear_problem(rng, 6, 10, 3, 1)
    a = ensemble_update(X, Y, y, r, rng=np.random.default_rng(9))
    z = np.random.default_rng(9).standard_normal(Y.shape)
    b = ensemble_update(X, Y, y, r, obs_noise=z)
    np.testing.assert_array_equal(a.states, b.states)
    part = ensemble_update(X[2:4], Y[2:4], y[2:4], r[2:4], obs_noise=z[2:4])
    np.testing.assert_array_equal(part.states, b.states[2:4])


# --- cycling on the linear reservoir -----------------------------------------------------


def _exact_draws(rng, B, N, var, against=None):
    """Draws (B, N) with sample mean 0, sample variance var (ddof = 1) and no sample
    covariance with ``against``: second-order exact sampling (common practice)."""
    g = rng.standard_normal((B, N))
    g -= g.mean(axis=1, keepdims=True)
    if against is not None:
        dev = against - against.mean(axis=1, keepdims=True)
        norm = np.einsum("bi,bi->b", dev, dev)
        g -= (np.einsum("bi,bi->b", g, dev) / np.where(norm > 0, norm, 1.0))[:, None] * dev
    g *= np.sqrt(var * (N - 1) / np.einsum("bi,bi->b", g, g))[:, None]
    return g


def _cycle(method, N, days=365, seed=0):
    """Run an ensemble filter and the exact Kalman filter side by side on the linear
    reservoir (assim.models.linear_reservoir) with linear runoff observations; return the
    daily ensemble and exact means and variances and the exact gains."""
    rng = np.random.default_rng(seed)
    model = get("linear_reservoir")
    B = 3
    k = np.array([0.05, 0.1, 0.3])
    c = np.array([0.01, 0.02, 0.05])
    q = np.array([4.0, 1.0, 9.0])  # model error variance added to the store, mm2
    r = np.array([0.04, 0.01, 0.25])  # runoff error variance, (mm d-1)2
    params_b = {"k": k, "c": c}
    params = {name: np.repeat(v, N) for name, v in params_b.items()}
    x = np.full(B, 40.0)
    P = np.full(B, 100.0)
    S = x[:, None] + _exact_draws(rng, B, N, P)
    truth = x + np.sqrt(P) * rng.standard_normal(B)
    out = {key: [] for key in ("mean", "var", "kf_mean", "kf_var", "gain", "a", "h", "pf")}
    for day in range(days):
        forcing_b = {
            "precipitation": rng.exponential(3.0, B) * (rng.random(B) < 0.4),
            "pet": rng.uniform(0.5, 4.0, B),
        }
        forcing = {name: np.repeat(v, N) for name, v in forcing_b.items()}
        a, b = transition(forcing_b, params_b)
        h = observation(forcing_b, params_b)
        # model error enters at the start of the day: S_new = a (S + eta) + b
        S = S + _exact_draws(rng, B, N, q, against=S)
        state, fluxes = model.step(S.reshape(-1, 1), forcing, params)
        S = state[:, 0].reshape(B, N)
        predicted = fluxes["runoff"].reshape(B, N)
        truth = a * (truth + np.sqrt(q) * rng.standard_normal(B)) + b
        y = h * truth + np.sqrt(r) * rng.standard_normal(B)
        if day % 11 == 5:
            y[day % 3] = np.nan
        xs, Ps = kalman_predict(
            x[:, None], P[:, None, None], a[:, None, None], (a * a * q)[:, None, None], u=b[:, None]
        )
        pf = Ps[:, 0, 0]
        an = ensemble_update(
            S[:, :, None], predicted[:, :, None], y[:, None], r[:, None], method=method, rng=rng
        )
        xs, Ps = kalman_update(xs, Ps, h[:, None, None], y[:, None], r[:, None, None])
        x, P = xs[:, 0], Ps[:, 0, 0]
        S = an.states[:, :, 0]
        out["mean"].append(S.mean(axis=1))
        out["var"].append(S.var(axis=1, ddof=1))
        out["kf_mean"].append(x)
        out["kf_var"].append(P)
        out["gain"].append(np.where(np.isnan(y), 0.0, pf * h * h / (pf * h * h + r)))
        out["a"].append(a)
        out["h"].append(h)
        out["pf"].append(pf)
    out = {key: np.array(v) for key, v in out.items()}
    out.update(q=q, r=r, N=N)
    return out


@pytest.mark.parametrize("method", ["etkf", "eakf"])
@pytest.mark.parametrize("N", [3, 16])
def test_deterministic_filters_track_the_kalman_filter_on_the_linear_reservoir(method, N):
    """365 days of cycling on the linear reservoir with linear runoff observations: with
    second-order exact initial ensemble and model-error draws, the square-root filters
    reproduce the exact Kalman filter's mean and variance every day to 1e-8 (relative),
    for any N >= 3 (Hunt et al. 2007, eqs. 22-23; Anderson 2001; reference numbers from
    kalman_predict/kalman_update)."""
    out = _cycle(method, N)
    np.testing.assert_allclose(out["mean"], out["kf_mean"], rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(out["var"], out["kf_var"], rtol=1e-8, atol=1e-10)


def test_enkf_tracks_the_kalman_filter_on_the_linear_reservoir():
    """365 days of stochastic EnKF (N = 400) against the exact Kalman filter on the linear
    reservoir: the daily ensemble variance and mean stay within 5 standard errors derived
    from N (Burgers et al. 1998; derivation, delta method, g = gain in observation units,
    K = g / h, rho = a^2 (1 - g)^2):
    per-day noise of the analysis variance sd_n = sqrt(2 K^4 R^2 + 4 (1-g)^2 K^2 Pf R) /
    sqrt(N - 1), damped over days to sd_v = sd_n / sqrt(1 - rho^2); the mean then errs by the
    gain error dK = h R / (h^2 Pf + R)^2 a^2 sd_v times the innovation (sd
    sqrt(h^2 Pf + R)), damped the same way, sd_m = that / sqrt(1 - rho)."""
    out = _cycle("enkf", 400, seed=2)
    N, r = out["N"], out["r"]
    g, pf, a, h = out["gain"], out["pf"], out["a"], out["h"]
    hh = h * h
    K = h * pf / (hh * pf + r)
    sd_n = np.sqrt(2 * K**4 * r**2 + 4 * (1 - g) ** 2 * K**2 * pf * r) / np.sqrt(N - 1)
    rho = (a * (1 - g)) ** 2
    sd_v = sd_n.max(axis=0) / np.sqrt(1 - rho.max(axis=0) ** 2)
    dk = h * r / (hh * pf + r) ** 2 * a**2 * sd_v
    sd_m = (dk * np.sqrt(hh * pf + r)).max(axis=0) / np.sqrt(1 - rho.max(axis=0))
    err_v = np.abs(out["var"] - out["kf_var"])
    err_m = np.abs(out["mean"] - out["kf_mean"])
    assert np.all(err_v < 5 * sd_v), (err_v.max(axis=0), sd_v)
    assert np.all(err_m < 5 * sd_m), (err_m.max(axis=0), sd_m)
    # The test has teeth: the average variance is right to within a few percent.
    np.testing.assert_allclose(out["var"].mean(axis=0), out["kf_var"].mean(axis=0), rtol=0.05)


# --- missing, gated, invalid, bounds, mask -----------------------------------------------


@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_basins_without_usable_observation_are_returned_bit_for_bit(method):
    """A basin whose readings are all missing (or gated) is returned bit for bit, with
    inflation, bounds and odd values (-0.0, NaN in a state) present (common practice, no
    published source)."""
    rng = np.random.default_rng(5)
    X, H, Y, y, r = _linear_problem(rng, 4, 8, 3, 2)
    X[1, 0, 0] = -0.0
    X[1, 3, 2] = np.nan
    X[3, 2, 1] = -0.0
    y[1] = np.nan
    y[3] = Y[3].mean(axis=0) + 1e3  # both readings far outside the gate
    a = ensemble_update(
        X,
        Y,
        y,
        r,
        method=method,
        rng=rng,
        gate_sigma=4.0,
        lower=-1e9,
        upper=1e9,
        inflation=Inflation(multiplicative=1.3, rtps=0.5),
    )
    for b in (1, 3):
        np.testing.assert_array_equal(_bits(a.states[b]), _bits(X[b]))
    assert a.missing[1].all() and not a.used[1].any()
    assert a.gated[3].all() and not a.used[3].any()
    np.testing.assert_array_equal(a.updated, [True, False, True, False])
    np.testing.assert_array_equal(a.clipped[[1, 3]], 0.0)
    assert not np.array_equal(a.states[0], X[0])


def test_partly_missing_readings_equal_assimilating_the_present_ones():
    """A NaN reading in one basin is skipped: the result equals the analysis with that
    observation column removed, basin by basin (common practice, no published source)."""
    rng = np.random.default_rng(6)
    X, H, Y, y, r = _linear_problem(rng, 3, 12, 3, 3)
    y[0, 1] = np.nan
    r[2, 2] = np.nan
    for method in ("etkf", "eakf"):
        a = ensemble_update(X, Y, y, r, method=method)
        one = ensemble_update(X[0], Y[0][:, [0, 2]], y[0][[0, 2]], r[0][[0, 2]], method=method)
        two = ensemble_update(X[2], Y[2][:, :2], y[2][:2], r[2][:2], method=method)
        np.testing.assert_allclose(a.states[0], one.states, rtol=1e-12)
        np.testing.assert_allclose(a.states[2], two.states, rtol=1e-12)
        assert a.missing[0, 1] and a.missing[2, 2] and a.missing.sum() == 2


def test_gate_rejects_large_innovations_and_reports_them():
    """Reject a reading when |innovation| > k sqrt(HPH^T + R), HPH^T the ensemble variance of
    predicted (common practice, no published source); the other reading is still used."""
    rng = np.random.default_rng(8)
    X, H, Y, y, r = _linear_problem(rng, 2, 50, 3, 2)
    sd = np.sqrt(Y.var(axis=1, ddof=1) + r)
    y = Y.mean(axis=1) + np.array([[2.9, 3.1], [-3.1, 0.0]]) * sd
    a = ensemble_update(X, Y, y, r, method="etkf", gate_sigma=3.0)
    np.testing.assert_array_equal(a.gated, [[False, True], [True, False]])
    np.testing.assert_array_equal(a.used, ~a.gated)
    np.testing.assert_allclose(a.innovation, y - Y.mean(axis=1), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(a.innovation_variance, sd**2, rtol=1e-12)
    keep = ensemble_update(X[0], Y[0][:, :1], y[0][:1], r[0][:1], method="etkf")
    np.testing.assert_allclose(a.states[0], keep.states, rtol=1e-12)


def test_bounds_are_honoured_and_the_clipped_water_reported():
    """States pushed outside [lower, upper] are clipped; Analysis.clipped is the signed
    water added per basin and state, summed over members: the bounded minus the unbounded
    analysis (common practice, no published source)."""
    rng = np.random.default_rng(9)
    B, N = 4, 30
    X = np.stack([rng.uniform(0, 10, (B, N)), rng.uniform(40, 50, (B, N))], axis=-1)
    Y = X[:, :, :1] + X[:, :, 1:]
    y = np.array([[0.0], [200.0], [30.0], [np.nan]])
    r = np.ones((B, 1))
    lower = np.array([0.0, 0.0])
    upper = np.array([np.inf, 60.0])
    free = ensemble_update(X, Y, y, r, method="eakf")
    a = ensemble_update(X, Y, y, r, method="eakf", lower=lower, upper=upper)
    assert np.all(a.states >= lower) and np.all(a.states <= upper)
    np.testing.assert_allclose(a.clipped, (a.states - free.states).sum(axis=1), atol=1e-12)
    assert a.clipped[0, 0] > 0 and a.clipped[1, 1] < 0  # water added, water removed
    np.testing.assert_array_equal(a.clipped[3], 0.0)
    np.testing.assert_allclose(a.clipped_total, a.clipped.sum(axis=-1))
    inside = (free.states >= lower) & (free.states <= upper)
    np.testing.assert_array_equal(a.states[inside], free.states[inside])


def test_clipping_many_basins_reports_the_same_water():
    """When most basins leave their bounds (the in-place path), the clipped water is still
    the bounded minus the unbounded analysis, and exactly zero in columns never clipped."""
    rng = np.random.default_rng(19)
    B, N = 40, 16
    X = np.stack([rng.uniform(0, 10, (B, N)), rng.uniform(40, 50, (B, N))], axis=-1)
    Y = X[:, :, :1] + X[:, :, 1:]
    y = np.full((B, 1), 20.0)
    free = ensemble_update(X, Y, y, np.ones((B, 1)), method="etkf")
    a = ensemble_update(X, Y, y, np.ones((B, 1)), method="etkf", lower=0.0)
    assert (a.clipped[:, 0] > 0).sum() > B // 8
    np.testing.assert_allclose(a.clipped, (a.states - free.states).sum(axis=1), atol=1e-10)
    np.testing.assert_array_equal(a.clipped[:, 1], 0.0)
    np.testing.assert_allclose(a.spread_after, a.states.std(axis=1, ddof=1), rtol=1e-10)
    assert np.all(a.states >= 0.0)


def test_bounds_broadcast_per_member():
    """Bounds may differ per basin and member (e.g. a store bounded by a member's
    parameter), broadcast to the states' shape."""
    rng = np.random.default_rng(10)
    X, H, Y, y, r = _linear_problem(rng, 3, 6, 2, 1)
    upper = X.max(axis=(1, 2))[:, None, None] - rng.uniform(0, 1, (3, 6, 1))
    a = ensemble_update(X, Y, y, r, method="etkf", upper=upper)
    assert np.all(a.states <= upper)


def test_update_mask_leaves_other_columns_bit_for_bit():
    """Columns outside update_mask are returned bit for bit; the updated columns equal the
    full analysis (each column is regressed on its own: Hunt et al. 2007, eq. 22)."""
    rng = np.random.default_rng(11)
    X, H, Y, y, r = _linear_problem(rng, 3, 10, 4, 2)
    mask = np.array([True, False, True, False])
    for method in ("enkf", "etkf", "eakf"):
        full = ensemble_update(X, Y, y, r, method=method, obs_noise=np.ones(Y.shape))
        part = ensemble_update(
            X, Y, y, r, method=method, obs_noise=np.ones(Y.shape), update_mask=mask
        )
        np.testing.assert_array_equal(_bits(part.states[..., ~mask]), _bits(X[..., ~mask]))
        np.testing.assert_allclose(part.states[..., mask], full.states[..., mask], rtol=1e-12)
        np.testing.assert_allclose(part.spread_before, full.spread_before, rtol=1e-12)


def test_nan_never_leaks_into_states():
    """Unusable inputs (a NaN member prediction, a prediction outside the transform's domain,
    a NaN in a state outside update_mask) never put NaN into finite states; the readings
    concerned are reported invalid."""
    rng = np.random.default_rng(12)
    X, H, Y, y, r = _linear_problem(rng, 4, 10, 3, 2)
    Y = np.abs(Y) + 1.0
    y = np.abs(y) + 1.0
    Y[0, 4, 1] = np.nan
    Y[1, 2, 0] = -5.0  # log(-5 + 1) undefined
    X[2, 7, 2] = np.nan
    mask = np.array([True, True, False])
    for method in ("enkf", "etkf", "eakf"):
        a = ensemble_update(
            X,
            Y,
            y,
            r,
            method=method,
            rng=rng,
            update_mask=mask,
            transform=Transform("log", offset=1.0),
        )
        finite = np.isfinite(X)
        assert np.all(np.isfinite(a.states[finite]))
        np.testing.assert_array_equal(
            a.invalid, [[False, True], [True, False], [False, False], [False, False]]
        )
        assert a.used[2].all()


def test_transformed_space_is_the_linear_problem_in_that_space():
    """Assimilating in log space a prediction that is exp-linear in the states is the exact
    Kalman update in log space (square-root property, Hunt et al. 2007, eqs. 22-23); the
    variance passed is already in log space."""
    rng = np.random.default_rng(13)
    X, H, _, _, r = _linear_problem(rng, 3, 15, 3, 1)
    H = 0.05 * H
    offset = 0.5
    Y = np.exp(np.einsum("bmn,bin->bim", H, X)) - offset
    y = np.exp(np.einsum("bmn,bn->bm", H, X.mean(axis=1)) + 0.3) - offset
    a = ensemble_update(X, Y, y, 0.1 * r, method="etkf", transform=Transform("log", offset=offset))
    mean, P = _stats(X)
    xk, Pk = kalman_update(mean, P, H, np.log(y + offset), 0.1 * r[..., None] * np.eye(1))
    xa, Pa = _stats(a.states)
    np.testing.assert_allclose(xa, xk, atol=1e-10 * np.abs(xk).max())
    np.testing.assert_allclose(Pa, Pk, atol=1e-10 * np.abs(P).max())
    np.testing.assert_allclose(a.innovation, np.log(y + offset) - np.log(Y + offset).mean(axis=1))


def test_diagnostics_against_numpy():
    """Innovation, its variance, spreads and predicted spread against direct numpy
    computations (numpy.mean, numpy.var with ddof = 1)."""
    rng = np.random.default_rng(14)
    X, H, Y, y, r = _linear_problem(rng, 3, 25, 2, 2)
    a = ensemble_update(X, Y, y, r, method="etkf", inflation=Inflation(multiplicative=1.1))
    np.testing.assert_allclose(a.innovation, y - Y.mean(axis=1), rtol=1e-12)
    np.testing.assert_allclose(a.innovation_variance, 1.21 * Y.var(axis=1, ddof=1) + r, rtol=1e-12)
    np.testing.assert_allclose(a.predicted_spread, Y.std(axis=1, ddof=1), rtol=1e-12)
    np.testing.assert_allclose(a.spread_before, X.std(axis=1, ddof=1), rtol=1e-12)
    np.testing.assert_allclose(a.spread_after, a.states.std(axis=1, ddof=1), rtol=1e-10)


@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_spreads_stay_exact_when_sums_of_squares_would_cancel(method):
    """States with a mean 1e9 times their spread (a collapsed parameter column), a clipped
    basin and an RTPS run: spread_before and spread_after still equal the two-pass
    numpy.std (ddof = 1) to 1e-9, and RTPS reaches its target spread to 1e-7 (the
    precision left by rounding the states themselves, eps * mean / sd)."""
    rng = np.random.default_rng(16)
    X, H, Y, y, r = _linear_problem(rng, 8, 20, 3, 1)
    X[:6, :, 2] = 1e4 + 1e-5 * rng.standard_normal((6, 20))  # most basins: whole-batch path
    X[1, :, 1] -= X[1, :, 1].min() + 1.0  # basin 1 sits near the lower bound of 0 ...
    Y = np.einsum("bmn,bin->bim", H, X)
    y[1] = Y[1].mean(axis=0) - 3 * np.sign(H[1, 0, 1]) * Y[1].std(axis=0)  # ... and is pushed below
    z = rng.standard_normal(Y.shape)
    for infl, few in itertools.product((None, Inflation(rtps=0.5)), (False, True)):
        Xi = X.copy()
        if few:  # one collapsed basin only: the gathered path
            Xi[[0, 2, 3, 4, 5], :, 2] = rng.normal(50, 5, (5, 20))
        a = ensemble_update(
            Xi, Y, y, r, method=method, rng=rng, lower=np.array([-np.inf, 0.0, 0.0]), inflation=infl
        )
        np.testing.assert_allclose(a.spread_before, Xi.std(axis=1, ddof=1), rtol=1e-9)
        np.testing.assert_allclose(a.spread_after, a.states.std(axis=1, ddof=1), rtol=1e-9)
        assert a.clipped[1, 1] > 0
        if infl is not None:  # RTPS reaches its target spread in the collapsed column too
            plain = ensemble_update(Xi, Y, y, r, method=method, obs_noise=z)
            relaxed = ensemble_update(Xi, Y, y, r, method=method, obs_noise=z, inflation=infl)
            target = 0.5 * plain.spread_before + 0.5 * plain.spread_after
            np.testing.assert_allclose(relaxed.spread_after, target, rtol=1e-7)


# --- shapes, errors, properties ----------------------------------------------------------


@settings(max_examples=40, deadline=None)
@given(
    batch=st.lists(st.integers(1, 3), min_size=0, max_size=2).map(tuple),
    N=st.integers(2, 6),
    n=st.integers(1, 4),
    m=st.integers(1, 3),
    method=st.sampled_from(["enkf", "etkf", "eakf"]),
    seed=st.integers(0, 2**16),
    missing_fraction=st.floats(0, 1),
)
def test_property_shapes_and_unchanged_when_missing(batch, N, n, m, method, seed, missing_fraction):
    """Any batch shape, N >= 2, any n_state and n_obs: output shapes follow the input, a
    basin with every reading missing is returned bit for bit (DESIGN.md, Filters) and the
    reported spreads are those of the states (numpy.std, ddof = 1)."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=batch + (N, n))
    Y = X[..., :1] * rng.normal(size=(m,)) + rng.normal(size=batch + (N, m))
    y = rng.normal(size=batch + (m,))
    y[rng.random(batch + (m,)) < missing_fraction] = np.nan
    a = ensemble_update(X, Y, y, np.ones(m), method=method, rng=rng)
    assert a.states.shape == X.shape
    assert a.innovation.shape == a.used.shape == a.missing.shape == batch + (m,)
    assert a.spread_before.shape == a.spread_after.shape == a.clipped.shape == batch + (n,)
    assert a.updated.shape == batch
    none = np.isnan(y).all(axis=-1)
    np.testing.assert_array_equal(_bits(a.states[none]), _bits(X[none]))
    np.testing.assert_allclose(a.spread_before, X.std(axis=-2, ddof=1), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(a.spread_after, a.states.std(axis=-2, ddof=1), rtol=1e-8, atol=1e-10)
    assert np.all(np.isfinite(a.states))
    np.testing.assert_array_equal(a.updated, ~none)


@pytest.mark.parametrize(
    "change, variable",
    [
        (dict(method="kalman"), "method"),
        (dict(states=np.zeros((3, 1, 2))), "states"),
        (dict(predicted=np.zeros((3, 4, 1, 1))), "predicted"),
        (dict(observed=np.zeros((3, 2))), "observed"),
        (dict(obs_variance=np.zeros((3, 1))), "obs_variance"),
        (dict(obs_variance=np.ones((2, 1))), "obs_variance"),
        (dict(update_mask=np.ones(3, bool)), "update_mask"),
        (dict(obs_noise=np.zeros((3, 4))), "obs_noise"),
        (dict(rng=None), "rng"),
        (dict(lower=np.zeros(3)), "lower"),
        (dict(upper=np.zeros((2, 4, 2))), "upper"),
    ],
)
def test_bad_input_raises_input_error_naming_the_variable(change, variable):
    """Bad shapes and values raise assim.errors.InputError naming the variable."""
    args = dict(
        states=np.zeros((3, 4, 2)),
        predicted=np.zeros((3, 4, 1)),
        observed=np.zeros((3, 1)),
        obs_variance=np.ones((3, 1)),
        method="enkf",
        rng=np.random.default_rng(0),
    )
    args.update(change)
    with pytest.raises(InputError) as info:
        ensemble_update(
            args.pop("states"),
            args.pop("predicted"),
            args.pop("observed"),
            args.pop("obs_variance"),
            **args,
        )
    assert info.value.variable == variable


def test_single_basin_without_leading_dimension():
    """states (member, n_state), predicted (member, n_obs), observed (n_obs,) work."""
    rng = np.random.default_rng(15)
    X, H, Y, y, r = _linear_problem(rng, 1, 7, 2, 1)
    a = ensemble_update(X[0], Y[0], y[0], r[0], method="eakf")
    b = ensemble_update(X, Y, y, r, method="eakf")
    np.testing.assert_array_equal(a.states, b.states[0])
    assert a.updated.shape == ()
