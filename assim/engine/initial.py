"""The ensemble before the first day, and the members' prepared parameters and bounds."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from assim import perturb as pt
from assim.engine.records import EnsembleState, Inputs, Settings, forcing_names
from assim.models.base import Model


def parameter_ranges(model: Model) -> dict[str, pt.ParameterRange]:
    return {p.name: pt.ParameterRange(p.low, p.high) for p in model.parameters}


def initial_ensemble(model: Model, inputs: Inputs, settings: Settings) -> EnsembleState:
    """The ensemble before the first day of ``inputs``.

    Members get their parameters (:func:`assim.perturb.perturb_parameters`), the model's
    initial state, and AR(1) errors of each forcing (:func:`forcing_names`) drawn from the stationary distribution on the day
    before the first (so the first day's errors are already stationary).

    Returns
    -------
    EnsembleState valid at the end of ``inputs.days[0] - 1``
    """
    members = np.arange(settings.members)
    params = pt.perturb_parameters(
        inputs.parameters, settings.parameter_sd, parameter_ranges(model),
        seed=settings.seed, keys=inputs.keys, members=members,
    )
    b, m = inputs.n_basin, settings.members
    flat = {k: v.reshape(-1) for k, v in params.items()}
    states = np.asarray(model.initial_state(flat), dtype=np.float64).reshape(b, m, model.n_state)
    day0 = int(inputs.days[0]) - 1
    ar1 = {
        name: pt.standard_normal(pt.counter_keys(settings.seed, inputs.keys, members, pt.FORCING_STREAMS[name]), day0)
        for name in forcing_names(model)
    }
    return EnsembleState(day0, states, params, ar1, np.zeros(b, dtype=np.int64))


def fixed_parameters(model: Model, parameters: Mapping[str, np.ndarray]) -> tuple:
    """The model's prepared parameters and state bounds of an ensemble's members.

    Parameters
    ----------
    parameters : dict name -> (basin, member) float64

    Returns
    -------
    (prepared parameters, lower, upper), lower and upper (basin * member, n_state) mm
    """
    flat = {k: np.array(v, dtype=np.float64).reshape(-1) for k, v in parameters.items()}  # own copies
    lower, upper = model.bounds(flat)
    return model.prepare(flat), lower, upper
