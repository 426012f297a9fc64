"""A linear reservoir: one store, outflow k·S, evaporation proportional to the store.

The model is exactly linear in its state for given forcing, so the exact Kalman filter is the
reference for every ensemble filter run on it. One day:

1. the day's precipitation enters the store: ``S' = S + P``;
2. a fraction ``k`` of it leaves as runoff: ``Q = k S'``;
3. of the rest, a fraction ``1 - exp(-c · PET)`` evaporates: ``E = (1 - k)(1 - exp(-c PET)) S'``;
4. ``S_new = S' - Q - E = a (S + P)`` with ``a = (1 - k) exp(-c PET)``.

So ``S_new = a S + b`` with ``b = a P`` (:func:`transition`), and the day's runoff is a
linear function of the new state, ``Q = h S_new`` with ``h = k / a`` (:func:`observation`).
With no forcing the store recedes as ``S_t = S_0 (1 - k)^t``; with constant precipitation
and no PET it tends to ``S* = (1 - k) P / k`` where the runoff equals P. The store can never
become negative for non-negative forcing. Units: mm, mm d-1, 1-day step.

The choice of evaporation form (a storage-proportional loss whose rate grows with PET and
never exceeds the water left after outflow) is this package's, made to keep the model
linear in S; it is not a published model.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from assim.models.base import Model, Parameter, StateVariable, WaterBalance, register

PARAMETERS = (
    Parameter("k", "d-1", "outflow coefficient (fraction of the store leaving per day)",
              0.001, 0.95, 0.1),
    Parameter("c", "mm-1", "evaporation coefficient (loss rate per mm of PET)", 0.0, 1.0, 0.02),
)

STATES = (
    StateVariable("store", "mm", "reservoir storage S", 0.0, np.inf, True),
)

FLUXES = ("precipitation", "pet", "actual_evaporation", "runoff")


def transition(
    forcing: Mapping[str, np.ndarray], params: Mapping[str, np.ndarray]
) -> tuple[np.ndarray, np.ndarray]:
    """Exact one-day transition ``S_new = a S + b``.

    Parameters
    ----------
    forcing : dict with ``precipitation`` and ``pet``, each (batch,) float64, mm d-1
    params : dict with ``k`` (d-1) and ``c`` (mm-1), each (batch,) float64

    Returns
    -------
    a : (batch,) float64, dimensionless, in (0, 1)
    b : (batch,) float64, mm
    """
    k = np.asarray(params["k"], dtype=np.float64)
    c = np.asarray(params["c"], dtype=np.float64)
    pet = np.asarray(forcing["pet"], dtype=np.float64)
    a = (1.0 - k) * np.exp(-c * pet)
    return a, a * np.asarray(forcing["precipitation"], dtype=np.float64)


def observation(
    forcing: Mapping[str, np.ndarray], params: Mapping[str, np.ndarray]
) -> np.ndarray:
    """Runoff operator ``h`` such that the day's runoff is ``Q = h S_new``.

    ``S_new`` is the state at the end of the step (the one a filter updates), so the
    observation operator of the discharge in mm d-1 is ``H = h``.

    Parameters
    ----------
    forcing : dict with ``pet``, (batch,) float64, mm d-1
    params : dict with ``k`` (d-1) and ``c`` (mm-1), each (batch,) float64

    Returns
    -------
    h : (batch,) float64, d-1
    """
    a, _ = transition({"precipitation": 0.0, "pet": forcing["pet"]}, params)
    return np.asarray(params["k"], dtype=np.float64) / a


def initial_state(params: Mapping[str, np.ndarray]) -> np.ndarray:
    """An empty store.

    Parameters
    ----------
    params : dict of (batch,) float64

    Returns
    -------
    (batch, 1) float64, mm
    """
    k = np.asarray(params["k"], dtype=np.float64).reshape(-1)
    return np.zeros((k.size, 1))


def store(S, p, pet, k, c):
    """One day of the store, element-wise (floats or arrays; numpy's step applies it to the
    batch and :mod:`assim.kernels` compiles the same function for one member).

    Returns
    -------
    S_end, evaporation, runoff : mm and mm d-1; ``S_end = a (S + P)`` with ``a`` of
        :func:`transition`, ``runoff = k (S + P)``, evaporation the rest
    """
    a = (1.0 - k) * np.exp(-c * pet)  # as transition()
    filled = S + p
    new = a * filled
    runoff = k * filled
    return new, filled - runoff - new, runoff


def step(
    state: np.ndarray, forcing: Mapping[str, np.ndarray], params: Mapping[str, np.ndarray]
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Advance the linear reservoir by one day.

    Parameters
    ----------
    state : (batch, 1) float64, mm (not modified)
    forcing : dict with ``precipitation`` and ``pet``, each (batch,) float64, mm d-1, >= 0
    params : dict with ``k`` (d-1) and ``c`` (mm-1), each (batch,) float64

    Returns
    -------
    state : (batch, 1) float64, mm, a new array
    fluxes : dict of (batch,) float64, mm d-1: ``precipitation``, ``pet``,
        ``actual_evaporation``, ``runoff``; ``S_new - S = precipitation -
        actual_evaporation - runoff`` to rounding.
    """
    p = np.asarray(forcing["precipitation"], dtype=np.float64)
    pet = np.asarray(forcing["pet"], dtype=np.float64)
    k = np.asarray(params["k"], dtype=np.float64)
    c = np.asarray(params["c"], dtype=np.float64)
    new, evaporation, runoff = store(np.asarray(state, dtype=np.float64)[:, 0], p, pet, k, c)
    n = new.shape[0]
    return new[:, None], {
        "precipitation": np.broadcast_to(p, (n,)),
        "pet": np.broadcast_to(pet, (n,)),
        "actual_evaporation": evaporation,
        "runoff": runoff,
    }


MODEL = register(
    Model(
        name="linear_reservoir",
        description="Linear reservoir: one store, outflow k S, storage-proportional evaporation",
        reference="Linear reservoir (common practice); evaporation form defined in "
        "assim.models.linear_reservoir",
        states=STATES,
        parameters=PARAMETERS,
        step=step,
        initial_state=initial_state,
        balance=WaterBalance(inputs=("precipitation",), outputs=("actual_evaporation", "runoff")),
        fluxes=FLUXES,
    )
)
