"""A degree-day snow routine in front of any registered model: ``wrap(get("gr4j"))``.

The classic degree-day (temperature-index) method as reviewed by Hock, R. (2003).
Temperature-index melt modelling in mountain areas. Journal of Hydrology 282, 104-115:
snow accumulates from precipitation falling below a threshold temperature, and melts at a
rate proportional to the positive difference between the air temperature and a melt
threshold (Hock 2003, eq. 1: M = DDF (T - T0) for T > T0, else 0). One day, in order, for
every element of the flat batch (T the day's mean air temperature, degC):

1. **Rain and snow.** The rain fraction rises linearly from 0 to 1 across a transition
   interval of width ``snow_interval`` centred on ``snow_threshold``:
   ``f = clip((T - snow_threshold) / snow_interval + 1/2, 0, 1)``; rainfall ``f P``,
   snowfall ``P - f P`` joins the pack (solid water equivalent, mm).
2. **Melt** ``min(degree_day_factor * max(T - melt_threshold, 0), pack)`` (Hock 2003,
   eq. 1, limited by the pack).
3. **Refreezing** of the liquid water held in the pack since the day before:
   ``min(refreezing * degree_day_factor * max(melt_threshold - T, 0), liquid)``.
4. Rain and melt join the liquid water in the pack; the pack holds at most
   ``water_holding`` times its solid water equivalent; the rest leaves as the **outflow**,
   which is the precipitation the wrapped model receives.

With no pack and no snowfall (T above the transition interval, or a basin whose
``snow_routine`` is 0) every step above adds or subtracts exact zeros, so the wrapped model
receives P bit for bit: a rain-only basin computes exactly what the model alone computes.
The day's formulas are one element-wise function, :func:`day`, that the numpy step applies
to the batch and :mod:`assim.kernels` compiles as it is, behind the compiled form of any
model that has one (:func:`unwrap` finds the wrapped model).

The wrapped model's states come first, then ``snowpack`` (solid, mm; the filter may update
it) and ``snow_liquid`` (liquid water held in the pack, mm). Its parameters are the model's
plus the snow parameters below; ``snow_routine`` (1 or 0) lets basins with and without snow
share one run (all basins of a run share one model). The forcings are the model's plus
``temperature`` (degC). The fluxes are the model's, with ``precipitation`` the total P, plus
``rainfall``, ``snowfall``, ``melt``, ``refreezing`` and ``snow_outflow``: the model's
balance then closes over all states, snowpack included.

Parameter ranges: thresholds within +-3 degC and degree-day factors up to 10 mm degC-1 d-1
cover the values Hock (2003, table 2) lists for snow (2.5 to 11.6 at most sites; value
recalled from memory); the holding capacity 0-0.2 and the refreezing coefficient 0-1 are
common practice, no published source.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from assim.models.base import Model, Parameter, StateVariable, register

SUFFIX = "+snow"

PARAMETERS = (
    Parameter("snow_routine", "1", "1: the basin has snow; 0: precipitation passes as rain", 0.0, 1.0, 1.0),
    Parameter("snow_threshold", "degC", "centre of the rain/snow transition", -3.0, 3.0, 0.0),
    Parameter("snow_interval", "degC", "width of the rain/snow transition", 0.0, 6.0, 2.0),
    Parameter("melt_threshold", "degC", "temperature above which the pack melts", -3.0, 3.0, 0.0),
    Parameter("degree_day_factor", "mm degC-1 d-1", "melt per degree above the melt threshold", 0.0, 10.0, 3.0),
    Parameter("water_holding", "1", "liquid water the pack holds, per unit of its solid water", 0.0, 0.2, 0.1),
    Parameter("refreezing", "1", "refreezing rate, as a fraction of the degree-day factor", 0.0, 1.0, 0.05),
)
NAMES = tuple(p.name for p in PARAMETERS)

STATES = (
    StateVariable("snowpack", "mm", "solid water equivalent of the snowpack", 0.0, np.inf, True),
    StateVariable("snow_liquid", "mm", "liquid water held in the snowpack", 0.0, np.inf, False),
)

FLUXES = ("rainfall", "snowfall", "melt", "refreezing", "snow_outflow")


def rain_from(params) -> np.ndarray:
    """The temperature at the centre of the rain/snow transition, as the routine uses it:
    ``snow_threshold``, or -inf where ``snow_routine`` is 0 (all precipitation is then rain,
    whatever the temperature). :func:`wrap`'s ``prepare`` keeps it as ``_rain_from``."""
    if "_rain_from" in params:
        return params["_rain_from"]
    return np.where(np.asarray(params["snow_routine"]) > 0, np.asarray(params["snow_threshold"], dtype=np.float64),
                    -np.inf)


# ---------------------------------------------------------------- the formulas, written once
#
# day() is element-wise: every argument is a float or an array (all broadcast together), and
# it uses only +, -, *, /, minimum, maximum and fmin. The numpy step applies it to the batch;
# assim.kernels compiles the same function object with numba for one member at a time. Both
# give the same bits.


