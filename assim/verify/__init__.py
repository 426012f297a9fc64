"""Verification: metrics on numpy arrays (:mod:`assim.verify.metrics`) and the skill of
the run and hindcast products (:func:`verify_results`, writing skill.nc and skill.csv).

Metric functions take arrays with time on the last axis of ``obs`` and members on the last
axis of ``ens`` (time second-last); see :mod:`assim.verify.metrics` for the conventions.
"""

import sys
import types

from assim.verify.metrics import (
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
    """Skill of every product in ``cfg["results"]``; see :func:`assim.verify.results.verify_results`."""
    from assim.verify.results import verify_results as _verify_results

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


class _CallableModule(types.ModuleType):
    """``assim.verify`` is both this package and the entry point ``assim.verify(cfg)``: once
    the package is imported it shadows the entry point on ``assim``, so calling the package
    does what the entry point does."""

    def __call__(self, cfg):
        return verify_results(cfg)


sys.modules[__name__].__class__ = _CallableModule
