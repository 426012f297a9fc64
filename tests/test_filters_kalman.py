"""Tests of assim.filters.kalman: the exact linear Kalman filter."""

import numpy as np
import pytest
from filterpy.kalman import KalmanFilter
from hypothesis import given, settings
from hypothesis import strategies as st

from assim.filters import kalman_predict, kalman_update


def _sequential(x, P, A, b, sd):
    """Assimilate the rows of A x = b one at a time with kalman_update."""
    for a_i, b_i, s_i in zip(A, b, sd, strict=True):
        x, P = kalman_update(x, P, a_i[None, :], np.array([b_i]), np.array([[s_i**2]]))
    return x, P


def test_sequential_updates_equal_weighted_least_squares():
    """Sequential scalar updates of a static state equal weighted least squares.

    Reference: the normal equations A^T C A u = A^T C b with C = diag(1/sd^2), solved by
    numpy.linalg.lstsq on the whitened system (C^1/2 A) u = C^1/2 b. The Gaussian prior
    N(x0, P0) enters as n extra whitened rows P0^-1/2 u = P0^-1/2 x0, so the comparison is
    exact; the posterior covariance is (A^T C A + P0^-1)^-1 (common practice, no published
    source).
    """
    rng = np.random.default_rng(11)
    n, rows = 3, 40
    A = rng.normal(size=(rows, n))
    sd = rng.uniform(0.2, 2.0, rows)
    b = A @ np.array([1.0, -2.0, 0.5]) + sd * rng.normal(size=rows)
    x0 = np.array([0.3, 0.1, -0.2])
    P0 = np.diag([4.0, 9.0, 1.0])
    x, P = _sequential(x0, P0, A, b, sd)

    p0_isqrt = np.diag(1.0 / np.sqrt(np.diag(P0)))
    whitened_A = np.vstack([A / sd[:, None], p0_isqrt])
    whitened_b = np.concatenate([b / sd, p0_isqrt @ x0])
    u, *_ = np.linalg.lstsq(whitened_A, whitened_b, rcond=None)
    np.testing.assert_allclose(x, u, rtol=0, atol=1e-10)
    np.testing.assert_allclose(P, np.linalg.inv(whitened_A.T @ whitened_A), rtol=1e-9, atol=1e-12)


def test_vague_prior_gives_plain_weighted_least_squares():
    """With a vague prior (P0 = 1e10 I) the estimate is the WLS solution A^T C A u = A^T C b.

    Reference: numpy.linalg.lstsq on the whitened overdetermined system, no prior rows.
    """
    rng = np.random.default_rng(12)
    A = rng.normal(size=(30, 2))
    sd = rng.uniform(0.5, 1.5, 30)
    b = A @ np.array([3.0, -1.0]) + sd * rng.normal(size=30)
    x, _ = _sequential(np.zeros(2), 1e10 * np.eye(2), A, b, sd)
    u, *_ = np.linalg.lstsq(A / sd[:, None], b / sd, rcond=None)
    np.testing.assert_allclose(x, u, rtol=1e-7)


def test_running_mean_gain_is_one_over_k():
    """Estimating a constant from unit-variance readings with a vague prior: the gain at
    the k-th reading is 1/k and the estimate the arithmetic mean of the readings so far
    (common practice, no published source)."""
    rng = np.random.default_rng(3)
    readings = rng.normal(5.0, 1.0, 25)
    x, P = np.zeros(1), np.array([[1e12]])
    for k, reading in enumerate(readings, start=1):
        gain = P[0, 0] / (P[0, 0] + 1.0)
        np.testing.assert_allclose(gain, 1.0 / k, rtol=1e-9)
        x, P = kalman_update(x, P, np.eye(1), np.array([reading]), np.eye(1))
        np.testing.assert_allclose(x[0], readings[:k].mean(), rtol=1e-9)
        np.testing.assert_allclose(P[0, 0], 1.0 / k, rtol=1e-9)


@settings(max_examples=200, deadline=None)
@given(
    x=st.floats(-1e3, 1e3),
    p=st.floats(1e-3, 1e3),
    y=st.floats(-1e3, 1e3),
    r=st.floats(1e-3, 1e3),
)
def test_scalar_analysis_lies_between_forecast_and_observation(x, p, y, r):
    """A scalar analysis lies between the forecast and the observation, and its variance
    below both (common practice, no published source)."""
    xa, pa = kalman_update(
        np.array([x]), np.array([[p]]), np.eye(1), np.array([y]), np.array([[r]])
    )
    slack = 1e-9 * (1.0 + abs(x) + abs(y))
    assert min(x, y) - slack <= xa[0] <= max(x, y) + slack
    assert pa[0, 0] <= min(p, r) * (1 + 1e-9)