def day(pack, liquid, p, t, rain_from, interval, melt_t, ddf, holding, refreezing):
    """One day of the degree-day routine (module docstring, steps 1-4).

    Parameters
    ----------
    pack, liquid : start-of-day solid and liquid water of the pack, mm
    p, t : precipitation (mm d-1) and the day's mean air temperature (degC)
    rain_from : centre of the rain/snow transition (degC; -inf: all rain, :func:`rain_from`)
    interval, melt_t, ddf, holding, refreezing : ``snow_interval``, ``melt_threshold``,
        ``degree_day_factor``, ``water_holding`` and ``refreezing``

    Returns
    -------
    pack, liquid, rain, snowfall, melt, refreeze, outflow : the end-of-day pack and liquid
    water (mm) and the day's fluxes (mm d-1); ``outflow`` is what the wrapped model receives.

    A zero ``interval`` divides by zero (numpy: call it under ``np.errstate``): x = +-inf on
    either side of the threshold and NaN on it, and ``fmin(NaN, 1)`` is 1, so the transition
    is then the plain threshold ``T >= snow_threshold`` (rain).
    """
    frac = np.maximum(np.fmin((t - rain_from) / interval + 0.5, 1.0), 0.0)  # rain fraction, in [0, 1]
    rain = frac * p
    snowfall = p - rain
    pack = pack + snowfall
    melt = np.minimum(ddf * np.maximum(t - melt_t, 0.0), pack)  # Hock (2003), eq. 1, limited by the pack
    pack = pack - melt
    refreeze = np.minimum(refreezing * ddf * np.maximum(melt_t - t, 0.0), liquid)
    pack = pack + refreeze
    liquid = (liquid - refreeze + rain) + melt
    outflow = np.maximum(liquid - holding * pack, 0.0)  # beyond what the pack holds
    liquid = liquid - outflow
    return pack, liquid, rain, snowfall, melt, refreeze, outflow


def snow_step(pack, liquid, precipitation, temperature, params):
    """One day of the degree-day routine for the batch (:func:`day`).

    Parameters
    ----------
    pack, liquid : (batch,) float64, mm, at the start of the day
    precipitation : (batch,) float64, mm d-1
    temperature : (batch,) float64, degC, the day's mean air temperature
    params : dict of (batch,) float64 with the names of :data:`PARAMETERS` (raw or prepared)

    Returns
    -------
    pack, liquid : (batch,) float64, mm, at the end of the day
    fluxes : dict of (batch,) float64, mm d-1: ``rainfall``, ``snowfall``, ``melt``,
        ``refreezing``, ``snow_outflow`` (the liquid water leaving the pack)
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        pack, liquid, *fluxes = day(
            np.asarray(pack, dtype=np.float64), np.asarray(liquid, dtype=np.float64),
            np.asarray(precipitation, dtype=np.float64), np.asarray(temperature, dtype=np.float64),
            rain_from(params), *(np.asarray(params[n], dtype=np.float64) for n in KERNEL_ROWS[1:]))
    return pack, liquid, dict(zip(FLUXES, fluxes, strict=True))


KERNEL_ROWS = ("_rain_from", "snow_interval", "melt_threshold", "degree_day_factor", "water_holding", "refreezing")
"""The prepared parameters of :func:`day`, in its order (the compiled kernel packs these rows)."""


def wrap(base: Model) -> Model:
    """``base`` behind the degree-day snow routine, registered as ``base.name + "+snow"``.

    ``base`` must take ``precipitation`` among its forcings and name it in its balance.
    """
    n_base = base.n_state
    base_names = base.parameter_names

    def prepare(params: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
        out = dict(base.prepare({k: v for k, v in params.items() if k not in NAMES}))
        shape = np.shape(params[base_names[0]]) if base_names else np.shape(params[NAMES[0]])
        for name in NAMES:
            out[name] = np.broadcast_to(np.asarray(params[name], dtype=np.float64), shape).reshape(-1)
        out["_rain_from"] = rain_from(out)
        return out

    def step(state, forcing, params):
        state = np.asarray(state, dtype=np.float64)
        pack, liquid, snow = snow_step(state[:, n_base], state[:, n_base + 1], forcing["precipitation"],
                                       forcing["temperature"], params)
        inner = {k: v for k, v in forcing.items() if k != "temperature"}
        inner["precipitation"] = snow["snow_outflow"]
        new_base, fluxes = base.step(state[:, :n_base], inner, params)
        out = np.empty((state.shape[0], n_base + 2), order="F")
        out[:, :n_base] = new_base
        out[:, n_base] = pack
        out[:, n_base + 1] = liquid
        fluxes = dict(fluxes)
        fluxes["precipitation"] = np.asarray(forcing["precipitation"], dtype=np.float64)
        fluxes.update(snow)
        return out, fluxes

    def initial_state(params):
        inner = base.initial_state(params)
        out = np.zeros((inner.shape[0], n_base + 2), order="F")
        out[:, :n_base] = inner
        return out

    model = register(Model(
        name=base.name + SUFFIX,
        description=f"{base.description}, behind a degree-day snow routine",
        reference=f"{base.reference} Snow: degree-day method as reviewed by Hock, R. (2003). "
                  "Temperature-index melt modelling in mountain areas. J. Hydrol. 282, 104-115.",
        states=base.states + STATES,
        parameters=base.parameters + PARAMETERS,
        step=step,
        initial_state=initial_state,
        balance=base.balance,
        forcings=tuple(base.forcings) + ("temperature",),
        fluxes=tuple(base.fluxes) + FLUXES,
        prepare=prepare,
    ))
    step.snow_wraps = base  # (a function's attributes travel with it to another process)
    return model


def unwrap(model: Model) -> Model | None:
    """The model ``model`` wraps when :func:`wrap` built it (its step is the wrapper's), else None."""
    return getattr(model.step, "snow_wraps", None)
