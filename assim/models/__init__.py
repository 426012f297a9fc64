"""Vectorised rainfall-runoff models over a flat (basin x member) batch.

>>> m = get("gr4j")
>>> params = m.prepare(params)                      # optional: precompute once per run
>>> state = m.initial_state(params)                 # (batch, n_state)
>>> state, fluxes = m.step(state, {"precipitation": p, "pet": e}, params)

Built in: ``gr4j`` (:mod:`assim.models.gr4j`) and ``linear_reservoir``
(:mod:`assim.models.linear_reservoir`). A user model joins with :func:`register`. Any model
behind the degree-day snow routine (:mod:`assim.models.snow`): ``get("gr4j+snow")``.
"""

from assim.models import gr4j, linear_reservoir, snow
from assim.models.base import (
    Model,
    Parameter,
    StateVariable,
    WaterBalance,
    available,
    get,
    register,
)

__all__ = [
    "Model",
    "Parameter",
    "StateVariable",
    "WaterBalance",
    "available",
    "get",
    "gr4j",
    "linear_reservoir",
    "register",
    "snow",
]
