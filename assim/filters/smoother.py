"""Fixed-lag ensemble Kalman smoother and asynchronous readings, on the one analysis.

:func:`fixed_lag_update` updates the current states AND the states of the previous W days
(kept by the caller, one ensemble per lagged day) from readings of the window. It writes no
analysis of its own: it hands :func:`assim.filters.ensemble_update` the augmented vector
(current states, lagged states) of each member, so the lagged states move by their
ensemble cross-covariance with the predicted readings, exactly as the current states do
(the ensemble Kalman smoother of Evensen & van Leeuwen 2000, in its fixed-lag form). Every
method, inflation, transform, gate and bound of the filter applies unchanged; with no lagged
day (W = 0) the call is :func:`ensemble_update` itself.

The readings need not be of the current day: ``predicted`` holds each member's prediction
of each reading at the reading's own time, taken from the predictions the caller stored
(:func:`lagged_predictions`). A reading of day t - k that arrives late (or several readings
inside the window) is thus assimilated at the analysis of day t without re-running the model
from an old state: the asynchronous ensemble filter (Sakov et al. 2010). For a linear model
the result is the filter that had the reading on time; for a nonlinear one it is the usual
ensemble approximation, and re-running from a restart remains the exact alternative.

Each reading must be assimilated once: in the fixed-lag smoother, the reading of day t at
the analysis of day t, which then also corrects the W lagged days. A lagged day leaves the
window after the analysis of W days later; its states are then final (smoothed by the
readings of its own day and the W days after it).

References
----------
Evensen, G. & van Leeuwen, P. J. (2000). An ensemble Kalman smoother for nonlinear dynamics.
    Mon. Wea. Rev. 128, 1852-1867.
Sakov, P., Evensen, G. & Bertino, L. (2010). Asynchronous data assimilation with the EnKF.
    Tellus A 62, 24-29.

This module imports numpy only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from assim.errors import InputError
from assim.filters.ensemble import Analysis, ensemble_update

__all__ = ["SmootherAnalysis", "fixed_lag_update", "lagged_predictions"]


@dataclass(frozen=True, eq=False)
class SmootherAnalysis:
    """Result of one :func:`fixed_lag_update`.

    Attributes
    ----------
    states : (..., member, n_state) float64
        Updated current states.
    lagged : (..., window, member, n_lagged) float64
        Updated states of the lagged days (same order as given).
    analysis : Analysis
        The analysis of the augmented vector: its ``states`` are (..., member, n_state +
        window * n_lagged), current states first then each lagged day in order; its
        diagnostics (innovations, use, clipping of every column) as for
        :func:`ensemble_update`.
    """

    states: np.ndarray
    lagged: np.ndarray
    analysis: Analysis


def _bound(bound, name, shape):
    """A bound of the current or the lagged states broadcast to ``shape``, or None."""
    if bound is None:
        return None
    try:
        return np.broadcast_to(np.asarray(bound, dtype=np.float64), shape)
    except ValueError:
        raise InputError(f"must broadcast to {shape}, got {np.shape(bound)}", variable=name) from None


def fixed_lag_update(
    states,
    lagged,
    predicted,
    observed,
    obs_variance,
    *,
    lower=None,
    upper=None,
    lagged_lower=None,
    lagged_upper=None,
    **options,
) -> SmootherAnalysis:
    """One fixed-lag smoother analysis: current and lagged states from the window's readings.

    Parameters
    ----------
    states : (..., member, n_state) float64
        Current ensemble (the prior of today's analysis).
    lagged : (..., window, member, n_lagged) float64
        The ensemble of each of the ``window`` previous days as the earlier analyses left it
        (any columns: states, discharge); ``window`` may be 0.
    predicted : (..., member, n_obs) float64
        Each member's prediction of each reading at the reading's own time (today's, or a
        stored one for a late reading: :func:`lagged_predictions`).
    observed : (..., n_obs) float64
        The readings; NaN = missing.
    obs_variance : (..., n_obs) float64
        Their error variances, assimilation space (as :func:`ensemble_update`).
    lower, upper : broadcastable to ``states``, optional
        Bounds of the current states.
    lagged_lower, lagged_upper : broadcastable to ``lagged``, optional
        Bounds of the lagged columns.
    **options
        Passed to :func:`ensemble_update` (``method``, ``rng``, ``inflation``,
        ``gate_sigma``, ``update_mask`` of the current states, ``transform``, ``obs_noise``,
        ``centre_noise``). Multiplicative inflation and relaxation act on every column, the
        lagged ones included.

    Returns
    -------
    SmootherAnalysis

    Raises
    ------
    InputError
        Shapes that do not fit (and everything :func:`ensemble_update` refuses).
    """
    X = np.asarray(states, dtype=np.float64)
    L = np.asarray(lagged, dtype=np.float64)
    if X.ndim < 2 or L.ndim != X.ndim + 1 or L.shape[:-3] != X.shape[:-2] or L.shape[-2] != X.shape[-2]:
        raise InputError(f"lagged must be (..., window, member, n) with the batch and members of states "
                         f"{X.shape}, got {L.shape}", variable="lagged")
    window, n_lag = L.shape[-3], L.shape[-1]
    if window == 0 or n_lag == 0:
        a = ensemble_update(X, predicted, observed, obs_variance, lower=lower, upper=upper, **options)
        return SmootherAnalysis(a.states, L.copy(), a)
    batch, N, n = X.shape[:-2], X.shape[-2], X.shape[-1]
    # The augmented member vector (current states, lagged day 1, ..., lagged day W).
    lag_cols = np.moveaxis(L, -3, -2).reshape(batch + (N, window * n_lag))
    aug = np.concatenate([X, lag_cols], axis=-1)
    bounds = []
    for cur, lag, name in ((lower, lagged_lower, "lower"), (upper, lagged_upper, "upper")):
        if cur is None and lag is None:
            bounds.append(None)
            continue
        fill = -np.inf if name == "lower" else np.inf
        c = _bound(cur, name, X.shape)
        g = _bound(lag, "lagged_" + name, L.shape)
        c = np.full(X.shape, fill) if c is None else c
        g = np.full(L.shape, fill) if g is None else g
        bounds.append(np.concatenate([c, np.moveaxis(g, -3, -2).reshape(lag_cols.shape)], axis=-1))
    mask = options.pop("update_mask", None)
    if mask is not None:
        mask = np.concatenate([np.asarray(mask, dtype=bool), np.ones(window * n_lag, dtype=bool)])
    a = ensemble_update(aug, predicted, observed, obs_variance, lower=bounds[0], upper=bounds[1],
                        update_mask=mask, **options)
    xa = a.states
    new_lag = np.moveaxis(xa[..., n:].reshape(batch + (N, window, n_lag)), -2, -3)
    return SmootherAnalysis(xa[..., :n], new_lag, a)


def lagged_predictions(history, lags):
    """Each member's stored prediction of each reading at the reading's own time.

    Parameters
    ----------
    history : (..., 1 + window, member) float64
        Predicted observation of every day of the window as the model made it (before the
        day's analysis): index 0 is today, index k is k days ago.
    lags : (..., n_obs) int
        How many days before today each reading was taken (0 .. window).

    Returns
    -------
    (..., member, n_obs) float64
        The ``predicted`` argument of :func:`fixed_lag_update` (or :func:`ensemble_update`).

    Raises
    ------
    InputError
        A lag outside the stored window.
    """
    H = np.asarray(history, dtype=np.float64)
    k = np.asarray(lags)
    if k.size and (k.min() < 0 or k.max() >= H.shape[-2]):
        raise InputError(f"reading lags must be within 0 .. {H.shape[-2] - 1} days", variable="lags")
    idx = np.broadcast_to(k, H.shape[:-2] + k.shape[-1:])[..., :, None]  # (..., n_obs, 1)
    picked = np.take_along_axis(H, idx, axis=-2)  # (..., n_obs, member)
    return np.swapaxes(picked, -1, -2)
