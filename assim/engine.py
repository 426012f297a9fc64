"""Time cycling of the ensemble: open loop, assimilation, hindcasts and forecasts.

The engine works on arrays only (numpy; dask through :mod:`assim.parallel`). It receives the
inputs of a run as an :class:`Inputs` record, its settings as a :class:`Settings` record and
a *sink* for its results; it never opens a file. :mod:`assim.pipeline` builds the inputs from
the prepared layer and passes an :mod:`assim.io.products` writer as the sink.

One day of a run, for the whole flat (basin x member) batch at once:

1. perturb the day's forcing (multiplicative lognormal AR(1) errors, :mod:`assim.perturb`);
2. advance every member with one ``model.step`` call; add the optional state noise;
3. predict discharge: runoff (mm d-1) -> m3 s-1 with the basin area;
4. (assimilation, after the spin-up) update the chosen states, the predicted discharge (an
   augmented column, giving ``discharge_analysis``) and the estimated parameters from the
   day's usable gauge readings, with one :func:`assim.filters.ensemble_update` call over all
   basins; basins without a reading are left unchanged;
5. check that every state is finite (else :class:`assim.errors.RunError` naming basin and day).

Time is cut into blocks (``ensemble.time_block_days``); within a block, each basin chunk
(and, where members are independent, each member chunk) is one task that advances its part
of the ensemble over the block and returns the block's outputs. Each chunk is pinned to a
worker lane (:mod:`assim.parallel`) where its state stays from one block to the next; the
last block returns the end state. The main thread joins the chunks of each block and hands
it to the sink while the lanes compute the next blocks (at most two blocks in flight), so
memory stays flat and the results do not depend on the chunking or the scheduler.
"""

from __future__ import annotations

import functools
import warnings as _warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from assim import parallel
from assim import perturb as pt
from assim.errors import ConfigError, RunError
from assim.models.base import Model

SECONDS_PER_DAY_OVER_1000 = 86.4  # Q[m3 s-1] = q[mm d-1] * area[km2] / 86.4
OBS_USED, OBS_MISSING, OBS_GATED, OBS_REJECTED = 0, 1, 2, 3
FORCINGS = ("precipitation", "pet")


# ---------------------------------------------------------------- records


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
    observed : (basin, time) float64, m3 s-1, usable daily discharge, NaN where missing
    rejected : (basin, time) bool, readings rejected by quality control
    parameters : dict name -> (basin,) float64, the basins' model parameters
    climatology : optional :class:`Climatology` (the whole forcing record), for
        climatological forecasts
    forecast_forcing : optional forcing forecasts of hindcast issues: ``days`` (issue,)
        int64 and ``precipitation``, ``pet`` (basin, issue, lead, file_member) mm d-1
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

    @property
    def n_basin(self) -> int:
        return len(self.basin_ids)

    def days_slice(self, a: int, b: int) -> Inputs:
        """The inputs of day indices ``a .. b - 1`` (what one task of a block needs)."""
        t = slice(a, b)
        return replace(self, days=self.days[t], precipitation=self.precipitation[:, t], pet=self.pet[:, t],
                       observed=self.observed[:, t], rejected=self.rejected[:, t])

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
        )


@dataclass(frozen=True)
class Climatology:
    """The forcing record used for climatological (ensemble streamflow prediction) forecasts.

    days : (n,) int64 consecutive days; precipitation, pet : (basin, n) float64, mm d-1
    """

    days: np.ndarray
    precipitation: np.ndarray
    pet: np.ndarray

    def subset(self, b: slice) -> Climatology:
        return replace(self, precipitation=self.precipitation[b], pet=self.pet[b])


