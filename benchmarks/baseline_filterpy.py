"""Baseline: filterpy's EnsembleKalmanFilter driving GR4J member by member.

The way a hydrologist would use a general-purpose filter library: one
``filterpy.kalman.EnsembleKalmanFilter`` per basin, whose ``fx`` advances one member by one
day with the per-member GR4J of :mod:`baseline_loop` and whose ``hx`` returns the member's
discharge. The run has the same settings as :func:`baseline_loop.run` with the gate off:
the same forcing (multiplicative lognormal AR(1) errors from the counter-based normals of
:mod:`assim.perturb`), the same analysed vector (production store, routing store and
predicted discharge; the unit-hydrograph slots stay outside the filter, as in ``assim``),
relative observation errors with a floor, states clipped to their bounds after each update.

What differs, by filterpy's design: its perturbed observations come from numpy's global
generator (seeded here) and are not centred, it adds process noise drawn with covariance
``Q`` (set to zero, so it adds nothing) and it recomputes the sample covariance after every
step. The numbers are therefore those of the same filter, not the same draws; the run
without readings (open loop) is the same to rounding (``tests/test_baselines.py``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import baseline_loop as loop
import numpy as np
from filterpy.kalman import EnsembleKalmanFilter

from assim import perturb


class _Members:
    """The GR4J members of one basin, advanced by filterpy's ``fx`` one after the other.

    filterpy calls ``fx(sigma, dt)`` for members 0, 1, ..., N-1 in order; the counter tells
    which member is being advanced, and that member's unit-hydrograph slots and forcing of
    the day are kept here.
    """

    def __init__(self, n_member, x1, x2, x3, x4, to_m3s):
        self.n_member = n_member
        self.x1, self.x2, self.x3 = x1, x2, x3
        self.uh1, self.uh2 = loop.uh_ordinates(x4)
        self.to_m3s = to_m3s
        self.slots = [[0.0] * (loop.N_SLOT1 + loop.N_SLOT2) for _ in range(n_member)]
        self.p = self.e = None
        self.i = 0

    def fx(self, sigma, dt):
        i = self.i
        self.i = (i + 1) % self.n_member
        state, runoff = loop.gr4j_step([sigma[0], sigma[1], *self.slots[i]], self.p[i], self.e[i],
                                       self.x1, self.x2, self.x3, self.uh1, self.uh2)
        self.slots[i] = state[2:]
        return np.array([state[0], state[1], runoff * self.to_m3s])


def _hx(sigma):
    return sigma[2:3]


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
    precipitation_error: perturb.LognormalAR1 = loop.PRECIPITATION_ERROR,
    pet_error: perturb.LognormalAR1 = loop.PET_ERROR,
    relative_error: float = 0.1,
    error_floor: float = 0.05,
) -> dict[str, np.ndarray]:
    """Assimilation run with one filterpy ensemble Kalman filter per basin.

    Parameters and returns as :func:`baseline_loop.run` (no innovation gate).
    """
    n_basin, n_day = precipitation.shape
    keys = perturb.basin_keys(basin_ids)
    # filterpy draws its perturbations from numpy's global generator: seed it for a repeatable run
    np.random.seed(seed % 2**32)  # noqa: NPY002
    discharge = np.empty((n_basin, n_day, members))
    analysis = np.empty((n_basin, n_day, members))
    end = np.empty((n_basin, members, loop.N_STATE))
    for b in range(n_basin):
        x1, x2, x3, x4 = (float(parameters[k][b]) for k in ("x1", "x2", "x3", "x4"))
        gr4j = _Members(members, x1, x2, x3, x4, float(area_km2[b]) / 86.4)
        start = np.array(loop.initial_state(x1, x3)[:2] + [0.0])
        kf = EnsembleKalmanFilter(x=start, P=np.eye(3), dim_z=1, dt=1.0, N=members, hx=_hx, fx=gr4j.fx)
        kf.sigmas = np.tile(start, (members, 1))  # every member starts from the same state
        kf.Q = np.zeros((3, 3))
        lower, upper = np.zeros(3), np.array([x1, x3, np.inf])
        streams = (perturb.PRECIPITATION, perturb.PET)
        z_p, z_e = (loop.basin_normals(seed, keys[b], members, days, s) for s in streams)
        e_p, e_e = (loop.ar1_start(seed, keys[b], members, days, s) for s in streams)
        for t in range(n_day):
            e_p = precipitation_error.step(e_p, z_p[t])
            e_e = pet_error.step(e_e, z_e[t])
            gr4j.p = (precipitation[b, t] * precipitation_error.multiplier(e_p)).tolist()
            gr4j.e = (pet[b, t] * pet_error.multiplier(e_e)).tolist()
            kf.predict()
            discharge[b, t] = kf.sigmas[:, 2]
            y = observed[b, t]
            if np.isfinite(y):
                sd = max(relative_error * abs(y), error_floor)
                kf.update(np.array([y]), R=sd * sd)
                np.clip(kf.sigmas, lower, upper, out=kf.sigmas)
            analysis[b, t] = kf.sigmas[:, 2]
        end[b, :, :2] = kf.sigmas[:, :2]
        end[b, :, 2:] = gr4j.slots
    return {"discharge": discharge, "discharge_analysis": analysis, "states": end}
