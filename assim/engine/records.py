"""The engine's records: its inputs, settings, ensemble state, plan and results.

Small dataclasses that carry arrays between the pipeline and the engine and between the
parts of the engine; the constants every part shares live here too.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, replace

import numpy as np

from assim import perturb as pt
from assim.conventions import OBS_GATED, OBS_MISSING, OBS_REJECTED, OBS_USED  # noqa: F401 (re-exported)

SECONDS_PER_DAY_OVER_1000 = 86.4  # Q[m3 s-1] = q[mm d-1] * area[km2] / 86.4
FORCINGS = ("precipitation", "pet")  # passed to every model, mm d-1
OPTIONAL_FORCINGS = ("temperature",)  # passed to a model that declares it (degC, for a snow routine)


def forcing_names(model) -> tuple[str, ...]:
    """The forcings the engine perturbs and passes to ``model.step``: precipitation and PET
    for every model, then those of :data:`OPTIONAL_FORCINGS` that ``model.forcings``
    declares. The ensemble carries one AR(1) error per name (:attr:`EnsembleState.ar1`)."""
    return FORCINGS + tuple(n for n in OPTIONAL_FORCINGS if n in model.forcings)


@dataclass(frozen=True)
class Inputs:
    """Inputs of a run, on the run's days (spin-up included).

    Attributes
    ----------
    basin_ids : (basin,) str
    keys : (basin,) uint64, :func:`assim.perturb.basin_keys` of the ids
    area_km2 : (basin,) float64, km2
    days : (time,) int64, days since 1970-01-01, consecutive
    precipitation, pet : (basin, time) float64, mm d-1
    temperature : (basin, time) float64, degC, daily mean air temperature; None unless the
        model takes it (:func:`forcing_names`)
    observed : (basin, time) float64, m3 s-1, usable daily discharge, NaN where missing
    rejected : (basin, time) bool, readings rejected by quality control
    parameters : dict name -> (basin,) float64, the basins' model parameters
    climatology : optional :class:`Climatology` (the whole forcing record), for
        climatological forecasts
    forecast_forcing : optional forcing forecasts of hindcast issues: ``days`` (issue,)
        int64 and ``precipitation``, ``pet`` (basin, issue, lead, file_member) mm d-1 (and
        ``temperature`` degC when the model takes it)
    """

    basin_ids: tuple[str, ...]
    keys: np.ndarray
    area_km2: np.ndarray
    days: np.ndarray
    precipitation: np.ndarray
    pet: np.ndarray
    observed: np.ndarray
    rejected: np.ndarray
    parameters: dict[str, np.ndarray]
    climatology: Climatology | None = None
    forecast_forcing: Mapping[str, np.ndarray] | None = None
    temperature: np.ndarray | None = None

    @property
    def n_basin(self) -> int:
        return len(self.basin_ids)

    def days_slice(self, a: int, b: int) -> Inputs:
        """The inputs of day indices ``a .. b - 1`` (what one task of a block needs)."""
        t = slice(a, b)
        return replace(self, days=self.days[t], precipitation=self.precipitation[:, t], pet=self.pet[:, t],
                       observed=self.observed[:, t], rejected=self.rejected[:, t],
                       temperature=None if self.temperature is None else self.temperature[:, t])

    def subset(self, b: slice) -> Inputs:
        """The inputs of the basins ``b`` (a slice)."""
        return replace(
            self,
            basin_ids=self.basin_ids[b],
            keys=self.keys[b],
            area_km2=self.area_km2[b],
            precipitation=self.precipitation[b],
            pet=self.pet[b],
            observed=self.observed[b],
            rejected=self.rejected[b],
            parameters={k: v[b] for k, v in self.parameters.items()},
            climatology=None if self.climatology is None else self.climatology.subset(b),
            forecast_forcing=None if self.forecast_forcing is None else {
                k: (v if k == "days" else v[b]) for k, v in self.forecast_forcing.items()},
            temperature=None if self.temperature is None else self.temperature[b],
        )


@dataclass(frozen=True)
class Climatology:
    """The forcing record used for climatological (ensemble streamflow prediction) forecasts.

    days : (n,) int64 consecutive days; precipitation, pet : (basin, n) float64, mm d-1;
    temperature : (basin, n) float64, degC, or None (as in :class:`Inputs`)
    """

    days: np.ndarray
    precipitation: np.ndarray
    pet: np.ndarray
    temperature: np.ndarray | None = None

    def subset(self, b: slice) -> Climatology:
        return replace(self, precipitation=self.precipitation[b], pet=self.pet[b],
                       temperature=None if self.temperature is None else self.temperature[b])


@dataclass(frozen=True)
class EnsembleState:
    """The ensemble at the end of day ``day`` (everything a restart holds).

    states : (basin, member, n_state) float64, mm
    parameters : dict name -> (basin, member) float64
    ar1 : dict forcing name -> (basin, member) float64, the AR(1) errors on ``day`` (log errors
        of precipitation and PET, the standardised temperature error), one per name of
        :func:`forcing_names`
    collapse_days : (basin,) int64, consecutive days of collapsed spread so far
    inflation_mean, inflation_sd : (basin,) float64 or None, the adaptive inflation after the
        last analysis (None: not started; the run starts it from its settings)
    window : (basin, member, slot, column) float64 or None, the smoother's window
        (:mod:`assim.engine.window`); window_days : (slot,) int64, the day of each slot
    """

    day: int
    states: np.ndarray
    parameters: dict[str, np.ndarray]
    ar1: dict[str, np.ndarray]
    collapse_days: np.ndarray
    inflation_mean: np.ndarray | None = None
    inflation_sd: np.ndarray | None = None
    window: np.ndarray | None = None
    window_days: np.ndarray | None = None

    def subset(self, b: slice, m: slice = slice(None)) -> EnsembleState:
        return EnsembleState(
            day=self.day,
            states=self.states[b, m],
            parameters={k: v[b, m] for k, v in self.parameters.items()},
            ar1={k: v[b, m] for k, v in self.ar1.items()},
            collapse_days=self.collapse_days[b],
            inflation_mean=None if self.inflation_mean is None else self.inflation_mean[b],
            inflation_sd=None if self.inflation_sd is None else self.inflation_sd[b],
            window=None if self.window is None else self.window[b, m],
            window_days=self.window_days,
        )

    @staticmethod
    def concatenate(parts: list[EnsembleState], axis: int) -> EnsembleState:
        """Join the states of chunks along basins (``axis`` 0) or members (``axis`` 1)."""
        p0 = parts[0]
        return EnsembleState(
            p0.day,
            np.concatenate([p.states for p in parts], axis=axis),
            {k: np.concatenate([p.parameters[k] for p in parts], axis=axis) for k in p0.parameters},
            {k: np.concatenate([p.ar1[k] for p in parts], axis=axis) for k in p0.ar1},
            np.concatenate([p.collapse_days for p in parts]) if axis == 0 else p0.collapse_days,
            *((None if getattr(p0, k) is None else
               np.concatenate([getattr(p, k) for p in parts]) if axis == 0 else getattr(p0, k))
              for k in ("inflation_mean", "inflation_sd")),
            None if p0.window is None else np.concatenate([p.window for p in parts], axis=axis),
            p0.window_days,
        )


@dataclass(frozen=True)
class ObsError:
    """Observation error of discharge: ``absolute`` sd, or ``relative`` x Q with a floor (m3 s-1)."""

    kind: str = "relative"
    absolute: float = 1.0
    relative: float = 0.1
    floor: float = 0.05

    def variance(self, observed: np.ndarray) -> np.ndarray:
        """(...) m3 s-1 -> (...) (m3 s-1)^2, by :func:`assim.filters.obs_variance` (NaN stays NaN)."""
        from assim.filters import obs_variance

        return obs_variance(observed, self.kind, sd=self.absolute, relative=self.relative, floor=self.floor)


@dataclass(frozen=True)
class Settings:
    """Settings of one engine run (the entry layer builds it from the config,
    :func:`assim.settings.settings_from_config`).

    The fields mirror the config: ``mode`` ("openloop", "assimilate" or "reanalysis": an
    assimilation that records the fixed-lag smoothed ensemble), ``members``,
    ``seed``, ``spinup_days`` (``period``); the forcing error models ``precipitation``,
    ``pet`` and ``temperature`` (named as the forcings they perturb), ``parameter_sd``
    (relative sd by parameter name) and ``state_noise`` (sd in mm
    by state name) (``perturbation``); ``method``, ``update_states``, ``obs_error``,
    ``transform*``, ``gate_sigma``, ``inflation``/``rtps``/``rtpp``, ``adaptive_*`` (adaptive
    inflation, Anderson 2009: on/off, initial mean and sd, damping, bounds, sd floor), ``estimate`` and
    ``shrinkage`` (the Liu & West factor a), ``collapse_*``, ``gating_warn_fraction`` and
    ``smoother_window`` (days W of the fixed-lag smoother) (``filter``); ``quantiles`` (None = members), ``write_states``, ``float32``
    (``outputs``); ``basin_chunk``, ``member_chunk``, ``time_block_days``, ``scheduler``,
    ``workers`` (``ensemble``; they never change the numbers).
    """

    mode: str = "assimilate"
    members: int = 64
    seed: int = 0
    spinup_days: int = 0
    precipitation: pt.LognormalAR1 = pt.LognormalAR1(0.3, 0.5)
    pet: pt.LognormalAR1 = pt.LognormalAR1(0.1, 0.8)
    temperature: pt.GaussianAR1 = pt.GaussianAR1(0.0, 0.7)
    parameter_sd: Mapping[str, float] = field(default_factory=dict)
    state_noise: Mapping[str, float] = field(default_factory=dict)
    method: str = "enkf"
    update_states: tuple[str, ...] = ()
    obs_error: ObsError = ObsError()
    transform: str = "none"
    transform_offset: float = 0.01
    transform_lambda: float = 0.3
    gate_sigma: float = 5.0
    inflation: float = 1.0
    rtps: float = 0.0
    rtpp: float = 0.0
    adaptive_inflation: bool = False
    adaptive_initial_mean: float = 1.0
    adaptive_initial_sd: float = 0.6
    adaptive_damping: float = 0.9
    adaptive_lower: float = 1.0
    adaptive_upper: float = 10.0
    adaptive_min_sd: float = 0.1
    estimate: tuple[str, ...] = ()
    shrinkage: float = 0.98
    collapse_ratio: float = 0.1
    collapse_days: int = 30
    gating_warn_fraction: float = 0.2
    quantiles: tuple[float, ...] | None = None
    write_states: tuple[str, ...] = ()
    float32: bool = True
    basin_chunk: int = 64
    member_chunk: int = 0
    time_block_days: int = 365
    scheduler: str = "threads"
    workers: int = 0
    kernel: str = "auto"
    smoother_window: int = 0

    @property
    def assimilate(self) -> bool:
        return self.mode in ("assimilate", "reanalysis")

    @property
    def reanalysis(self) -> bool:
        return self.mode == "reanalysis"

    @property
    def keeps_window(self) -> bool:
        """Whether the runs keep the smoother's window (:mod:`assim.engine.window`)."""
        return self.reanalysis or (self.assimilate and self.smoother_window > 0)


