"""The ensemble's error model and its counter-based random numbers (numpy and scipy only).

Every random number of a run is a pure function of (seed, basin id, member, day, stream):
the days are taken in pairs (2j, 2j + 1); the 64-bit counter of (seed, basin, member, pair
j, stream) is hashed with the splitmix64 finaliser into two uniforms, and the Box-Muller
transform turns them into two independent standard normals, the cosine one for day 2j and
the sine one for day 2j + 1. Nothing is drawn from a generator that carries state, so adding
a basin, changing the chunking or restarting a run never changes another number, and a
block of consecutive days costs one transform per pair of days.

Streams (the last element of the counter) keep the uses apart: precipitation, PET and
temperature errors, the perturbed observations of the stochastic EnKF, the additive state noise (one stream per
state name), the parameter draws (one stream per parameter name) and the Liu & West kernel
noise of joint estimation.

The error model
---------------
- Forcing: a multiplicative lognormal error ``w = exp(s e - s^2 / 2)`` with
  ``s^2 = ln(1 + cv^2)``, where the log error ``e`` is a stationary AR(1) process with unit
  variance, ``e_t = phi e_{t-1} + sqrt(1 - phi^2) z_t``. Since every ``e_t ~ N(0, 1)``,
  ``E[w] = 1`` exactly and ``CV[w] = cv``; the lag-one autocorrelation of ``w`` is
  ``(exp(phi s^2) - 1) / (exp(s^2) - 1)`` (lognormal moments), slightly below ``phi``.
- Temperature (for a snow routine): an additive Gaussian error ``sd e`` (degC) with the same
  stationary unit-variance AR(1) process ``e``: mean 0, standard deviation ``sd``, lag-one
  autocorrelation ``phi``. Temperature errors are additive because a degree-day routine
  responds to the difference between the temperature and a threshold near 0 degC, where a
  relative error has no meaning (common practice, no published source).
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
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

# Stream numbers of the fixed uses; named uses (parameters, state noise) hash their name.
PRECIPITATION = 1
PET = 2
OBSERVATION = 3
KERNEL = 4
TEMPERATURE = 5
# the stream of each perturbed forcing
FORCING_STREAMS = {"precipitation": PRECIPITATION, "pet": PET, "temperature": TEMPERATURE}

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_S30, _S27, _S31, _S11 = (np.uint64(k) for k in (30, 27, 31, 11))
_TWO_M53 = 2.0**-53
_S60, _M49 = np.uint64(60), np.uint64(2**49 - 1)
_DAY = np.uint64(0x632BE59BD9B4E019)
# The angle 2 pi u2 of the Box-Muller transform is cut into 16 sectors of pi/8: the top 4
# bits of u2 give the sector k, the next 49 bits the angle phi in [0, pi/8) within it, and
# cos(k pi/8 + phi), sin(k pi/8 + phi) follow from exact sector values and the Taylor series
# of cos phi and sin phi to phi^14 and phi^13 (truncation below 1e-18): numpy's own cos and
# sin run one element at a time, several times slower than these array operations.
_PHI = (math.pi / 8.0) * 2.0**-49
_SIN_TAYLOR = tuple((-1) ** j / math.factorial(2 * j + 1) for j in range(7))
_COS_TAYLOR = tuple((-1) ** j / math.factorial(2 * j) for j in range(8))


def _sector_cosines() -> tuple[np.ndarray, np.ndarray]:
    """cos(k pi/8) and sin(k pi/8), k = 0..15, with the exact symmetries of the circle."""
    c1, c2, c3 = math.sqrt(2.0 + math.sqrt(2.0)) / 2.0, math.sqrt(0.5), math.sqrt(2.0 - math.sqrt(2.0)) / 2.0
    quarter = [1.0, c1, c2, c3]  # k = 0..3; then cos(k pi/8 + pi/2) = -sin(k pi/8)
    sines = [0.0, c3, c2, c1]
    cos = np.array(quarter + [-v for v in sines] + [-v for v in quarter] + sines)
    return cos, np.roll(cos, 4)  # sin(x) = cos(x - pi/2)


_SECTOR_COS, _SECTOR_SIN = _sector_cosines()
_PASS = 16384  # elements per pass of the transform: its temporaries stay in the core's cache
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
        array gives a (day, ...) result. Consecutive days (a (day,) range) are the fast case.

    Returns
    -------
    float64 array of shape ``days.shape + ckeys.shape``
    """
    ck = np.ascontiguousarray(ckeys, dtype=np.uint64).reshape(-1)
    d = np.asarray(days, dtype=np.int64)
    shape = d.shape + np.shape(ckeys)
    if d.ndim == 1 and d.size > 1 and bool((np.diff(d) == 1).all()):
        first = int(d[0]) >> 1  # pair of the first day (floor, also before 1970)
        n_pairs = (int(d[-1]) >> 1) - first + 1
        z = np.empty((n_pairs, 2, ck.size))  # (pair, cosine/sine, counter) = (day, counter)
        _box_muller(_day_hash(np.arange(first, first + n_pairs, dtype=np.int64)), ck, z)
        off = int(d[0]) - 2 * first
        return z.reshape(2 * n_pairs, ck.size)[off:off + d.size].reshape(shape)
    flat = d.reshape(-1)
    z = np.empty((flat.size, ck.size))
    _box_muller(_day_hash(flat >> 1), ck, z, odd=(flat & 1).astype(bool))
    return z.reshape(shape)


