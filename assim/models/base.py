"""The model protocol: what a rainfall-runoff model declares so the engine and filters can use it.

A model is a frozen :class:`Model` record. Its ``step`` advances a flat batch — every
(basin, member) pair — by one day, in one vectorised numpy call:

``step(state, forcing, params) -> (state, fluxes)``

state : (batch, n_state) float64, mm (any memory order; ``step`` never modifies it and
    returns a new array)
forcing : dict of (batch,) float64, mm d-1 (``precipitation``, ``pet``)
params : dict of (batch,) float64, one value per batch element (members may differ), raw or
    as returned by ``prepare(params)``
fluxes : dict of (batch,) float64, mm d-1; ``runoff`` is the total streamflow and the other
    entries close the water balance as declared by ``balance``.

``prepare(params)`` returns the parameters with whatever the model precomputes once per
parameter set (call it once per run and again whenever the parameters change). Its extra
keys start with ``_``; every value keeps the batch as its first axis, so a prepared dict can
be sliced like the raw one (``{k: v[idx] for k, v in prepared.items()}``). The default
returns a plain copy.

This module imports numpy only.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

Bound = float | Callable[[Mapping[str, np.ndarray]], np.ndarray]


def _as_dict(params: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The default ``prepare``: nothing to precompute."""
    return dict(params)


@dataclass(frozen=True)
class StateVariable:
    """One state variable of a model.

    ``lower`` and ``upper`` are numbers or functions of the parameter dict returning
    (batch,) arrays (e.g. the production store of GR4J is bounded by X1).
    ``updatable`` says whether a filter may change it by default. ``reported`` says whether
    products write it when they write the updated states (``outputs.states``): False for
    a model's internal buffers (GR4J's unit-hydrograph slots), written only with
    ``outputs.all_states``.
    """

    name: str
    unit: str
    description: str
    lower: Bound = 0.0
    upper: Bound = np.inf
    updatable: bool = False
    reported: bool = True


@dataclass(frozen=True)
class Parameter:
    """One model parameter with its unit, valid range (inclusive) and default."""

    name: str
    unit: str
    description: str
    low: float
    high: float
    default: float


@dataclass(frozen=True)
class WaterBalance:
    """How the fluxes close the balance of one step.

    ``storage_change = sum(inputs) - sum(outputs)`` where every name is a key of the fluxes
    dict, and storage is the sum over all state variables (mm).
    """

    inputs: tuple[str, ...]
    outputs: tuple[str, ...]


@dataclass(frozen=True)
class Model:
    """A vectorised rainfall-runoff model (see the module docstring for the protocol).

    Attributes
    ----------
    name : str
        The key of :func:`get` and of ``model`` in ``basins.yaml``.
    description, reference : str
        One line each: what the model is, and its published source.
    states : tuple of StateVariable
        One per column of the state array, in column order.
    parameters : tuple of Parameter
        The keys of the parameter dict, with valid ranges and defaults.
    step : callable ``(state, forcing, params) -> (state, fluxes)``
    initial_state : callable ``params -> (batch, n_state) float64``
        A starting state for spin-up.
    balance : WaterBalance
        Which fluxes close the water balance of a step.
    forcings : tuple of str
        Keys of the forcing dict (mm d-1).
    fluxes : tuple of str
        Keys of the fluxes dict; always includes ``runoff`` (mm d-1).
    prepare : callable ``params -> dict``
        Precomputation once per parameter set (default: a plain copy).
    """

    name: str
    description: str
    reference: str
    states: tuple[StateVariable, ...]
    parameters: tuple[Parameter, ...]
    step: Callable[..., tuple[np.ndarray, dict[str, np.ndarray]]]
    initial_state: Callable[[Mapping[str, np.ndarray]], np.ndarray]
    balance: WaterBalance
    forcings: tuple[str, ...] = ("precipitation", "pet")
    fluxes: tuple[str, ...] = field(default=("runoff",))
    prepare: Callable[[Mapping[str, np.ndarray]], dict[str, np.ndarray]] = _as_dict

    @property
    def state_names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.states)

    @property
    def parameter_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.parameters)

    @property
    def n_state(self) -> int:
        return len(self.states)

    def state_index(self, name: str) -> int:
        """Column of state ``name`` in the state array; KeyError if unknown."""
        try:
            return self.state_names.index(name)
        except ValueError:
            raise KeyError(f"model {self.name!r} has no state {name!r}") from None

    def default_updated_states(self) -> tuple[str, ...]:
        """Names of the states a filter updates unless told otherwise."""
        return tuple(s.name for s in self.states if s.updatable)

    def reported_states(self, names) -> tuple[str, ...]:
        """Of the states ``names``, those products write as the updated states
        (``outputs.states``): all but the model's internal buffers (``reported=False``)."""
        hidden = {s.name for s in self.states if not s.reported}
        return tuple(n for n in names if n not in hidden)

    def default_parameters(self) -> dict[str, float]:
        return {p.name: p.default for p in self.parameters}

    def bounds(self, params: Mapping[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
        """Lower and upper bounds of every state.

        Parameters
        ----------
        params : dict of (batch,) float64

        Returns
        -------
        lower, upper : (batch, n_state) float64, mm
        """
        # Only the declared parameters set the batch shape: prepared parameter dicts may
        # also carry precomputed arrays of other shapes.
        shapes = [np.shape(params[p.name]) for p in self.parameters if p.name in params]
        batch = np.broadcast_shapes(*shapes) if shapes else ()
        lower = np.empty(batch + (self.n_state,))
        upper = np.empty(batch + (self.n_state,))
        for j, s in enumerate(self.states):
            lower[..., j] = s.lower(params) if callable(s.lower) else s.lower
            upper[..., j] = s.upper(params) if callable(s.upper) else s.upper
        return lower, upper


_REGISTRY: dict[str, Model] = {}


def register(model: Model) -> Model:
    """Make ``model`` available to :func:`get` under ``model.name``.

    Registration is how a user's model joins: build a :class:`Model` and register it before
    the run (for the CLI: a module named in the config's ``model.plugins``)."""
    _REGISTRY[model.name] = model
    return model


def get(name: str) -> Model:
    """The model registered under ``name``; KeyError naming the known models otherwise.

    ``"<model>+snow"`` is any registered model behind the degree-day snow routine
    (:func:`assim.models.snow.wrap`), built on first use."""
    if name in _REGISTRY:
        return _REGISTRY[name]
    base = name.removesuffix("+snow")
    if base != name and base in _REGISTRY:
        from assim.models import snow

        return snow.wrap(_REGISTRY[base])
    known = ", ".join(sorted(_REGISTRY))
    raise KeyError(f"unknown model {name!r}; known models: {known} (each also as <model>+snow)")


def available() -> tuple[str, ...]:
    return tuple(sorted(_REGISTRY))