@dataclass(frozen=True)
class EnsembleState:
    """The ensemble at the end of day ``day`` (everything a restart holds).

    states : (basin, member, n_state) float64, mm
    parameters : dict name -> (basin, member) float64
    ar1 : dict forcing name -> (basin, member) float64, the AR(1) log errors on ``day``
    collapse_days : (basin,) int64, consecutive days of collapsed spread so far
    """

    day: int
    states: np.ndarray
    parameters: dict[str, np.ndarray]
    ar1: dict[str, np.ndarray]
    collapse_days: np.ndarray

    def subset(self, b: slice, m: slice = slice(None)) -> EnsembleState:
        return EnsembleState(
            day=self.day,
            states=self.states[b, m],
            parameters={k: v[b, m] for k, v in self.parameters.items()},
            ar1={k: v[b, m] for k, v in self.ar1.items()},
            collapse_days=self.collapse_days[b],
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
    """Settings of one engine run (built from the config by :func:`settings_from_config`).

    The fields mirror the config: ``mode`` ("openloop" or "assimilate"), ``members``,
    ``seed``, ``spinup_days`` (``period``); the forcing error models ``precipitation`` and
    ``pet``, ``parameter_sd`` (relative sd by parameter name) and ``state_noise`` (sd in mm
    by state name) (``perturbation``); ``method``, ``update_states``, ``obs_error``,
    ``transform*``, ``gate_sigma``, ``inflation``/``rtps``/``rtpp``, ``estimate`` and
    ``shrinkage`` (the Liu & West factor a), ``collapse_*`` and ``gating_warn_fraction``
    (``filter``); ``quantiles`` (None = members), ``write_states``, ``float32``
    (``outputs``); ``basin_chunk``, ``member_chunk``, ``time_block_days``, ``scheduler``,
    ``workers`` (``ensemble``; they never change the numbers).
    """

    mode: str = "assimilate"
    members: int = 64
    seed: int = 0
    spinup_days: int = 0
    precipitation: pt.LognormalAR1 = pt.LognormalAR1(0.3, 0.5)
    pet: pt.LognormalAR1 = pt.LognormalAR1(0.1, 0.8)
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

    @property
    def assimilate(self) -> bool:
        return self.mode == "assimilate"


def settings_from_config(cfg: Mapping, model: Model, mode: str) -> Settings:
    """Engine settings from a validated config (a mapping of sections).

    Raises
    ------
    ConfigError
        naming the key when a state or parameter name is not one of the model's.
    """
    ens, per, fil, out = cfg["ensemble"], cfg["perturbation"], cfg["filter"], cfg["outputs"]
    names = model.state_names
    for key, chosen in (("filter.update_states", fil["update_states"]),
                        ("perturbation.state_noise", list(per["state_noise"]))):
        for n in chosen:
            if n not in names:
                raise ConfigError(f"model {model.name!r} has no state {n!r}; states: {', '.join(names)}",
                                  file=getattr(cfg, "source", None), variable=key)
    pnames = model.parameter_names
    for key, chosen in (("perturbation.parameters", list(per["parameters"])),
                        ("filter.parameters.estimate", fil["parameters"]["estimate"])):
        for n in chosen:
            if n not in pnames:
                raise ConfigError(f"model {model.name!r} has no parameter {n!r}; parameters: {', '.join(pnames)}",
                                  file=getattr(cfg, "source", None), variable=key)
    update = tuple(fil["update_states"]) or model.default_updated_states()
    update = tuple(n for n in names if n in update)  # model order
    if out["all_states"]:
        write = names
    elif out["states"]:
        write = update
    else:
        write = ()
    oe, tr, inf = fil["obs_error"], fil["transform"], fil["inflation"]
    settings = Settings(
        mode=mode,
        members=int(ens["members"]),
        seed=int(ens["seed"]),
        spinup_days=int(cfg["period"]["spinup_days"]),
        precipitation=pt.LognormalAR1(float(per["precipitation_cv"]), float(per["precipitation_ar1"])),
        pet=pt.LognormalAR1(float(per["pet_cv"]), float(per["pet_ar1"])),
        parameter_sd=dict(per["parameters"]),
        state_noise=dict(per["state_noise"]),
        method=fil["method"],
        update_states=update,
        obs_error=ObsError(oe["kind"], float(oe["absolute_m3s"]), float(oe["relative"]), float(oe["floor_m3s"])),
        transform=tr["kind"],
        transform_offset=float(tr["offset_m3s"]),
        transform_lambda=float(tr["lambda"]),
        gate_sigma=float(fil["gate_sigma"]),
        inflation=float(inf["multiplicative"]),
        rtps=float(inf["rtps"]),
        rtpp=float(inf["rtpp"]),
        estimate=tuple(p for p in pnames if p in fil["parameters"]["estimate"]),
        shrinkage=float(fil["parameters"]["shrinkage"]),
        collapse_ratio=float(fil["collapse_ratio"]),
        collapse_days=int(fil["collapse_days"]),
        gating_warn_fraction=float(fil["gating_warn_fraction"]),
        quantiles=tuple(out["quantiles"]) if out["ensemble"] == "quantiles" else None,
        write_states=write,
        float32=bool(out["float32"]),
        basin_chunk=int(ens["basin_chunk"]),
        member_chunk=int(ens["member_chunk"]),
        time_block_days=int(ens["time_block_days"]),
        scheduler=str(ens["scheduler"]),
        workers=int(ens["workers"]),
        kernel=str(ens.get("kernel", "auto")),
    )
    if settings.kernel == "compiled":
        from assim.fused_block import kernel_choice

        why = kernel_choice(model, settings)
        if why is not None:
            raise ConfigError(f"the compiled kernel cannot run this: {why}", file=getattr(cfg, "source", None),
                              variable="ensemble.kernel")
    return settings


# ---------------------------------------------------------------- initial ensemble


def parameter_ranges(model: Model) -> dict[str, pt.ParameterRange]:
    return {p.name: pt.ParameterRange(p.low, p.high) for p in model.parameters}


def initial_ensemble(model: Model, inputs: Inputs, settings: Settings) -> EnsembleState:
    """The ensemble before the first day of ``inputs``.

    Members get their parameters (:func:`assim.perturb.perturb_parameters`), the model's
    initial state, and AR(1) log errors drawn from the stationary distribution on the day
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
        name: pt.standard_normal(pt.counter_keys(settings.seed, inputs.keys, members, stream), day0)
        for name, stream in (("precipitation", pt.PRECIPITATION), ("pet", pt.PET))
    }
    return EnsembleState(day0, states, params, ar1, np.zeros(b, dtype=np.int64))


# ---------------------------------------------------------------- planning


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


def _iso(day) -> str:
    """Day number (days since 1970-01-01) -> 'YYYY-MM-DD'."""
    return str(np.datetime64(int(day), "D"))


def plan(inputs: Inputs, settings: Settings, state: EnsembleState | None, until_day: int | None = None) -> Plan:
    """Days of a run from ``state`` (None: from the first day) to ``until_day``.

    Raises
    ------
    RunError
        if the state is not valid on a day of the inputs (or the day before the first), or
        ``until_day`` is outside the inputs.
    """
    days = inputs.days
    start = 0 if state is None else int(state.day - days[0] + 1)
    if not 0 <= start <= len(days):
        raise RunError(f"the restart is not valid on a day of the run period ({_iso(days[0])} to "
                       f"{_iso(days[-1])})", variable="valid_time", place=_iso(state.day))
    stop = len(days) - 1 if until_day is None else int(until_day - days[0])
    if not start - 1 <= stop < len(days):
        raise RunError(f"--until is outside the run period ({_iso(days[0])} to {_iso(days[-1])}) or before "
                       "the restart", variable="until", place=_iso(until_day))
    first = min(settings.spinup_days, len(days))
    return Plan(start, stop, first, first)


# ---------------------------------------------------------------- the analysis


def augmented_bounds(lower: np.ndarray, upper: np.ndarray, theta_lower: np.ndarray,
                     theta_upper: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bounds of the augmented analysis vector (updated states, discharge, parameters).

    Parameters
    ----------
    lower, upper : (basin, member, n_update) state bounds, mm
    theta_lower, theta_upper : (n_param,) valid ranges of the estimated parameters

    Returns
    -------
    lower, upper : (basin, member, n_update + 1 + n_param); discharge is bounded below by 0
    """
    nb, nm, _ = lower.shape
    npar = len(theta_lower)
    lo = np.concatenate([lower, np.zeros((nb, nm, 1)), np.broadcast_to(theta_lower, (nb, nm, npar))], axis=-1)
    hi = np.concatenate([upper, np.full((nb, nm, 1), np.inf), np.broadcast_to(theta_upper, (nb, nm, npar))],
                        axis=-1)
    return lo, hi


def analyse(
    states: np.ndarray,
    discharge: np.ndarray,
    theta: np.ndarray | None,
    observed: np.ndarray,
    obs_var: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    obs_noise: np.ndarray | None,
    settings: Settings,
):
    """One analysis over all basins of a chunk.

    The analysis vector of each member is (updated states, predicted discharge, estimated
    parameters): the discharge column gives ``discharge_analysis`` and the parameter
    columns the joint state-parameter update.

    Parameters
    ----------
    states : (basin, member, n_update) float64, mm, the updated states
    discharge : (basin, member) float64, m3 s-1, predicted discharge (background)
    theta : (basin, member, n_param) float64 or None, estimated parameters
    observed : (basin,) float64, m3 s-1, NaN where no usable reading
    obs_var : (basin,) float64, (m3 s-1)^2, observation error variance
    lower, upper : (basin, member, n_update + 1 + n_param), from :func:`augmented_bounds`
    obs_noise : (basin, member) standard normals for the perturbed observations (EnKF)

    Returns
    -------
    states, discharge, theta (updated), and the filter's ``Analysis``.
    """
    from assim.filters import ensemble_update

    nb, nm, nu = states.shape
    npar = 0 if theta is None else theta.shape[-1]
    # one (basin, member) plane per column, members fastest: the layout the filter's
    # one-observation path works on along contiguous members (and returns)
    planes = np.empty((nu + 1 + npar, nb, nm))
    planes[:nu] = np.moveaxis(states, -1, 0)
    planes[nu] = discharge
    if theta is not None:
        planes[nu + 1:] = np.moveaxis(theta, -1, 0)
    x = np.moveaxis(planes, 0, -1)  # (basin, member, column)
    transform = _transform(settings)
    if transform is not None:
        obs_var = transform.variance(observed, obs_var)
    a = ensemble_update(
        x,
        discharge[..., None],
        observed[:, None],
        obs_var[:, None],
        method=settings.method,
        inflation=_inflation(settings),
        gate_sigma=settings.gate_sigma if settings.gate_sigma > 0 else None,
        lower=lower,
        upper=upper,
        transform=transform,
        obs_noise=None if obs_noise is None else obs_noise[..., None],
    )
    xa = a.states
    new_theta = None if theta is None else xa[..., nu + 1:]
    return xa[..., :nu], xa[..., nu], new_theta, a


def _inflation(settings: Settings):
    return _inflation_of(settings.inflation, settings.rtps, settings.rtpp)


def _transform(settings: Settings):
    if settings.transform == "none":
        return None
    lam = settings.transform_lambda if settings.transform == "boxcox" else 1.0
    return _transform_of(settings.transform, settings.transform_offset, lam)


# Built once per distinct setting, not once per analysis (frozen records, safe to share).
@functools.lru_cache(maxsize=32)
def _inflation_of(multiplicative: float, rtps: float, rtpp: float):
    from assim import filters

    return filters.Inflation(multiplicative=multiplicative, rtps=rtps, rtpp=rtpp)


@functools.lru_cache(maxsize=32)
def _transform_of(kind: str, offset: float, lam: float):
    from assim import filters

    return filters.Transform(kind, offset=offset, lam=lam)


def _member_sd(a: np.ndarray) -> np.ndarray:
    """``a.std(axis=-1, ddof=1)`` of a (basin, member) or (basin, time, member) array, the
    same operations without the Python layers of ``ndarray.std``; each (basin, day) row is
    reduced alone, so a spread does not depend on the other rows."""
    n = a.shape[-1]
    mean = np.add.reduce(a, axis=-1, keepdims=True)
    np.true_divide(mean, n, out=mean)
    d = np.subtract(a, mean)
    np.square(d, out=d)
    out = np.add.reduce(d, axis=-1)
    np.true_divide(out, n - 1, out=out)
    return np.sqrt(out, out=out)


def collapse_counts(count: np.ndarray, has: np.ndarray, low: np.ndarray, days: np.ndarray,
                    limit: int) -> tuple[np.ndarray, np.ndarray]:
    """Consecutive-day counters of collapsed spread over a run of analysed days, at once.

    Day by day: a day with a reading and a low spread adds one, a day with a reading and a
    normal spread resets to 0, a day without a reading keeps the count; the warning day is the
    first day whose count equals ``limit``.

    Parameters
    ----------
    count : (basin,) int, counts before the first day
    has, low : (basin, day) bool, reading present; reading present and spread low
    days : (day,) int, day numbers
    limit : int, ``filter.collapse_days``

    Returns
    -------
    count : (basin,) int64 after the last day
    first : (basin,) int64, the first day number whose count equals ``limit``, -1 for none
    """
    nb, nd = has.shape
    count = np.asarray(count, dtype=np.int64)
    if nd == 0:
        return count.copy(), np.full(nb, -1, dtype=np.int64)
    lows = np.cumsum(low, axis=1, dtype=np.int64)  # low days so far
    reset = has & ~low
    last = np.maximum.accumulate(np.where(reset, np.arange(nd), -1), axis=1)  # last reset day so far
    at_reset = np.take_along_axis(lows, np.maximum(last, 0), axis=1)
    counts = np.where(last >= 0, lows - at_reset, count[:, None] + lows)
    hit = counts == limit
    first = np.where(hit.any(axis=1), np.asarray(days, dtype=np.int64)[hit.argmax(axis=1)], -1)
    return counts[:, -1].copy(), first


def liu_west_shrink(theta: np.ndarray, a: float, z: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Kernel shrinkage of parameter members before an analysis.

    Parameters
    ----------
    theta : (basin, member, n_param) float64
    a : shrinkage factor in (0, 1]
    z : (basin, member, n_param) standard normals
    low, high : (n_param,) valid range

    Returns
    -------
    (basin, member, n_param): ``a theta + (1 - a) mean + h sd z`` clipped to the range,
    ``h^2 = 1 - a^2``, so the ensemble mean and variance are kept in expectation.
    """
    mean = theta.mean(axis=1, keepdims=True)
    var = theta.var(axis=1, ddof=1, keepdims=True)
    h = np.sqrt(1.0 - a * a)
    # Liu & West (2001), eq. 10: theta_i <- a theta_i + (1 - a) mean + N(0, h^2 Var(theta))
    new = a * theta + (1.0 - a) * mean + h * np.sqrt(var) * z
    return np.clip(new, low, high)


# ---------------------------------------------------------------- one task: a chunk over a block


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


def advance(
    model: Model,
    inputs: Inputs,
    state: EnsembleState,
    settings: Settings,
    t0: int,
    t1: int,
    *,
    members: np.ndarray,
    first_output: int,
    first_analysis: int,
    collect: bool = True,
    issue_index: np.ndarray | None = None,
    leads: int = 0,
    forecast_forcing: str = "observed",
    fixed: tuple | None = None,
    check_daily: bool = False,
) -> BlockResult:
    """Advance a chunk of the ensemble over days ``t0 .. t1 - 1`` (indices into inputs.days).

    Parameters
    ----------
    inputs : the chunk's basins, all days
    state : the chunk's ensemble at the end of day ``t0 - 1``
    members : (member,) int, the member numbers of the chunk
    first_output, first_analysis : day indices where outputs and analyses start
    collect : gather the run outputs (False for a hindcast, which keeps forecasts only)
    issue_index : day indices (within the block) whose end states start a hindcast forecast
    leads : forecast length of the hindcast (days)
    fixed : optional ``(prepared parameters, lower, upper)`` of the chunk, from
        :func:`fixed_parameters`, when no parameter is estimated (they are then the same in
        every block, and computing them is as costly as stepping the model over a month)
    check_daily : check that the state is finite every day (else at the end of the block
        and on days with non-finite discharge; a failed block is then run again checked)

    Returns
    -------
    BlockResult
    """
    if issue_index is None and not check_daily:
        from assim import fused_block

        if fused_block.applicable(model, settings):
            r = fused_block.advance(model, inputs, state, settings, t0, t1, members=members,
                                    first_output=first_output, first_analysis=first_analysis,
                                    collect=collect, fixed=fixed)
            if r is not None:
                return r
            check_daily = True  # a state went non-finite: the numpy path names it
    nb, nm = inputs.n_basin, len(members)
    ns = model.n_state
    s = settings
    days = inputs.days[t0:t1]
    nt = len(days)
    assim = s.assimilate
    upd = np.array([model.state_index(n) for n in s.update_states], dtype=np.intp)
    est = s.estimate
    ranges = parameter_ranges(model)
    th_lo = np.array([ranges[p].low for p in est])
    th_hi = np.array([ranges[p].high for p in est])

    x = np.array(state.states, dtype=np.float64).reshape(nb * nm, ns)
    params = {k: np.array(v, dtype=np.float64) for k, v in state.parameters.items()}
    if fixed is not None and not est:
        prepared, lower, upper = fixed
    else:
        prepared, lower, upper = fixed_parameters(model, params)

    # random numbers and perturbed forcing of the whole block, one call per stream
    ck = {name: pt.counter_keys(s.seed, inputs.keys, members, stream)
          for name, stream in (("precipitation", pt.PRECIPITATION), ("pet", pt.PET))}
    log_err = {}  # (time, basin, member) AR(1) log errors of the block, kept for hindcast issues
    end_ar1 = {}
    forcing_blk = {}  # (time, basin * member) perturbed forcing, mm d-1
    for name, model_err in (("precipitation", s.precipitation), ("pet", s.pet)):
        e = model_err.series(state.ar1[name], pt.standard_normal(ck[name], days))
        end_ar1[name] = e[-1].copy() if nt else state.ar1[name]
        if issue_index is not None and len(issue_index):
            log_err[name] = e
            e = np.empty_like(e)
        w = model_err.multiplier(log_err.get(name, e), out=e)  # in place when not kept
        w *= getattr(inputs, name)[:, t0:t1].T[:, :, None]
        forcing_blk[name] = w.reshape(nt, nb * nm)
    noise = pt.StateNoise.from_names(s.state_noise, list(model.state_names))
    noise_keys = [pt.counter_keys(s.seed, inputs.keys, members, k) for k in noise.streams]
    kernel_keys = [pt.counter_keys(s.seed, inputs.keys, members, pt.stream_id("kernel:" + p)) for p in est]
    if assim:
        obs_blk = inputs.observed[:, t0:t1]
        has_blk = np.isfinite(obs_blk)
        any_blk = has_blk.any(axis=0)
        var_blk = s.obs_error.variance(obs_blk)
        sd_blk = np.sqrt(np.where(has_blk, var_blk, np.inf))
        status_blk = np.where(inputs.rejected[:, t0:t1], OBS_REJECTED, OBS_MISSING).astype(np.int8)
        obs_noise_blk = None
        if s.method == "enkf":
            okeys = pt.counter_keys(s.seed, inputs.keys, members, pt.OBSERVATION)
            obs_noise_blk = pt.standard_normal(okeys, days)  # (time, basin, member)

    area = inputs.area_km2[:, None] / SECONDS_PER_DAY_OVER_1000  # (basin, 1)
    out_idx = [k for k in range(nt) if t0 + k >= first_output]
    n_out = len(out_idx) if collect else 0
    k_out0 = out_idx[0] if out_idx else nt
    odt = np.float32 if s.float32 else np.float64
    write_cols = [(n, model.state_index(n)) for n in s.write_states]
    arrays: dict[str, np.ndarray] = {}
    if n_out:
        ens = (nb, n_out, nm)
        arrays["discharge"] = np.empty(ens, dtype=odt)
        if assim:
            arrays["discharge_analysis"] = np.empty(ens, dtype=odt)
        for n in s.write_states:
            arrays[n] = np.empty(ens, dtype=odt)
        if assim:
            for p in est:
                arrays[p] = np.empty(ens, dtype=odt)
            for n in ("innovation", "innovation_variance", "spread_before", "spread_after"):
                arrays[n] = np.full((nb, n_out), np.nan)
            arrays["observed_discharge"] = obs_blk[:, k_out0:].copy()
            arrays["clipped_water"] = np.zeros((nb, n_out))
            arrays["obs_status"] = status_blk[:, k_out0:].copy()
        if noise:  # per member here; the ensemble mean is taken after the chunks are joined
            arrays["state_noise_water"] = np.zeros((nb, n_out, nm))
    n_used = np.zeros(nb, dtype=np.int64)
    n_gated = np.zeros(nb, dtype=np.int64)
    collapse = np.array(state.collapse_days, dtype=np.int64)
    collapse_first = np.full(nb, -1, dtype=np.int64)
    issues = set() if issue_index is None else {int(i) for i in issue_index}
    snaps = []

    def updated_bounds():
        return augmented_bounds(lower[:, upd].reshape(nb, nm, len(upd)), upper[:, upd].reshape(nb, nm, len(upd)),
                                th_lo, th_hi)

    lo3, hi3 = updated_bounds()
    if assim:  # discharge (float64) and reading use of every day, for the spreads, counts and
        # collapse counters of the block at its end
        q_blk = np.empty((nb, nt, nm))
        qa_blk = np.empty((nb, nt, nm))
        analysed = np.zeros(nt, dtype=bool)
        used_blk = np.zeros((nb, nt), dtype=bool)
        gated_blk = np.zeros((nb, nt), dtype=bool)
    try:
        for k in range(nt):
            t = t0 + k
            day = int(days[k])
            x, fluxes = model.step(x, {n: forcing_blk[n][k] for n in FORCINGS}, prepared)
            added = None
            if noise:
                z = [pt.standard_normal(kk, day).reshape(-1) for kk in noise_keys]
                x, added = pt.add_state_noise(x, noise, z, lower, upper)
            q = fluxes["runoff"].reshape(nb, nm) * area
            qa = q
            k_o = k - k_out0
            record = collect and k >= k_out0
            if assim and t >= first_analysis and any_blk[k]:
                theta = None
                if est:
                    theta = np.stack([params[p] for p in est], axis=-1)
                    zk = np.stack([pt.standard_normal(kk, day) for kk in kernel_keys], axis=-1)
                    theta = liu_west_shrink(theta, s.shrinkage, zk, th_lo, th_hi)
                on = None if obs_noise_blk is None else obs_noise_blk[k]
                # x is the model's fresh output: update its columns in place (it may be
                # Fortran-ordered, so work on the flat (batch, n_state) view, never on a reshaped copy)
                xs, qa, theta_new, a = analyse(x[:, upd].reshape(nb, nm, len(upd)), q, theta, obs_blk[:, k],
                                               var_blk[:, k], lo3, hi3, on, s)
                x[:, upd] = xs.reshape(nb * nm, len(upd))
                if est:
                    for j, p in enumerate(est):
                        params[p] = np.ascontiguousarray(theta_new[..., j])
                    flat = {kk: v.reshape(-1) for kk, v in params.items()}
                    prepared = model.prepare(flat)
                    lower, upper = model.bounds(flat)
                    lo3, hi3 = updated_bounds()
                used_blk[:, k] = np.asarray(a.used).reshape(nb)
                gated_blk[:, k] = np.asarray(a.gated).reshape(nb)
                analysed[k] = True
                if record:
                    arrays["innovation"][:, k_o] = np.asarray(a.innovation).reshape(nb)
                    arrays["innovation_variance"][:, k_o] = np.asarray(a.innovation_variance).reshape(nb)
                    arrays["clipped_water"][:, k_o] = _clipped_water(a, nb, nm, len(upd))
            # A non-finite state stops the run. Summing the whole state every day costs as much
            # as a tenth of the day's work, so it is summed at the end of the block and on days
            # whose discharge is not finite; a block that fails is run again from its start,
            # checked every day, to name the first bad day and state.
            if check_daily or k == nt - 1 or not np.isfinite(np.add.reduce(q, axis=None)):
                if not np.isfinite(x.sum()):
                    if not check_daily:
                        raise _Replay
                    bad = np.flatnonzero(~np.isfinite(x).all(axis=1))[0]
                    col = int(np.flatnonzero(~np.isfinite(x[bad]))[0])
                    return BlockResult({}, state, None, n_used, n_gated, collapse_first,
                                       first_bad=(inputs.basin_ids[bad // nm], day, model.state_names[col]))
            if assim:
                q_blk[:, k] = q
                qa_blk[:, k] = qa
            if record:
                if not assim:
                    arrays["discharge"][:, k_o] = q
                for p in est:
                    arrays[p][:, k_o] = params[p]
                for n, col in write_cols:
                    arrays[n][:, k_o] = x[:, col].reshape(nb, nm)
                if added is not None:
                    arrays["state_noise_water"][:, k_o] = added.reshape(nb, nm)
            if t in issues:
                snaps.append((t, x.reshape(nb, nm, ns).copy(), {kk: v.copy() for kk, v in params.items()},
                              {n: e[k].copy() for n, e in log_err.items()}))
    except Exception:
        if check_daily:
            raise
        # a state gone bad mid-block may have upset the filter: the checked run names it
        return advance(model, inputs, state, settings, t0, t1, members=members, first_output=first_output,
                       first_analysis=first_analysis, collect=collect, issue_index=issue_index, leads=leads,
                       forecast_forcing=forecast_forcing, fixed=fixed, check_daily=True)
    if assim and nt:
        # spreads of every day at once (each row reduced alone, as on its own day), then the
        # counts and collapse counters of the analysed days
        spread_b = _member_sd(q_blk)  # (basin, time)
        n_used += used_blk.sum(axis=1)
        n_gated += gated_blk.sum(axis=1)
        a_days = np.flatnonzero(analysed)
        has = has_blk[:, a_days]
        low_spread = has & (spread_b[:, a_days] < s.collapse_ratio * sd_blk[:, a_days])
        collapse, collapse_first = collapse_counts(collapse, has, low_spread, days[a_days], s.collapse_days)
        if n_out:
            arrays["obs_status"][:] = np.where(used_blk, OBS_USED, np.where(gated_blk, OBS_GATED,
                                                                             status_blk))[:, k_out0:]
            arrays["discharge"][:] = q_blk[:, k_out0:]
            arrays["discharge_analysis"][:] = qa_blk[:, k_out0:]
            arrays["spread_before"][:] = spread_b[:, k_out0:]
            arrays["spread_after"][:] = _member_sd(qa_blk[:, k_out0:])

    end = EnsembleState(
        day=int(days[-1]) if nt else state.day,
        states=x.reshape(nb, nm, ns).copy(),
        parameters=params,
        ar1=end_ar1,
        collapse_days=collapse,
    )
    hind = None
    if snaps:
        hind = hindcast_forecasts(model, inputs, settings, snaps, members, leads, forecast_forcing)
    return BlockResult(arrays, end, hind, n_used, n_gated, collapse_first)


class _Replay(Exception):
    """A block's state went bad: run it again, checked every day."""


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


def _clipped_water(a, nb: int, nm: int, nu: int) -> np.ndarray:
    """Water added by clipping the updated states to their bounds, ensemble mean per basin (mm).

    ``a.clipped`` is (basin, n_col) summed over members; only the first ``nu`` columns are
    states (the others are discharge and parameters)."""
    c = np.asarray(a.clipped, dtype=np.float64).reshape(nb, -1)
    return c[:, :nu].sum(axis=1) / nm


def reduce_members(arrays: dict[str, np.ndarray], settings: Settings) -> dict[str, np.ndarray]:
    """What a block's member arrays become in the output: the member mean of the state-noise
    water, and quantiles instead of members when ``settings.quantiles`` is set. Applied to
    whole-member arrays only (in the lane when a chunk holds every member, else after the
    member chunks are joined); rows are made contiguous first, so both places give the same
    bits."""
    arrays = dict(arrays)
    if "state_noise_water" in arrays:
        arrays["state_noise_water"] = np.ascontiguousarray(arrays["state_noise_water"]).mean(axis=2)
    if settings.quantiles is not None and arrays:
        arrays = quantile_arrays({k: np.ascontiguousarray(v) for k, v in arrays.items()}, settings.quantiles)
    return arrays


def quantile_arrays(arrays: dict[str, np.ndarray], quantiles: Sequence[float]) -> dict[str, np.ndarray]:
    """Replace member arrays (basin, time, member) by discharge quantiles (basin, time, quantile)."""
    out = {k: v for k, v in arrays.items() if v.ndim == 2}
    for name in ("discharge", "discharge_analysis"):
        if name in arrays:
            out[name + "_quantile"] = member_quantiles(arrays[name], quantiles).astype(arrays[name].dtype)
    return out


def member_quantiles(values: np.ndarray, quantiles: Sequence[float]) -> np.ndarray:
    """Quantiles over the last (member) axis, linear between order statistics: the sample
    quantile of Hyndman & Fan (1996) definition 7, numpy's default. One sort of each row,
    then the interpolation at fixed positions (numpy.quantile's partitioning is six times
    slower on (basin, day, 128) blocks).

    values : (..., member) float; quantiles : (q,) in [0, 1] -> (..., q)
    """
    s = np.sort(values, axis=-1)
    n = s.shape[-1]
    position = (n - 1) * np.asarray(quantiles, dtype=np.float64)  # Hyndman & Fan (1996), definition 7
    lo = np.floor(position).astype(np.intp)
    hi = np.minimum(lo + 1, n - 1)
    below, above = s[..., lo], s[..., hi]
    return below + (above - below) * (position - lo)


# ---------------------------------------------------------------- forecasts


def climatology_index(clim_days: np.ndarray, issue_days: np.ndarray, leads: int, members: np.ndarray) -> np.ndarray:
    """Index into the climatology record of the forcing of every (issue, lead, member).

    Member ``m`` takes the weather of year ``Y - 1 - (m mod n)`` counted among the record's
    years with a complete window (issue date and leads 1..L on the same calendar dates, 29
    February read as 28 February), most recent first; years after the issue year (for
    hindcasts inside the record) follow the earlier ones. The issue's own year is never used.

    Parameters
    ----------
    clim_days : (n,) int64 consecutive days of the record
    issue_days : (issue,) int64
    leads : L
    members : (member,) int

    Returns
    -------
    (issue, L, member) intp

    Raises
    ------
    RunError
        if the record holds no other year with a complete window.
    """
    d0 = int(clim_days[0])
    n = len(clim_days)
    out = np.empty((len(issue_days), leads, len(members)), dtype=np.intp)
    dt = np.datetime64("1970-01-01", "D")
    rec_years = np.arange((dt + d0).astype("datetime64[Y]").astype(int) + 1970,
                          (dt + int(clim_days[-1])).astype("datetime64[Y]").astype(int) + 1971)
    for i, iday in enumerate(issue_days):
        date = dt + int(iday)
        y = date.astype("datetime64[Y]").astype(int) + 1970
        md = str(date)[5:]
        if md == "02-29":
            md = "02-28"
        cands = []
        for yy in list(rec_years[rec_years < y][::-1]) + list(rec_years[rec_years > y]):
            start = int((np.datetime64(f"{yy:04d}-{md}") - dt).astype(int)) - d0
            if start >= 0 and start + leads < n:
                cands.append(start)
        if not cands:
            raise RunError("the forcing record holds no other year to build a climatological forecast",
                           variable="forecast.forcing", place=str(date))
        starts = np.array(cands)[np.asarray(members) % len(cands)]
        out[i] = starts[None, :] + np.arange(1, leads + 1)[:, None]
    return out


def lead_forcing(
    inputs: Inputs,
    settings: Settings,
    issue_index: np.ndarray,
    ar1: Mapping[str, np.ndarray],
    members: np.ndarray,
    leads: int,
    kind: str,
    file_forcing: Mapping[str, np.ndarray] | None = None,
) -> dict[str, np.ndarray]:
    """Forcing of every lead of every issue.

    Parameters
    ----------
    issue_index : (issue,) day indices into ``inputs.days``
    ar1 : forcing name -> (issue, basin, member) AR(1) log errors at the issue day
    kind : "observed" (recorded weather, perturbed as in the run: the AR(1) errors go on),
        "climatology" (:func:`climatology_index`, unperturbed) or "file"
    file_forcing : for "file", name -> (basin, issue, lead, file_member) mm d-1; member m
        takes file member ``m mod n_file``

    Returns
    -------
    dict name -> (lead, issue, basin, member) float64, mm d-1
    """
    ni, nb, nm = len(issue_index), inputs.n_basin, len(members)
    out = {}
    if kind == "observed":
        for name, model_err, stream in (("precipitation", settings.precipitation, pt.PRECIPITATION),
                                        ("pet", settings.pet, pt.PET)):
            ck = pt.counter_keys(settings.seed, inputs.keys, members, stream)
            e = ar1[name]
            vals = np.empty((leads, ni, nb, nm))
            src = getattr(inputs, name)
            for lead in range(1, leads + 1):
                idx = issue_index + lead
                z = pt.standard_normal(ck, inputs.days[idx])  # (issue, basin, member)
                e = model_err.step(e, z)
                vals[lead - 1] = src[:, idx].T[:, :, None] * model_err.multiplier(e)
            out[name] = vals
    elif kind == "climatology":
        clim = inputs.climatology
        if clim is None:
            raise RunError("climatological forecasts need the forcing record", variable="forecast.forcing")
        idx = climatology_index(clim.days, inputs.days[issue_index], leads, members)  # (issue, L, member)
        for name in FORCINGS:
            src = getattr(clim, name)  # (basin, n)
            out[name] = src[:, idx].transpose(2, 1, 0, 3)  # (L, issue, basin, member)
    elif kind == "file":
        if file_forcing is None:
            ff = inputs.forecast_forcing
            pos = np.searchsorted(ff["days"], inputs.days[issue_index])
            file_forcing = {n: ff[n][:, pos] for n in FORCINGS}
        for name in FORCINGS:
            f = np.asarray(file_forcing[name])  # (basin, issue, lead, file_member)
            sel = f[..., np.asarray(members) % f.shape[-1]]
            out[name] = sel.transpose(2, 1, 0, 3)[:leads]
    else:
        raise ConfigError(f"unknown forecast forcing {kind!r}", variable="forcing")
    return out


def forecast_leads(
    model: Model,
    states: np.ndarray,
    parameters: Mapping[str, np.ndarray],
    forcing: Mapping[str, np.ndarray],
    area_km2: np.ndarray,
    settings: Settings,
    keys: np.ndarray,
    members: np.ndarray,
    lead_days: np.ndarray,
) -> np.ndarray:
    """Advance the ensembles of several issue times over the leads, as one flat batch.

    Parameters
    ----------
    states : (issue, basin, member, n_state) float64, mm, at the end of each issue day
    parameters : name -> (issue, basin, member) float64
    forcing : name -> (lead, issue, basin, member) mm d-1
    area_km2 : (basin,)
    keys : (basin,) uint64; members : (member,) int
    lead_days : (lead, issue) int64, day numbers of every lead (for the state noise)

    Returns
    -------
    (basin, issue, lead, member) float64, m3 s-1
    """
    ni, nb, nm, ns = states.shape
    nl = forcing["precipitation"].shape[0]
    x = states.reshape(-1, ns)
    flat = {k: np.ascontiguousarray(v).reshape(-1) for k, v in parameters.items()}
    prepared = model.prepare(flat)
    noise = pt.StateNoise.from_names(settings.state_noise, list(model.state_names))
    if noise:
        lower, upper = model.bounds(flat)
        noise_keys = [pt.counter_keys(settings.seed, keys, members, k) for k in noise.streams]
    out = np.empty((nb, ni, nl, nm))
    area = area_km2[None, :, None] / SECONDS_PER_DAY_OVER_1000
    for lead in range(nl):
        x, fl = model.step(x, {n: forcing[n][lead].reshape(-1) for n in FORCINGS}, prepared)
        if noise:
            z = [pt.standard_normal(kk, lead_days[lead]).reshape(-1) for kk in noise_keys]
            x, _ = pt.add_state_noise(x, noise, z, lower, upper)
        out[:, :, lead, :] = (fl["runoff"].reshape(ni, nb, nm) * area).transpose(1, 0, 2)
    return out


def hindcast_forecasts(model, inputs, settings, snaps, members, leads, kind):
    """Forecasts from the end states of the issue days collected in a block."""
    idx = np.array([t for t, *_ in snaps])
    states = np.stack([x for _, x, _, _ in snaps])
    params = {k: np.stack([p[k] for _, _, p, _ in snaps]) for k in snaps[0][2]}
    ar1 = {n: np.stack([a[n] for _, _, _, a in snaps]) for n in FORCINGS}
    forcing = lead_forcing(inputs, settings, idx, ar1, members, leads, kind)
    lead_days = inputs.days[0] + idx[None, :] + np.arange(1, leads + 1)[:, None]
    return forecast_leads(model, states, params, forcing, inputs.area_km2, settings, inputs.keys, members, lead_days)


def issue_indices(plan_: Plan, every_days: int, leads: int, n_days: int) -> np.ndarray:
    """Hindcast issue days: every K days from the first output day, with all leads inside."""
    first = max(plan_.first_output, plan_.start)
    idx = np.arange(first, plan_.stop + 1, every_days)
    return idx[idx + leads <= min(plan_.stop, n_days - 1)]


# ---------------------------------------------------------------- the run


@dataclass
class RunSummary:
    """What a run returns besides the sink's file: end state, warnings, counts per basin."""

    state: EnsembleState
    warnings: list[str]
    n_used: np.ndarray
    n_gated: np.ndarray
    first_collapse: np.ndarray
    plan: Plan


def _merge(results: list[list[BlockResult]]) -> BlockResult:
    """Concatenate the tasks of one block (rows: basin chunks, columns: member chunks)."""
    rows = []
    for row in results:
        if len(row) == 1:
            rows.append(row[0])
            continue
        arrays = {}
        for k, v in row[0].arrays.items():
            arrays[k] = np.concatenate([r.arrays[k] for r in row], axis=2) if v.ndim == 3 else v
        st = None if row[0].state is None else EnsembleState(
            row[0].state.day,
            np.concatenate([r.state.states for r in row], axis=1),
            {k: np.concatenate([r.state.parameters[k] for r in row], axis=1) for k in row[0].state.parameters},
            {k: np.concatenate([r.state.ar1[k] for r in row], axis=1) for k in row[0].state.ar1},
            row[0].state.collapse_days,
        )
        hind = None if row[0].hindcast is None else np.concatenate([r.hindcast for r in row], axis=3)
        rows.append(BlockResult(arrays, st, hind, row[0].n_used, row[0].n_gated, row[0].collapse_first))
    r0 = rows[0]
    if len(rows) == 1:
        return r0
    arrays = {k: np.concatenate([r.arrays[k] for r in rows], axis=0) for k in r0.arrays}
    st = None if r0.state is None else EnsembleState(
        r0.state.day,
        np.concatenate([r.state.states for r in rows], axis=0),
        {k: np.concatenate([r.state.parameters[k] for r in rows], axis=0) for k in r0.state.parameters},
        {k: np.concatenate([r.state.ar1[k] for r in rows], axis=0) for k in r0.state.ar1},
        np.concatenate([r.state.collapse_days for r in rows]),
    )
    hind = None if r0.hindcast is None else np.concatenate([r.hindcast for r in rows], axis=0)
    cat = np.concatenate
    return BlockResult(arrays, st, hind, cat([r.n_used for r in rows]), cat([r.n_gated for r in rows]),
                       cat([r.collapse_first for r in rows]))


def _chunk_task(args, store) -> BlockResult:
    """One chunk over one time block, on the chunk's lane (see :mod:`assim.parallel`).

    The first block of a chunk brings its model and state; later blocks take the model and
    the end state the previous block left in the lane's ``store``, with the prepared
    parameters (fixed when no parameter is estimated). The result carries the end state only after the last block (or
    a failure); otherwise the state stays in the store."""
    key, model, inputs, state, settings, t1, kwargs, last, whole_members = args
    if state is None:
        state = store.pop(key)
    # the model travels with the first block only (pickling its functions by value is slow)
    model = store.setdefault((key, "model"), model) if model is not None else store[(key, "model")]
    fixed = None
    if not settings.estimate:
        fixed = store.get((key, "fixed"))
        if fixed is None:
            fixed = store[(key, "fixed")] = fixed_parameters(model, state.parameters)
    r = advance(model, inputs, state, settings, 0, t1, fixed=fixed, **kwargs)
    if whole_members and r.arrays and r.first_bad is None:
        # reduced here, in parallel, rather than in the main thread that writes the file
        r = replace(r, arrays=reduce_members(r.arrays, settings))
    if last or r.first_bad is not None:
        store.pop((key, "fixed"), None)
        store.pop((key, "model"), None)
        return r
    store[key] = r.state
    return replace(r, state=None)


def run(
    model: Model,
    inputs: Inputs,
    settings: Settings,
    sink=None,
    *,
    state: EnsembleState | None = None,
    until_day: int | None = None,
    hindcast: tuple[int, int, str] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> RunSummary:
    """Run the ensemble over the inputs' days, block by block, handing outputs to ``sink``.

    Parameters
    ----------
    model : the model of every basin
    inputs : :class:`Inputs`
    settings : :class:`Settings` (``mode`` "openloop" or "assimilate")
    sink : object with ``write_block(start, arrays)`` (run outputs; ``start`` counts the
        output days of :attr:`Plan.output_slice`) and, for hindcasts,
        ``write_issues(start, discharge)`` with discharge (basin, issue, lead, member) m3 s-1;
        None keeps nothing (the end state is still returned)
    state : the ensemble to continue from (a restart); None starts a new run
    until_day : last day to run (day number); None = the last day of the inputs
    hindcast : (every_days, leads, forcing kind) to issue hindcast forecasts instead of
        collecting run outputs
    progress : called with (days done, days total) after each block

    Returns
    -------
    RunSummary

    Raises
    ------
    RunError
        when a state becomes NaN or infinite (naming the basin, the day and the state), or
        the days asked for are outside the inputs.
    """
    if state is None:
        state = initial_ensemble(model, inputs, settings)
    p = plan(inputs, settings, state, until_day)
    nb, nmem = inputs.n_basin, settings.members
    bc = max(1, min(settings.basin_chunk, nb))
    b_chunks = [slice(i, min(i + bc, nb)) for i in range(0, nb, bc)]
    member_chunking = settings.member_chunk > 0 and not settings.assimilate
    mc = settings.member_chunk if member_chunking else nmem
    m_chunks = [slice(i, min(i + mc, nmem)) for i in range(0, nmem, mc)]
    members = np.arange(nmem)
    issues = None
    if hindcast is not None:
        every, leads, kind = hindcast
        issues = issue_indices(p, every, leads, len(inputs.days))
    sub_inputs = [inputs.subset(b) for b in b_chunks]
    chunks = [(bi, b, mi, m) for bi, b in enumerate(b_chunks) for mi, m in enumerate(m_chunks)]
    blocks = [(t, min(t + settings.time_block_days, p.stop + 1))
              for t in range(p.start, p.stop + 1, settings.time_block_days)]

    n_used = np.zeros(nb, dtype=np.int64)
    n_gated = np.zeros(nb, dtype=np.int64)
    first_collapse = np.full(nb, -1, dtype=np.int64)
    total = p.stop + 1 - p.start
    out0 = max(p.start, p.first_output)
    issue_done = 0

    def submit_block(ex, j):
        """Submit the tasks of block ``j``, one per chunk on the chunk's lane."""
        t, t1 = blocks[j]
        # each task gets the days of its block only (and the leads after it), indices shifted
        end = min(len(inputs.days), t1 + (hindcast[1] if hindcast is not None else 0))
        kwargs = dict(first_output=p.first_output - t, first_analysis=p.first_analysis - t,
                      collect=hindcast is None and sink is not None)
        if issues is not None:
            blk = issues[(issues >= t) & (issues < t1)]
            kwargs.update(issue_index=blk - t, leads=hindcast[1], forecast_forcing=hindcast[2])
        last = j == len(blocks) - 1
        first = j == 0  # the model and the state go to a chunk's lane once
        return [ex.submit_to(ci, ci, _chunk_task,
                             (ci, model if first else None, sub_inputs[bi].days_slice(t, end),
                              state.subset(b, m) if first else None, settings, t1 - t,
                              dict(kwargs, members=members[m]), last, len(m_chunks) == 1))
                for ci, (bi, b, mi, m) in enumerate(chunks)]

    with parallel.executor(settings.scheduler, settings.workers) as ex:
        # Every lane gets its chunks' next block before it finishes the current one; the main
        # thread meanwhile joins and writes the finished block. Two blocks in flight bound memory.
        ahead = 2
        pending = [submit_block(ex, j) for j in range(min(ahead, len(blocks)))]
        for j, (t, t1) in enumerate(blocks):
            flat_results = [f.result() for f in pending.pop(0)]
            bad = [r.first_bad for r in flat_results if r.first_bad is not None]
            if bad:
                basin, day, var = min(bad, key=lambda x: x[1])
                raise RunError("the ensemble state became NaN or infinite; check the forcing, the "
                               "parameters and the filter settings", variable=var,
                               place=f"basin {basin}, {np.datetime64('1970-01-01', 'D') + day}")
            if j + ahead < len(blocks):
                pending.append(submit_block(ex, j + ahead))
            grid = [flat_results[i * len(m_chunks):(i + 1) * len(m_chunks)] for i in range(len(b_chunks))]
            merged = _merge(grid)
            if merged.state is not None:  # the last block brings the end state back
                state = merged.state
            if len(m_chunks) > 1 and merged.arrays:  # else reduced in the lanes
                merged.arrays = reduce_members(merged.arrays, settings)
            if sink is not None and merged.arrays:
                sink.write_block(max(t, out0) - out0, merged.arrays)
            if merged.hindcast is not None and sink is not None:
                sink.write_issues(issue_done, merged.hindcast)
                issue_done += merged.hindcast.shape[1]
            n_used += merged.n_used
            n_gated += merged.n_gated
            first_collapse = np.where((first_collapse < 0) & (merged.collapse_first >= 0),
                                      merged.collapse_first, first_collapse)
            if progress is not None:
                progress(t1 - p.start, total)
    warns = health_warnings(inputs.basin_ids, n_used, n_gated, first_collapse, settings)
    for w in summarise_warnings(warns):
        _warnings.warn(w, RuntimeWarning, stacklevel=2)
    return RunSummary(state, warns, n_used, n_gated, first_collapse, p)


def health_warnings(basin_ids, n_used, n_gated, first_collapse, settings: Settings) -> list[str]:
    """Warnings about ensemble collapse and frequent gating, one line per basin."""
    out = []
    if not settings.assimilate:
        return out
    for i, b in enumerate(basin_ids):
        if first_collapse[i] >= 0:
            day = np.datetime64("1970-01-01", "D") + int(first_collapse[i])
            out.append(f"basin {b}: ensemble collapse: the spread of predicted discharge stayed below "
                       f"{settings.collapse_ratio} x the observation error sd for {settings.collapse_days} "
                       f"days with readings (reached on {day}); consider inflation or larger perturbations")
        n = n_used[i] + n_gated[i]
        if n and n_gated[i] / n > settings.gating_warn_fraction:
            out.append(f"basin {b}: {n_gated[i]} of {n} readings ({n_gated[i] / n:.0%}) were gated; the "
                       "ensemble may be biased or its spread too small")
    return out


def summarise_warnings(warns: Sequence[str], most: int = 5) -> list[str]:
    """At most ``most`` lines per kind of warning; the rest are counted."""
    out = []
    for kind in ("ensemble collapse", "were gated"):
        lines = [w for w in warns if kind in w]
        out += lines[:most]
        if len(lines) > most:
            out.append(f"... and {len(lines) - most} more basins with {kind.removeprefix('were ')} readings"
                       if kind == "were gated" else f"... and {len(lines) - most} more basins with {kind}")
    return out


def forecast_issue(
    model: Model,
    inputs: Inputs,
    settings: Settings,
    state: EnsembleState,
    leads: int,
    kind: str,
    file_forcing: Mapping[str, np.ndarray] | None = None,
) -> np.ndarray:
    """Ensemble forecast from ``state`` (valid at the end of the issue day).

    ``inputs.days`` must contain the issue day (and, for "observed" forcing, the leads).

    Returns
    -------
    (basin, lead, member) float64, m3 s-1
    """
    members = np.arange(settings.members)
    idx = np.array([int(state.day - inputs.days[0])])
    forcing = lead_forcing(inputs, settings, idx, {n: v[None] for n, v in state.ar1.items()},
                           members, leads, kind,
                           None if file_forcing is None else {n: v[:, None] for n, v in file_forcing.items()})
    lead_days = state.day + np.arange(1, leads + 1)[:, None]
    q = forecast_leads(model, state.states[None], {k: v[None] for k, v in state.parameters.items()}, forcing,
                       inputs.area_km2, settings, inputs.keys, members, lead_days)
    return q[:, 0]
