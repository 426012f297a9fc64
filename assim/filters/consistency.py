"""Consistency of a filter's innovations with the variances it assumed, per basin.

From the daily innovations a run records, over the days with a reading used:

- the normalised innovation ``z = d / sqrt(sigma_pred^2 + sigma_obs^2)`` (``d`` observed
  minus the mean predicted, the variance the analysis expected for it): its mean and
  variance; for a consistent filter they are 0 and 1;
- the chi-square statistic ``mean(z^2)``: ``n mean(z^2)`` is chi-square with n degrees of
  freedom when the innovations are independent and their variance right, so the two-sided
  95 % interval of ``mean(z^2)`` is ``[chi2_{0.025}(n) / n, chi2_{0.975}(n) / n]``
  (e.g. Menard 2000, Mon. Wea. Rev. 128, 2931-2950; Desroziers et al. 2005). Daily discharge
  innovations are serially correlated, which widens the true spread of the statistic: the
  interval is then too narrow, so a value outside it is read as a sign, not a proof;
- the observation-error variance estimate of Desroziers et al. (2005, eq. 3):
  ``E[d_o-a d_o-b] = R`` for a filter whose gain is right, with ``d_o-b`` the innovation and
  ``d_o-a`` the observed minus the mean analysed prediction; compared with the mean ``R`` used.

All quantities are in the assimilation space (the transform's, if any).

References
----------
Desroziers, G., Berre, L., Chapnik, B. & Poli, P. (2005). Diagnosis of observation,
    background and analysis-error statistics in observation space. Q. J. R. Meteorol. Soc.
    131, 3385-3396.

This module imports numpy and scipy only.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

__all__ = ["STATISTICS", "innovation_statistics"]

# name -> long name, the per-basin statistics :func:`innovation_statistics` returns
STATISTICS = {
    "innovation_count": "number of readings used in the statistics",
    "normalised_innovation_mean": "mean of the normalised innovation d / sqrt(HPH' + R)",
    "normalised_innovation_variance": "variance (ddof 1) of the normalised innovation",
    "innovation_chi2": "mean of the squared normalised innovation (1 for a consistent filter)",
    "innovation_chi2_lower": "lower end of the two-sided 95% interval of innovation_chi2 for a consistent "
                             "filter with independent innovations, chi2_0.025(n) / n",
    "innovation_chi2_upper": "upper end of the two-sided 95% interval of innovation_chi2 for a consistent "
                             "filter with independent innovations, chi2_0.975(n) / n",
    "obs_error_variance_desroziers": "Desroziers et al. (2005) estimate of the observation error variance, "
                                     "mean of (observed - analysis) x (observed - background)",
    "obs_error_variance_used": "mean observation error variance used by the analysis",
}


def innovation_statistics(innovation, innovation_variance, innovation_analysis, obs_variance,
                          level: float = 0.95) -> dict[str, np.ndarray]:
    """Per-basin innovation statistics over a run (see the module docstring).

    Parameters
    ----------
    innovation : (basin, time) float64
        d_o-b, observed minus the ensemble mean predicted (NaN where no reading was used).
    innovation_variance : (basin, time) float64
        The variance the analysis expected for it, ``sigma_pred^2 + sigma_obs^2`` (after
        inflation).
    innovation_analysis : (basin, time) float64
        d_o-a, observed minus the ensemble mean of the analysed prediction.
    obs_variance : (basin, time) float64
        Observation error variance R used.
    level : float
        Coverage of the two-sided interval of the chi-square statistic.

    Returns
    -------
    dict name -> (basin,) array, the names of :data:`STATISTICS`; NaN where a basin has no
    reading (variance: fewer than 2).
    """
    d = np.asarray(innovation, dtype=np.float64)
    v = np.asarray(innovation_variance, dtype=np.float64)
    da = np.asarray(innovation_analysis, dtype=np.float64)
    r = np.asarray(obs_variance, dtype=np.float64)
    ok = np.isfinite(d) & np.isfinite(v) & (v > 0.0) & np.isfinite(da) & np.isfinite(r)
    n = ok.sum(axis=1)
    z = np.where(ok, d / np.sqrt(np.where(ok, v, 1.0)), 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = z.sum(axis=1) / n
        dev = np.where(ok, z - mean[:, None], 0.0)
        var = (dev * dev).sum(axis=1) / (n - 1)
        chi2 = (z * z).sum(axis=1) / n
        alpha = 1.0 - level
        safe = np.maximum(n, 1)
        lower = np.where(n > 0, stats.chi2.ppf(alpha / 2, safe) / safe, np.nan)
        upper = np.where(n > 0, stats.chi2.ppf(1 - alpha / 2, safe) / safe, np.nan)
        # Desroziers et al. (2005), eq. 3: E[d_o-a d_o-b] = R
        desroziers = np.where(ok, da * d, 0.0).sum(axis=1) / n
        used = np.where(ok, r, 0.0).sum(axis=1) / n
    return {
        "innovation_count": n.astype(np.int64),
        "normalised_innovation_mean": mean,
        "normalised_innovation_variance": np.where(n > 1, var, np.nan),
        "innovation_chi2": chi2,
        "innovation_chi2_lower": lower,
        "innovation_chi2_upper": upper,
        "obs_error_variance_desroziers": desroziers,
        "obs_error_variance_used": used,
    }