def _day_hash(pairs: np.ndarray) -> np.ndarray:
    """(n,) int64 day-pair numbers -> (n,) uint64 hashes mixed into the counters."""
    with np.errstate(over="ignore"):
        return _mix((pairs.astype(np.uint64) + _DAY) * _GOLDEN)


def _box_muller(dh: np.ndarray, ck: np.ndarray, out: np.ndarray, odd: np.ndarray | None = None) -> None:
    """Two standard normals of every (day pair, counter), written into ``out``.

    dh : (P,) uint64 day-pair hashes; ck : (K,) uint64 counters. Without ``odd``, ``out`` is
    (P, 2, K): the cosine normal (even day) and the sine normal (odd day) of each pair. With
    ``odd`` (P,) bool, ``out`` is (P, K): the sine normal where ``odd``, else the cosine one
    (the same numbers: sin(x) = cos(x - pi/2) is a shift of four sectors).

    Works through the rows in passes of about ``_PASS`` elements, in place.
    """
    n_k = ck.size
    rows = max(1, _PASS // max(n_k, 1))
    m = min(rows, dh.size) * n_k
    h1, h2 = np.empty(m, np.uint64), np.empty(m, np.uint64)
    sector = np.empty(m, np.int64)
    r, phi, x, sn, cs, a, b = (np.empty(m) for _ in range(7))
    mul, add, sub = np.multiply, np.add, np.subtract
    with np.errstate(over="ignore"):
        for p0 in range(0, dh.size, rows):
            p1 = min(p0 + rows, dh.size)
            n = (p1 - p0) * n_k
            k1, k2, kk, rr, ff, xx, s_, c_, aa, bb = (v[:n] for v in (h1, h2, sector, r, phi, x, sn, cs, a, b))
            np.bitwise_xor(ck[None, :], dh[p0:p1, None], out=k1.reshape(p1 - p0, n_k))
            _mix_inplace(k1)  # the counter of (seed, basin, member, day pair, stream)
            add(k1, _GOLDEN, out=k2)
            _mix_inplace(k2)  # a second, independent 64-bit word
            # u1 in (0, 1) from the top 53 bits of the first word; r = sqrt(-2 ln u1)
            np.right_shift(k1, _S11, out=k1)
            rr[...] = k1.view(np.int64)  # exact: below 2^53
            add(rr, 0.5, out=rr)
            mul(rr, _TWO_M53, out=rr)
            np.log(rr, out=rr)
            mul(rr, -2.0, out=rr)
            np.sqrt(rr, out=rr)  # Box & Muller (1958), Ann. Math. Stat. 29, 610 (first display): r = sqrt(-2 ln u1), angle 2 pi u2
            # u2 in [0, 1) from the top 53 bits of the second word: sector and angle within it
            np.right_shift(k2, _S60, out=kk.view(np.uint64))
            if odd is not None:  # the sine: four sectors back
                sub(kk.reshape(p1 - p0, n_k), 4 * odd[p0:p1, None], out=kk.reshape(p1 - p0, n_k))  # view
                np.bitwise_and(kk, 15, out=kk)
            np.right_shift(k2, _S11, out=k2)
            np.bitwise_and(k2, _M49, out=k2)
            ff[...] = k2.view(np.int64)
            mul(ff, _PHI, out=ff)
            mul(ff, ff, out=xx)
            _horner(xx, _SIN_TAYLOR, s_)
            mul(s_, ff, out=s_)  # sin(phi)
            _horner(xx, _COS_TAYLOR, c_)  # cos(phi)
            np.take(_SECTOR_COS, kk, out=aa)
            np.take(_SECTOR_SIN, kk, out=bb)
            # cos(k pi/8 + phi) = cos_k cos(phi) - sin_k sin(phi), and the sine alike
            grid = (p1 - p0, n_k)
            mul(aa, c_, out=ff)
            mul(bb, s_, out=xx)
            sub(ff, xx, out=ff)
            mul(ff.reshape(grid), rr.reshape(grid), out=out[p0:p1, 0] if odd is None else out[p0:p1])
            if odd is None:
                mul(bb, c_, out=ff)
                mul(aa, s_, out=xx)
                add(ff, xx, out=ff)
                mul(ff.reshape(grid), rr.reshape(grid), out=out[p0:p1, 1])


def _horner(x: np.ndarray, coef: tuple[float, ...], out: np.ndarray) -> None:
    """``out = sum_j coef[j] x^j`` by Horner's rule, in place."""
    np.multiply(x, coef[-1], out=out)
    for c in coef[-2:0:-1]:
        np.add(out, c, out=out)
        np.multiply(out, x, out=out)
    np.add(out, coef[0], out=out)


# ---------------------------------------------------------------- AR(1) forcing errors


class _AR1:
    """The stationary unit-variance AR(1) process ``e`` behind a forcing error (field ``phi``)."""

    def step(self, e_prev: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Next error (unit variance) from the previous one and a standard normal."""
        return self.phi * e_prev + np.sqrt(1.0 - self.phi**2) * z  # stationary AR(1)

    def series(self, e_prev: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Errors of consecutive days.

        Parameters
        ----------
        e_prev : (...) float64, error of the day before the first
        z : (day, ...) float64, standard normals of the days

        Returns
        -------
        (day, ...) float64
        """
        out = np.empty_like(z)
        c = np.sqrt(1.0 - self.phi**2)
        tmp = np.empty(z.shape[1:])
        e = e_prev
        for t in range(z.shape[0]):  # self.step, written into out
            np.multiply(self.phi, e, out=out[t])
            np.multiply(c, z[t], out=tmp)
            e = np.add(out[t], tmp, out=out[t])
        return out


@dataclass(frozen=True)
class LognormalAR1(_AR1):
    """Multiplicative lognormal error with mean 1, coefficient of variation ``cv`` and
    AR(1) log error of lag-one autocorrelation ``phi``."""

    cv: float
    phi: float

    @property
    def sigma(self) -> float:
        """Standard deviation of the log error, ``sqrt(ln(1 + cv^2))`` (lognormal moments)."""
        return float(np.sqrt(np.log1p(self.cv**2)))

    def multiplier(self, e: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Multiplicative error ``exp(s e - s^2/2)``; mean exactly 1 when e ~ N(0, 1).

        ``out``: an array of the shape of ``e`` to write into (may be ``e`` itself)."""
        s = self.sigma
        out = np.multiply(s, e, out=out)
        out -= 0.5 * s * s
        return np.exp(out, out=out)

    def apply(self, e: np.ndarray, values: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``values`` (broadcast to the shape of ``e``) times :meth:`multiplier` of ``e``."""
        w = self.multiplier(e, out=out)
        w *= values
        return w

    def lag1_autocorrelation(self) -> float:
        """Lag-one autocorrelation of the multiplier (not of the log error)."""
        s2 = self.sigma**2
        if s2 == 0.0:
            return float(self.phi)
        return float(np.expm1(self.phi * s2) / np.expm1(s2))


@dataclass(frozen=True)
class GaussianAR1(_AR1):
    """Additive Gaussian error ``sd e`` (in the forcing's unit) whose standardised error ``e``
    is a stationary AR(1) process of lag-one autocorrelation ``phi``; ``sd`` 0 leaves the
    forcing exactly as it is."""

    sd: float
    phi: float

    def apply(self, e: np.ndarray, values: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``values`` (broadcast to the shape of ``e``) plus ``sd e``."""
        out = np.multiply(self.sd, e, out=out)
        out += values
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
