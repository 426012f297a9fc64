"""Calibration of model parameters, every basin at once (engine layer: arrays in, arrays out).

Each basin is its own optimisation problem: find the parameters that maximise an objective
(KGE, NSE, ...) of the simulated against the observed flows over a calibration period. The
search is a differential evolution (DE; Storn, R. and Price, K. (1997). Differential
evolution - a simple and efficient heuristic for global optimization over continuous
spaces. Journal of Global Optimization 11, 341-359), run for every basin side by side:

- each basin has its own population of ``population`` parameter vectors, all inside the
  search box (the model's declared ranges, narrowed by the caller);
- one generation evaluates the trial vectors of every active basin in ONE model run over
  the flat (basin x population) batch, with the model's own vectorised ``step``;
- mutation, crossover and selection are array operations over (basin, member, parameter).

Why DE across basins: the basins are independent problems of a few parameters each, and a
population method evaluates a whole generation at once, which is what the flat batch does
best. scipy's ``differential_evolution`` solves one problem at a time (its ``vectorized``
option batches one population), so calibrating 100 basins would mean 100 sequential runs of
a batch 100 times smaller; here the per-step overhead of numpy is shared by every basin.

The scheme. Positions are kept in the unit cube (0 = lower, 1 = upper end of each
parameter's range). The initial population is a Latin hypercube (one member per stratum of
every parameter, McKay, Beckman & Conover 1979). Each generation builds, for member i,

    v = x_base + F (x_r2 - x_r3)                     Storn & Price (1997), eq. 1

with ``x_base`` a random member r1 (``strategy="rand1bin"``, the paper's DE/rand/1/bin) or
the basin's best member (``"best1bin"``, DE/best/1/bin), r1, r2, r3 distinct and different
from i, and F drawn per basin and generation from ``mutation = (F_min, F_max)`` (dither, as
Price, Storn & Lampinen 2005 recommend); then the binomial crossover

    u_j = v_j if U_j <= CR or j = j_rand else x_ij    Storn & Price (1997), eq. 2-3

A component of u outside [0, 1] is put back at a random point between the base vector's
component and the bound it crossed (a common repair; Price et al. 2005, sec. 4.4). The
trial replaces its target when its objective is at least as good (eq. 4, greedy
selection). A basin stops when the spread (max - min) of its population's objective is at
most ``tolerance``, or after ``max_generations``; a stopped basin leaves the batch.

Random numbers come from :mod:`assim.perturb` (counter-based, no generator with state),
keyed by (seed, basin id, draw number, generation) and a stream of their own: a basin's
search depends only on its own data, its id and the seed, never on the other basins in the
batch or on how the basins are chunked.

Missing observations (NaN) are left out of the objective; the first ``warmup`` days of the
forcing are simulated but never scored.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr

from assim import perturb

Objective = Callable[[np.ndarray, np.ndarray], np.ndarray]
STRATEGIES = ("best1bin", "rand1bin")
STREAM = perturb.stream_id("calibration:differential-evolution")


@dataclass(frozen=True)
class Settings:
    """How the search runs.

    seed : int, keys every random number with the basin id
    population : members per basin (at least 5)
    max_generations : generations after the initial population, at most
    tolerance : a basin stops when max - min of its population's objective is at most this
    mutation : (F_min, F_max), the range of the dithered differential weight F
    crossover : CR, the probability that a trial component comes from the mutant
    strategy : "best1bin" or "rand1bin" (see the module docstring)
    """

    seed: int
    population: int = 40
    max_generations: int = 300
    tolerance: float = 1e-4
    mutation: tuple[float, float] = (0.5, 1.0)
    crossover: float = 0.9
    strategy: str = "best1bin"


@dataclass(frozen=True)
class Problem:
    """The basins to calibrate, as arrays.

    basin_ids : (basin,) str
    forcing : name -> (basin, time) float64, the model's forcings (mm d-1; temperature degC)
    observed : (basin, time) float64, the flows the objective compares with (NaN: missing),
        in the model's runoff unit (mm d-1)
    warmup : days at the start of ``time`` that are simulated but not scored
    names : the searched parameters, in column order of ``lower`` / ``upper``
    lower, upper : (basin, n_search) float64, the search box (lower < upper)
    fixed : name -> (basin,) float64, parameters held at a given value
    """

    basin_ids: tuple[str, ...]
    forcing: Mapping[str, np.ndarray]
    observed: np.ndarray
    warmup: int
    names: tuple[str, ...]
    lower: np.ndarray
    upper: np.ndarray
    fixed: Mapping[str, np.ndarray]


@dataclass(frozen=True)
class Result:
    """The outcome for every basin.

    parameters : name -> (basin,) float64, the best member's parameters (searched and fixed)
    objective : (basin,) float64, its objective
    population : (basin, member, n_search) float64, the final population in parameter units
    population_objective : (basin, member) float64
    generations : (basin,) int64, generations run
    converged : (basin,) bool, stopped by ``tolerance`` rather than ``max_generations``
    """

    parameters: dict[str, np.ndarray]
    objective: np.ndarray
    population: np.ndarray
    population_objective: np.ndarray
    generations: np.ndarray
    converged: np.ndarray


def simulate(model, forcing: Mapping[str, np.ndarray], params: Mapping[str, np.ndarray],
             first: int = 0) -> np.ndarray:
    """Run ``model`` from its initial state over every day of ``forcing``; return the runoff.

    Parameters
    ----------
    model : assim.models.Model
    forcing : name -> (batch, time) float64, every forcing the model declares
    params : name -> (batch,) float64, raw parameters
    first : the first day whose runoff is returned (earlier days only warm the states up)

    Returns
    -------
    (batch, time - first) float64, mm d-1 (a transposed view of a (time, batch) array)
    """
    series = {n: np.ascontiguousarray(np.asarray(forcing[n], dtype=np.float64).T) for n in model.forcings}
    return _run(model, series, params, first).T


def _run(model, series: Mapping[str, np.ndarray], params: Mapping[str, np.ndarray], first: int) -> np.ndarray:
    """:func:`simulate` on forcing already laid out as (time, batch); returns (time, batch)."""
    prepared = model.prepare(params)
    names = tuple(model.forcings)
    nt, nb = series[names[0]].shape
    state = model.initial_state(prepared)
    out = np.empty((max(nt - first, 0), nb))
    for t in range(nt):
        state, fluxes = model.step(state, {n: series[n][t] for n in names}, prepared)
        if t >= first:
            out[t - first] = fluxes["runoff"]
    return out


def _uniforms(seed: int, keys: np.ndarray, count: int, generation: int) -> np.ndarray:
    """(basin, count) uniforms in (0, 1) of generation ``generation``, keyed by basin."""
    ck = perturb.counter_keys(seed, keys, np.arange(count), STREAM)
    return ndtr(perturb.standard_normal(ck, generation))


def _latin_hypercube(u: np.ndarray, n_member: int, n_param: int) -> np.ndarray:
    """(basin, member, param) positions in [0, 1): one member in each of the ``n_member``
    strata of every parameter, in a random order (McKay et al. 1979)."""
    nb = u.shape[0]
    order = u[:, : n_member * n_param].reshape(nb, n_param, n_member)
    jitter = u[:, n_member * n_param: 2 * n_member * n_param].reshape(nb, n_member, n_param)
    rank = np.argsort(np.argsort(order, axis=-1), axis=-1)  # a random permutation per parameter
    return (np.swapaxes(rank, 1, 2) + jitter) / n_member


def _trials(pos: np.ndarray, fit: np.ndarray, u: np.ndarray, settings: Settings) -> np.ndarray:
    """One generation of DE trial vectors for every basin, (basin, member, param) in [0, 1]."""
    nb, npop, nd = pos.shape
    k = 0

    def take(n):
        nonlocal k
        k += n
        return u[:, k - n:k]

    f_lo, f_hi = settings.mutation
    f = f_lo + (f_hi - f_lo) * take(1)  # (basin, 1): dither, one F per basin and generation
    # r1, r2, r3: the three smallest of npop random keys, the member's own key made largest.
    key = take(npop * npop).reshape(nb, npop, npop)
    key[:, np.arange(npop), np.arange(npop)] = 2.0
    r = np.argsort(key, axis=-1)[..., :3]
    rows = np.arange(nb)[:, None]
    if settings.strategy == "best1bin":
        base = np.broadcast_to(pos[np.arange(nb), np.argmax(fit, axis=1)][:, None, :], pos.shape)
    else:
        base = pos[rows, r[..., 0]]
    mutant = base + f[:, :, None] * (pos[rows, r[..., 1]] - pos[rows, r[..., 2]])  # Storn & Price (1997), eq. 1
    cross = take(npop * nd).reshape(nb, npop, nd) <= settings.crossover
    j_rand = np.minimum((take(npop) * nd).astype(np.int64), nd - 1)
    cross |= np.arange(nd)[None, None, :] == j_rand[..., None]  # Storn & Price (1997), eq. 2-3
    trial = np.where(cross, mutant, pos)
    w = take(npop * nd).reshape(nb, npop, nd)
    low, high = trial < 0.0, trial > 1.0
    trial = np.where(low, base * (1.0 - w), trial)  # between the base and the bound crossed
    trial = np.where(high, base + w * (1.0 - base), trial)
    return trial


def _draws(npop: int, nd: int) -> int:
    """Uniforms one generation of :func:`_trials` takes per basin."""
    return 1 + npop * npop + 2 * npop * nd + npop


def _evaluate(model, problem: Problem, idx: np.ndarray, pos: np.ndarray,
              objective: Objective) -> np.ndarray:
    """Objective of every member of the basins ``idx``: (len(idx), member), -inf where NaN."""
    nb, npop, _ = pos.shape
    lo, hi = problem.lower[idx][:, None, :], problem.upper[idx][:, None, :]
    values = lo + pos * (hi - lo)
    params = {n: values[..., j].reshape(-1) for j, n in enumerate(problem.names)}
    params.update({n: np.repeat(v[idx], npop) for n, v in problem.fixed.items()})
    # (time, basin x member) forcing built in one pass; the runoff back to time-last once,
    # so that the objective reduces over contiguous memory
    series = {n: np.repeat(np.asarray(v, dtype=np.float64)[idx].T, npop, axis=1) for n, v in problem.forcing.items()}
    q = np.ascontiguousarray(_run(model, series, params, problem.warmup).T).reshape(nb, npop, -1)
    obs = problem.observed[idx, problem.warmup:][:, None, :]
    score = np.asarray(objective(q, obs), dtype=np.float64)
    return np.where(np.isfinite(score), score, -np.inf)


def search(model, problem: Problem, settings: Settings, objective: Objective,
           progress: Callable[[int, int], None] | None = None) -> Result:
    """Calibrate every basin of ``problem`` by differential evolution (module docstring).

    Parameters
    ----------
    model : assim.models.Model
    problem : the basins, their forcing, observations and search box
    settings : population, generations, tolerance, DE constants, seed
    objective : ``objective(sim, obs) -> score``, sim (basin, member, time) and obs
        (basin, 1, time), both mm d-1 with NaN where missing; larger is better (e.g.
        :func:`assim.verification.metrics.kge`)
    progress : called as ``progress(generation, max_generations)``

    Returns
    -------
    Result
    """
    if settings.strategy not in STRATEGIES:
        raise ValueError(f"strategy must be one of {STRATEGIES}, not {settings.strategy!r}")
    nb, nd = len(problem.basin_ids), len(problem.names)
    npop = int(settings.population)
    if npop < 5:
        raise ValueError("differential evolution needs a population of at least 5")
    keys = perturb.basin_keys(problem.basin_ids)
    pos = _latin_hypercube(_uniforms(settings.seed, keys, 2 * npop * nd, 0), npop, nd)
    fit = _evaluate(model, problem, np.arange(nb), pos, objective)
    generations = np.zeros(nb, dtype=np.int64)
    converged = _spread(fit) <= settings.tolerance
    n_draw = _draws(npop, nd)
    for g in range(1, settings.max_generations + 1):
        idx = np.flatnonzero(~converged)
        if not idx.size:
            break
        if progress is not None:
            progress(g - 1, settings.max_generations)
        u = _uniforms(settings.seed, keys[idx], n_draw, g)
        trial = _trials(pos[idx], fit[idx], u, settings)
        f_trial = _evaluate(model, problem, idx, trial, objective)
        better = f_trial >= fit[idx]  # Storn & Price (1997), eq. 4
        pos[idx] = np.where(better[..., None], trial, pos[idx])
        fit[idx] = np.where(better, f_trial, fit[idx])
        generations[idx] = g
        converged[idx] = _spread(fit[idx]) <= settings.tolerance
    if progress is not None:
        progress(settings.max_generations, settings.max_generations)
    lo, hi = problem.lower[:, None, :], problem.upper[:, None, :]
    values = lo + pos * (hi - lo)
    best = np.argmax(fit, axis=1)
    params = {n: values[np.arange(nb), best, j] for j, n in enumerate(problem.names)}
    params.update({n: np.asarray(v, dtype=np.float64).copy() for n, v in problem.fixed.items()})
    return Result(params, fit[np.arange(nb), best], values, fit, generations, converged)


def _spread(fit: np.ndarray) -> np.ndarray:
    """max - min of each basin's objective (inf while a member has none)."""
    with np.errstate(invalid="ignore"):
        s = fit.max(axis=-1) - fit.min(axis=-1)
    return np.where(np.isfinite(s), s, np.inf)


def search_box(model, names: Sequence[str], narrowed: Mapping[str, Sequence[float]]
               ) -> tuple[np.ndarray, np.ndarray]:
    """The search range of each of ``names``: the model's declared range, or ``narrowed``.

    Returns
    -------
    lower, upper : (n,) float64
    """
    declared = {p.name: (p.low, p.high) for p in model.parameters}
    lo = np.array([float(narrowed.get(n, declared[n])[0]) for n in names])
    hi = np.array([float(narrowed.get(n, declared[n])[1]) for n in names])
    return lo, hi
