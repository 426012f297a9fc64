"""Tests of the smoothers: assim.filters.kalman.rts_smooth (the exact reference) and the
fixed-lag ensemble Kalman smoother of assim.filters.smoother.

Real data: the Nile annual flow at Aswan, 1871-1970 (10^8 m3), as shipped with statsmodels
(``statsmodels.datasets.nile``; public domain per its COPYRIGHT note; first analysed by
Cobb 1978, Biometrika 65, 243-251), the series of
Durbin & Koopman (2012), Time Series Analysis by State Space Methods, 2nd ed., ch. 2.
"""

import numpy as np
import pytest

from assim.filters import kalman_predict, kalman_update, rts_smooth

# Durbin & Koopman (2012), section 2.10: maximum likelihood estimates for the Nile local
# level model (observation and level disturbance variances).
SIGMA2_EPS = 15099.0
SIGMA2_ETA = 1469.1


def _kalman_pass(y, a1, P1, F, Q, H, R):
    """Filter a (time, m) series with kalman_predict/kalman_update; returns the filtered and
    predicted means and covariances, each with time as the first axis."""
    x, P = np.asarray(a1, float), np.asarray(P1, float)
    xs_p, Ps_p, xs_f, Ps_f = [], [], [], []
    for t in range(len(y)):
        if t:
            x, P = kalman_predict(x, P, F, Q)
        xs_p.append(x)
        Ps_p.append(P)
        x, P = kalman_update(x, P, H, y[t], R)
        xs_f.append(x)
        Ps_f.append(P)
    return np.array(xs_f), np.array(Ps_f), np.array(xs_p), np.array(Ps_p)


def _nile():
    sm_data = pytest.importorskip("statsmodels.datasets.nile")
    return sm_data.load_pandas().data["volume"].to_numpy(dtype=np.float64)


def _statsmodels_local_level(y, a1, P1):
    from statsmodels.tsa.statespace.structural import UnobservedComponents

    mod = UnobservedComponents(y, "local level")
    mod.ssm.initialize_known(np.array([a1]), np.array([[P1]]))
    res = mod.smooth(np.array([SIGMA2_EPS, SIGMA2_ETA]))
    return res.smoothed_state[0], res.smoothed_state_cov[0, 0]


def _rts_local_level(y, a1, P1):
    one = np.ones((1, 1))
    xf, Pf, xp, Pp = _kalman_pass(y[:, None], [a1], [[P1]], one, SIGMA2_ETA * one, one, SIGMA2_EPS * one)
    xs, Ps = rts_smooth(xf, Pf, xp, Pp, one)
    return xs[:, 0], Ps[:, 0, 0]


