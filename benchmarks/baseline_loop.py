"""Baseline: GR4J and the stochastic EnKF written member by member in plain Python.

This is the program a hydrologist writes first from the papers: one member at a time,
scalar Python floats and the ``math`` module for the model, a loop over members for the
perturbed observations and the update (numpy only for each basin's covariances). It computes
the same thing as ``assim`` (``tests/test_baselines.py`` checks it), so that the speed-ups in
``benchmarks/run.py`` compare like with like:

- :func:`gr4j_step` is GR4J of Perrin, Michel & Andréassian (2003), appendix, on the state
  layout of ``assim.models.get("gr4j")`` (production store, routing store, 9 UH1 and 19 UH2
  slots holding the water that leaves 1, 2, ... days later);
- :func:`enkf_update` is the stochastic EnKF of Burgers et al. (1998) with centred
  perturbed observations, the scheme of ``assim.filters.ensemble_update(method="enkf")``;
- :func:`run` is an assimilation run as ``assim.engine.run`` does it (multiplicative
  lognormal AR(1) forcing errors drawn from the same counter-based normals of
  :mod:`assim.perturb`, discharge from runoff and area, analysis of the production and
  routing stores and the predicted discharge, innovation gate, bounds), basin by basin,
  day by day, member by member.

Perrin, C., Michel, C. & Andréassian, V. (2003). Improvement of a parsimonious model for
    streamflow simulation. J. Hydrol. 279, 275-289.
Burgers, G., van Leeuwen, P. J. & Evensen, G. (1998). Analysis scheme in the ensemble
    Kalman filter. Mon. Wea. Rev. 126, 1719-1724.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np

from assim import perturb

N_SLOT1 = 9  # UH1 water still in transit at the end of a day (X4 <= 10 d)
N_SLOT2 = 19  # UH2 water still in transit
N_STATE = 2 + N_SLOT1 + N_SLOT2
PRECIPITATION_ERROR = perturb.LognormalAR1(0.3, 0.5)  # the engine's default error model
PET_ERROR = perturb.LognormalAR1(0.1, 0.8)


# ---------------------------------------------------------------- GR4J, one member


def _sh1(t: float, x4: float) -> float:
    if t <= 0.0:
        return 0.0
    if t < x4:
        return (t / x4) ** 2.5  # Perrin et al. (2003), appendix: SH1
    return 1.0


def _sh2(t: float, x4: float) -> float:
    if t <= 0.0:
        return 0.0
    if t <= x4:
        return 0.5 * (t / x4) ** 2.5  # Perrin et al. (2003), appendix: SH2, t <= X4
    if t < 2.0 * x4:
        return 1.0 - 0.5 * (2.0 - t / x4) ** 2.5  # same, X4 < t < 2 X4
    return 1.0


def uh_ordinates(x4: float) -> tuple[list[float], list[float]]:
    """Ordinates of UH1 and UH2 of one member (share of an input leaving 0, 1, ... days later).

    Returns
    -------
    uh1 : list of ceil(X4) floats; uh2 : list of ceil(2 X4) floats
    """
    n1, n2 = math.ceil(x4), math.ceil(2.0 * x4)
    uh1 = [_sh1(j, x4) - _sh1(j - 1, x4) for j in range(1, n1 + 1)]  # Perrin et al. (2003), appendix: UH1(j) = SH1(j) - SH1(j-1)
    uh2 = [_sh2(j, x4) - _sh2(j - 1, x4) for j in range(1, n2 + 1)]  # same for UH2
    return uh1, uh2


def initial_state(x1: float, x3: float) -> list[float]:
    """S = 0.3 X1, R = 0.5 X3, empty unit hydrographs (as ``assim``'s GR4J starts)."""
    return [0.3 * x1, 0.5 * x3] + [0.0] * (N_SLOT1 + N_SLOT2)


def gr4j_step(state: Sequence[float], p: float, e: float, x1: float, x2: float, x3: float,
              uh1: Sequence[float], uh2: Sequence[float]) -> tuple[list[float], float]:
    """One day of GR4J for one member.

    Parameters
    ----------
    state : 30 floats, mm: S, R, UH1 slots 1..9, UH2 slots 1..19 (start of the day)
    p, e : precipitation and PET of the day, mm d-1
    x1, x2, x3 : mm, mm d-1, mm
    uh1, uh2 : ordinates from :func:`uh_ordinates`

    Returns
    -------
    state : 30 floats, mm (end of the day), q : discharge, mm d-1
    """
    s, r = state[0], state[1]
    if p >= e:
        pn, en = p - e, 0.0
    else:
        pn, en = 0.0, e - p
    ps = es = 0.0
    if pn > 0.0:
        tp = math.tanh(pn / x1)
        ps = x1 * (1.0 - (s / x1) ** 2) * tp / (1.0 + s / x1 * tp)  # Perrin et al. (2003), appendix: Ps
    if en > 0.0:
        te = math.tanh(en / x1)
        es = s * (2.0 - s / x1) * te / (1.0 + (1.0 - s / x1) * te)  # Perrin et al. (2003), appendix: Es
    s = s - es + ps
    perc = s * (1.0 - (1.0 + (4.0 / 9.0 * s / x1) ** 4) ** -0.25)  # Perrin et al. (2003), appendix: Perc
    s = s - perc
    pr = perc + (pn - ps)  # Perrin et al. (2003), appendix: Pr

    # Unit hydrographs: slot k holds the water leaving k days after the day just ended.
    old1 = state[2:2 + N_SLOT1]
    old2 = state[2 + N_SLOT1:]
    p1, p2 = 0.9 * pr, 0.1 * pr  # Perrin et al. (2003), appendix: 90 % to UH1, 10 % to UH2
    q9 = old1[0] + uh1[0] * p1
    new1 = [0.0] * N_SLOT1
    for j in range(1, len(uh1)):
        new1[j - 1] = old1[j] + uh1[j] * p1 if j < N_SLOT1 else uh1[j] * p1
    q1 = old2[0] + uh2[0] * p2
    new2 = [0.0] * N_SLOT2
    for j in range(1, len(uh2)):
        new2[j - 1] = old2[j] + uh2[j] * p2 if j < N_SLOT2 else uh2[j] * p2

    f = x2 * (r / x3) ** 3.5  # Perrin et al. (2003), appendix: F
    r = max(0.0, r + q9 + f)
    qr = r * (1.0 - (1.0 + (r / x3) ** 4) ** -0.25)  # Perrin et al. (2003), appendix: Qr
    r = r - qr
    qd = max(0.0, q1 + f)  # Perrin et al. (2003), appendix: Qd
    return [s, r, *new1, *new2], qr + qd  # Perrin et al. (2003), appendix: Q = Qr + Qd


# ---------------------------------------------------------------- stochastic EnKF, one basin


def enkf_basin(states, predicted, observed, obs_variance, noise, *, gate_sigma=None,
               lower=None, upper=None):
    """Stochastic EnKF analysis of one basin, member by member.

    Parameters
    ----------
    states : (member, n_state) float64; predicted : (member, n_obs) float64
    observed, obs_variance : (n_obs,) float64, NaN = missing
    noise : (member, n_obs) standard normals of the perturbed observations
    gate_sigma : reject a reading with ``|y - mean| > gate_sigma sqrt(var + r)``
    lower, upper : (member, n_state) bounds, or None

    Returns
    -------
    (member, n_state) float64, a new array (the prior when no reading is used)
    """
    X = np.array(states, dtype=np.float64)
    Y = np.asarray(predicted, dtype=np.float64)
    n_member = X.shape[0]
    y_mean = Y.mean(axis=0)
    Yp = Y - y_mean
    var_y = (Yp * Yp).sum(axis=0) / (n_member - 1)
    use = np.isfinite(observed) & np.isfinite(obs_variance)
    if gate_sigma:
        use &= ~(np.abs(observed - y_mean) > gate_sigma * np.sqrt(var_y + obs_variance))
    if not use.any():
        return X
    y, r, Yu, z = observed[use], obs_variance[use], Y[:, use], noise[:, use]
    Xp = X - X.mean(axis=0)
    Yp = Yp[:, use]
    Pxy = Xp.T @ Yp / (n_member - 1)
    Pyy = Yp.T @ Yp / (n_member - 1) + np.diag(r)
    K = Pxy @ np.linalg.inv(Pyy)  # Kalman gain
    # The member loop in Python floats: the gain and each member's perturbed innovation.
    gain, sd = K.tolist(), np.sqrt(r).tolist()
    y, z, Yu = y.tolist(), z.tolist(), Yu.tolist()
    m, n = len(y), X.shape[1]
    z_mean = [0.0] * m
    for i in range(n_member):
        for j in range(m):
            z_mean[j] += z[i][j]
    z_mean = [v / n_member for v in z_mean]
    rows = X.tolist()
    for i in range(n_member):
        # Burgers et al. (1998): each member sees the reading perturbed by its own error.
        d = [y[j] + sd[j] * (z[i][j] - z_mean[j]) - Yu[i][j] for j in range(m)]
        row = rows[i]
        for k in range(n):
            g, total = gain[k], row[k]
            for j in range(m):
                total += g[j] * d[j]
            row[k] = total
    X = np.array(rows)
    if lower is not None or upper is not None:
        np.clip(X, lower, upper, out=X)
    return X


def enkf_update(states, predicted, observed, obs_variance, noise, *, gate_sigma=None,
                lower=None, upper=None) -> np.ndarray:
    """:func:`enkf_basin` for every basin, one after the other.

    Parameters
    ----------
    states : (basin, member, n_state); predicted, noise : (basin, member, n_obs)
    observed, obs_variance : (basin, n_obs); lower, upper : (basin, member, n_state) or None

    Returns
    -------
    (basin, member, n_state) float64
    """
    out = np.empty(np.shape(states))
    for b in range(len(states)):
        out[b] = enkf_basin(states[b], predicted[b], observed[b], obs_variance[b], noise[b],
                            gate_sigma=gate_sigma, lower=None if lower is None else lower[b],
                            upper=None if upper is None else upper[b])
    return out


# ---------------------------------------------------------------- an assimilation run


def basin_normals(seed: int, key, members: int, days: np.ndarray, stream: int) -> np.ndarray:
    """(time, member) standard normals of one basin (``key`` from ``perturb.basin_keys``) and
    one stream on ``days``: the numbers the engine draws for that basin."""
    counters = perturb.counter_keys(seed, np.atleast_1d(key), np.arange(members), stream)
    return perturb.standard_normal(counters, days)[:, 0]


def ar1_start(seed: int, key, members: int, days: np.ndarray, stream: int) -> np.ndarray:
    """(member,) AR(1) log errors on the day before ``days[0]``, as the engine starts them (a
    stationary draw: the standard normal of that day)."""
    return basin_normals(seed, key, members, np.asarray(days[:1]) - 1, stream)[0]


def run(
    precipitation: np.ndarray,
    pet: np.ndarray,
    observed: np.ndarray,
    area_km2: np.ndarray,
    parameters: Mapping[str, np.ndarray],
    basin_ids: Sequence[str],
    days: np.ndarray,
    *,
    members: int,
    seed: int,
    precipitation_error: perturb.LognormalAR1 = PRECIPITATION_ERROR,
    pet_error: perturb.LognormalAR1 = PET_ERROR,
    relative_error: float = 0.1,
    error_floor: float = 0.05,
    gate_sigma: float | None = 5.0,
) -> dict[str, np.ndarray]:
    """Assimilation run of GR4J with the stochastic EnKF, basin by basin and member by member.

    The same run as ``assim.engine.run`` in mode ``assimilate`` with the default updated
    states (production and routing stores), the predicted discharge as an augmented column,
    no spin-up, no parameter or state noise, no inflation, relative observation errors with
    a floor, and the same counter-based random numbers.

    Parameters
    ----------
    precipitation, pet : (basin, time) float64, mm d-1
    observed : (basin, time) float64, m3 s-1, NaN where missing
    area_km2 : (basin,) float64
    parameters : ``x1``..``x4``, each (basin,) float64
    basin_ids : (basin,) str; days : (time,) int64, days since 1970-01-01
    members, seed : ensemble size and seed

    Returns
    -------
    dict with ``discharge`` and ``discharge_analysis`` (basin, time, member) m3 s-1 and
    ``states`` (basin, member, 30) mm at the end
    """
    n_basin, n_day = precipitation.shape
    keys = perturb.basin_keys(basin_ids)
    discharge = np.empty((n_basin, n_day, members))
    analysis = np.empty((n_basin, n_day, members))
    end = np.empty((n_basin, members, N_STATE))
    for b in range(n_basin):
        x1, x2, x3, x4 = (float(parameters[k][b]) for k in ("x1", "x2", "x3", "x4"))
        uh1, uh2 = uh_ordinates(x4)
        to_m3s = float(area_km2[b]) / 86.4  # Q[m3 s-1] = q[mm d-1] * area[km2] / 86.4
        # The normals of this basin (all days, all members), from the engine's generator.
        z_p, z_e, z_o = (basin_normals(seed, keys[b], members, days, stream)
                         for stream in (perturb.PRECIPITATION, perturb.PET, perturb.OBSERVATION))
        z_p, z_e = z_p.tolist(), z_e.tolist()
        e_p, e_e = (ar1_start(seed, keys[b], members, days, stream).tolist()
                    for stream in (perturb.PRECIPITATION, perturb.PET))
        phi_p, phi_e = precipitation_error.phi, pet_error.phi
        c_p, c_e = math.sqrt(1.0 - phi_p ** 2), math.sqrt(1.0 - phi_e ** 2)
        s_p, s_e = precipitation_error.sigma, pet_error.sigma
        h_p, h_e = 0.5 * s_p * s_p, 0.5 * s_e * s_e
        states = [initial_state(x1, x3) for _ in range(members)]
        lower = np.zeros((members, 3))
        upper = np.tile([x1, x3, np.inf], (members, 1))
        for t in range(n_day):
            p_day, e_day = float(precipitation[b, t]), float(pet[b, t])
            zp, ze = z_p[t], z_e[t]
            q = [0.0] * members
            for i in range(members):
                # Multiplicative lognormal errors with AR(1) log errors (as assim.perturb).
                e_p[i] = phi_p * e_p[i] + c_p * zp[i]
                e_e[i] = phi_e * e_e[i] + c_e * ze[i]
                states[i], runoff = gr4j_step(states[i], p_day * math.exp(s_p * e_p[i] - h_p),
                                              e_day * math.exp(s_e * e_e[i] - h_e), x1, x2, x3, uh1, uh2)
                q[i] = runoff * to_m3s
            discharge[b, t] = q
            y = float(observed[b, t])
            if math.isfinite(y):
                sd = max(relative_error * abs(y), error_floor)
                X = np.array([[st[0], st[1], qi] for st, qi in zip(states, q, strict=True)])
                Xa = enkf_basin(X, X[:, 2:], np.array([y]), np.array([sd * sd]), z_o[t][:, None],
                                gate_sigma=gate_sigma, lower=lower, upper=upper)
                for i in range(members):
                    states[i][0], states[i][1] = float(Xa[i, 0]), float(Xa[i, 1])
                analysis[b, t] = Xa[:, 2]
            else:
                analysis[b, t] = q
        end[b] = states
    return {"discharge": discharge, "discharge_analysis": analysis, "states": end}
