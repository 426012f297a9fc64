"""One chunk of the ensemble over one time block: the day loop.

:func:`advance` prepares what the block's days need at once (perturbed forcing, usable
readings and their error variances, the output arrays), then runs the days one by one for
the whole flat (basin x member) batch of the chunk:

1. advance every member with one ``model.step`` call; add the optional state noise
   (:func:`step_day`);
2. predict discharge: runoff (mm d-1) -> m3 s-1 with the basin area;
3. (assimilation, after the spin-up, on days with a usable reading) shrink the estimated
   parameters (Liu & West), update the chosen states, the predicted discharge (an augmented
   column, giving ``discharge_analysis``) and the parameters with one analysis over every
   basin of the chunk (:func:`analyse_day`); basins without a reading are left unchanged;
4. check that every state is finite (:func:`check_finite`);
5. record the day's outputs (:func:`record_day`); with the fixed-lag smoother, the day
   enters its window and the day W days older leaves it, final (:func:`window_day`; the
   analysis of step 3 corrected the window's days too); keep the end state of a hindcast
   issue day (:func:`snapshot`).

At the end of the block the spreads, reading counts and collapse counters of every day are
computed at once (:func:`finish_block`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from assim import perturb as pt
from assim.engine.analysis import (
    adaptive_options,
    analyse,
    augmented_bounds,
    clipped_water,
    collapse_counts,
    desroziers_series,
    liu_west_shrink,
    member_sd,
)
from assim.engine.forecast import hindcast_forecasts
from assim.engine.initial import fixed_parameters, parameter_ranges
from assim.engine.records import (
    OBS_GATED,
    OBS_MISSING,
    OBS_REJECTED,
    OBS_USED,
    SECONDS_PER_DAY_OVER_1000,
    BlockResult,
    EnsembleState,
    Inputs,
    Settings,
)
from assim.engine.window import Window, emitted_days, window_columns
from assim.filters.inflation import damp_inflation
from assim.models.base import Model


class _Replay(Exception):
    """The engine's own signal that a block's state went bad: :func:`advance` runs the block
    again, checked every day, to name the first bad day and state. Nothing else replays a
    block: any other exception propagates."""


# ---------------------------------------------------------------- what a block prepares at once


def perturbed_forcing(inputs: Inputs, ar1: Mapping[str, np.ndarray], settings: Settings, members: np.ndarray,
                      t0: int, t1: int, keep_errors: bool) -> tuple[dict, dict, dict]:
    """The perturbed forcing of days ``t0 .. t1 - 1``, one random-number call per stream.

    The forcings are the names of ``ar1`` (:func:`assim.engine.records.forcing_names` of the
    model), each perturbed by its error model in ``settings`` (the field of the same name).

    Parameters
    ----------
    ar1 : forcing name -> (basin, member) AR(1) errors on the day before ``t0``
    keep_errors : keep the errors of every day (hindcast issues start from them)

    Returns
    -------
    forcing : name -> (time, basin * member) float64, mm d-1 (temperature degC)
    log_errors : name -> (time, basin, member) AR(1) errors (empty unless ``keep_errors``)
    end_ar1 : name -> (basin, member) AR(1) errors on the last day
    """
    days = inputs.days[t0:t1]
    nt = len(days)
    nb, nm = inputs.n_basin, len(members)
    log_err, end_ar1, forcing = {}, {}, {}
    for name in ar1:
        model_err = getattr(settings, name)
        ck = pt.counter_keys(settings.seed, inputs.keys, members, pt.FORCING_STREAMS[name])
        e = model_err.series(ar1[name], pt.standard_normal(ck, days))
        end_ar1[name] = e[-1].copy() if nt else ar1[name]
        if keep_errors:
            log_err[name] = e
            e = np.empty_like(e)
        # in place when not kept
        w = model_err.apply(log_err.get(name, e), getattr(inputs, name)[:, t0:t1].T[:, :, None], out=e)
        forcing[name] = w.reshape(nt, nb * nm)
    return forcing, log_err, end_ar1


@dataclass(frozen=True)
class Readings:
    """The usable gauge readings of a block and what the analysis needs of them.

    observed, variance : (basin, time) m3 s-1 and (m3 s-1)^2, NaN where no usable reading
    has : (basin, time) bool; any_day : (time,) bool, some basin has a reading
    sd : (basin, time) observation error sd, inf where no reading
    status : (basin, time) int8, OBS_REJECTED or OBS_MISSING (used and gated are set after)
    noise : (time, basin, member) standard normals of the perturbed observations (EnKF), or None
    """

    observed: np.ndarray
    has: np.ndarray
    any_day: np.ndarray
    variance: np.ndarray
    sd: np.ndarray
    status: np.ndarray
    noise: np.ndarray | None


def block_readings(inputs: Inputs, settings: Settings, members: np.ndarray, t0: int, t1: int) -> Readings:
    """The readings of days ``t0 .. t1 - 1`` with their error variances and noise."""
    obs = inputs.observed[:, t0:t1]
    has = np.isfinite(obs)
    var = settings.obs_error.variance(obs)
    noise = None
    if settings.method == "enkf":
        okeys = pt.counter_keys(settings.seed, inputs.keys, members, pt.OBSERVATION)
        noise = pt.standard_normal(okeys, inputs.days[t0:t1])  # (time, basin, member)
    return Readings(
        observed=obs, has=has, any_day=has.any(axis=0), variance=var,
        sd=np.sqrt(np.where(has, var, np.inf)),
        status=np.where(inputs.rejected[:, t0:t1], OBS_REJECTED, OBS_MISSING).astype(np.int8),
        noise=noise,
    )


def allocate_outputs(model: Model, settings: Settings, readings: Readings | None, nb: int, nm: int,
                     k_out0: int, n_out: int, noise: bool) -> dict[str, np.ndarray]:
    """The output arrays of a block's ``n_out`` output days (from day ``k_out0`` of the block).

    Ensemble variables are (basin, time, member) in the output precision; diagnostics
    (basin, time) float64; ``obs_status`` int8; ``state_noise_water`` per member here (its
    ensemble mean is taken once the chunks are joined)."""
    arrays: dict[str, np.ndarray] = {}
    if not n_out:
        return arrays
    assim = settings.assimilate
    odt = np.float32 if settings.float32 else np.float64
    ens = (nb, n_out, nm)
    arrays["discharge"] = np.empty(ens, dtype=odt)
    if assim:
        arrays["discharge_analysis"] = np.empty(ens, dtype=odt)
    for n in settings.write_states:
        arrays[n] = np.empty(ens, dtype=odt)
    if assim:
        for p in settings.estimate:
            arrays[p] = np.empty(ens, dtype=odt)
        for n in ("innovation", "innovation_variance", "innovation_analysis", "obs_error_variance",
                  "spread_before", "spread_after"):
            arrays[n] = np.full((nb, n_out), np.nan)
        if settings.adaptive_inflation:
            for n in ("inflation_mean", "inflation_sd"):
                arrays[n] = np.full((nb, n_out), np.nan)
        arrays["observed_discharge"] = readings.observed[:, k_out0:].copy()
        arrays["clipped_water"] = np.zeros((nb, n_out))
        arrays["obs_status"] = readings.status[:, k_out0:].copy()
    if noise:
        arrays["state_noise_water"] = np.zeros((nb, n_out, nm))
    return arrays


# ---------------------------------------------------------------- the block's working record


@dataclass
class _Block:
    """A chunk over one block while its days run: the fixed parts and what changes daily.

    x : (basin * member, n_state) float64, mm, the members' states (changed in place)
    params : name -> (basin, member) float64; prepared, lower, upper : of the members
    bounds : bounds of the analysis columns (:func:`augmented_bounds`)
    inflation : (mean, sd) of the adaptive inflation, each (basin,), or None when off
    """

    model: Model
    settings: Settings
    inputs: Inputs
    members: np.ndarray
    t0: int
    days: np.ndarray
    x: np.ndarray
    params: dict[str, np.ndarray]
    prepared: object
    lower: np.ndarray
    upper: np.ndarray
    forcing: dict[str, np.ndarray]
    log_err: dict[str, np.ndarray]
    readings: Readings | None
    arrays: dict[str, np.ndarray]
    k_out0: int
    first_analysis: int
    collect: bool
    issues: set[int]
    inflation: tuple[np.ndarray, np.ndarray] | None = None
    upd: np.ndarray = field(init=False)
    estimate: tuple[str, ...] = field(init=False)
    theta_low: np.ndarray = field(init=False)
    theta_high: np.ndarray = field(init=False)
    bounds: tuple = field(init=False)
    noise: pt.StateNoise = field(init=False)
    noise_keys: list = field(init=False)
    kernel_keys: list = field(init=False)
    area: np.ndarray = field(init=False)
    write_cols: list = field(init=False)
    snaps: list = field(default_factory=list)
    q_blk: np.ndarray | None = None  # (basin, time, member) discharge before / after the analysis
    qa_blk: np.ndarray | None = None
    analysed: np.ndarray | None = None  # (time,) bool
    used: np.ndarray | None = None  # (basin, time) bool, reading used / gated
    gated: np.ndarray | None = None
    window: Window | None = None  # the smoother's window (assim.engine.window), when kept
    emit0: int = 0  # block index of the first recorded day leaving the window (reanalysis)

    def __post_init__(self):
        model, s, inputs = self.model, self.settings, self.inputs
        self.upd = np.array([model.state_index(n) for n in s.update_states], dtype=np.intp)
        # parameters are estimated by the analysis only: an open loop keeps them as drawn
        self.estimate = s.estimate if s.assimilate else ()
        ranges = parameter_ranges(model)
        self.theta_low = np.array([ranges[p].low for p in self.estimate])
        self.theta_high = np.array([ranges[p].high for p in self.estimate])
        self.write_cols = [(n, model.state_index(n)) for n in s.write_states]
        self.bounds = self.updated_bounds()
        self.noise = pt.StateNoise.from_names(s.state_noise, list(model.state_names))
        self.noise_keys = [pt.counter_keys(s.seed, inputs.keys, self.members, k) for k in self.noise.streams]
        self.kernel_keys = [pt.counter_keys(s.seed, inputs.keys, self.members, pt.stream_id("kernel:" + p))
                            for p in self.estimate]
        self.area = inputs.area_km2[:, None] / SECONDS_PER_DAY_OVER_1000  # (basin, 1)
        if s.assimilate:  # discharge (float64) and reading use of every day, for the spreads,
            # counts and collapse counters of the block at its end
            nb, nm, nt = inputs.n_basin, len(self.members), len(self.days)
            self.q_blk = np.empty((nb, nt, nm))
            self.qa_blk = np.empty((nb, nt, nm))
            self.analysed = np.zeros(nt, dtype=bool)
            self.used = np.zeros((nb, nt), dtype=bool)
            self.gated = np.zeros((nb, nt), dtype=bool)

    @property
    def shape(self) -> tuple[int, int, int]:
        """(basin, member, updated state) of the chunk."""
        return self.inputs.n_basin, len(self.members), len(self.upd)

    def updated_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        nb, nm, nu = self.shape
        lo, hi = augmented_bounds(self.lower[:, self.upd].reshape(nb, nm, nu),
                                  self.upper[:, self.upd].reshape(nb, nm, nu), self.theta_low, self.theta_high)
        if self.window is None or not self.window.size:
            return lo, hi
        ns = self.model.n_state
        wlo, whi = self.window.bounds(self.lower.reshape(nb, nm, ns), self.upper.reshape(nb, nm, ns),
                                      [c for _, c in self.write_cols])
        return np.concatenate([lo, wlo], axis=-1), np.concatenate([hi, whi], axis=-1)


# ---------------------------------------------------------------- one day


def step_day(blk: _Block, k: int, day: int) -> tuple[np.ndarray, np.ndarray | None]:
    """Advance the members over day ``k`` of the block (model step, then state noise).

    Returns
    -------
    q : (basin, member) float64, m3 s-1, predicted discharge
    added : (basin * member,) mm of water the state noise added, or None without noise
    """
    blk.x, fluxes = blk.model.step(blk.x, {n: f[k] for n, f in blk.forcing.items()}, blk.prepared)
    added = None
    if blk.noise:
        z = [pt.standard_normal(kk, day).reshape(-1) for kk in blk.noise_keys]
        blk.x, added = pt.add_state_noise(blk.x, blk.noise, z, blk.lower, blk.upper)
    nb, nm, _ = blk.shape
    return fluxes["runoff"].reshape(nb, nm) * blk.area, added


def shrunk_parameters(blk: _Block, day: int) -> np.ndarray | None:
    """(basin, member, n_param) estimated parameters after the Liu & West kernel shrinkage, or None."""
    if not blk.estimate:
        return None
    theta = np.stack([blk.params[p] for p in blk.estimate], axis=-1)
    z = np.stack([pt.standard_normal(kk, day) for kk in blk.kernel_keys], axis=-1)
    return liu_west_shrink(theta, blk.settings.shrinkage, z, blk.theta_low, blk.theta_high)


def set_parameters(blk: _Block, theta: np.ndarray) -> None:
    """Take the analysed parameters (basin, member, n_param) into the members."""
    for j, p in enumerate(blk.estimate):
        blk.params[p] = np.ascontiguousarray(theta[..., j])
    flat = {kk: v.reshape(-1) for kk, v in blk.params.items()}
    blk.prepared = blk.model.prepare(flat)
    blk.lower, blk.upper = blk.model.bounds(flat)
    blk.bounds = blk.updated_bounds()


def analyse_day(blk: _Block, k: int, day: int, q: np.ndarray, record: bool) -> np.ndarray:
    """Update the members with the readings of day ``k``; returns the analysed discharge
    (basin, member), m3 s-1. Records the day's innovation and clipped water when ``record``."""
    nb, nm, nu = blk.shape
    r = blk.readings
    theta = shrunk_parameters(blk, day)
    on = None if r.noise is None else r.noise[k]
    # x is the model's fresh output: update its columns in place (it may be Fortran-ordered,
    # so work on the flat (batch, n_state) view, never on a reshaped copy)
    lo3, hi3 = blk.bounds
    w = blk.window if blk.window is not None and blk.window.size else None
    xs, qa, theta_new, a = analyse(blk.x[:, blk.upd].reshape(nb, nm, nu), q, theta, r.observed[:, k],
                                   r.variance[:, k], lo3, hi3, on, blk.settings, blk.inflation,
                                   lagged=None if w is None else w.values)
    blk.x[:, blk.upd] = xs.reshape(nb * nm, nu)
    if blk.inflation is not None:
        blk.inflation = (a.inflation_mean, a.inflation_sd)
    if w is not None:  # the lagged days, corrected by the same analysis: the last columns
        w.values = np.ascontiguousarray(np.moveaxis(a.states[..., a.states.shape[-1] - w.values.shape[0]:], -1, 0))
    if blk.estimate:
        set_parameters(blk, theta_new)
    blk.used[:, k] = np.asarray(a.used).reshape(nb)
    blk.gated[:, k] = np.asarray(a.gated).reshape(nb)
    blk.analysed[k] = True
    if record:
        k_o = k - blk.k_out0
        blk.arrays["innovation"][:, k_o] = np.asarray(a.innovation).reshape(nb)
        blk.arrays["innovation_variance"][:, k_o] = np.asarray(a.innovation_variance).reshape(nb)
        blk.arrays["clipped_water"][:, k_o] = clipped_water(a, nb, nm, nu)
    return qa


