"""Verification metrics on numpy arrays, NaN-aware and vectorised over leading dimensions.

Axis conventions (every function follows them):

- ``obs`` : ``(..., time)`` — observed values; the *last* axis is the one a summary metric
  reduces over (time, or issue times at a fixed lead). NaN marks a missing reading.
- ``sim`` : ``(..., time)`` — a deterministic series of the same shape (or broadcastable),
  e.g. an ensemble reduced by the caller to its median or mean.
- ``ens`` : ``(..., time, member)`` — an ensemble: members on the *last* axis, time on the
  second-last. A forecast with any NaN member is treated as missing.
- leading dimensions ``...`` are any batch (basins, leads, experiments), computed at once.

Summary metrics (:func:`nse`, :func:`nse_log`, :func:`kge`, :func:`kge_modified`,
:func:`pbias`, :func:`rmse`, :func:`crpss`, :func:`spread_skill`, :func:`rank_histogram`,
:func:`reliability_table`) reduce over the time axis and return ``(...)`` (or ``(..., k)``).
Pointwise scores (:func:`crps_ensemble`, :func:`brier_score`, :func:`pit`) return one value
per forecast, shape ``obs.shape``; average them with :func:`mean_score`.

Only pairs where both sides are finite count; a summary over fewer than two pairs is NaN.
Discharge-valued results (RMSE, CRPS) carry the unit of the input (m3 s-1 in assim).

Sources: Nash & Sutcliffe (1970, J. Hydrol. 10); Gupta et al. (2009, J. Hydrol. 377);
Kling et al. (2012, J. Hydrol. 424-425); Knoben et al. (2019, HESS 23); Gneiting & Raftery
(2007, JASA 102); Ferro (2014, QJRMS 140); Brier (1950, MWR 78); Hamill (2001, MWR 129);
Fortin et al. (2014, J. Hydrometeor. 15). Equation numbers are given where recalled.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "Reliability",
    "brier_score",
    "count_pairs",
    "crps_ensemble",
    "crpss",
    "exceedance_probability",
    "kge",
    "kge_modified",
    "mean_score",
    "nse",
    "nse_log",
    "pbias",
    "pit",
    "rank_histogram",
    "reliability_table",
    "rmse",
    "spread_skill",
]


def _pairs(sim, obs):
    """Broadcast ``sim`` and ``obs``; return them with invalid pairs zeroed, and the mask."""
    sim, obs = np.broadcast_arrays(np.asarray(sim, dtype=float), np.asarray(obs, dtype=float))
    valid = np.isfinite(sim) & np.isfinite(obs)
    return np.where(valid, sim, 0.0), np.where(valid, obs, 0.0), valid


def _ens_pairs(obs, ens):
    """Obs ``(...,)`` and ens ``(..., member)``; a forecast with a NaN member is missing."""
    obs = np.asarray(obs, dtype=float)
    ens = np.asarray(ens, dtype=float)
    shape = np.broadcast_shapes(obs.shape, ens.shape[:-1])
    obs = np.broadcast_to(obs, shape)
    ens = np.broadcast_to(ens, shape + ens.shape[-1:])
    valid = np.isfinite(obs) & np.all(np.isfinite(ens), axis=-1)
    return np.where(valid, obs, 0.0), np.where(valid[..., None], ens, 0.0), valid


def _nan_where(value, ok):
    return np.where(ok, value, np.nan)


def _moments(sim, obs, valid):
    """Means, population standard deviations and covariance over the last axis."""
    n = valid.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mu_s = sim.sum(axis=-1) / n
        mu_o = obs.sum(axis=-1) / n
        ds = np.where(valid, sim - mu_s[..., None], 0.0)
        do = np.where(valid, obs - mu_o[..., None], 0.0)
        sd_s = np.sqrt((ds**2).sum(axis=-1) / n)
        sd_o = np.sqrt((do**2).sum(axis=-1) / n)
        cov = (ds * do).sum(axis=-1) / n
    return n, mu_s, mu_o, sd_s, sd_o, cov


def count_pairs(sim, obs) -> np.ndarray:
    """Number of pairs where both ``sim`` and ``obs`` are finite, over the last axis.

    Returns
    -------
    (...) int64
    """
    return _pairs(sim, obs)[2].sum(axis=-1)


def nse(sim, obs) -> np.ndarray:
    """Nash–Sutcliffe efficiency over the time axis.

    Parameters
    ----------
    sim, obs : (..., time) float, any unit (the same for both)

    Returns
    -------
    (...) float64, dimensionless; 1 is perfect, 0 is the skill of the observed mean.
    """
    s, o, valid = _pairs(sim, obs)
    n, _, mu_o, _, sd_o, _ = _moments(s, o, valid)
    sse = np.where(valid, (s - o) ** 2, 0.0).sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = 1.0 - sse / (n * sd_o**2)  # Nash & Sutcliffe (1970), efficiency R^2
    return _nan_where(value, (n >= 2) & (sd_o > 0))


def nse_log(sim, obs, offset=None) -> np.ndarray:
    """NSE of log-transformed flows, ``log(Q + offset)``, over the time axis.

    Parameters
    ----------
    sim, obs : (..., time) float, m3 s-1 (or any flow unit, the same for both)
    offset : float or (...) array, optional
        Added before the logarithm so that zero flows stay finite. Default: one hundredth
        of the mean observed flow of each series (Pushpalatha et al. 2012, J. Hydrol.
        420-421, 171-182, recommend mean(Q_obs)/100). Negative values give NaN pairs.

    Returns
    -------
    (...) float64, dimensionless
    """
    s, o, valid = _pairs(sim, obs)
    if offset is None:
        with np.errstate(invalid="ignore", divide="ignore"):
            offset = 0.01 * o.sum(axis=-1) / valid.sum(axis=-1)
    eps = np.asarray(offset, dtype=float)[..., None]
    with np.errstate(invalid="ignore", divide="ignore"):
        ls = np.log(np.where(valid, s, np.nan) + eps)
        lo = np.log(np.where(valid, o, np.nan) + eps)
    return nse(ls, lo)


def _kge(sim, obs, modified: bool):
    s, o, valid = _pairs(sim, obs)
    n, mu_s, mu_o, sd_s, sd_o, cov = _moments(s, o, valid)
    with np.errstate(invalid="ignore", divide="ignore"):
        # A constant simulation has no correlation: r = 0, as Knoben et al. (2019) take it
        # for the mean-flow benchmark.
        r = np.where(sd_s > 0, cov / (sd_s * sd_o), 0.0)
        beta = mu_s / mu_o
        if modified:
            var = (sd_s / mu_s) / (sd_o / mu_o)  # Kling et al. (2012), eq. 4
        else:
            var = sd_s / sd_o
        value = 1.0 - np.sqrt((r - 1) ** 2 + (var - 1) ** 2 + (beta - 1) ** 2)  # Gupta et al. (2009), eq. 9
    return _nan_where(value, (n >= 2) & (sd_o > 0) & (mu_o != 0))


def kge(sim, obs) -> np.ndarray:
    """Kling–Gupta efficiency (Gupta et al. 2009) over the time axis.

    ``KGE = 1 - sqrt((r-1)^2 + (alpha-1)^2 + (beta-1)^2)`` with r the Pearson correlation,
    alpha = sd(sim)/sd(obs), beta = mean(sim)/mean(obs). A constant simulation has r = 0, so
    the observed mean as a forecast scores 1 - sqrt(2) ~ -0.41 (Knoben et al. 2019).

    Parameters
    ----------
    sim, obs : (..., time) float

    Returns
    -------
    (...) float64, dimensionless; 1 is perfect.
    """
    return _kge(sim, obs, modified=False)


def kge_modified(sim, obs) -> np.ndarray:
    """Modified Kling–Gupta efficiency KGE' (Kling et al. 2012): the variability term is
    the ratio of coefficients of variation, gamma = (sd_s/mean_s) / (sd_o/mean_o).

    Parameters
    ----------
    sim, obs : (..., time) float

    Returns
    -------
    (...) float64, dimensionless
    """
    return _kge(sim, obs, modified=True)


def pbias(sim, obs) -> np.ndarray:
    """Percent bias ``100 * sum(sim - obs) / sum(obs)``; positive when sim overestimates.

    Parameters
    ----------
    sim, obs : (..., time) float

    Returns
    -------
    (...) float64, percent
    """
    s, o, valid = _pairs(sim, obs)
    n = valid.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = 100.0 * (s - o).sum(axis=-1) / o.sum(axis=-1)
    return _nan_where(value, n >= 1)


def rmse(sim, obs) -> np.ndarray:
    """Root mean square error over the time axis.

    Parameters
    ----------
    sim, obs : (..., time) float

    Returns
    -------
    (...) float64, unit of the input
    """
    s, o, valid = _pairs(sim, obs)
    n = valid.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.sqrt(((s - o) ** 2).sum(axis=-1) / n)
    return _nan_where(value, n >= 1)


def mean_score(score) -> np.ndarray:
    """Mean of a pointwise score over the last (time) axis, skipping NaN.

    Parameters
    ----------
    score : (..., time) float

    Returns
    -------
    (...) float64; NaN where no value is finite.
    """
    score = np.asarray(score, dtype=float)
    valid = np.isfinite(score)
    n = valid.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.where(valid, score, 0.0).sum(axis=-1) / n
    return _nan_where(value, n >= 1)


def crps_ensemble(obs, ens, *, fair: bool = False, skip_nan_members: bool = False) -> np.ndarray:
    """Continuous ranked probability score of an ensemble, one value per forecast.

    Exact for the empirical distribution of the members, from the sorted members in
    O(N log N): ``CRPS = mean|x_i - y| - (1/N^2) sum_i (2i - N - 1) x_(i)``, the kernel form
    ``E|X - y| - E|X - X'| / 2`` with the pairwise sum of sorted values written out.
    ``fair=True`` gives the fair (unbiased for the ensemble's parent distribution) score of
    Ferro (2014), which divides the pairwise sum by N(N-1) instead of N^2.

    Parameters
    ----------
    obs : (...) float, e.g. m3 s-1
    ens : (..., member) float, same unit
    fair : bool
    skip_nan_members : bool
        False (default): a forecast with a NaN member is missing. True: NaN members are
        left out and each forecast is scored on its finite members (a sample of varying
        size, e.g. a climatology); N is then the number of finite members.

    Returns
    -------
    (...) float64, unit of the input; NaN where obs is NaN, where a member is NaN (unless
    ``skip_nan_members``), where no member is finite, and for ``fair=True`` with one member.
    """
    obs = np.asarray(obs, dtype=float)
    ens = np.asarray(ens, dtype=float)
    shape = np.broadcast_shapes(obs.shape, ens.shape[:-1])
    y = np.broadcast_to(obs, shape)
    ens = np.broadcast_to(ens, shape + ens.shape[-1:])
    member_ok = np.isfinite(ens)
    if not skip_nan_members:
        member_ok = np.broadcast_to(np.all(member_ok, axis=-1, keepdims=True), ens.shape)
    # Missing members sort last, so the finite ones hold ranks 1..N of each forecast.
    x = np.sort(np.where(member_ok, ens, np.inf), axis=-1)
    ok = np.isfinite(x)
    n = ok.sum(axis=-1)
    x = np.where(ok, x, 0.0)
    y0 = np.where(np.isfinite(y), y, 0.0)
    rank = np.arange(1, x.shape[-1] + 1, dtype=float)
    spread = (x * (2.0 * rank - n[..., None] - 1.0) * ok).sum(axis=-1)  # = (1/2) sum_i sum_j |x_i - x_j|
    with np.errstate(invalid="ignore", divide="ignore"):
        distance = (np.abs(x - y0[..., None]) * ok).sum(axis=-1) / n
        if fair:
            value = distance - spread / (n * (n - 1.0))  # Ferro (2014), fair CRPS
        else:
            value = distance - spread / n**2  # Gneiting & Raftery (2007), eq. 21
    return _nan_where(value, np.isfinite(y) & (n >= (2 if fair else 1)))


def crpss(crps, crps_ref) -> np.ndarray:
    """Continuous ranked probability skill score ``1 - mean(CRPS) / mean(CRPS_ref)``.

    The means are taken over the same pairs: only times where both scores are finite.

    Parameters
    ----------
    crps, crps_ref : (..., time) float, pointwise CRPS (e.g. from :func:`crps_ensemble`)

    Returns
    -------
    (...) float64, dimensionless; 1 is perfect, 0 is the reference's skill.
    """
    c, r, valid = _pairs(crps, crps_ref)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = 1.0 - c.sum(axis=-1) / r.sum(axis=-1)
    return _nan_where(value, valid.sum(axis=-1) >= 1)


def exceedance_probability(ens, threshold) -> np.ndarray:
    """Fraction of members strictly above ``threshold``.

    Parameters
    ----------
    ens : (..., member) float, m3 s-1
    threshold : float or array broadcastable to ``ens.shape[:-1]``, m3 s-1

    Returns
    -------
    (...) float64 in [0, 1]; NaN where the threshold or a member is NaN.
    """
    ens = np.asarray(ens, dtype=float)
    thr = np.asarray(threshold, dtype=float)
    p = (ens > thr[..., None]).mean(axis=-1)
    ok = np.isfinite(thr) & np.all(np.isfinite(ens), axis=-1)
    return _nan_where(p, ok)


def brier_score(obs, ens, threshold) -> np.ndarray:
    """Brier score of the event "flow exceeds ``threshold``", one value per forecast.

    The forecast probability is the fraction of members above the threshold (as written in
    the forecast products); the outcome is 1 when the observation is above it.

    Parameters
    ----------
    obs : (...) float, m3 s-1
    ens : (..., member) float, m3 s-1
    threshold : float or array broadcastable to ``obs.shape``, m3 s-1

    Returns
    -------
    (...) float64 in [0, 1]; NaN where obs, the threshold or a member is NaN.
    """
    y, x, valid = _ens_pairs(obs, ens)
    thr = np.broadcast_to(np.asarray(threshold, dtype=float), y.shape)
    p = (x > thr[..., None]).mean(axis=-1)
    event = (y > thr).astype(float)
    value = (p - event) ** 2  # Brier (1950)
    return _nan_where(value, valid & np.isfinite(thr))


@dataclass(frozen=True)
class Reliability:
    """A reliability table of a probability forecast of one event.

    Attributes
    ----------
    bin_edges : (bins + 1,) float64, probability
    forecast_probability : (..., bins) float64, mean forecast probability in each bin
    observed_frequency : (..., bins) float64, observed relative frequency in each bin
    count : (..., bins) int64, forecasts in each bin
    """

    bin_edges: np.ndarray
    forecast_probability: np.ndarray
    observed_frequency: np.ndarray
    count: np.ndarray


def reliability_table(obs, ens, threshold, bins: int = 10) -> Reliability:
    """Reliability table of the exceedance of ``threshold`` over the time axis.

    Forecast probabilities (fraction of members above the threshold) are sorted into
    ``bins`` equal-width bins on [0, 1] (the last bin includes 1); for each bin the mean
    forecast probability, the observed frequency and the count are returned.

    Parameters
    ----------
    obs : (..., time) float, m3 s-1
    ens : (..., time, member) float, m3 s-1
    threshold : float or array broadcastable to ``obs.shape`` (e.g. ``(basin, 1, 1)``)
    bins : int

    Returns
    -------
    Reliability
        arrays shaped ``(..., bins)``; empty bins are NaN (count 0).
    """
    y, x, valid = _ens_pairs(obs, ens)
    thr = np.broadcast_to(np.asarray(threshold, dtype=float), y.shape)
    valid = valid & np.isfinite(thr)
    p = (x > thr[..., None]).mean(axis=-1)
    event = (y > thr).astype(float)
    # A tiny tolerance puts k/N that falls on a bin edge into the upper bin despite rounding.
    k = np.clip(np.floor(p * bins + 1e-9).astype(int), 0, bins - 1)
    onehot = (k[..., None] == np.arange(bins)) & valid[..., None]  # (..., time, bins)
    count = onehot.sum(axis=-2)
    with np.errstate(invalid="ignore", divide="ignore"):
        fp = (onehot * p[..., None]).sum(axis=-2) / count
        of = (onehot * event[..., None]).sum(axis=-2) / count
    return Reliability(
        bin_edges=np.linspace(0.0, 1.0, bins + 1),
        forecast_probability=_nan_where(fp, count > 0),
        observed_frequency=_nan_where(of, count > 0),
        count=count,
    )


def _ranks(obs, ens):
    """Members strictly below and equal to the observation, and the validity mask."""
    y, x, valid = _ens_pairs(obs, ens)
    below = (x < y[..., None]).sum(axis=-1)
    equal = (x == y[..., None]).sum(axis=-1)
    return below, equal, valid


def rank_histogram(obs, ens) -> np.ndarray:
    """Rank histogram (Talagrand diagram) over the time axis (Hamill 2001).

    The rank of an observation is the number of members below it, 0..N. Ties between the
    observation and members (frequent at zero or constant flows) are shared equally between
    the tied ranks: the expected histogram of the random tie-breaking Hamill (2001)
    recommends, without drawing random numbers. Counts can therefore be fractional.

    Parameters
    ----------
    obs : (..., time) float
    ens : (..., time, member) float

    Returns
    -------
    (..., member + 1) float64, counts per rank; they sum to the number of valid forecasts.
    """
    below, equal, valid = _ranks(obs, ens)
    m = np.asarray(ens).shape[-1]
    lead_shape = below.shape[:-1]
    n_series = int(np.prod(lead_shape, dtype=int))
    series = np.broadcast_to(np.arange(n_series).reshape(lead_shape + (1,)), below.shape)
    weight = np.where(valid, 1.0 / (equal + 1.0), 0.0)
    width = m + 2
    # Difference array: +w at the first tied rank, -w after the last, then a cumulative sum.
    start = (series * width + below).ravel()
    stop = (series * width + below + equal + 1).ravel()
    diff = np.bincount(start, weights=weight.ravel(), minlength=n_series * width)
    diff -= np.bincount(stop, weights=weight.ravel(), minlength=n_series * width)
    counts = np.cumsum(diff.reshape(lead_shape + (width,)), axis=-1)[..., : m + 1]
    return np.where(np.abs(counts) < 1e-9, 0.0, counts)


def pit(obs, ens) -> np.ndarray:
    """Probability integral transform values of ensemble forecasts, one per forecast.

    ``PIT = (r + 1/2) / (N + 1)`` with r the observation's rank among the N members (ties
    taken at the middle of the tied ranks), so that a calibrated ensemble gives values
    uniform on (0, 1) in N + 1 classes, consistent with :func:`rank_histogram`.

    Parameters
    ----------
    obs : (...) float
    ens : (..., member) float

    Returns
    -------
    (...) float64 in (0, 1); NaN where obs or a member is NaN.
    """
    below, equal, valid = _ranks(obs, ens)
    m = np.asarray(ens).shape[-1]
    return _nan_where((below + 0.5 * equal + 0.5) / (m + 1.0), valid)


def spread_skill(obs, ens) -> np.ndarray:
    """Spread–skill ratio with the finite-ensemble correction, over the time axis.

    ``sqrt((N+1)/N) * sqrt(mean(s^2)) / RMSE(ensemble mean)``, with s^2 the unbiased
    ensemble variance of each forecast; 1 for a calibrated ensemble of N members,
    below 1 when the ensemble is under-dispersive (Fortin et al. 2014).

    Parameters
    ----------
    obs : (..., time) float
    ens : (..., time, member) float, at least two members

    Returns
    -------
    (...) float64, dimensionless
    """
    y, x, valid = _ens_pairs(obs, ens)
    m = x.shape[-1]
    if m < 2:
        return np.full(valid.shape[:-1], np.nan)
    n = valid.sum(axis=-1)
    mean = x.mean(axis=-1)
    var = np.where(valid, x.var(axis=-1, ddof=1), 0.0)
    sq_err = np.where(valid, (mean - y) ** 2, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        spread = np.sqrt(var.sum(axis=-1) / n)
        skill = np.sqrt(sq_err.sum(axis=-1) / n)
        value = np.sqrt((m + 1.0) / m) * spread / skill  # Fortin et al. (2014), (N+1)/N factor
    return _nan_where(value, n >= 2)
