"""Glue between the engine and :mod:`assim.filters`: one day's analysis over a chunk.

The analysis vector of each member is (updated states, predicted discharge, estimated
parameters); this module builds it with its bounds, calls
:func:`assim.filters.ensemble_update` once for every basin of the chunk, and holds the
small rules around it: the inflation and transform records (built once per setting), the
Liu & West kernel shrinkage of estimated parameters, the ensemble spread, the water added
by clipping and the consecutive-day counters of collapsed spread.
"""

from __future__ import annotations

import functools

import numpy as np

from assim.engine.records import Settings


def augmented_bounds(lower: np.ndarray, upper: np.ndarray, theta_lower: np.ndarray,
                     theta_upper: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bounds of the augmented analysis vector (updated states, discharge, parameters).

    Parameters
    ----------
    lower, upper : (basin, member, n_update) state bounds, mm
    theta_lower, theta_upper : (n_param,) valid ranges of the estimated parameters

    Returns
    -------
    lower, upper : (basin, member, n_update + 1 + n_param); discharge is bounded below by 0
    """
    nb, nm, _ = lower.shape
    npar = len(theta_lower)
    lo = np.concatenate([lower, np.zeros((nb, nm, 1)), np.broadcast_to(theta_lower, (nb, nm, npar))], axis=-1)
    hi = np.concatenate([upper, np.full((nb, nm, 1), np.inf), np.broadcast_to(theta_upper, (nb, nm, npar))],
                        axis=-1)
    return lo, hi


def analyse(
    states: np.ndarray,
    discharge: np.ndarray,
    theta: np.ndarray | None,
    observed: np.ndarray,
    obs_var: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    obs_noise: np.ndarray | None,
    settings: Settings,
    inflation_state: tuple[np.ndarray, np.ndarray] | None = None,
    lagged: np.ndarray | None = None,
):
    """One analysis over all basins of a chunk.

    The analysis vector of each member is (updated states, predicted discharge, estimated
    parameters): the discharge column gives ``discharge_analysis`` and the parameter
    columns the joint state-parameter update. With ``lagged`` (the smoother's window), the
    lagged days' columns are appended to the vector, so the same analysis corrects them by
    their cross-covariance with today's predicted discharge (the fixed-lag smoother,
    :func:`assim.filters.fixed_lag_update`); they come back as the last columns of the
    ``Analysis`` states.

    Parameters
    ----------
    states : (basin, member, n_update) float64, mm, the updated states
    discharge : (basin, member) float64, m3 s-1, predicted discharge (background)
    theta : (basin, member, n_param) float64 or None, estimated parameters
    observed : (basin,) float64, m3 s-1, NaN where no usable reading
    obs_var : (basin,) float64, (m3 s-1)^2, observation error variance
    lower, upper : (basin, member, n_update + 1 + n_param [+ n_lagged]), from
        :func:`augmented_bounds` (and the window's bounds)
    obs_noise : (basin, member) standard normals for the perturbed observations (EnKF)
    inflation_state : (mean, sd), each (basin,), the prior adaptive inflation (already
        damped), when ``settings.adaptive_inflation``
    lagged : (n_lagged, basin, member) float64, optional, the window's planes

    Returns
    -------
    states, discharge, theta (updated), and the filter's ``Analysis``.
    """
    from assim.filters import ensemble_update

    nb, nm, nu = states.shape
    npar = 0 if theta is None else theta.shape[-1]
    # one (basin, member) plane per column, members fastest: the layout the filter's
    # one-observation path works on along contiguous members (and returns)
    n_lag = 0 if lagged is None else lagged.shape[0]
    planes = np.empty((nu + 1 + npar + n_lag, nb, nm))
    planes[:nu] = np.moveaxis(states, -1, 0)
    planes[nu] = discharge
    if theta is not None:
        planes[nu + 1:nu + 1 + npar] = np.moveaxis(theta, -1, 0)
    if n_lag:
        planes[nu + 1 + npar:] = lagged
    x = np.moveaxis(planes, 0, -1)  # (basin, member, column)
    transform = _transform(settings)
    obs_var = assimilation_variance(observed, obs_var, settings)
    a = ensemble_update(
        x,
        discharge[..., None],
        observed[:, None],
        obs_var[:, None],
        method=settings.method,
        inflation=_inflation(settings),
        gate_sigma=settings.gate_sigma if settings.gate_sigma > 0 else None,
        lower=lower,
        upper=upper,
        transform=transform,
        obs_noise=None if obs_noise is None else obs_noise[..., None],
        inflation_state=inflation_state,
    )
    xa = a.states
    new_theta = None if theta is None else xa[..., nu + 1:nu + 1 + npar]
    return xa[..., :nu], xa[..., nu], new_theta, a


def assimilation_variance(observed: np.ndarray, obs_var: np.ndarray, settings: Settings) -> np.ndarray:
    """The observation error variance in the assimilation space (the transform's), (basin,)."""
    transform = _transform(settings)
    return obs_var if transform is None else transform.variance(observed, obs_var)


def desroziers_series(observed: np.ndarray, variance: np.ndarray, analysed: np.ndarray, used: np.ndarray,
                      settings: Settings) -> tuple[np.ndarray, np.ndarray]:
    """What the Desroziers et al. (2005) diagnostics need of each analysed day, beside the
    innovation: the observed minus the ensemble mean of the analysed discharge (d_o-a) and
    the observation error variance used, both in the assimilation space.

    Parameters
    ----------
    observed, variance : (basin, time) m3 s-1 and (m3 s-1)^2, the readings and their error variance
    analysed : (basin, time, member) m3 s-1, the discharge after each day's analysis
    used : (basin, time) bool, readings the analysis used

    Returns
    -------
    innovation_analysis, obs_error_variance : (basin, time) float64, NaN where no reading was used
    """
    obs = np.where(used, observed, np.nan)
    transform = _transform(settings)
    if transform is not None:
        obs, analysed = transform.forward(obs), transform.forward(analysed)
    d_oa = obs - np.add.reduce(analysed, axis=-1) / analysed.shape[-1]
    return d_oa, np.where(used, assimilation_variance(observed, variance, settings), np.nan)


def _inflation(settings: Settings):
    adaptive = None
    if settings.adaptive_inflation:
        adaptive = (settings.adaptive_initial_mean, settings.adaptive_initial_sd, settings.adaptive_damping,
                    settings.adaptive_lower, settings.adaptive_upper, settings.adaptive_min_sd)
    return _inflation_of(settings.inflation, settings.rtps, settings.rtpp, adaptive)


def adaptive_options(settings: Settings):
    """The :class:`assim.filters.AdaptiveInflation` of the settings, or None when off."""
    return _inflation(settings).adaptive


def _transform(settings: Settings):
    if settings.transform == "none":
        return None
    lam = settings.transform_lambda if settings.transform == "boxcox" else 1.0
    return _transform_of(settings.transform, settings.transform_offset, lam)


# Built once per distinct setting, not once per analysis (frozen records, safe to share).
@functools.lru_cache(maxsize=32)
def _inflation_of(multiplicative: float, rtps: float, rtpp: float, adaptive: tuple | None = None):
    from assim import filters

    opts = None if adaptive is None else filters.AdaptiveInflation(*adaptive)
    return filters.Inflation(multiplicative=multiplicative, rtps=rtps, rtpp=rtpp, adaptive=opts)


@functools.lru_cache(maxsize=32)
def _transform_of(kind: str, offset: float, lam: float):
    from assim import filters

    return filters.Transform(kind, offset=offset, lam=lam)


def member_sd(a: np.ndarray) -> np.ndarray:
    """``a.std(axis=-1, ddof=1)`` of a (basin, member) or (basin, time, member) array, the
    same operations without the Python layers of ``ndarray.std``; each (basin, day) row is
    reduced alone, so a spread does not depend on the other rows."""
    n = a.shape[-1]
    mean = np.add.reduce(a, axis=-1, keepdims=True)
    np.true_divide(mean, n, out=mean)
    d = np.subtract(a, mean)
    np.square(d, out=d)
    out = np.add.reduce(d, axis=-1)
    np.true_divide(out, n - 1, out=out)
    return np.sqrt(out, out=out)


def collapse_counts(count: np.ndarray, has: np.ndarray, low: np.ndarray, days: np.ndarray,
                    limit: int) -> tuple[np.ndarray, np.ndarray]:
    """Consecutive-day counters of collapsed spread over a run of analysed days, at once.

    Day by day: a day with a reading and a low spread adds one, a day with a reading and a
    normal spread resets to 0, a day without a reading keeps the count; the warning day is the
    first day whose count equals ``limit``.

    Parameters
    ----------
    count : (basin,) int, counts before the first day
    has, low : (basin, day) bool, reading present; reading present and spread low
    days : (day,) int, day numbers
    limit : int, ``filter.collapse_days``

    Returns
    -------
    count : (basin,) int64 after the last day
    first : (basin,) int64, the first day number whose count equals ``limit``, -1 for none
    """
    nb, nd = has.shape
    count = np.asarray(count, dtype=np.int64)
    if nd == 0:
        return count.copy(), np.full(nb, -1, dtype=np.int64)
    lows = np.cumsum(low, axis=1, dtype=np.int64)  # low days so far
    reset = has & ~low
    last = np.maximum.accumulate(np.where(reset, np.arange(nd), -1), axis=1)  # last reset day so far
    at_reset = np.take_along_axis(lows, np.maximum(last, 0), axis=1)
    counts = np.where(last >= 0, lows - at_reset, count[:, None] + lows)
    hit = counts == limit
    first = np.where(hit.any(axis=1), np.asarray(days, dtype=np.int64)[hit.argmax(axis=1)], -1)
    return counts[:, -1].copy(), first


def liu_west_shrink(theta: np.ndarray, a: float, z: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Kernel shrinkage of parameter members before an analysis.

    Parameters
    ----------
    theta : (basin, member, n_param) float64
    a : shrinkage factor in (0, 1]
    z : (basin, member, n_param) standard normals
    low, high : (n_param,) valid range

    Returns
    -------
    (basin, member, n_param): ``a theta + (1 - a) mean + h sd z`` clipped to the range,
    ``h^2 = 1 - a^2``, so the ensemble mean and variance are kept in expectation.
    """
    mean = theta.mean(axis=1, keepdims=True)
    var = theta.var(axis=1, ddof=1, keepdims=True)
    h = np.sqrt(1.0 - a * a)
    # Liu & West (2001), eq. 10: theta_i <- a theta_i + (1 - a) mean + N(0, h^2 Var(theta))
    new = a * theta + (1.0 - a) * mean + h * np.sqrt(var) * z
    return np.clip(new, low, high)



def clipped_water(a, nb: int, nm: int, nu: int) -> np.ndarray:
    """Water added by clipping the updated states to their bounds, ensemble mean per basin (mm).

    ``a.clipped`` is (basin, n_col) summed over members; only the first ``nu`` columns are
    states (the others are discharge and parameters)."""
    c = np.asarray(a.clipped, dtype=np.float64).reshape(nb, -1)
    return c[:, :nu].sum(axis=1) / nm