def first_bad_state(blk: _Block, day: int) -> tuple[str, int, str]:
    """(basin id, day, state name) of the first member state that is not finite."""
    nm = len(blk.members)
    bad = np.flatnonzero(~np.isfinite(blk.x).all(axis=1))[0]
    col = int(np.flatnonzero(~np.isfinite(blk.x[bad]))[0])
    return blk.inputs.basin_ids[bad // nm], day, blk.model.state_names[col]


def check_finite(blk: _Block, k: int, day: int, q: np.ndarray, check_daily: bool) -> tuple | None:
    """None while every state is finite; else, checked daily, the first bad state
    (:func:`first_bad_state`), unchecked, :class:`_Replay`.

    Summing the whole state every day costs as much as a tenth of the day's work, so an
    unchecked block sums it at its end and on days whose discharge is not finite; a block that
    fails is run again from its start, checked every day, to name the first bad day and state.
    """
    if check_daily or k == len(blk.days) - 1 or not np.isfinite(np.add.reduce(q, axis=None)):
        if not np.isfinite(blk.x.sum()):
            if not check_daily:
                raise _Replay
            return first_bad_state(blk, day)
    return None


def record_day(blk: _Block, k: int, q: np.ndarray, qa: np.ndarray, added: np.ndarray | None) -> None:
    """Keep day ``k``'s discharge for the block's end and write its output columns."""
    if blk.settings.assimilate:
        blk.q_blk[:, k] = q
        blk.qa_blk[:, k] = qa
    if not blk.collect or k < blk.k_out0 or blk.settings.reanalysis:
        return
    k_o = k - blk.k_out0
    nb, nm, _ = blk.shape
    arrays = blk.arrays
    if blk.inflation is not None:
        arrays["inflation_mean"][:, k_o], arrays["inflation_sd"][:, k_o] = blk.inflation
    if not blk.settings.assimilate:
        arrays["discharge"][:, k_o] = q
    for p in blk.estimate:
        arrays[p][:, k_o] = blk.params[p]
    for n, col in blk.write_cols:
        arrays[n][:, k_o] = blk.x[:, col].reshape(nb, nm)
    if added is not None:
        arrays["state_noise_water"][:, k_o] = added.reshape(nb, nm)


def window_day(blk: _Block, k: int, day: int, qa: np.ndarray) -> None:
    """Day ``k`` enters the smoother's window with its analysed discharge and recorded
    states; in a reanalysis, the day leaving it is recorded with its final values."""
    nb, nm, _ = blk.shape
    w = blk.window
    planes = np.empty((w.n_column, nb, nm))
    planes[0] = qa
    for j, (_, col) in enumerate(blk.write_cols):
        planes[1 + j] = blk.x[:, col].reshape(nb, nm)
    left, values = w.push(day, planes)
    if values is None or not blk.settings.reanalysis or not blk.arrays:
        return
    i = left - int(blk.days[0]) - blk.emit0
    if 0 <= i < blk.arrays["discharge"].shape[1]:
        for j, name in enumerate(w.columns):
            blk.arrays[name][:, i] = values[j]


def snapshot(blk: _Block, k: int) -> None:
    """Keep the end state of day ``k`` when it is a hindcast issue day."""
    t = blk.t0 + k
    if t in blk.issues:
        nb, nm, _ = blk.shape
        blk.snaps.append((t, blk.x.reshape(nb, nm, blk.model.n_state).copy(),
                          {kk: v.copy() for kk, v in blk.params.items()},
                          {n: e[k].copy() for n, e in blk.log_err.items()}))


def run_day(blk: _Block, k: int, check_daily: bool) -> tuple | None:
    """Day ``k`` of the block; returns the first bad state (checked daily) or None."""
    day = int(blk.days[k])
    q, added = step_day(blk, k, day)
    qa = q
    analysis_day = blk.settings.assimilate and blk.t0 + k >= blk.first_analysis
    if analysis_day and blk.inflation is not None:
        # Anderson (2009): the inflation is damped toward 1 before each day's analysis
        blk.inflation = (damp_inflation(blk.inflation[0], blk.settings.adaptive_damping), blk.inflation[1])
    if analysis_day and blk.readings.any_day[k]:
        qa = analyse_day(blk, k, day, q, record=blk.collect and k >= blk.k_out0 and not blk.settings.reanalysis)
    bad = check_finite(blk, k, day, q, check_daily)
    if bad is not None:
        return bad
    record_day(blk, k, q, qa, added)
    if blk.window is not None:
        window_day(blk, k, day, qa)
    snapshot(blk, k)
    return None


# ---------------------------------------------------------------- the block's end


def finish_block(blk: _Block, collapse: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Spreads of every day at once (each row reduced alone, as on its own day), then the
    reading counts and collapse counters of the analysed days, and the outputs that need them.

    Parameters
    ----------
    collapse : (basin,) int64, consecutive days of collapsed spread before the block

    Returns
    -------
    n_used, n_gated : (basin,) int64; collapse : (basin,) after the block; collapse_first :
    (basin,) first day number the collapse limit was reached, -1 none
    """
    s, r = blk.settings, blk.readings
    spread_b = member_sd(blk.q_blk)  # (basin, time)
    n_used = blk.used.sum(axis=1)
    n_gated = blk.gated.sum(axis=1)
    a_days = np.flatnonzero(blk.analysed)
    has = r.has[:, a_days]
    low_spread = has & (spread_b[:, a_days] < s.collapse_ratio * r.sd[:, a_days])
    collapse, collapse_first = collapse_counts(collapse, has, low_spread, blk.days[a_days], s.collapse_days)
    arrays, k0 = blk.arrays, blk.k_out0
    if arrays and not s.reanalysis:
        arrays["obs_status"][:] = np.where(blk.used, OBS_USED, np.where(blk.gated, OBS_GATED, r.status))[:, k0:]
        arrays["discharge"][:] = blk.q_blk[:, k0:]
        arrays["discharge_analysis"][:] = blk.qa_blk[:, k0:]
        arrays["spread_before"][:] = spread_b[:, k0:]
        arrays["spread_after"][:] = member_sd(blk.qa_blk[:, k0:])
        arrays["innovation_analysis"][:], arrays["obs_error_variance"][:] = desroziers_series(
            r.observed[:, k0:], r.variance[:, k0:], blk.qa_blk[:, k0:], blk.used[:, k0:], s)
    return n_used, n_gated, collapse, collapse_first


# ---------------------------------------------------------------- one task


def initial_inflation(state: EnsembleState, settings: Settings) -> tuple[np.ndarray, np.ndarray] | None:
    """The adaptive inflation (mean, sd) a block starts from: the state's, else the settings'
    initial values; None when adaptive inflation is off."""
    if not settings.adaptive_inflation:
        return None
    nb = state.states.shape[0]
    if state.inflation_mean is not None:
        return (np.array(state.inflation_mean, dtype=np.float64), np.array(state.inflation_sd, dtype=np.float64))
    opts = adaptive_options(settings)
    return np.full(nb, opts.initial_mean), np.full(nb, opts.initial_sd)



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
        and on days with non-finite discharge; a block whose state went bad is then run
        again checked, and only then: any other error propagates at once)

    Returns
    -------
    BlockResult
    """
    if issue_index is None and not check_daily:
        from assim.engine import fused

        if fused.applicable(model, settings):
            r = fused.advance(model, inputs, state, settings, t0, t1, members=members,
                              first_output=first_output, first_analysis=first_analysis,
                              collect=collect, fixed=fixed)
            if r is not None:
                return r
            check_daily = True  # a state went non-finite: the numpy path names it
    if not check_daily:
        try:
            return _advance(model, inputs, state, settings, t0, t1, members, first_output, first_analysis, collect,
                            issue_index, leads, forecast_forcing, fixed, False)
        except _Replay:
            pass  # a state went bad: the block again, checked every day, names the first bad state
    return _advance(model, inputs, state, settings, t0, t1, members, first_output, first_analysis, collect,
                    issue_index, leads, forecast_forcing, fixed, True)


def _advance(model, inputs, state, settings, t0, t1, members, first_output, first_analysis, collect,
             issue_index, leads, forecast_forcing, fixed, check_daily) -> BlockResult:
    s = settings
    nb, nm = inputs.n_basin, len(members)
    days = inputs.days[t0:t1]
    nt = len(days)
    params = {k: np.array(v, dtype=np.float64) for k, v in state.parameters.items()}
    estimate = s.estimate if s.assimilate else ()
    if fixed is not None and not estimate:
        prepared, lower, upper = fixed
    else:
        prepared, lower, upper = fixed_parameters(model, params)
    keep = issue_index is not None and len(issue_index) > 0
    forcing, log_err, end_ar1 = perturbed_forcing(inputs, state.ar1, s, members, t0, t1, keep)
    readings = block_readings(inputs, s, members, t0, t1) if s.assimilate else None
    out_idx = [k for k in range(nt) if t0 + k >= first_output]
    k_out0 = out_idx[0] if out_idx else nt
    n_out = len(out_idx) if collect else 0
    noisy = bool(pt.StateNoise.from_names(s.state_noise, list(model.state_names)))
    window, emit0 = None, 0
    if s.keeps_window and issue_index is None:  # (a hindcast's forecasts never read the window)
        columns = window_columns(s.write_states)
        window = Window.from_state(state.window, state.window_days, s.smoother_window, columns, nb, nm)
    if s.reanalysis:  # a reanalysis records the days leaving the window
        emit0, n_emit = emitted_days(nt, s.smoother_window, first_output)
        odt = np.float32 if s.float32 else np.float64
        arrays = {n: np.empty((nb, n_emit, nm), dtype=odt) for n in window_columns(s.write_states)} \
            if collect and n_emit else {}
    else:
        arrays = allocate_outputs(model, s, readings, nb, nm, k_out0, n_out, noisy)
    blk = _Block(
        model, s, inputs, members, t0, days,
        x=np.array(state.states, dtype=np.float64).reshape(nb * nm, model.n_state),
        params=params, prepared=prepared, lower=lower, upper=upper, forcing=forcing, log_err=log_err,
        readings=readings, arrays=arrays,
        k_out0=k_out0, first_analysis=first_analysis, collect=collect,
        issues=set() if issue_index is None else {int(i) for i in issue_index},
        inflation=initial_inflation(state, s) if s.assimilate else None,
        window=window, emit0=emit0,
    )
    n_used = np.zeros(nb, dtype=np.int64)
    n_gated = np.zeros(nb, dtype=np.int64)
    collapse = np.array(state.collapse_days, dtype=np.int64)
    collapse_first = np.full(nb, -1, dtype=np.int64)
    for k in range(nt):
        try:
            bad = run_day(blk, k, check_daily)
        except _Replay:
            raise
        except Exception:
            # An error raised while a state is not finite (the filter upset by NaN) is the
            # state going bad, which the checked run names; any other error is a bug and
            # propagates as it is.
            if np.isfinite(blk.x).all():
                raise
            if not check_daily:
                raise _Replay from None
            bad = first_bad_state(blk, int(days[k]))
        if bad is not None:
            return BlockResult({}, state, None, n_used, n_gated, collapse_first, first_bad=bad)
    if s.assimilate and nt:
        n_used, n_gated, collapse, collapse_first = finish_block(blk, collapse)
    win, win_days = (None, None) if window is None else window.to_state()
    end = EnsembleState(
        day=int(days[-1]) if nt else state.day,
        states=blk.x.reshape(nb, nm, model.n_state).copy(),
        parameters=blk.params,
        ar1=end_ar1,
        collapse_days=collapse,
        inflation_mean=None if blk.inflation is None else blk.inflation[0].copy(),
        inflation_sd=None if blk.inflation is None else blk.inflation[1].copy(),
        window=win,
        window_days=win_days,
    )
    hind = None
    if blk.snaps:
        hind = hindcast_forecasts(model, inputs, settings, blk.snaps, members, leads, forecast_forcing)
    return BlockResult(blk.arrays, end, hind, n_used, n_gated, collapse_first)
