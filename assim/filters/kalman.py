"""Exact linear Kalman filtering, batched over leading dimensions.

The reference for every ensemble method: for a linear model with Gaussian errors the
ensemble filters must reproduce these numbers (in the mean and covariance), and the tests
check that they do.

References
----------
Kalman, R. E. (1960). A new approach to linear filtering and prediction problems.
    J. Basic Eng. 82, 35-45.
Bucy, R. S. & Joseph, P. D. (1968). Filtering for Stochastic Processes with Applications to
    Guidance. Interscience, New York.
Rauch, H. E., Tung, F. & Striebel, C. T. (1965). Maximum likelihood estimates of linear
    dynamic systems. AIAA J. 3, 1445-1450.

This module imports numpy only.
"""

from __future__ import annotations

import numpy as np

__all__ = ["kalman_predict", "kalman_update", "rts_smooth"]


def _symmetric(P: np.ndarray) -> np.ndarray:
    return 0.5 * (P + np.swapaxes(P, -1, -2))


def kalman_predict(x, P, F, Q, u=None):
    """Propagate a Gaussian state estimate through a linear model.

    ``x <- F x + u``, ``P <- F P F^T + Q`` (Kalman 1960).

    Parameters
    ----------
    x : (..., n) float64
        State mean.
    P : (..., n, n) float64
        State error covariance (symmetric positive semi-definite).
    F : (..., n, n) float64
        Transition matrix.
    Q : (..., n, n) float64
        Model error covariance.
    u : (..., n) float64, optional
        Known forcing term added to the mean.

    Returns
    -------
    x : (..., n) float64
    P : (..., n, n) float64, symmetric
    """
    x = np.asarray(x, dtype=np.float64)
    P = np.asarray(P, dtype=np.float64)
    F = np.asarray(F, dtype=np.float64)
    x_new = np.einsum("...ij,...j->...i", F, x)  # Kalman (1960), Theorem 3 (prediction of the mean)
    if u is not None:
        x_new = x_new + np.asarray(u, dtype=np.float64)
    # Kalman (1960), Theorem 3 (prediction of the covariance)
    P_new = F @ P @ np.swapaxes(F, -1, -2) + np.asarray(Q, dtype=np.float64)
    return x_new, _symmetric(P_new)


def kalman_update(x, P, H, y, R):
    """Condition a Gaussian state estimate on a linear observation.

    Gain ``K = P H^T (H P H^T + R)^-1``; mean ``x + K (y - H x)``; covariance in Joseph
    form ``(I - K H) P (I - K H)^T + K R K^T`` (Bucy & Joseph 1968), which stays symmetric
    positive semi-definite. NaN components of ``y`` are missing and skipped, each batch
    element on its own: their rows of ``H`` and ``R`` take no part in the update.

    Parameters
    ----------
    x : (..., n) float64
    P : (..., n, n) float64
    H : (..., m, n) float64
        Observation operator.
    y : (..., m) float64
        Observations; NaN = missing.
    R : (..., m, m) float64
        Observation error covariance (positive definite on the present components).

    Returns
    -------
    x : (..., n) float64
    P : (..., n, n) float64, symmetric
    """
    x = np.asarray(x, dtype=np.float64)
    P = np.asarray(P, dtype=np.float64)
    H = np.asarray(H, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    R = np.asarray(R, dtype=np.float64)
    present = ~np.isnan(y)
    both = present[..., :, None] & present[..., None, :]
    eye_m = np.eye(y.shape[-1], dtype=bool)
    # A missing component gets a zero row of H, a zero innovation and a unit, uncoupled
    # variance: its column of the gain is then exactly zero.
    H = np.where(present[..., :, None], H, 0.0)
    R = np.where(both, R, np.where(eye_m, 1.0, 0.0))
    innovation = np.where(present, y - np.einsum("...ij,...j->...i", H, x), 0.0)
    PHt = P @ np.swapaxes(H, -1, -2)
    S = H @ PHt + R
    # Kalman (1960), Theorem 3 (gain)
    K = np.swapaxes(np.linalg.solve(S, np.swapaxes(PHt, -1, -2)), -1, -2)
    x_new = x + np.einsum("...ij,...j->...i", K, innovation)
    A = np.eye(x.shape[-1]) - K @ H
    # Bucy & Joseph (1968): Joseph form of the analysis covariance
    P_new = A @ P @ np.swapaxes(A, -1, -2) + K @ R @ np.swapaxes(K, -1, -2)
    return x_new, _symmetric(P_new)


def rts_smooth(x_filtered, P_filtered, x_predicted, P_predicted, F):
    """Rauch-Tung-Striebel fixed-interval smoother: the backward pass after a Kalman filter.

    With the filter's estimates ``x_t|t``, ``P_t|t`` and its one-step predictions
    ``x_t|t-1``, ``P_t|t-1`` of every time ``t = 0 .. T-1``, the smoothed estimates given all
    T times are, backwards from ``x_T-1|T-1`` (Rauch, Tung & Striebel 1965)::

        C_t = P_t|t F_t^T P_t+1|t^-1
        x_t|T = x_t|t + C_t (x_t+1|T - x_t+1|t)
        P_t|T = P_t|t + C_t (P_t+1|T - P_t+1|t) C_t^T

    Parameters
    ----------
    x_filtered : (..., time, n) float64
        Filtered means ``x_t|t`` (after the update of time t; with no reading at t, the
        prediction).
    P_filtered : (..., time, n, n) float64
        Filtered covariances ``P_t|t``.
    x_predicted : (..., time, n) float64
        One-step predictions ``x_t|t-1`` (element 0 is not used).
    P_predicted : (..., time, n, n) float64
        Their covariances ``P_t|t-1`` (element 0 is not used; a singular one is inverted
        by its pseudo-inverse).
    F : (..., n, n) or (..., time, n, n) float64
        Transition from time t to t + 1 (constant, or element t for each t; the last is
        not used).

    Returns
    -------
    x : (..., time, n) float64
        Smoothed means ``x_t|T``.
    P : (..., time, n, n) float64, symmetric
        Smoothed covariances ``P_t|T``.
    """
    xf = np.asarray(x_filtered, dtype=np.float64)
    Pf = np.asarray(P_filtered, dtype=np.float64)
    xp = np.asarray(x_predicted, dtype=np.float64)
    Pp = np.asarray(P_predicted, dtype=np.float64)
    F = np.asarray(F, dtype=np.float64)
    varying = F.ndim == Pf.ndim
    T = xf.shape[-2]
    xs = xf.copy()
    Ps = Pf.copy()
    for t in range(T - 2, -1, -1):  # (over time: each step needs the next one's result)
        Ft = F[..., t, :, :] if varying else F
        # Rauch, Tung & Striebel (1965): C = P_t|t F^T P_t+1|t^-1 (pseudo-inverse: a
        # predicted state known exactly, P = 0, passes no correction back)
        C = Pf[..., t, :, :] @ np.swapaxes(Ft, -1, -2) @ np.linalg.pinv(Pp[..., t + 1, :, :], hermitian=True)
        dx = xs[..., t + 1, :] - xp[..., t + 1, :]
        xs[..., t, :] = xf[..., t, :] + np.einsum("...ij,...j->...i", C, dx)
        Ps[..., t, :, :] = _symmetric(
            Pf[..., t, :, :] + C @ (Ps[..., t + 1, :, :] - Pp[..., t + 1, :, :]) @ np.swapaxes(C, -1, -2)
        )
    return xs, Ps
