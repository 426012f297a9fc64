"""One ensemble Kalman analysis for many basins at once.

:func:`ensemble_update` corrects an ensemble of model states with the observations of one
time step. The caller supplies the predicted observations of each member (any nonlinear
observation operator: the model's discharge); the cross-covariance between the states and
those predictions carries the correction into the states. Leading dimensions are basins
(any batch shape); nothing is model-specific, so joint state-parameter estimation is done by
appending parameter columns to the state array.

How the numbers are computed (all methods, per basin)
-----------------------------------------------------
Observation errors are uncorrelated, so each observation is divided by its error standard
deviation ("whitened", R = I). With ``N`` members, prior state perturbations ``X'``,
whitened predicted perturbations ``Y'`` (member x n_obs), inflation factor ``g`` on the
perturbations, whitened innovation ``d``:

- ``C = X'^T Y' / (N - 1)`` (state-prediction cross-covariance, n_state x n_obs),
  ``A = g^2 Y'^T Y' / (N - 1)`` (predicted covariance, n_obs x n_obs);
- every method adds to the states an increment of rank <= n_obs, ``W C^T``, with member
  weights ``W`` (member x n_obs):

  - ``enkf``: ``W_i = g^2 (A + I)^-1 (d + z_i - g Y'_i)``, ``z_i`` standard normal
    observation perturbations (Burgers et al. 1998);
  - ``etkf``: ``W_i = g^2 (A + I)^-1 d + g^3 f(A) Y'_i`` with
    ``f(a) = ((1 + a)^-1/2 - 1) / a``: the symmetric square root transform of Hunt et al.
    (2007, eqs. 20-24), ``T = (I + S S^T)^-1/2`` in ensemble space with
    ``S = g Y' / sqrt(N - 1)``, moved to observation space by the identity
    ``(I + S S^T)^-1/2 = I + S f(S^T S) S^T`` (from the singular value decomposition of S);
  - ``eakf``: observations one at a time (Anderson 2001), each moving the predicted
    observation and regressing its increment onto the states and the remaining predicted
    observations (Anderson 2003). The sequence runs in observation space; the states'
    regression coefficients follow from one pass over the states, so the states are read
    once for all observations. For one observation it is the ``etkf`` formula.

Costs are O(N n_state n_obs) per basin plus O(n_obs^3) for the ``etkf`` eigenproblem. Every
call, with one observation per basin or many, runs the same stages, each written once below
in this order: checks and the assimilation space (``_prepare``); observation space, gate and
whitening (``_predicted``, ``_screen``, ``_whiten``); the member weights of each method; one
pass over the states for their member sums (``_contract``); the increment's products with
the prior (``_scalar_terms``, ``_matrix_terms``); inflation and the analysis moments
(``_relax_weights`` for RTPP, ``_moments``, ``_lost``); the update with multiplicative
inflation and RTPS folded in (``_update``, ``_redo_rtps``); clipping (``_clip_to_bounds``),
restore (``_restore``), spread after (``_spread_after``) and the result (``_result``). Only
the weights differ by the number of observations: with one per basin (the engine's case)
``_scalar_weights`` keeps observation space as (basin, member) vectors, with no (basin,
n_obs, n_obs) matrices and no solve (the gain is the (basin, n_state) vector
``cov(x, h) / (var(h) + R)``); with several, ``_matrix_weights`` solves or diagonalises. The
states are read for their sums of squares and their contraction with the member vectors,
and the result written by one product and one addition; the analysis spread follows from
small quantities. States whose member axis is fastest in memory, one (basin, member) plane
per state (a model's Fortran-ordered (batch, n_state) array, as the engine passes it), are
worked on plane by plane along contiguous members and the analysis keeps that layout; other
layouts are returned C-ordered. Every member sum and dot product is taken per basin, so a
basin's numbers never depend on the other basins of the call. Inflation costs no extra pass:
multiplicative inflation and RTPS are a per-column factor and shift in the update (RTPS's
factor comes from the analysis spread known beforehand), and RTPP, with
``X'a = g X' + W'C^T`` and ``X'b = g X'``, scales the weight perturbations ``W'`` by
``1 - alpha``. Spreads from sums of squares are recomputed from deviations for the basins
where the mean exceeds 1000 standard deviations (cancellation), so they keep about 1e-9
relative precision.

Perturbed observations of ``enkf`` are centred per basin and observation (their member
mean is removed). Centring makes the analysis mean exactly the Kalman update of the
ensemble mean, with no sampling noise, while the centred sample covariance (divisor N - 1)
keeps the expected perturbation variance equal to R. Centring uses only the members of one
basin on one day, which one call always holds, so the numbers still depend only on the
draws of that basin and day. ``centre_noise=False`` gives the uncentred scheme.

References
----------
Anderson, J. L. (2001). An ensemble adjustment Kalman filter for data assimilation.
    Mon. Wea. Rev. 129, 2884-2903.
Anderson, J. L. (2003). A local least squares framework for ensemble filtering.
    Mon. Wea. Rev. 131, 634-642.
Bishop, C. H., Etherton, B. J. & Majumdar, S. J. (2001). Adaptive sampling with the ensemble
    transform Kalman filter. Part I: Theoretical aspects. Mon. Wea. Rev. 129, 420-436.
Burgers, G., van Leeuwen, P. J. & Evensen, G. (1998). Analysis scheme in the ensemble Kalman
    filter. Mon. Wea. Rev. 126, 1719-1724.
Hunt, B. R., Kostelich, E. J. & Szunyogh, I. (2007). Efficient data assimilation for
    spatiotemporal chaos: a local ensemble transform Kalman filter. Physica D 230, 112-126.

This module imports numpy only.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from assim.errors import InputError
from assim.filters.inflation import (
    Inflation,
    relax_to_prior_perturbations,
    rtps_factor,
    update_inflation,
)
from assim.filters.obs import Transform

__all__ = ["METHODS", "Analysis", "ensemble_update"]

METHODS = ("enkf", "etkf", "eakf")

_NO_INFLATION = Inflation()  # (frozen record, safe to share)


@dataclass(frozen=True, eq=False)
class Analysis:
    """Result of one :func:`ensemble_update`.

    Shapes: ``...`` are the leading (basin) dimensions of the input.

    Attributes
    ----------
    states : (..., member, n_state) float64, mm
        Updated ensemble (same shape as the input states; states laid out member-fastest,
        one plane per state, come back in that layout).
    innovation : (..., n_obs) float64
        Observed minus ensemble mean of predicted, in the assimilation space; NaN where the
        reading is missing or the prediction is not finite.
    innovation_variance : (..., n_obs) float64
        ``HPH^T + R``: ensemble variance of predicted (after multiplicative inflation) plus
        the observation error variance, assimilation space.
    predicted_spread : (..., n_obs) float64
        Ensemble standard deviation of predicted before inflation, assimilation space.
    spread_before, spread_after : (..., n_state) float64, mm
        Ensemble standard deviation (ddof = 1) of each state before and after the analysis.
    used : (..., n_obs) bool
        Observations that entered the analysis.
    gated : (..., n_obs) bool
        Observations rejected by the innovation gate.
    missing : (..., n_obs) bool
        Observations absent (NaN reading or NaN error variance).
    invalid : (..., n_obs) bool
        Readings present but unusable: the transform is undefined at the reading or at a
        prediction, a prediction is not finite, or an updated state is not finite.
    clipped : (..., n_state) float64, mm
        Water added to the state by clipping to the bounds, summed over members: positive
        where members were raised to a lower bound, negative where lowered to an upper bound.
    updated : (...) bool
        Basins whose states were changed (at least one observation used).
    inflation_mean, inflation_sd : (...) float64 or None
        Adaptive inflation (a factor on the prior variance) after this analysis's update,
        the factor applied; None without adaptive inflation.
    """

    states: np.ndarray
    innovation: np.ndarray
    innovation_variance: np.ndarray
    predicted_spread: np.ndarray
    spread_before: np.ndarray
    spread_after: np.ndarray
    used: np.ndarray
    gated: np.ndarray
    missing: np.ndarray
    invalid: np.ndarray
    clipped: np.ndarray
    updated: np.ndarray
    inflation_mean: np.ndarray | None = None
    inflation_sd: np.ndarray | None = None

    @property
    def clipped_total(self) -> np.ndarray:
        """(...) float64, mm: clipped water summed over members and states (signed)."""
        return self.clipped.sum(axis=-1)


# --- stage 1: checks, the flat batch and the assimilation space ---------------------------


def _fail(message, variable, place=None):
    raise InputError(message, variable=variable, place=place)


def _check(states, predicted, observed, obs_variance, method, update_mask, obs_noise):
    X = np.asarray(states, dtype=np.float64)
    Y = np.asarray(predicted, dtype=np.float64)
    y = np.asarray(observed, dtype=np.float64)
    if method not in METHODS:
        _fail(f"method must be one of {METHODS}, got {method!r}", "method")
    if X.ndim < 2:
        _fail(f"states must be (..., member, n_state), got shape {X.shape}", "states")
    batch, N, n = X.shape[:-2], X.shape[-2], X.shape[-1]
    if N < 2:
        _fail(f"an ensemble needs at least 2 members, got {N}", "states")
    if Y.ndim != X.ndim or Y.shape[:-1] != X.shape[:-1]:
        _fail(
            f"predicted must be (..., member, n_obs) matching states {X.shape}, got {Y.shape}",
            "predicted",
        )
    m = Y.shape[-1]
    if y.shape != batch + (m,):
        _fail(f"observed must have shape {batch + (m,)}, got {y.shape}", "observed")
    r = np.asarray(obs_variance, dtype=np.float64)
    if r.shape != y.shape:
        try:
            r = np.broadcast_to(r, y.shape)
        except ValueError:
            _fail(
                f"obs_variance must broadcast to {y.shape}, got {np.shape(obs_variance)}",
                "obs_variance",
            )
    if update_mask is None:
        mask = None  # every column
    else:
        mask = np.asarray(update_mask)
        if mask.dtype != bool or mask.shape != (n,):
            _fail(
                f"update_mask must be a ({n},) bool array, got {mask.dtype} {mask.shape}",
                "update_mask",
            )
    noise = None
    if obs_noise is not None:
        noise = np.asarray(obs_noise, dtype=np.float64)
        if noise.shape != Y.shape:
            _fail(
                f"obs_noise must have the shape of predicted {Y.shape}, got {noise.shape}",
                "obs_noise",
            )
    return X, Y, y, r, mask, noise


def _prepare(states, predicted, observed, obs_variance, method, rng, update_mask, transform,
             obs_noise):
    """Check the arguments, flatten the batch and move to the assimilation space.

    Returns X2 (B, N, n) (a view of ``states`` when it can), Y2 (B, N, m) and y2 (B, m) in
    the assimilation space, r2 (B, m), missing (B, m) bool, cols (the updated columns),
    noise (B, N, m) or None, and the shapes of ``states`` and ``observed``."""
    X, Y, y, r, mask, noise = _check(
        states, predicted, observed, obs_variance, method, update_mask, obs_noise
    )
    if method == "enkf" and noise is None and rng is None:
        _fail("method 'enkf' needs rng or obs_noise for the perturbed observations", "rng")
    batch, N, n, m = X.shape[:-2], X.shape[-2], X.shape[-1], Y.shape[-1]
    B = math.prod(batch)
    X2 = X.reshape(B, N, n)
    Y2 = Y.reshape(B, N, m)
    y2 = y.reshape(B, m)
    r2 = np.ascontiguousarray(r).reshape(B, m)
    missing = ~(np.isfinite(y2) & np.isfinite(r2))
    bad = r2 <= 0.0  # (NaN compares False; where the reading is missing it is allowed)
    if bad.any() and (bad := bad & ~missing).any():
        b, j = np.argwhere(bad)[0]
        _fail(
            f"must be > 0 where a reading is present, got {r2[b, j]!r}",
            "obs_variance",
            f"batch index {np.unravel_index(b, batch) if batch else ()}, observation {j}",
        )
    if transform is not None and transform.kind != "none":
        y2 = transform.forward(y2)
        Y2 = transform.forward(Y2)
    cols = np.arange(n) if mask is None else np.flatnonzero(mask)
    if noise is not None:
        noise = noise.reshape(B, N, m)
    return X2, Y2, y2, r2, missing, cols, noise, X.shape, y.shape


# --- member sums, dot products and variances, per basin ----------------------------------

_vecmat = getattr(np, "vecmat", None)  # numpy >= 2.2


def _vm(v: np.ndarray, a: np.ndarray) -> np.ndarray:
    """``v^T a`` per basin for v (B, N) and a (B, N, n): (B, n), one pass over ``a``."""
    if _vecmat is not None:
        return _vecmat(v, a)
    return np.einsum("bi,bin->bn", v, a)


def _sum(a: np.ndarray) -> np.ndarray:
    """Member sum of a (B, N, k) array, (B, k)."""
    return np.matmul(np.ones(a.shape[1]), a)


def _cross(a: np.ndarray, vt: np.ndarray) -> np.ndarray:
    """``v^T a`` per basin for a (B, N, n) and v given transposed, vt (B, k, N): (B, k, n).

    Broadcast vector-matrix products read each basin's block of ``a`` once for all k
    vectors (it stays in cache), far faster than a batched matmul of small matrices."""
    if _vecmat is not None:
        return _vecmat(vt, a[:, None])
    return np.einsum("bki,bin->bkn", vt, a)


def _planes_of(X2: np.ndarray) -> np.ndarray | None:
    """The states as (n, B, N) planes if their member axis is the fastest in memory and
    each state is one contiguous (basin, member) plane (a model's Fortran-ordered
    (batch, n_state) array, the engine's layout), else None (worked on as (B, N, n))."""
    B, N, _ = X2.shape
    st = X2.strides
    if st[1] == X2.itemsize and (B == 1 or st[0] == N * X2.itemsize):
        return X2.transpose(2, 0, 1)
    return None


def _squares(X2, XT, cols):
    """Member sums of squares of the states (B, n), one pass, and which basins have every
    updated column finite (B,) bool: a NaN or infinite state shows in its sum of squares."""
    xsq = np.vecdot(XT, XT).T if XT is not None else np.einsum("bin,bin->bn", X2, X2)
    if not cols.size:
        return xsq, np.zeros(X2.shape[0], bool)
    full = cols.size == X2.shape[2]
    return xsq, np.logical_and.reduce(np.isfinite(xsq if full else xsq[:, cols]), axis=1)


def _contract(X2, XT, V, ones):
    """``V^T X`` per basin (B, k, n) for the member vectors V (B, k, N), whose row 0 is the
    ones (member sums): one pass over C-ordered states for all k vectors, or on planes one
    pass per vector along contiguous members."""
    if XT is None:
        return _cross(X2, V)
    k = V.shape[1]
    sums = np.empty((XT.shape[0], XT.shape[1], k))
    np.vecdot(XT, ones, out=sums[:, :, 0])
    for j in range(1, k):
        np.vecdot(XT, V[:, j], out=sums[:, :, j])
    return sums.transpose(1, 2, 0)


def _exact_variance(a: np.ndarray) -> np.ndarray:
    """Two-pass ensemble variance (ddof = 1) of a (B, N, k) array, (B, k)."""
    dev = a - (_sum(a) / a.shape[1])[:, None, :]
    return np.einsum("bik,bik->bk", dev, dev) / (a.shape[1] - 1)


# Variances from member sums of squares lose about (mean / sd)^2 N eps of their relative
# precision; where the mean exceeds sqrt(_CANCELLATION_RATIO) standard deviations they are
# recomputed from deviations (two passes) for the basins concerned.
_CANCELLATION_RATIO = 1e6


def _variance(a: np.ndarray, total: np.ndarray, squares: np.ndarray) -> np.ndarray:
    """Ensemble variance (ddof = 1) of a (B, N, k) array from its member sums and sums of
    squares, recomputed from deviations where cancellation would cost precision."""
    N = a.shape[1]
    mean = total / N
    var = np.maximum(squares - total * mean, 0.0) / (N - 1)
    redo = ~(mean * mean <= _CANCELLATION_RATIO * var)  # (comparisons raise no FP error)
    redo = np.logical_or.reduce(redo, axis=-1)
    count = np.count_nonzero(redo)
    if not count:
        return var
    redo &= np.logical_and.reduce(np.isfinite(squares), axis=-1)
    count = np.count_nonzero(redo)
    if count > 0.25 * redo.size:
        var[redo] = _exact_variance(a)[redo]
    elif count:
        var[redo] = _exact_variance(a[redo])
    return var


def _variance_of(a: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Ensemble variance of the basins ``rows`` of a (B, N, k) array, (rows.sum(), k)."""
    if np.count_nonzero(rows) > 0.25 * rows.size:
        return _variance(a, _sum(a), np.einsum("bin,bin->bn", a, a))[rows]
    sub = a[rows]
    return _variance(sub, _sum(sub), np.einsum("bin,bin->bn", sub, sub))


# --- stage 2: observation space, screening (gate) and whitening ---------------------------
#
# The inflation factor g on the perturbations is a number, or with adaptive inflation one
# factor per basin, a (B, 1) array, which broadcasts against (B, m) and (B, n) quantities;
# ``_g3`` gives it the shape (B, 1, 1) for (B, m, N) and (B, m, n) ones.


def _g3(gamma):
    """The inflation factor for (B, k, l) arrays: the number, or (B, 1, 1)."""
    return gamma if np.ndim(gamma) == 0 else gamma[:, :, None]


def _is_one(gamma) -> bool:
    return np.ndim(gamma) == 0 and gamma == 1.0


def _adapt(infl, state, innovation, var_y, r2, used_prior, gamma0):
    """Adaptive inflation (:func:`assim.filters.inflation.update_inflation`) of each basin by
    its observations in turn; returns the updated (mean, sd) (B,) and the factor on the
    perturbations g (B, 1), ``multiplicative * sqrt(mean)``."""
    mean, sd = state
    for j in range(innovation.shape[1]):  # (over the observations of a basin, usually one)
        mean, sd = update_inflation(mean, sd, innovation[:, j], gamma0**2 * var_y[:, j], r2[:, j],
                                    infl.adaptive, use=used_prior[:, j])
    return mean, sd, (gamma0 * np.sqrt(mean))[:, None]


def _predicted(Y2, y2, r2, gamma, Yp, ones):
    """Predicted mean ybar (B, m), perturbations written into ``Yp`` (B, m, N; the member
    axis fast), their variance var_y (B, m) (before inflation), the innovation and its
    expected variance ``g^2 var_y + R`` (B, m)."""
    N = Y2.shape[1]
    YT = Y2.transpose(0, 2, 1)
    ybar = np.vecdot(YT, ones) / N
    np.subtract(YT, ybar[:, :, None], out=Yp)
    var_y = np.vecdot(Yp, Yp) / (N - 1)
    innovation = y2 - ybar
    innovation_variance = (var_y if gamma == 1.0 else gamma**2 * var_y) + r2
    return ybar, var_y, innovation, innovation_variance


def _screen(missing, innovation, var_y, innovation_variance, states_ok, gate_sigma):
    """Which observations enter the analysis (B, m) bool: ``used``, ``gated`` (innovation
    gate, from the prior statistics) and ``invalid`` (present but unusable: the transform
    undefined at the reading or a prediction, a prediction or an updated state not
    finite)."""
    present = ~missing
    usable = present & np.isfinite(innovation) & np.isfinite(var_y) & states_ok[:, None]
    invalid = present ^ usable
    if gate_sigma:
        # (the variance can be negative only where the reading is missing, hence unusable)
        limit = gate_sigma * np.sqrt(np.maximum(innovation_variance, 0.0))
        gated = usable & (np.abs(innovation) > limit)
        used = usable ^ gated
    else:
        gated = np.zeros_like(usable)
        used = usable
    return used, gated, invalid


def _whiten(Yp, var_y, innovation, r2, used, all_used, gamma):
    """Divide each observation by its error sd (R = I); an unused one gets weight 0, so it
    contributes exactly nothing. Scales ``Yp`` in place; returns s = R^-1/2 (B, m), the
    whitened innovation d (B, m) and the whitened inflated predicted variance a (B, m)."""
    if all_used:
        s = 1.0 / np.sqrt(r2)
        dw = innovation * s
        a = var_y * (s * s)
    else:
        s = np.where(used, 1.0 / np.sqrt(np.where(used, r2, 1.0)), 0.0)
        Yp[~used] = 0.0
        dw = np.where(used, innovation, 0.0) * s
        a = np.where(used, var_y, 0.0) * (s * s)
    Yp *= s[:, :, None]
    if not _is_one(gamma):
        a = gamma**2 * a
    return s, dw, a


def _perturbations(noise, rng, B, N, m):
    """Standard normal observation perturbations of ``enkf``, z (B, m, N): ``obs_noise``
    as given, else drawn from ``rng``."""
    z = noise if noise is not None else rng.standard_normal((B, N, m))
    return z.transpose(0, 2, 1)


# --- stage 3: member weights of each method ------------------------------------------------
#
# Every method adds to the states the increment W^T C^T (member weights W (B, m, N), the
# state-prediction cross-covariance C^T (B, m, n)). The weights are kept as W = f U with a
# per-observation factor f that is moved onto C^T (f None: W = U). With one observation the
# innovation variance is a scalar and the weights closed formulas: no (m, m) matrix, no
# solve, no eigenproblem.


def _sqrt_weight(a: np.ndarray) -> np.ndarray:
    """``((1 + a)^-1/2 - 1) / a``, written so that it holds at ``a = 0`` (value -1/2)."""
    root = np.sqrt(1.0 + np.maximum(a, 0.0))
    return -1.0 / (root * (1.0 + root))


def _scalar_weights(method, Yp, dw, a, z, gamma, U, ones):
    """Member weights for one observation, W = f u.

    Yp (B, 1, N) whitened predicted perturbations; dw, a (B, 1); z (B, 1, N) or None
    (enkf; any centring is already in dw); U (B, 1, N) the buffer for u when u is
    contracted with the states (enkf), else None. Returns u (B, 1, N), f (B, 1), the
    weights' member mean wbar (B, 1) and what :func:`_scalar_terms` needs."""
    N = Yp.shape[2]
    if method == "enkf":
        # Burgers et al. (1998): w_i = g^2 (a + 1)^-1 (d + z_i - g y'_i) = f u_i
        f = gamma**2 / (1.0 + a)
        if _is_one(gamma):
            u = np.subtract(z, Yp, out=U)
        else:
            u = np.multiply(Yp, -_g3(gamma), out=U)
            u += z
        u += dw[:, :, None]
        usum = np.vecdot(u, ones)
        ubar = usum / N
        # sum of (u - ubar)^2 from sums: u is z plus small terms, its spread about 1 and its
        # mean the whitened innovation, so this loses nothing unless the innovation is
        # thousands of spreads (such basins are recomputed from the states, _scalar_terms)
        uu = np.vecdot(u, u) - usum * ubar
        return u, f, f * ubar, (a, usum, uu)
    # Hunt et al. (2007), eqs. 20 and 24: w_i = wbar + p y'_i = p u_i (for eakf, one
    # observation gives the same ensemble: Anderson 2001)
    wbar = gamma**2 * dw / (1.0 + a)
    f = gamma**3 * _sqrt_weight(a)
    u = Yp + (wbar / f)[:, :, None]
    return u, f, wbar, (a, None, None)


def _scalar_terms(method, N, sums, Ct, xbar, f, terms, gamma):
    """The increment's products with the prior perturbations for one observation.

    sums (B, k, n_u): member sums of the states with (ones, y', u); Ct (B, 1, n_u); xbar
    (B, n_u) the prior mean. Returns C^T (B, 1, n_u), ``W'X'`` (B, 1, n_u), ``W'W'^T``
    (B, 1, 1) and the basins (B,) bool whose ``W'W'^T`` from sums of squares is imprecise
    (None where that cannot happen)."""
    a, usum, uu = terms
    if method == "enkf":
        # w' = f (u - ubar): w'^T X' = f (X^T u - sum(u) xbar) and w'^T w'
        WX = f[:, :, None] * (sums[:, 2:3] - usum[:, :, None] * xbar[:, None, :])
        WtW = (f * f * uu)[:, :, None]
        ubar = usum[:, 0] / N
        # a mean of u too large for its sums of squares (see _scalar_weights)
        imprecise = ~(ubar * ubar <= (_CANCELLATION_RATIO / (N - 1)) * uu[:, 0])
        return Ct, WX, WtW, imprecise
    # w' = p y', so w'^T X' = (N - 1) p C and w'^T w' = (N - 1) p^2 a / g^2.
    WX = (N - 1) * (f[:, :, None] * Ct)
    WtW = (((N - 1) / gamma**2) * (f * a * f))[:, :, None]
    return Ct, WX, WtW, None


def _matrix_weights(method, Yp, dw, z, gamma, U, s, ybar, y2, used):
    """Member weights for several observations, W (B, m, N) (f = 1).

    Yp (B, m, N) whitened predicted perturbations (replaced, for the serial adjustment, by
    those of each observation at its turn); dw (B, m); z (B, m, N) or None; U (B, m, N) the
    buffer for the centred weights W' contracted with the states (enkf, eakf), else None.
    Returns W, wbar (B, m) and what :func:`_matrix_terms` needs."""
    B, m, N = Yp.shape
    g3 = _g3(gamma)
    A = g3**2 * np.einsum("bmi,bki->bmk", Yp, Yp) / (N - 1)
    if method == "eakf":
        ybar_w = np.where(used, ybar, 0.0) * s
        y_w = np.where(used, y2, 0.0) * s
        W, YP, inv_var = _eakf_observation_space(Yp, ybar_w, y_w, used, gamma)
        Yp[...] = YP
        wbar = W.mean(axis=2)
        np.subtract(W, wbar[:, :, None], out=U)
        return W, wbar, (A, None, inv_var, W)
    if method == "enkf":
        rhs = dw[:, :, None] + z - g3 * Yp
        W = g3**2 * np.linalg.solve(A + np.eye(m), rhs)  # Burgers et al. (1998)
        wbar = np.add.reduce(W, axis=2) / N
        np.subtract(W, wbar[:, :, None], out=U)
        return W, wbar, (A, None, None, None)
    lam, V = np.linalg.eigh(A)
    Vt = np.swapaxes(V, 1, 2)
    inv = (V / (1.0 + lam)[:, None, :]) @ Vt
    wbar = gamma**2 * np.einsum("bjl,bl->bj", inv, dw)  # Hunt et al. (2007), eq. 20
    P = g3**3 * ((V * _sqrt_weight(lam)[:, None, :]) @ Vt)
    return wbar[:, :, None] + P @ Yp, wbar, (A, P, None, None)  # Hunt et al. (2007), eq. 24


def _matrix_terms(method, N, sums, Ct, xbar, U, Yp, terms, gamma):
    """:func:`_scalar_terms` for several observations: sums (B, k, n_u) of the states
    with (ones, Y', W'), U the centred weights W' (B, m, N) (enkf, eakf)."""
    A, P, inv_var, DY = terms
    m = Ct.shape[1]
    if P is not None:
        # W' = P Y', so W' X' = (N - 1) P C^T and W' W'^T = (N - 1) P A P / g^2.
        return Ct, (N - 1) * (P @ Ct), ((N - 1) / _g3(gamma) ** 2) * (P @ A @ P), None
    if inv_var is not None:
        # The serial adjustment's "cross-covariance" is its regression coefficients; the
        # prior states enter inflated, X_1 = xbar + g X'.
        Ct = _eakf_regression(_g3(gamma) * Ct, DY, Yp, inv_var)
    WX = sums[:, 1 + m :] - U.sum(axis=2)[:, :, None] * xbar[:, None, :]
    return Ct, WX, np.einsum("bmi,bki->bmk", U, U), None


def _eakf_observation_space(Ypw, ybar_w, y_w, used, gamma):
    """Serial ensemble adjustment in observation space, one observation at a time.

    Ypw (B, m, N) whitened predicted perturbations; ybar_w, y_w, used (B, m) whitened
    predicted mean, whitened reading, use flag; gamma the inflation factor. Returns, for
    each observation at its turn, the increments of its predicted members DY (B, m, N), its
    centred predicted members YP (B, m, N) and 1 / their variance (B, m; 0 if none). The
    states follow by regression on YP (see :func:`_eakf_regression`), so they are read once
    for all observations instead of once per observation."""
    B, m, N = Ypw.shape
    Y = ybar_w[:, :, None] + _g3(gamma) * Ypw
    DY = np.zeros((B, m, N))
    YP = np.empty((B, m, N))
    inv_var = np.zeros((B, m))
    for j in range(m):
        yj = Y[:, j]
        ym = yj.mean(axis=1)
        yp = np.subtract(yj, ym[:, None], out=YP[:, j])
        var = np.einsum("bi,bi->b", yp, yp) / (N - 1)
        # Anderson (2001): the scalar posterior (R = 1 after whitening) and the members
        # shifted to its mean and shrunk to its spread.
        shift = var / (1.0 + var) * (y_w[:, j] - ym)
        dy = shift[:, None] + (1.0 / np.sqrt(1.0 + var) - 1.0)[:, None] * yp
        DY[:, j] = np.where(used[:, j, None], dy, 0.0)
        inv_var[:, j] = np.where(var > 0.0, 1.0 / np.where(var > 0.0, var, 1.0), 0.0)
        if j + 1 < m:
            # Anderson (2003): the increment regressed onto the remaining predictions.
            rest = Y[:, j + 1 :]
            by = np.einsum("bki,bi->bk", rest, yp) * (inv_var[:, j] / (N - 1))[:, None]
            rest += by[:, :, None] * DY[:, j][:, None, :]
    return DY, YP, inv_var


def _eakf_regression(G, DY, YP, inv_var):
    """Regression coefficients (B, m, n) of the serial adjustment's state increments.

    At its turn, observation j moves the states by ``DY_j b_j`` with
    ``b_j = cov(X_j, YP_j) / var_j`` (Anderson 2003), ``X_j`` the states after the earlier
    observations: ``cov(X_j, YP_j) = G_j + sum_k<j b_k cov(DY_k, YP_j)``, with
    ``G_j = cov(X_1, YP_j)`` (B, m, n) from the prior states."""
    N = DY.shape[2]
    Q = np.einsum("bki,bji->bkj", DY, YP) / (N - 1)
    b = np.empty_like(G)
    for j in range(G.shape[1]):
        cov = G[:, j] + np.einsum("bk,bkn->bn", Q[:, :j, j], b[:, :j])
        b[:, j] = cov * inv_var[:, j, None]
    return b



# --- stage 4: inflation (RTPP, RTPS) and the analysis moments ------------------------------
#
# Inflation costs no extra pass over the states. Multiplicative inflation g enters the
# weights (above) and the update as a factor and shift per column; RTPP, with
# X'a = g X' + W'^T C^T and X'b = g X', scales the weight perturbations W' by 1 - alpha;
# RTPS is a factor on the analysis perturbations, known beforehand from the analysis spread
# computed from small quantities (the prior spread, W'X' and W'W'^T).


def _relax_weights(u, f, wbar, WX, WtW, rtpp):
    """RTPP (Zhang et al. 2004) on the weights: the perturbations of u (B, m, N) about
    their mean ``wbar / f`` shrink by ``1 - rtpp``, and the products with them too."""
    shrink = 1.0 - rtpp
    ubar = wbar if f is None else wbar / f
    u = ubar[:, :, None] + relax_to_prior_perturbations(u - ubar[:, :, None], 0.0, rtpp)
    return u, shrink * WX, shrink**2 * WtW


def _per_obs_sum(a):
    """Sum over the observation axis of a (B, m, n) array, (B, n)."""
    return a[:, 0] if a.shape[1] == 1 else a.sum(axis=1)


def _moments(Ct, WX, WtW, wbar, xbar_u, var_u, gamma, N):
    """Analysis mean and variance (B, n_u) from small quantities, X'a = g X' + W'^T C^T:
    sum X'a^2 = g^2 sum X'^2 + 2 g C (W'X') + C (W'W'^T) C^T."""
    WtWC = WtW * Ct if Ct.shape[1] == 1 else WtW @ Ct
    var_a = ((gamma**2 * (N - 1)) * var_u + _per_obs_sum(Ct * ((2.0 * _g3(gamma)) * WX + WtWC))) / (
        N - 1
    )
    mean_a = xbar_u + _per_obs_sum(wbar[:, :, None] * Ct)
    return var_a, mean_a


def _lost(var_a, mean_a, var_u, gamma, active, imprecise):
    """Basins (B,) whose analysis spreads are recomputed from the states: the analysis
    spread lost most of the prior's, or the mean is too large for sums of squares."""
    exact = (var_a > (1e-6 * gamma**2) * var_u) & (mean_a * mean_a <= _CANCELLATION_RATIO * var_a)
    lost = ~np.logical_and.reduce(exact, axis=1)
    if imprecise is not None:
        lost |= imprecise
    lost &= active
    return lost


def _redo_rtps(Xa: np.ndarray, lost: np.ndarray, scale: np.ndarray, sd_prior: np.ndarray, rtps: float) -> None:
    """Redo, in place, the RTPS factor of the basins ``lost`` from their states, where the
    spread from small quantities was not precise enough: the update was a scaling by
    ``scale`` about the mean, so it can be undone and applied again exactly.

    Xa : (B, N, k) analysis; lost : (B,) bool; scale : (B, k) factor used;
    sd_prior : (lost basins, k) prior spread
    """
    sub = Xa[lost]
    sub_mean = _sum(sub) / sub.shape[1]
    sd_now = np.sqrt(_exact_variance(sub))
    s_used = scale[lost]
    ok = s_used > 0.0
    sd_pre = np.where(ok, sd_now / np.where(ok, s_used, 1.0), 0.0)
    s_exact = rtps_factor(sd_prior, sd_pre, rtps)
    ratio = np.where(ok, s_exact / np.where(ok, s_used, 1.0), 1.0)
    Xa[lost] = sub_mean[:, None, :] + ratio[:, None, :] * (sub - sub_mean[:, None, :])


# --- stage 5: the update of the states ------------------------------------------------------


def _per_column(v, planes):
    """A per-(basin, column) quantity v (B, n) broadcast against the work array: (B, 1, n),
    or (n, B, 1) on planes."""
    return np.ascontiguousarray(v.T)[:, :, None] if planes else v[:, None, :]


def _write(Xw, u, K, planes, G=None, c=None):
    """``(Xw + u^T K) G + c`` per basin and column, a new array: Xw (B, N, n) and the
    result in that layout, or on planes Xw (n, B, N) and the result (n, B, N); u (B, m, N);
    K (B, m, n); G and c, if given, (B, n) (G may be a number).

    On planes a large batch is done one plane at a time, so that each plane is still in
    cache for the next operation; either way each element gets the same operations."""
    m = u.shape[1]
    if not planes:
        if m == 1:
            out = np.einsum("bi,bn->bin", u[:, 0], K[:, 0])
        else:
            out = np.matmul(np.ascontiguousarray(np.swapaxes(u, 1, 2)), K)
        out += Xw
        if G is not None:
            out *= G if np.ndim(G) == 0 else G[:, None, :]
        if c is not None:
            out += c[:, None, :]
        return out
    out = np.empty(Xw.shape)
    KT = np.ascontiguousarray(K[:, 0].T if m == 1 else K.transpose(2, 0, 1))  # (n, B[, m])
    GT = None if G is None or np.ndim(G) == 0 else np.ascontiguousarray(G.T)
    cT = None if c is None else np.ascontiguousarray(c.T)
    if m == 1 and u[:, 0].size <= 4096:
        np.multiply(KT[:, :, None], u[None, :, 0], out=out)
        out += Xw
        if G is not None:
            out *= G if GT is None else GT[:, :, None]
        if c is not None:
            out += cT[:, :, None]
        return out
    for j in range(out.shape[0]):  # (over the state columns)
        if m == 1:
            plane = np.multiply(u[:, 0], KT[j][:, None], out=out[j])
        else:
            plane = out[j]
            plane[...] = _vm(KT[j], u)
        plane += Xw[j]
        if G is not None:
            plane *= G if GT is None else GT[j][:, None]
        if c is not None:
            plane += cT[j][:, None]
    return out


def _update(Xw, u, f, Ct, var_u, var_a, mean_a, xbar_u, gamma, rtps, planes):
    """The analysis in one pass over the states: Xa = G X + u^T (f C')^T + c per basin and
    column, with multiplicative inflation (inflation.inflate) and RTPS (Whitaker & Hamill
    2012: the analysis perturbations scaled about the analysis mean) folded into G, C', c.

    Returns Xa (B, N, n_u) (a view of the planes when ``planes``), the analysis variance
    after RTPS (B, n_u) and the RTPS factor (B, n_u) or None."""
    K = Ct if f is None else f[:, :, None] * Ct
    scale = None
    if rtps > 0.0:
        scale = rtps_factor(gamma * np.sqrt(var_u), np.sqrt(var_a), rtps)
        G = gamma * scale
        K = K * scale[:, None, :]
        c = scale * ((1.0 - gamma) * xbar_u - mean_a) + mean_a
        var_a = scale**2 * var_a
        if bool(np.logical_and.reduce(G > 0.0, axis=None)):
            work = _write(Xw, u, K / G[:, None, :], planes, G, c)
        else:
            work = _write(_per_column(G, planes) * Xw, u, K, planes, None, c)
    elif _is_one(gamma):
        work = _write(Xw, u, K, planes)
    elif np.ndim(gamma) == 0:
        # G = gamma everywhere: (X + u K^T / g) g + (1 - g) xbar
        work = _write(Xw, u, K / gamma, planes, gamma, (1.0 - gamma) * xbar_u)
    else:
        # one factor per basin, G (B, n_u) (adaptive inflation)
        G = np.broadcast_to(gamma, xbar_u.shape)
        work = _write(Xw, u, K / gamma[:, :, None], planes, G, (1.0 - G) * xbar_u)
    return (work.transpose(1, 2, 0) if planes else work), var_a, scale


# --- stage 6: bounds, restore, spread after, result ----------------------------------------


def _bounds(bound, name, cols, full, shape, B):
    """A bound broadcast to the updated columns, (B, N, n_u), without copying if it can;
    None if it is -inf (lower) or +inf (upper) everywhere: nothing to clip."""
    arr = np.asarray(bound, dtype=np.float64)
    same = arr.shape == shape
    if not same:
        try:
            np.broadcast_shapes(arr.shape, shape)
        except ValueError:
            _fail(f"must broadcast to the states' shape {shape}, got {arr.shape}", name)
    if not full and arr.ndim and arr.shape[-1] != 1:
        arr = arr[..., cols]
    # all -inf (lower) / all +inf (upper), by one reduction (a NaN makes it False, as ==)
    if not arr.size:
        return None
    if name == "lower":
        if np.maximum.reduce(arr, axis=None) == -np.inf:
            return None
    elif np.minimum.reduce(arr, axis=None) == np.inf:
        return None
    if same:
        return arr.reshape(B, shape[-2], cols.size)
    return np.broadcast_to(arr, shape[:-1] + (cols.size,)).reshape(B, shape[-2], cols.size)


def _clip(Xa, lo, hi, active):
    """Clip the analysis (B, N, n_u) in place to its bounds, basins ``active`` only.

    Returns the clipped water (B, n_u), mm summed over members (positive where members were
    raised to a lower bound), and which basins had any member outside (B,) bool."""
    B = Xa.shape[0]
    below = None if lo is None else np.logical_or.reduce(np.less(Xa, lo), axis=(1, 2))
    above = None if hi is None else np.logical_or.reduce(np.greater(Xa, hi), axis=(1, 2))
    outside = below if above is None else above if below is None else below | above
    outside &= active
    clipped = np.zeros((B, Xa.shape[2]))
    if not np.logical_or.reduce(outside):
        return clipped, outside
    count = np.count_nonzero(outside)
    if 0 < count <= max(1, B // 8):
        # Few basins out of bounds: clip just those, the clipped water exactly.
        raw = Xa[outside]
        fixed = raw
        if lo is not None:
            fixed = np.maximum(fixed, lo[outside])
        if hi is not None:
            fixed = np.minimum(fixed, hi[outside])
        Xa[outside] = fixed
        clipped[outside] = (fixed - raw).sum(axis=1)
    elif count:
        # Many: clip in place; a column with nothing clipped has bitwise the same member
        # sum before and after, so its clipped water is exactly zero. Inactive basins are
        # restored by the caller.
        before = _sum(Xa)
        if lo is not None:
            np.maximum(Xa, lo, out=Xa)
        if hi is not None:
            np.minimum(Xa, hi, out=Xa)
        clipped = np.where(outside[:, None], _sum(Xa) - before, 0.0)
    return clipped, outside




def _clip_to_bounds(Xa, lower, upper, cols, shape, active):
    """Clip the analysis Xa (B, N, n_u) in place to the bounds, basins ``active`` only.
    Returns the clipped water (B, n) (mm summed over members, 0 outside ``cols``) and
    which basins had a member outside (B,) bool, or None when there is nothing to clip."""
    B = Xa.shape[0]
    n = shape[-1]
    clipped = np.zeros((B, n))
    if lower is None and upper is None:
        return clipped, None
    full = cols.size == n
    lo = None if lower is None else _bounds(lower, "lower", cols, full, shape, B)
    hi = None if upper is None else _bounds(upper, "upper", cols, full, shape, B)
    if lo is None and hi is None:
        return clipped, None
    clipped[:, cols], outside = _clip(Xa, lo, hi, active)
    return clipped, outside


def _restore(Xa, X2, cols, active, all_active):
    """The analysis of every column (B, N, n), in the states' layout: the updated columns
    from Xa, the others and the basins not ``active`` the prior bit for bit."""
    if cols.size == X2.shape[2]:
        out = Xa
    else:
        out = X2.copy(order="K")
        out[:, :, cols] = Xa
    if not all_active:
        out[~active] = X2[~active]
    return out


def _spread_after(out, var_b, var_a, cols, active, all_active, redo):
    """Ensemble variance after the analysis (B, n): unchanged columns and basins keep the
    prior value, the updated ones come from the small-quantity formula (var_a, B x n_u)
    except the basins ``redo`` (clipped or imprecise), recomputed from the states."""
    full = cols.size == var_b.shape[1]
    any_redo = bool(np.logical_or.reduce(redo))
    if full and all_active and not any_redo:
        return var_a
    var_after = var_b.copy()
    keep = active & ~redo
    if full:
        var_after[keep] = var_a[keep]
    else:
        var_after[np.ix_(keep, cols)] = var_a[keep]
    if any_redo:
        var_after[redo] = _variance_of(out, redo)
    return var_after


def _result(out, innovation, innovation_variance, var_y, var_b, var_after, used, gated, missing,
            invalid, clipped, active, all_used, shape, yshape, adapted=None):
    """The :class:`Analysis`, reshaped to the caller's batch."""
    if not all_used:
        bad = missing | ~np.isfinite(innovation)
        innovation = np.where(bad, np.nan, innovation)
        innovation_variance = np.where(bad, np.nan, innovation_variance)
    state_shape = shape[:-2] + (shape[-1],)
    return Analysis(
        states=out.reshape(shape),
        innovation=innovation.reshape(yshape),
        innovation_variance=innovation_variance.reshape(yshape),
        predicted_spread=np.sqrt(var_y).reshape(yshape),
        spread_before=np.sqrt(var_b).reshape(state_shape),
        spread_after=np.sqrt(var_after).reshape(state_shape),
        used=used.reshape(yshape),
        gated=gated.reshape(yshape),
        missing=missing.reshape(yshape),
        invalid=invalid.reshape(yshape),
        clipped=clipped.reshape(state_shape),
        updated=active.reshape(shape[:-2]),
        inflation_mean=None if adapted is None else adapted[0].reshape(shape[:-2]),
        inflation_sd=None if adapted is None else adapted[1].reshape(shape[:-2]),
    )


# --- the analysis ---------------------------------------------------------------------------


def ensemble_update(
    states,
    predicted,
    observed,
    obs_variance,
    *,
    method: str = "enkf",
    rng: np.random.Generator | None = None,
    inflation: Inflation | None = None,
    gate_sigma: float | None = None,
    lower=None,
    upper=None,
    update_mask=None,
    transform: Transform | None = None,
    obs_noise=None,
    centre_noise: bool = True,
    inflation_state=None,
) -> Analysis:
    """One ensemble Kalman analysis for every basin of a batch.

    Parameters
    ----------
    states : (..., member, n_state) float64, mm
        Prior ensemble of model states (and any parameter columns appended by the caller).
    predicted : (..., member, n_obs) float64, observation units
        Each member's prediction of each observation (any observation operator).
    observed : (..., n_obs) float64, observation units
        The readings; NaN = missing (per basin and per element).
    obs_variance : (..., n_obs) float64, squared assimilation units
        Observation error variance, already in the assimilation space (see
        :meth:`Transform.variance`); NaN = missing. Must be > 0 where a reading is present.
    method : {"enkf", "etkf", "eakf"}
        Stochastic EnKF with perturbed observations (Burgers et al. 1998), symmetric
        ensemble transform (Bishop et al. 2001; Hunt et al. 2007), serial ensemble
        adjustment (Anderson 2001).
    rng : numpy.random.Generator, optional
        Source of the ``enkf`` observation perturbations when ``obs_noise`` is not given.
    inflation : Inflation, optional
        Multiplicative prior inflation, RTPP and RTPS (RTPP applied before RTPS).
    gate_sigma : float, optional
        Reject an observation when ``|innovation| > gate_sigma * sqrt(HPH^T + R)``, from the
        prior statistics (None or 0 = no gate).
    lower, upper : array broadcastable to ``states``, optional
        Physical bounds (mm); updated states outside are clipped and the clipped water
        reported in :attr:`Analysis.clipped`.
    update_mask : (n_state,) bool, optional
        Columns the analysis may change (default all); the others are returned bit for bit.
    transform : Transform, optional
        Assimilate ``T(observed)`` against ``T(predicted)`` (log, Box-Cox).
    obs_noise : (..., member, n_obs) float64, optional
        Pre-drawn standard normal perturbations for ``enkf`` (scaled by the error sd here),
        so that a caller can make them depend only on (seed, basin, member, day).
    centre_noise : bool
        Remove the member mean of the ``enkf`` perturbations per basin and observation.
    inflation_state : ((...) float64, (...) float64), optional
        Prior mean and sd of each basin's adaptive inflation (already damped), needed when
        ``inflation.adaptive`` is set: the inflation is first updated by the basin's
        observations (those present, usable and within the gate at the prior inflation),
        then the prior perturbations are multiplied by ``multiplicative * sqrt(mean)``; the
        update is returned in :attr:`Analysis.inflation_mean` and ``inflation_sd``.

    Returns
    -------
    Analysis
        Updated states and diagnostics. A basin with no usable observation is returned
        bit for bit, as are the columns outside ``update_mask``.

    Raises
    ------
    InputError
        Shapes that do not fit, an unknown method, ``enkf`` without ``rng`` or
        ``obs_noise``, a non-positive ``obs_variance`` at a present reading, or adaptive
        inflation without ``inflation_state``.
    """
    X2, Y2, y2, r2, missing, cols, noise, shape, yshape = _prepare(
        states, predicted, observed, obs_variance, method, rng, update_mask, transform, obs_noise
    )
    infl = _NO_INFLATION if inflation is None else inflation
    gamma = float(infl.multiplicative)
    B, N, n = X2.shape
    m = Y2.shape[2]
    full = cols.size == n
    XT = _planes_of(X2)
    planes = XT is not None
    ones = np.empty(N)
    ones.fill(1.0)
    # The member vectors contracted with the states in one pass, V (B, k, N): ones (member
    # sums), the whitened predicted perturbations Y' and, for enkf and the serial
    # adjustment, the weights. Observation space is kept transposed, the member axis fast.
    # On planes each vector is its own contiguous (B, N) array, contracted with each plane.
    contract_u = method == "enkf" or (method == "eakf" and m > 1)
    k = 1 + m + (m if contract_u else 0)
    if planes:
        V = np.empty((k, B, N)).transpose(1, 0, 2)  # (row 0 unused: the contraction uses ``ones``)
    else:
        V = np.empty((B, k, N))
        V[:, 0] = 1.0
    Yp = V[:, 1 : 1 + m]
    U = V[:, 1 + m :] if contract_u else None

    # Observation space, screening, whitening.
    ybar, var_y, innovation, innovation_variance = _predicted(Y2, y2, r2, gamma, Yp, ones)
    xsq, states_ok = _squares(X2, XT, cols)
    adapted = None
    if infl.adaptive is not None:
        if inflation_state is None:
            _fail("adaptive inflation needs the prior inflation mean and sd of each basin",
                  "inflation_state")
        prior = tuple(np.broadcast_to(np.asarray(v, dtype=np.float64), shape[:-2]).reshape(B)
                      for v in inflation_state)
        # the readings that inform the inflation: usable and within the gate at its prior
        prior_variance = gamma**2 * prior[0][:, None] * var_y + r2
        used_prior, _, _ = _screen(missing, innovation, var_y, prior_variance, states_ok, gate_sigma)
        mean_u, sd_u, gamma = _adapt(infl, prior, innovation, var_y, r2, used_prior, gamma)
        adapted = (mean_u, sd_u)
        innovation_variance = gamma**2 * var_y + r2
    used, gated, invalid = _screen(missing, innovation, var_y, innovation_variance, states_ok,
                                   gate_sigma)
    active = used[:, 0] if m == 1 else np.logical_or.reduce(used, axis=1)
    all_used = bool(np.logical_and.reduce(used, axis=None))
    all_active = all_used or bool(np.logical_and.reduce(active))
    s, dw, a = _whiten(Yp, var_y, innovation, r2, used, all_used, gamma)

    # Member weights (W = f u).
    z = None
    if method == "enkf":
        z = _perturbations(noise, rng, B, N, m)
        if centre_noise:
            # Centring z_i - mean(z) is folded into the innovation: d - mean(z) + z_i.
            dw = dw - np.vecdot(z, ones) / N
    if m == 1:
        u, f, wbar, terms = _scalar_weights(method, Yp, dw, a, z, gamma, U, ones)
    else:
        f = None
        u, wbar, terms = _matrix_weights(method, Yp, dw, z, gamma, U, s, ybar, y2, used)

    # One pass over the prior states for the member sums, X^T Y' and (enkf, serial) X^T U;
    # the prior mean and variance.
    sums = _contract(X2, XT, V, ones)
    xbar = sums[:, 0] / N
    var_b = _variance(X2, sums[:, 0], xsq)
    if not full:
        sums, xbar = sums[:, :, cols], xbar[:, cols]
    var_u = var_b if full else var_b[:, cols]
    # Cross-covariance C^T (B, m, n_u) from the raw states: Y' sums to zero over members, so
    # Y'^T X equals Y'^T X'; the second term removes what rounding leaves.
    ysum = np.vecdot(Yp, ones)
    Ct = (sums[:, 1 : 1 + m] - ysum[:, :, None] * xbar[:, None, :]) / (N - 1)
    if m == 1:
        Ct, WX, WtW, imprecise = _scalar_terms(method, N, sums, Ct, xbar, f, terms, gamma)
    else:
        Ct, WX, WtW, imprecise = _matrix_terms(method, N, sums, Ct, xbar, U, Yp, terms, gamma)

    # Inflation and the analysis moments.
    if infl.rtpp > 0.0:
        u, WX, WtW = _relax_weights(u, f, wbar, WX, WtW, infl.rtpp)
    var_a, mean_a = _moments(Ct, WX, WtW, wbar, xbar, var_u, gamma, N)
    lost = _lost(var_a, mean_a, var_u, gamma, active, imprecise)

    # The update, in one pass over the states.
    if planes:
        Xw = XT if full else XT[cols]
    else:
        Xw = X2 if full else X2[:, :, cols]
    Xa, var_a, scale = _update(Xw, u, f, Ct, var_u, var_a, mean_a, xbar, gamma, infl.rtps, planes)
    if infl.rtps > 0.0 and lost.any():
        g_lost = gamma if np.ndim(gamma) == 0 else gamma[lost]
        _redo_rtps(Xa, lost, scale, g_lost * np.sqrt(var_u[lost]), infl.rtps)

    # Bounds, restore, spread after, result.
    clipped, outside = _clip_to_bounds(Xa, lower, upper, cols, shape, active)
    out = _restore(Xa, X2, cols, active, all_active)
    redo = lost if outside is None else outside | lost
    var_after = _spread_after(out, var_b, var_a, cols, active, all_active, redo)
    return _result(out, innovation, innovation_variance, var_y, var_b, var_after, used, gated,
                   missing, invalid, clipped, active, all_used, shape, yshape, adapted)
