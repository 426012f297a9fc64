"""Verification: metrics on numpy arrays (:mod:`assim.verification.metrics`) and the skill of
the run and hindcast products (:func:`verify_results`, writing skill.nc and skill.csv).

Metric functions take arrays with time on the last axis of ``obs`` and members on the last
axis of ``ens`` (time second-last); see :mod:`assim.verification.metrics` for the conventions.
"""

from assim.verification.metrics import (
    Reliability,
    brier_score,
    count_pairs,
    crps_ensemble,
    crpss,
    exceedance_probability,
    kge,
    kge_modified,
    mean_score,
    nse,
    nse_log,
    pbias,
    pit,
    rank_histogram,
    reliability_table,
    rmse,
    spread_skill,
)


def verify_results(cfg):
    """Skill of every product in ``cfg["results"]``; see :func:`assim.verification.results.verify_results`."""
    from assim.verification.results import verify_results as _verify_results

    return _verify_results(cfg)


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
    "verify_results",
]