@pytest.mark.parametrize("gaps", [False, True])
def test_rts_equals_statsmodels_on_the_nile(gaps):
    """Smoothed level and variance of the Nile local level model equal statsmodels'.

    Reference: statsmodels.tsa.statespace UnobservedComponents('local level').smooth with the
    maximum likelihood variances of Durbin & Koopman (2012), section 2.10
    (sigma2_eps = 15099, sigma2_eta = 1469.1), both started from the same known prior
    N(0, 1e7) (an approximately diffuse start). With ``gaps`` the years 21-40 and 61-80
    are missing, as in Durbin & Koopman's Fig. 2.5: the smoother must bridge them.
    """
    y = _nile()
    if gaps:
        y = y.copy()
        y[20:40] = np.nan
        y[60:80] = np.nan
    a1, P1 = 0.0, 1e7
    ref_x, ref_P = _statsmodels_local_level(y, a1, P1)
    x, P = _rts_local_level(y, a1, P1)
    np.testing.assert_allclose(x, ref_x, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(P, ref_P, rtol=1e-8)
    # the smoothed variance is below the filtered one except at the end (equal there)
    one = np.ones((1, 1))
    _, Pf, _, _ = _kalman_pass(y[:, None], [a1], [[P1]], one, SIGMA2_ETA * one, one, SIGMA2_EPS * one)
    assert np.all(P[:-1] < Pf[:-1, 0, 0])
    assert P[-1] == pytest.approx(Pf[-1, 0, 0], rel=1e-12)


def test_rts_batched_equals_one_by_one():
    """A batch of two different models smoothed at once equals each smoothed alone (a
    two-state model with a time-varying transition; common practice, no published source:
    the batch axis must not mix the models)."""
    rng = np.random.default_rng(5)
    T, n = 30, 2
    F = np.stack([np.array([[0.9, 0.1], [0.0, 0.7]]), np.array([[0.5, 0.0], [0.3, 0.95]])])  # (batch, n, n)
    Ft = F[:, None] * rng.uniform(0.9, 1.1, (2, T, 1, 1))  # (batch, time, n, n)
    Q = np.diag([0.5, 0.2])
    H = np.array([[1.0, 1.0]])
    R = np.array([[0.3]])
    y = rng.normal(size=(T, 2, 1))
    y[5:9, 0] = np.nan
    passes, outs = [], []
    for b in range(2):
        x, P = np.zeros(n), np.eye(n)
        xf, Pf, xp, Pp = [], [], [], []
        for t in range(T):
            if t:
                x, P = kalman_predict(x, P, Ft[b, t - 1], Q)
            xp.append(x)
            Pp.append(P)
            x, P = kalman_update(x, P, H, y[t, b], R)
            xf.append(x)
            Pf.append(P)
        passes.append([np.array(v) for v in (xf, Pf, xp, Pp)])
        outs.append(rts_smooth(*passes[-1], Ft[b]))
    xs, Ps = rts_smooth(*(np.stack(v) for v in zip(*passes, strict=True)), Ft)
    for b in range(2):
        np.testing.assert_allclose(xs[b], outs[b][0], rtol=0, atol=1e-12)
        np.testing.assert_allclose(Ps[b], outs[b][1], rtol=0, atol=1e-12)


# --------------------------------------------------------------- the fixed-lag ensemble smoother

from assim.filters import ensemble_update, fixed_lag_update, lagged_predictions  # noqa: E402

# A linear reservoir as a linear-Gaussian state-space model: S_t+1 = A S_t + p_t + w_t
# (storage, mm; w ~ N(0, Q)), reading y_t = K S_t + v_t (outflow, v ~ N(0, R)).
A, K, Q, R = 0.8, 0.2, 4.0, 0.5
M0, P0 = 20.0, 25.0


def _series(T, seed=3):
    rng = np.random.default_rng(seed)
    p = rng.gamma(0.6, 6.0, T)
    s, ys = M0 + np.sqrt(P0) * rng.normal(), []
    for t in range(T):
        if t:
            s = A * s + p[t] + np.sqrt(Q) * rng.normal()
        ys.append(K * s + np.sqrt(R) * rng.normal())
    y = np.array(ys)
    y[[4, 11, 12]] = np.nan  # a few days without a reading
    return p, y


def _rts(p, y):
    """Exact smoothed means and variances of the reservoir over the readings y (rts_smooth)."""
    one = np.ones((1, 1))
    x, P = np.array([M0]), P0 * one
    xf, Pf, xp, Pp = [], [], [], []
    for t in range(len(y)):
        if t:
            x, P = kalman_predict(x, P, A * one, Q * one, u=np.array([p[t]]))
        xp.append(x)
        Pp.append(P)
        x, P = kalman_update(x, P, K * one, np.array([y[t]]), R * one)
        xf.append(x)
        Pf.append(P)
    xs, Ps = rts_smooth(np.array(xf), np.array(Pf), np.array(xp), np.array(Pp), A * one)
    return xs[:, 0], Ps[:, 0, 0]


def _exact_fixed_lag(p, y, W):
    """x_s|s+W (the exact fixed-lag smoother): the RTS smoother of the readings up to s + W."""
    T = len(y)
    mean, var = np.empty(T), np.empty(T)
    for s in range(T):
        xs, Ps = _rts(p[: s + W + 1], y[: s + W + 1])
        mean[s], var[s] = xs[s], Ps[s]
    return mean, var


def _standardised(z, against):
    """z (N,) made exactly centred, uncorrelated with the columns of ``against`` (N, k) and of
    unit sample variance: the ensemble's sample moments then follow the Kalman equations
    exactly (no Monte Carlo error)."""
    basis = np.column_stack([np.ones(len(z)), against - against.mean(axis=0)])
    qb, _ = np.linalg.qr(basis)
    z = z - qb @ (qb.T @ z)
    return z / z.std(ddof=1)


def _ensemble_fixed_lag(p, y, W, N, method, exact, seed=7):
    """Run the ensemble fixed-lag smoother over the series; returns the final (smoothed)
    ensemble mean and variance of every day."""
    rng = np.random.default_rng(seed)
    T = len(y)
    z = rng.normal(size=N)
    x = M0 + np.sqrt(P0) * (_standardised(z, np.empty((N, 0))) if exact else z)
    lagged = np.empty((0, N))  # (window, member): days t-1, t-2, ...
    final = np.full((T, N), np.nan)
    for t in range(T):
        if t:
            w = rng.normal(size=N)
            if exact:
                w = _standardised(w, np.column_stack([x, *lagged]) if len(lagged) else x[:, None])
            x = A * x + p[t] + np.sqrt(Q) * w
        r = fixed_lag_update(x[None, :, None], lagged[None, :, :, None], K * x[None, :, None],
                             y[t : t + 1][None], np.array([[R]]), method=method)
        x = r.states[0, :, 0]
        lagged = np.concatenate([x[None], r.lagged[0, :, :, 0]])  # today joins the window
        if len(lagged) > W:  # day t - W leaves it: final
            final[t - W] = lagged[-1]
            lagged = lagged[:-1]
    for j, day in enumerate(range(T - 1, T - 1 - len(lagged), -1)):
        final[day] = lagged[j]
    return final.mean(axis=1), final.var(axis=1, ddof=1)


@pytest.mark.parametrize("method", ["etkf", "eakf"])
@pytest.mark.parametrize("W", [3, 40])
def test_fixed_lag_smoother_equals_the_exact_smoother(method, W):
    """Linear-Gaussian limit, without sampling error: an ensemble whose model noise is drawn
    with exactly the prescribed sample moments carries the Kalman mean and covariance
    exactly, and the deterministic analyses (etkf, eakf) update them exactly, so the
    fixed-lag ensemble smoother's means and variances equal the exact smoother's to
    rounding. W = 40 covers the whole 40-day series: the full Rauch-Tung-Striebel smoother
    (Rauch, Tung & Striebel 1965); W = 3: the exact fixed-lag smoother x_s|s+3 (the RTS
    smoother of the readings through s + 3). Reference: Evensen & van Leeuwen (2000),
    Mon. Wea. Rev. 128, section 3: the ensemble smoother is the Kalman smoother for linear
    dynamics in the limit of sample moments equal to the true ones.
    """
    p, y = _series(40)
    ref_mean, ref_var = _rts(p, y) if W >= 40 else _exact_fixed_lag(p, y, W)
    mean, var = _ensemble_fixed_lag(p, y, W, N=120, method=method, exact=True)
    np.testing.assert_allclose(mean, ref_mean, rtol=1e-8)
    np.testing.assert_allclose(var, ref_var, rtol=1e-7)
    # smoothing is not filtering: the days with later readings differ from the filter
    filt_mean, _ = _exact_fixed_lag(p, y, 0)
    assert np.max(np.abs(mean[:-1] - filt_mean[:-1])) > 0.1


@pytest.mark.slow
def test_fixed_lag_smoother_large_ensemble_within_monte_carlo_error():
    """The same limit with plain random draws: 20,000 members (eakf), means and variances of
    the RTS smoother (Rauch, Tung & Striebel 1965) within Monte Carlo error (5 standard
    errors of a mean, 6 % of a variance, sqrt(2 / N) = 1 %)."""
    p, y = _series(40)
    ref_mean, ref_var = _rts(p, y)
    N = 20000
    mean, var = _ensemble_fixed_lag(p, y, 40, N=N, method="eakf", exact=False, seed=11)
    assert np.all(np.abs(mean - ref_mean) < 5 * np.sqrt(ref_var / N) + 1e-9)
    np.testing.assert_allclose(var, ref_var, rtol=0.06)


@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_window_zero_is_the_filter_bit_for_bit(method):
    """W = 0 (no lagged day) is ensemble_update itself, bit for bit, states and
    diagnostics (the definition of the fixed-lag smoother with an empty window, Evensen &
    van Leeuwen 2000)."""
    rng = np.random.default_rng(2)
    B, N = 3, 16
    X = rng.gamma(3.0, 10.0, (B, N, 2))
    Y = X[..., :1] * 0.3 + rng.normal(0, 0.1, (B, N, 1))
    y = np.array([[9.0], [np.nan], [11.0]])
    r = np.full((B, 1), 0.4)
    noise = rng.normal(size=(B, N, 1))
    kw = dict(method=method, obs_noise=noise if method == "enkf" else None, lower=0.0, gate_sigma=5.0)
    ref = ensemble_update(X, Y, y, r, **kw)
    got = fixed_lag_update(X, np.empty((B, 0, N, 2)), Y, y, r, **kw)
    assert np.array_equal(got.states, ref.states)
    assert np.array_equal(got.analysis.innovation, ref.innovation, equal_nan=True)
    assert got.lagged.shape == (B, 0, N, 2)


@pytest.mark.parametrize("method", ["etkf", "eakf"])
def test_asynchronous_readings_at_the_analysis_time_equal_the_synchronous_update(method):
    """Readings all taken on the analysis day (lag 0), picked from the stored predictions
    by lagged_predictions and assimilated with lagged days in the window, give the current
    states of the synchronous update with today's predictions (Sakov et al. 2010, Tellus A
    62, eq. 5: with zero lags the asynchronous EnKF is the EnKF)."""
    rng = np.random.default_rng(4)
    B, N, W = 2, 24, 3
    X = rng.gamma(3.0, 10.0, (B, N, 2))
    lag = rng.gamma(3.0, 10.0, (B, W, N, 2))
    q_today = 0.2 * X[..., 0] + 0.1 * X[..., 1]
    history = np.concatenate([q_today[:, None], rng.gamma(2.0, 3.0, (B, W, N))], axis=1)  # (B, 1 + W, N)
    y = np.array([[7.0, 7.5], [5.0, np.nan]])
    r = np.full((B, 2), 0.3)
    pred = lagged_predictions(history, np.zeros((B, 2), dtype=int))
    sync = ensemble_update(X, np.stack([q_today, q_today], axis=-1), y, r, method=method)
    asyn = fixed_lag_update(X, lag, pred, y, r, method=method)
    np.testing.assert_allclose(asyn.states, sync.states, rtol=1e-12)
    assert not np.allclose(asyn.lagged, lag)  # the lagged days were corrected too


@pytest.mark.parametrize("method", ["etkf", "eakf"])
def test_late_reading_equals_the_filter_that_had_it_on_time(method):
    """A reading of day t - 1 that arrives a day late, assimilated at day t against the
    members' stored predictions of day t - 1, gives the exact Kalman filter that had every
    reading on time (linear model, exact sample moments): Sakov et al. (2010), Tellus A 62,
    section 2 (for linear dynamics the asynchronous EnKF equals the sequential one).
    Reference numbers: kalman_predict / kalman_update."""
    p, y = _series(25)
    y = np.where(np.isnan(y), 3.0, y)
    rng = np.random.default_rng(9)
    N = 80
    x = M0 + np.sqrt(P0) * _standardised(rng.normal(size=N), np.empty((N, 0)))
    one = np.ones((1, 1))
    xk, Pk = np.array([M0]), P0 * one
    stored = None  # members' prediction of the late reading, kept from its own day
    for t in range(len(y)):
        if t:
            prev = x
            x = A * x + p[t] + np.sqrt(Q) * _standardised(rng.normal(size=N), prev[:, None])
            xk, Pk = kalman_predict(xk, Pk, A * one, Q * one, u=np.array([p[t]]))
        xk, Pk = kalman_update(xk, Pk, K * one, np.array([y[t]]), R * one)
        if t % 2 == 0:  # even days' readings arrive the next day: today nothing is assimilated
            stored = K * x
            continue
        history = np.stack([K * x, stored])[None]  # (1, 1 + W, N), today first
        pred = lagged_predictions(history, np.array([[1, 0]]))
        r = fixed_lag_update(x[None, :, None], np.empty((1, 0, N, 1)), pred,
                             np.array([[y[t - 1], y[t]]]), np.full((1, 2), R), method=method)
        x = r.states[0, :, 0]
        np.testing.assert_allclose(x.mean(), xk[0], rtol=1e-9)
        np.testing.assert_allclose(x.var(ddof=1), Pk[0, 0], rtol=1e-8)


def test_lagged_predictions_picks_each_reading_day_and_refuses_lags_outside():
    """lagged_predictions takes index k of the history for a reading k days old (common
    practice, no published source)."""
    history = np.arange(2 * 3 * 4, dtype=float).reshape(2, 3, 4)  # (basin, 1 + W, member)
    got = lagged_predictions(history, np.array([[2, 0], [1, 1]]))
    assert got.shape == (2, 4, 2)
    np.testing.assert_array_equal(got[0, :, 0], history[0, 2])
    np.testing.assert_array_equal(got[0, :, 1], history[0, 0])
    np.testing.assert_array_equal(got[1, :, 0], history[1, 1])
    from assim.errors import InputError

    with pytest.raises(InputError):
        lagged_predictions(history, np.array([[3, 0], [0, 0]]))