def test_matches_filterpy_constant_velocity_tracking():
    """Two-state constant-velocity tracking over 200 steps, three tracks batched, every
    seventh reading missing (NaN here, None for the reference), agrees to 1e-10.

    Reference library: filterpy.kalman.KalmanFilter (predict, update; Joseph form).
    """
    rng = np.random.default_rng(5)
    dt, steps, tracks = 1.0, 200, 3
    F = np.array([[1.0, dt], [0.0, 1.0]])
    H = np.array([[1.0, 0.0]])
    q = np.array([0.01, 0.1, 1.0])
    r = np.array([0.5, 2.0, 10.0])
    Q = q[:, None, None] * np.array([[dt**3 / 3, dt**2 / 2], [dt**2 / 2, dt]])
    R = r[:, None, None] * np.ones((1, 1))
    truth = np.cumsum(rng.normal(1.0, 0.3, (steps, tracks)), axis=0)
    z = truth + rng.normal(0.0, np.sqrt(r), (steps, tracks))
    z[::7] = np.nan

    refs = []
    for t in range(tracks):
        kf = KalmanFilter(dim_x=2, dim_z=1)
        kf.x = np.array([[0.0], [0.0]])
        kf.P = np.diag([100.0, 10.0])
        kf.F, kf.H, kf.Q, kf.R = F, H, Q[t], R[t]
        refs.append(kf)

    x = np.zeros((tracks, 2))
    P = np.broadcast_to(np.diag([100.0, 10.0]), (tracks, 2, 2))
    Fb = np.broadcast_to(F, (tracks, 2, 2))
    Hb = np.broadcast_to(H, (tracks, 1, 2))
    for step in range(steps):
        x, P = kalman_predict(x, P, Fb, Q)
        x, P = kalman_update(x, P, Hb, z[step][:, None], R)
        for t, kf in enumerate(refs):
            kf.predict()
            kf.update(None if np.isnan(z[step, t]) else z[step, t])
            np.testing.assert_allclose(x[t], kf.x[:, 0], rtol=0, atol=1e-10 * (1 + abs(kf.x).max()))
            np.testing.assert_allclose(P[t], kf.P, rtol=0, atol=1e-10 * (1 + abs(kf.P).max()))


def test_missing_components_are_skipped_per_batch_element():
    """A NaN component of y is skipped: the update equals the update with that row of H, y
    and R removed, independently in each batch element (common practice, no published
    source)."""
    rng = np.random.default_rng(8)
    n, m = 4, 3
    L = rng.normal(size=(2, n, n))
    P = L @ np.swapaxes(L, 1, 2) + np.eye(n)
    x = rng.normal(size=(2, n))
    H = rng.normal(size=(2, m, n))
    R = np.stack([np.diag(rng.uniform(0.5, 2, m)) for _ in range(2)])
    y = rng.normal(size=(2, m))
    y[0, 1] = np.nan
    y[1, :] = np.nan
    xa, Pa = kalman_update(x, P, H, y, R)
    keep = [0, 2]
    x0, P0 = kalman_update(x[0], P[0], H[0][keep], y[0][keep], R[0][np.ix_(keep, keep)])
    np.testing.assert_allclose(xa[0], x0, atol=1e-12)
    np.testing.assert_allclose(Pa[0], P0, atol=1e-12)
    np.testing.assert_array_equal(xa[1], x[1])
    np.testing.assert_allclose(Pa[1], P[1], atol=1e-12)


def test_joseph_form_keeps_covariance_symmetric_positive():
    """An ill-conditioned update (R tiny against P) keeps P symmetric and its eigenvalues
    non-negative (Bucy & Joseph 1968, the point of the Joseph form)."""
    rng = np.random.default_rng(2)
    n = 5
    L = rng.normal(size=(n, n)) * np.logspace(0, 4, n)
    P = L @ L.T
    H = rng.normal(size=(2, n))
    x, Pa = kalman_update(np.zeros(n), P, H, np.ones(2), 1e-8 * np.eye(2))
    np.testing.assert_array_equal(Pa, Pa.T)
    assert np.linalg.eigvalsh(Pa).min() > -1e-6 * np.abs(P).max()
    # The observed combinations are now known to within the observation error.
    np.testing.assert_allclose(H @ x, np.ones(2), atol=1e-6)


def test_predict_with_forcing_and_batch_broadcast():
    """x <- F x + u, P <- F P F^T + Q, batched (Kalman 1960), against a hand computation."""
    F = np.array([[0.9, 0.1], [0.0, 0.8]])
    x = np.array([[1.0, 2.0], [3.0, -1.0]])
    P = np.array([[[1.0, 0.2], [0.2, 2.0]], [[0.5, 0.0], [0.0, 0.5]]])
    Q = 0.1 * np.eye(2)
    u = np.array([0.5, 0.0])
    xp, Pp = kalman_predict(x, P, F, Q, u=u)
    for b in range(2):
        np.testing.assert_allclose(xp[b], F @ x[b] + u, atol=1e-14)
        np.testing.assert_allclose(Pp[b], F @ P[b] @ F.T + Q, atol=1e-14)


@pytest.mark.parametrize("batch", [(), (4,), (2, 3)])
def test_shapes_follow_leading_dimensions(batch):
    """Leading dimensions are carried through unchanged (DESIGN.md, Filters)."""
    n, m = 3, 2
    x = np.zeros(batch + (n,))
    P = np.broadcast_to(np.eye(n), batch + (n, n))
    H = np.broadcast_to(np.ones((m, n)), batch + (m, n))
    y = np.ones(batch + (m,))
    R = np.broadcast_to(np.eye(m), batch + (m, m))
    xa, Pa = kalman_update(x, P, H, y, R)
    assert xa.shape == batch + (n,) and Pa.shape == batch + (n, n)
    xp, Pp = kalman_predict(xa, Pa, np.broadcast_to(np.eye(n), batch + (n, n)), P)
    assert xp.shape == batch + (n,) and Pp.shape == batch + (n, n)
