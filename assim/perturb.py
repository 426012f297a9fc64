"""The ensemble's error model and its counter-based random numbers (numpy and scipy only).

Every random number of a run is a pure function of (seed, basin id, member, day, stream):
a 64-bit counter is hashed with the splitmix64 finaliser and turned into a standard normal
by the inverse normal CDF. Nothing is drawn from a generator that carries state, so adding a
basin, changing the chunking or restarting a run never changes another number.

Streams (the last element of the counter) keep the uses apart: precipitation and PET errors,
the perturbed observations of the stochastic EnKF, the additive state noise (one stream per
state name), the parameter draws (one stream per parameter name) and the Liu & West kernel
noise of joint estimation.

The error model
---------------
- Forcing: a multiplicative lognormal error ``w = exp(s e - s^2 / 2)`` with
  ``s^2 = ln(1 + cv^2)``, where the log error ``e`` is a stationary AR(1) process with unit
  variance, ``e_t = phi e_{t-1} + sqrt(1 - phi^2) z_t``. Since every ``e_t ~ N(0, 1)``,
  ``E[w] = 1`` exactly and ``CV[w] = cv``; the lag-one autocorrelation of ``w`` is
  ``(exp(phi s^2) - 1) / (exp(s^2) - 1)`` (lognormal moments), slightly below ``phi``.
- Parameters: one draw per (basin, member), made in a space that respects the valid range:
  the logit of the position in ``[low, high]`` for a finite range, ``log(theta - low)`` for
  a range open above. The draw's standard deviation in that space is chosen so that, to
  first order, the standard deviation in parameter units is ``relative_sd * |theta|``. The
  draw never leaves the valid range, and a parameter sitting on a bound stays there; the
  logit-space sd is at most ``MAX_LOGIT_SD`` (1), which only binds close to the upper bound
  of a finite range, where the draws are then squeezed against it.
- State noise: additive Gaussian error (mm) on chosen states after each model step, clipped
  to the states' bounds; the water actually added is returned so that it can be reported.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.special import ndtri

# Stream numbers of the fixed uses; named uses (parameters, state noise) hash their name.
PRECIPITATION = 1
PET = 2
OBSERVATION = 3
KERNEL = 4

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_S30, _S27, _S31, _S11 = (np.uint64(k) for k in (30, 27, 31, 11))
_TWO_M53 = 2.0**-53
# Largest sd of a parameter draw in logit space: near the upper bound of a finite range the
# first-order match would ask for an ever wider draw; this keeps the draws squeezed there.
MAX_LOGIT_SD = 1.0


def _mix(x: np.ndarray) -> np.ndarray:
    """splitmix64 finaliser of Steele, Lea & Flood (2014), applied elementwise to uint64."""
    shape = np.shape(x)
    return _mix_inplace(np.array(x, dtype=np.uint64, ndmin=1)).reshape(shape)


def _mix_inplace(x: np.ndarray) -> np.ndarray:
    """:func:`_mix` overwriting ``x`` (a uint64 array), with one temporary."""
    with np.errstate(over="ignore"):
        t = x >> _S30
        x ^= t
        x *= _M1
        np.right_shift(x, _S27, out=t)
        x ^= t
        x *= _M2
        np.right_shift(x, _S31, out=t)
        x ^= t
    return x


def _stable_hash(text: str) -> np.uint64:
    """A 64-bit hash of ``text`` that is the same in every process and session."""
    digest = hashlib.blake2b(text.encode("utf-8"), digest_size=8).digest()
    return np.uint64(int.from_bytes(digest, "little"))


def basin_keys(basin_ids: Iterable[str]) -> np.ndarray:
    """Stable 64-bit keys of basin id strings (not Python's salted ``hash``).

    Returns
    -------
    (basin,) uint64
    """
    return np.array([_stable_hash("basin:" + str(b)) for b in basin_ids], dtype=np.uint64)


def stream_id(name: str) -> int:
    """Stream number of a named use, e.g. ``stream_id("parameter:x1")``."""
    return int(_stable_hash("stream:" + name) >> np.uint64(1))


def counter_keys(seed: int, keys: np.ndarray, members: np.ndarray, stream: int) -> np.ndarray:
    """The day-independent part of the counter of every (basin, member) of one stream.

    Parameters
    ----------
    seed : int
    keys : (basin,) uint64, from :func:`basin_keys`
    members : (member,) int, member numbers (0..N-1 in a full ensemble)
    stream : int

    Returns
    -------
    (basin, member) uint64
    """
    with np.errstate(over="ignore"):
        h = _mix(np.uint64(seed) + _GOLDEN)
        h = _mix(h ^ np.asarray(keys, dtype=np.uint64))
        h = _mix(h ^ (np.uint64(stream) * _GOLDEN))
        m = np.asarray(members, dtype=np.uint64) + np.uint64(1)
        return _mix(h[:, None] ^ (m[None, :] * _M2))


def standard_normal(ckeys: np.ndarray, days) -> np.ndarray:
    """Standard normal numbers of the counters ``ckeys`` on ``days``.

    Parameters
    ----------
    ckeys : (...) uint64, from :func:`counter_keys`
    days : int or (...) int, day numbers (days since 1970-01-01); broadcast against
        ``ckeys`` after appending as many unit axes as ``ckeys`` has, so that a (day,)
        array gives a (day, ...) result.

    Returns
    -------
    float64 array of shape ``days.shape + ckeys.shape``
    """
    d = np.asarray(days, dtype=np.int64).astype(np.uint64)
    with np.errstate(over="ignore"):
        dh = _mix((d + np.uint64(0x632BE59BD9B4E019)) * _GOLDEN)
    dh = dh.reshape(dh.shape + (1,) * np.ndim(ckeys))
    h = _mix_inplace(np.array(ckeys ^ dh, dtype=np.uint64, ndmin=1))
    h >>= _S11
    u = h.astype(np.float64)
    del h
    u += 0.5
    u *= _TWO_M53  # in (0, 1), never 0 or 1
    return ndtri(u, out=u).reshape(np.shape(dh)[: np.ndim(d)] + np.shape(ckeys))


# ---------------------------------------------------------------- multiplicative AR(1) error


@dataclass(frozen=True)
class LognormalAR1:
    """Multiplicative lognormal error with mean 1, coefficient of variation ``cv`` and
    AR(1) log error of lag-one autocorrelation ``phi``."""

    cv: float
    phi: float

    @property
    def sigma(self) -> float:
        """Standard deviation of the log error, ``sqrt(ln(1 + cv^2))`` (lognormal moments)."""
        return float(np.sqrt(np.log1p(self.cv**2)))

    def step(self, e_prev: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Next log error (unit variance) from the previous one and a standard normal."""
        return self.phi * e_prev + np.sqrt(1.0 - self.phi**2) * z  # stationary AR(1)

    def multiplier(self, e: np.ndarray) -> np.ndarray:
        """Multiplicative error ``exp(s e - s^2/2)``; mean exactly 1 when e ~ N(0, 1)."""
        s = self.sigma
        return np.exp(s * e - 0.5 * s * s)

    def lag1_autocorrelation(self) -> float:
        """Lag-one autocorrelation of the multiplier (not of the log error)."""
        s2 = self.sigma**2
        if s2 == 0.0:
            return float(self.phi)
        return float(np.expm1(self.phi * s2) / np.expm1(s2))

    def series(self, e_prev: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Log errors of consecutive days.

        Parameters
        ----------
        e_prev : (...) float64, log error of the day before the first
        z : (day, ...) float64, standard normals of the days

        Returns
        -------
        (day, ...) float64
        """
        out = np.empty_like(z)
        e = e_prev
        for t in range(z.shape[0]):
            e = self.step(e, z[t])
            out[t] = e
        return out


# ---------------------------------------------------------------- parameters


@dataclass(frozen=True)
class ParameterRange:
    """Valid range of one parameter (inclusive); ``high`` may be ``inf``."""

    low: float
    high: float


def perturb_parameters(
    params: Mapping[str, np.ndarray],
    relative_sd: Mapping[str, float],
    ranges: Mapping[str, ParameterRange],
    *,
    seed: int,
    keys: np.ndarray,
    members: np.ndarray,
) -> dict[str, np.ndarray]:
    """One parameter set per member, drawn in a range-respecting space.

    Parameters
    ----------
    params : dict of (basin,) float64, the basins' parameters
    relative_sd : dict name -> relative standard deviation (names not given stay fixed)
    ranges : dict name -> :class:`ParameterRange`
    seed, keys, members : as for :func:`counter_keys`

    Returns
    -------
    dict of (basin, member) float64; unperturbed parameters are broadcast copies.
    """
    n_member = len(members)
    out = {}
    for name, value in params.items():
        theta = np.asarray(value, dtype=np.float64)
        sd = float(relative_sd.get(name, 0.0))
        if sd == 0.0:
            out[name] = np.repeat(theta[:, None], n_member, axis=1)
            continue
        z = standard_normal(counter_keys(seed, keys, members, stream_id("parameter:" + name)), 0)
        out[name] = _transformed_draw(theta, sd, ranges[name], z)
    return out


def _transformed_draw(theta: np.ndarray, rel: float, rng: ParameterRange, z: np.ndarray) -> np.ndarray:
    """theta (basin,), z (basin, member) -> draws (basin, member) inside the range."""
    lo, hi = rng.low, rng.high
    target = rel * np.abs(theta)  # wanted sd in parameter units
    if np.isfinite(hi):
        width = hi - lo
        p = np.clip((theta - lo) / width, 0.0, 1.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            slope = width * p * (1.0 - p)  # d theta / d logit(p)
            s = np.where(slope > 0, np.minimum(target / slope, MAX_LOGIT_SD), 0.0)
            u = np.log(p) - np.log1p(-p)
        drawn = lo + width / (1.0 + np.exp(-(u[:, None] + s[:, None] * z)))
    else:
        gap = theta - lo
        with np.errstate(divide="ignore", invalid="ignore"):
            s = np.where(gap > 0, target / gap, 0.0)  # d theta / d log(theta - lo) = gap
        drawn = lo + gap[:, None] * np.exp(s[:, None] * z)
    # a parameter on a bound (zero slope) keeps its value
    return np.where(np.isfinite(drawn), np.clip(drawn, lo, hi), theta[:, None])


# ---------------------------------------------------------------- additive state noise


@dataclass(frozen=True)
class StateNoise:
    """Additive model error: standard deviation (mm) per state column."""

    columns: tuple[int, ...] = ()
    sd: tuple[float, ...] = ()
    streams: tuple[int, ...] = field(default=())

    @classmethod
    def from_names(cls, sd_by_name: Mapping[str, float], state_names: Sequence[str]) -> StateNoise:
        chosen = [(state_names.index(n), float(v), stream_id("state:" + n)) for n, v in sd_by_name.items() if v > 0]
        chosen.sort()
        return cls(
            columns=tuple(c for c, _, _ in chosen),
            sd=tuple(s for _, s, _ in chosen),
            streams=tuple(k for _, _, k in chosen),
        )

    def __bool__(self) -> bool:
        return bool(self.columns)


def add_state_noise(
    states: np.ndarray, noise: StateNoise, z: Sequence[np.ndarray], lower: np.ndarray, upper: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Add Gaussian noise to chosen state columns and clip to the bounds.

    Parameters
    ----------
    states : (..., n_state) float64, mm
    noise : :class:`StateNoise`
    z : one (...) standard normal array per noisy column
    lower, upper : (..., n_state) float64, mm

    Returns
    -------
    states : (..., n_state) float64, mm, a new array
    added : (...) float64, mm, the water actually added (after clipping) summed over states
    """
    out = states.copy()
    added = np.zeros(states.shape[:-1])
    for col, sd, zc in zip(noise.columns, noise.sd, z, strict=True):
        new = np.clip(states[..., col] + sd * zc, lower[..., col], upper[..., col])
        added += new - states[..., col]
        out[..., col] = new
    return out, added
