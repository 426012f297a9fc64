"""The assimilation step: exact and ensemble Kalman filters on plain numpy arrays.

Importable into any model (numpy and scipy only, no files)::

    from assim.filters import ensemble_update, Inflation, Transform, obs_variance

    var = obs_variance(q_obs, "relative", relative=0.1, floor=0.05)   # (basin, n_obs)
    a = ensemble_update(states, q_pred, q_obs, var, method="eakf",    # (basin, member, ...)
                        inflation=Inflation(rtps=0.5), gate_sigma=5.0, lower=0.0)
    states = a.states                                                 # same shape as input

- :func:`kalman_predict`, :func:`kalman_update`: exact linear Kalman filter (the reference);
  :func:`rts_smooth`: its backward pass, the Rauch-Tung-Striebel smoother.
- :func:`ensemble_update`: one analysis (``enkf``, ``etkf``, ``eakf``) returning an
  :class:`Analysis` with the updated states and the diagnostics.
- :func:`fixed_lag_update`: the fixed-lag ensemble Kalman smoother (current and lagged
  states from the window's readings, late readings against their stored predictions,
  :func:`lagged_predictions`), built on :func:`ensemble_update`.
- :class:`Inflation`: multiplicative, RTPS, RTPP; :class:`AdaptiveInflation` (Anderson 2009)
  with :func:`update_inflation` and :func:`damp_inflation`.
- :func:`obs_variance`, :class:`Transform`: observation errors and the assimilation space.
"""

from assim.filters.ensemble import METHODS, Analysis, ensemble_update
from assim.filters.inflation import (
    AdaptiveInflation,
    Inflation,
    damp_inflation,
    inflate,
    relax_to_prior_perturbations,
    relax_to_prior_spread,
    rtps_factor,
    update_inflation,
)
from assim.filters.kalman import kalman_predict, kalman_update, rts_smooth
from assim.filters.obs import Transform, obs_variance
from assim.filters.smoother import SmootherAnalysis, fixed_lag_update, lagged_predictions

__all__ = [
    "METHODS",
    "AdaptiveInflation",
    "Analysis",
    "Inflation",
    "SmootherAnalysis",
    "Transform",
    "damp_inflation",
    "ensemble_update",
    "fixed_lag_update",
    "inflate",
    "kalman_predict",
    "kalman_update",
    "lagged_predictions",
    "obs_variance",
    "relax_to_prior_perturbations",
    "relax_to_prior_spread",
    "rtps_factor",
    "rts_smooth",
    "update_inflation",
]
