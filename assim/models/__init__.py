"""Vectorised rainfall-runoff models over a flat (basin x member) batch.

>>> m = get("gr4j")
>>> state = m.initial_state(params)                 # (batch, n_state)
>>> state, fluxes = m.step(state, {"precipitation": p, "pet": e}, params)
"""

from assim.models.base import (
    Model,
    Parameter,
    StateVariable,
    WaterBalance,
    available,
    get,
    register,
)
from assim.models import gr4j as _gr4j  # noqa: F401  (registers "gr4j")
from assim.models import linear_reservoir as _linear_reservoir  # noqa: F401

__all__ = ["Model", "Parameter", "StateVariable", "WaterBalance", "available", "get", "register"]