@dataclass(frozen=True)
class Plan:
    """Which days a run covers.

    start : index into ``inputs.days`` of the first day to advance
    stop : index of the last day (inclusive)
    first_output : index of the first day written (after spin-up)
    first_analysis : index of the first day assimilated (after spin-up)
    """

    start: int
    stop: int
    first_output: int
    first_analysis: int

    @property
    def output_slice(self) -> slice:
        return slice(max(self.start, self.first_output), self.stop + 1)


@dataclass
class BlockResult:
    """What one task returns: outputs of its days, end state, hindcasts and counters."""

    arrays: dict[str, np.ndarray]
    state: EnsembleState | None  # None while it stays in the chunk's lane (assim.parallel)
    hindcast: np.ndarray | None  # (basin, issue, lead, member) m3 s-1
    n_used: np.ndarray  # (basin,) readings used
    n_gated: np.ndarray  # (basin,)
    collapse_first: np.ndarray  # (basin,) first day number a collapse warning was reached, -1 none
    first_bad: tuple | None = None


@dataclass(frozen=True)
class HealthWarning:
    """A warning about one basin of a run. The engine returns these and never emits them;
    the entry layer writes them into the product and shows each once.

    code : "ensemble_collapse" or "frequent_gating"; basin : the basin id;
    message : one line, what happened and what to consider (``str()`` prefixes the basin)
    """

    code: str
    basin: str
    message: str

    def __str__(self) -> str:
        return f"basin {self.basin}: {self.message}"


@dataclass
class RunSummary:
    """What a run returns besides the sink's file: end state, warnings, counts per basin."""

    state: EnsembleState
    warnings: list[HealthWarning]
    n_used: np.ndarray
    n_gated: np.ndarray
    first_collapse: np.ndarray
    plan: Plan

