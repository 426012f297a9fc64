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

References
----------
Anderson, J. L. & Anderson, S. L. (1999). A Monte Carlo implementation of the nonlinear
    filtering problem to produce ensemble assimilations and forecasts. Mon. Wea. Rev. 127,
    2741-2758.
Whitaker, J. S. & Hamill, T. M. (2012). Evaluating methods to account for system errors in
    ensemble data assimilation. Mon. Wea. Rev. 140, 3078-3089.
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
    "Inflation",
    "inflate",
    "relax_to_prior_perturbations",
    "relax_to_prior_spread",
    "rtps_factor",
]


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

    Raises
    ------
    ConfigError
        If a value is outside its range.
    """

    multiplicative: float = 1.0
    rtps: float = 0.0
    rtpp: float = 0.0

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
        return self.multiplicative != 1.0 or self.rtps > 0.0 or self.rtpp > 0.0


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
