"""Covariance inflation of an ensemble analysis.

Three published remedies for the under-dispersion of a finite ensemble, combined in one
options record :class:`Inflation`:

- multiplicative prior inflation (Anderson & Anderson 1999): prior perturbations of the
  states *and* of the predicted observations are multiplied by a factor before the update;
- relaxation to prior spread, RTPS (Whitaker & Hamill 2012): after the update, analysis
  perturbations are rescaled so that the ensemble standard deviation of each state becomes
  ``alpha * sd_prior + (1 - alpha) * sd_analysis``;
- relaxation to prior perturbations, RTPP (Zhang, Snyder & Sun 2004): after the update,
  analysis perturbations become ``(1 - alpha) * X'a + alpha * X'b``.

"Prior" in RTPS and RTPP means the prior that entered the update, i.e. after any
multiplicative inflation.

Adaptive prior inflation (Anderson 2007; 2009), :class:`AdaptiveInflation`: the factor on the
prior *variance* of each basin, lambda, is itself estimated, day by day, from the innovations.
Its distribution is kept Gaussian, N(lambda_bar, s^2). With one observation of innovation d,
prior predicted-observation variance sigma_p^2 (before lambda) and observation error variance
sigma_o^2, the innovation is N(0, theta^2) with ``theta^2 = lambda sigma_p^2 + sigma_o^2``
(Anderson 2009, eq. for the observation-space likelihood with no localisation, gamma = 1).
Bayes' rule with the prior on lambda gives a posterior whose mode is found, as in Anderson
(2009, appendix A), with the likelihood linearised about lambda_bar: the mode solves the
quadratic ``l' x^2 + l x - s^2 l' = 0`` (x = lambda - lambda_bar, l and l' the likelihood and
its derivative at lambda_bar), the root nearest lambda_bar. The posterior variance follows from
the ratio r of the exact posterior density one prior sd above the mode and at the mode,
``s_u^2 = -s^2 / (2 ln r)`` (the density a Gaussian would have). Between analyses the mean is
damped toward 1, ``lambda <- 1 + rho (lambda - 1)`` (Anderson 2009, inflation damping). The
perturbations are multiplied by ``sqrt(lambda)`` (on top of the fixed multiplicative factor).
The paper's text could not be consulted here: these equations are recalled from memory, and
the tests check them by an independent derivation (the mode found by numeric maximisation
of the linearised and of the exact posterior, ``tests/test_filters_inflation.py``).

References
----------
Anderson, J. L. & Anderson, S. L. (1999). A Monte Carlo implementation of the nonlinear
    filtering problem to produce ensemble assimilations and forecasts. Mon. Wea. Rev. 127,
    2741-2758.
Whitaker, J. S. & Hamill, T. M. (2012). Evaluating methods to account for system errors in
    ensemble data assimilation. Mon. Wea. Rev. 140, 3078-3089.
Anderson, J. L. (2007). An adaptive covariance inflation error correction algorithm for
    ensemble filters. Tellus A 59, 210-224 (and Physica D 230, 99-111, the single-observation
    form).
Anderson, J. L. (2009). Spatially and temporally varying adaptive covariance inflation for
    ensemble filters. Tellus A 61, 72-83.
Zhang, F., Snyder, C. & Sun, J. (2004). Impacts of initial estimate and observation
    availability on convective-scale data assimilation with an ensemble Kalman filter.
    Mon. Wea. Rev. 132, 1238-1253.

This module imports numpy only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from assim.errors import ConfigError

__all__ = [
    "AdaptiveInflation",
    "Inflation",
    "damp_inflation",
    "update_inflation",
    "inflate",
    "relax_to_prior_perturbations",
    "relax_to_prior_spread",
    "rtps_factor",
]


@dataclass(frozen=True)
class AdaptiveInflation:
    """Options of adaptive prior inflation (Anderson 2009), the same for every basin.

    Parameters
    ----------
    initial_mean : float > 0
        Mean of the inflation (a factor on the prior variance) before the first analysis.
    initial_sd : float >= 0
        Its standard deviation before the first analysis (0 = fixed inflation).
    damping : float in [0, 1]
        ``rho`` of the damping toward 1 before each analysis (1 = none).
    lower, upper : float, 0 < lower <= upper
        Bounds of the inflation mean.
    min_sd : float >= 0
        Floor of the inflation sd, so that the inflation can still follow a change after a
        long run has made it certain.

    Raises
    ------
    ConfigError
        If a value is outside its range.
    """

    initial_mean: float = 1.0
    initial_sd: float = 0.6
    damping: float = 0.9
    lower: float = 1.0
    upper: float = 10.0
    min_sd: float = 0.1

    def __post_init__(self):
        checks = (
            ("initial_mean", self.initial_mean > 0.0),
            ("initial_sd", self.initial_sd >= 0.0),
            ("damping", 0.0 <= self.damping <= 1.0),
            ("lower", self.lower > 0.0),
            ("upper", self.upper >= self.lower),
            ("min_sd", self.min_sd >= 0.0),
        )
        for name, ok in checks:
            value = getattr(self, name)
            if not (ok and np.isfinite(value)):
                raise ConfigError(f"adaptive inflation {name} out of range, got {value!r}",
                                  variable=f"inflation.adaptive.{name}")


def damp_inflation(mean: np.ndarray, damping: float) -> np.ndarray:
    """Inflation damping toward 1 (Anderson 2009): ``1 + rho (lambda - 1)``.

    Parameters
    ----------
    mean : (...) float64, the inflation mean of each basin
    damping : float in [0, 1], rho (1 = none)

    Returns
    -------
    (...) float64
    """
    if damping == 1.0:
        return np.asarray(mean, dtype=np.float64)
    return 1.0 + damping * (np.asarray(mean, dtype=np.float64) - 1.0)  # Anderson (2009), damping


def _log_posterior(lam, prior_mean, prior_var, var_p, var_o, d2):
    """Log of the unnormalised posterior of lambda: Gaussian prior times the likelihood of
    the innovation, N(0, theta^2) with ``theta^2 = lambda var_p + var_o``."""
    theta2 = lam * var_p + var_o  # Anderson (2009): observation-space likelihood, gamma = 1
    return -0.5 * (lam - prior_mean) ** 2 / prior_var - 0.5 * np.log(theta2) - 0.5 * d2 / theta2


def update_inflation(mean, sd, innovation, predicted_variance, obs_variance, options: AdaptiveInflation,
                     use=None):
    """Bayesian update of the prior inflation of each basin by one observation.

    Parameters
    ----------
    mean, sd : (...) float64
        Prior mean and standard deviation of the inflation lambda (a factor on the prior
        variance), already damped (:func:`damp_inflation`).
    innovation : (...) float64
        Observed minus ensemble-mean predicted, d.
    predicted_variance : (...) float64
        Ensemble variance of the predicted observation before lambda, sigma_p^2 (same units
        squared as d).
    obs_variance : (...) float64
        Observation error variance sigma_o^2.
    options : AdaptiveInflation
        Bounds and the sd floor.
    use : (...) bool, optional
        Where the observation informs the inflation; elsewhere the prior is returned as it is.
        Default: where every input is finite, sd > 0 and sigma_p^2 > 0.

    Returns
    -------
    mean, sd : (...) float64, the updated inflation (mean clipped to the bounds; sd never
    larger than the prior's, nor smaller than ``options.min_sd`` unless the prior's was).
    """
    mean = np.asarray(mean, dtype=np.float64)
    sd = np.asarray(sd, dtype=np.float64)
    d = np.asarray(innovation, dtype=np.float64)
    var_p = np.asarray(predicted_variance, dtype=np.float64)
    var_o = np.asarray(obs_variance, dtype=np.float64)
    ok = np.isfinite(d) & np.isfinite(var_p) & np.isfinite(var_o) & (var_p > 0.0) & (sd > 0.0)
    ok &= np.isfinite(mean) & (var_o >= 0.0)
    if use is not None:
        ok &= np.asarray(use, dtype=bool)
    shape = np.broadcast_shapes(mean.shape, sd.shape, d.shape, var_p.shape, var_o.shape)
    if not ok.any():
        return np.broadcast_to(mean, shape).copy(), np.broadcast_to(sd, shape).copy()
    # neutral values where not used, so that nothing below raises or warns
    lam = np.where(ok, mean, 1.0)
    s2 = np.where(ok, sd, 1.0) ** 2
    vp = np.where(ok, var_p, 1.0)
    vo = np.where(ok, var_o, 1.0)
    d2 = np.where(ok, d, 0.0) ** 2
    theta2 = lam * vp + vo  # Anderson (2009), gamma = 1
    # l'/l at lambda_bar: d ln l / d lambda = var_p (d^2 / theta^2 - 1) / (2 theta^2)
    q = vp * (d2 / theta2 - 1.0) / (2.0 * theta2)
    # Anderson (2009), appendix A: the mode of the prior times the linearised likelihood
    # solves l' x^2 + l x - s^2 l' = 0 (x = lambda - lambda_bar); its root nearest 0, written
    # without cancellation (and without l, which may underflow for a large innovation)
    x = 2.0 * s2 * q / (1.0 + np.sqrt(1.0 + 4.0 * s2 * q * q))
    lam_u = np.clip(lam + x, options.lower, options.upper)
    # Anderson (2009): the posterior variance from the ratio of the exact posterior one prior
    # sd above the mode and at the mode, as a Gaussian would have it
    s = np.sqrt(s2)
    log_r = (_log_posterior(lam_u + s, lam, s2, vp, vo, d2) - _log_posterior(lam_u, lam, s2, vp, vo, d2))
    neg = log_r < 0.0
    var_u = np.where(neg, -s2 / (2.0 * np.where(neg, log_r, -1.0)), s2)
    sd_u = np.sqrt(np.minimum(var_u, s2))  # never wider than the prior
    sd_u = np.maximum(sd_u, np.minimum(options.min_sd, s))
    mean_out = np.where(ok, lam_u, mean)
    sd_out = np.where(ok, sd_u, sd)
    return np.broadcast_to(mean_out, shape).copy(), np.broadcast_to(sd_out, shape).copy()


@dataclass(frozen=True)
class Inflation:
    """Inflation options of one analysis.

    Parameters
    ----------
    multiplicative : float, >= 1
        Factor on the prior perturbations of states and predicted observations (1 = none);
        the prior covariance is multiplied by its square.
    rtps : float in [0, 1]
        Relaxation to prior spread coefficient alpha (0 = none).
    rtpp : float in [0, 1]
        Relaxation to prior perturbations coefficient alpha (0 = none).
    adaptive : AdaptiveInflation, optional
        Adaptive prior inflation (Anderson 2009), a per-basin factor ``sqrt(lambda)`` on the
        prior perturbations on top of ``multiplicative``; its per-basin mean and sd are passed
        to :func:`assim.filters.ensemble_update` as ``inflation_state`` (None = off).

    Raises
    ------
    ConfigError
        If a value is outside its range.
    """

    multiplicative: float = 1.0
    rtps: float = 0.0
    rtpp: float = 0.0
    adaptive: AdaptiveInflation | None = None

    def __post_init__(self):
        if not (np.isfinite(self.multiplicative) and self.multiplicative >= 1.0):
            raise ConfigError(
                f"multiplicative inflation must be a finite number >= 1, got {self.multiplicative!r}",
                variable="inflation.multiplicative",
            )
        for name in ("rtps", "rtpp"):
            value = getattr(self, name)
            if not (0.0 <= value <= 1.0):
                raise ConfigError(
                    f"{name} must lie in [0, 1], got {value!r}", variable=f"inflation.{name}"
                )

    @property
    def active(self) -> bool:
        """True if any of the three remedies changes the ensemble."""
        return (self.multiplicative != 1.0 or self.rtps > 0.0 or self.rtpp > 0.0
                or self.adaptive is not None)


def inflate(perturbations: np.ndarray, factor: float) -> np.ndarray:
    """Multiplicative prior inflation of ensemble perturbations.

    Parameters
    ----------
    perturbations : (..., member, k) float64
        Deviations of the members from the ensemble mean (any unit).
    factor : float, >= 1
        Factor on the perturbations (the covariance grows by ``factor**2``).

    Returns
    -------
    (..., member, k) float64
    """
    return factor * perturbations  # Anderson & Anderson (1999): x' <- r x'


def relax_to_prior_perturbations(
    analysis_perturbations: np.ndarray, prior_perturbations: np.ndarray, alpha: float
) -> np.ndarray:
    """Relaxation to prior perturbations (RTPP).

    Parameters
    ----------
    analysis_perturbations, prior_perturbations : (..., member, n_state) float64, mm
        Deviations from the respective ensemble means.
    alpha : float in [0, 1]

    Returns
    -------
    (..., member, n_state) float64, mm
        ``(1 - alpha) * X'a + alpha * X'b``.
    """
    # Zhang, Snyder & Sun (2004): relaxation to prior perturbations
    return (1.0 - alpha) * analysis_perturbations + alpha * prior_perturbations


def rtps_factor(prior_spread: np.ndarray, analysis_spread: np.ndarray, alpha: float) -> np.ndarray:
    """Factor on the analysis perturbations of relaxation to prior spread (RTPS).

    Parameters
    ----------
    prior_spread, analysis_spread : (..., n_state) float64, mm
        Ensemble standard deviations (ddof = 1) before and after the update.
    alpha : float in [0, 1]

    Returns
    -------
    (..., n_state) float64
        ``alpha (sd_b - sd_a) / sd_a + 1``, so that the scaled perturbations have the
        standard deviation ``alpha * sd_b + (1 - alpha) * sd_a``; 1 where there is no analysis
        spread (nothing to rescale).
    """
    safe = np.where(analysis_spread > 0.0, analysis_spread, 1.0)
    scale = alpha * (prior_spread - analysis_spread) / safe + 1.0  # Whitaker & Hamill (2012): RTPS
    return np.where(analysis_spread > 0.0, scale, 1.0)


def relax_to_prior_spread(
    analysis_perturbations: np.ndarray,
    prior_spread: np.ndarray,
    analysis_spread: np.ndarray,
    alpha: float,
) -> np.ndarray:
    """Relaxation to prior spread (RTPS).

    Parameters
    ----------
    analysis_perturbations : (..., member, n_state) float64, mm
    prior_spread, analysis_spread : (..., n_state) float64, mm
        Ensemble standard deviations (ddof = 1) before and after the update.
    alpha : float in [0, 1]

    Returns
    -------
    (..., member, n_state) float64, mm
        Perturbations whose standard deviation is ``alpha * sd_b + (1 - alpha) * sd_a``.
        A state with no analysis spread is left as it is (nothing to rescale).
    """
    scale = rtps_factor(prior_spread, analysis_spread, alpha)
    return analysis_perturbations * scale[..., None, :]
