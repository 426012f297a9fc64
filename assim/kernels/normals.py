"""The counter-based standard normals of :mod:`assim.perturb`, compiled for one counter.

The same numbers as :func:`assim.perturb.standard_normal` on consecutive days: the counter
of (seed, basin, member, day pair, stream) is hashed by the splitmix64 finaliser into two
uniforms, and the Box-Muller transform turns them into the cosine normal (even day) and the
sine normal (odd day) of the pair. Every operation is the one of the numpy path in the same
order; only the logarithm is the C library's (numpy's may differ in the last unit).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from assim import perturb as _pt

_JIT = dict(cache=True, nogil=True, error_model="numpy", fastmath=False)

_GOLDEN = _pt._GOLDEN
_M1 = _pt._M1
_M2 = _pt._M2
_M49 = _pt._M49
_TWO_M53 = _pt._TWO_M53
_PHI = _pt._PHI
_SIN = tuple(_pt._SIN_TAYLOR)  # tuples: the compiler unrolls the Horner loop (not over an array)
_COS = tuple(_pt._COS_TAYLOR)
_SECTOR_COS = _pt._SECTOR_COS.copy()
_SECTOR_SIN = _pt._SECTOR_SIN.copy()


@numba.njit(**_JIT)
def mix(x):
    """splitmix64 finaliser (Steele, Lea & Flood 2014) of one uint64, as perturb._mix."""
    x ^= x >> np.uint64(30)
    x *= _M1
    x ^= x >> np.uint64(27)
    x *= _M2
    x ^= x >> np.uint64(31)
    return x


@numba.njit(**_JIT)
def _horner(x, coef):
    out = x * coef[len(coef) - 1]
    for j in range(len(coef) - 2, 0, -1):
        out = out + coef[j]
        out = out * x
    return out + coef[0]


@numba.njit(**_JIT)
def _angle(ck, dh):
    """The uniform of the radius and the cosine and sine parts of the angle of counter
    ``ck`` (uint64) and day-pair hash ``dh`` (uint64), as perturb._box_muller: integer and
    polynomial work only (no library call), so that a loop of it vectorises."""
    k1 = mix(ck ^ dh)
    k2 = mix(k1 + _GOLDEN)
    u = float(np.int64(k1 >> np.uint64(11)))
    u = (u + 0.5) * _TWO_M53
    sector = np.int64(k2 >> np.uint64(60))
    phi = float(np.int64((k2 >> np.uint64(11)) & _M49)) * _PHI
    xx = phi * phi
    s = _horner(xx, _SIN) * phi
    c = _horner(xx, _COS)
    a = _SECTOR_COS[sector]
    b = _SECTOR_SIN[sector]
    return u, a * c - b * s, b * c + a * s


@numba.njit(**_JIT)
def _radius(u):
    # Box & Muller (1958), Ann. Math. Stat. 29, 610: r = sqrt(-2 ln u1), angle 2 pi u2
    return math.sqrt(math.log(u) * -2.0)


@numba.njit(**_JIT)
def normal_pair(ck, dh):
    """The two normals of counter ``ck`` (uint64) and day-pair hash ``dh`` (uint64): the
    cosine one (even day) and the sine one (odd day), as perturb._box_muller."""
    u, c, s = _angle(ck, dh)
    r = _radius(u)
    return c * r, s * r


@numba.njit(**_JIT)
def normal_row(ck, dh, zc, zs, u):
    """The normal pairs of the counters ``ck (N,)`` on one day pair (hash ``dh``) into
    ``zc``, ``zs`` (N,), as :func:`normal_pair`; ``u`` (N,) scratch. Two loops: the angles
    (vectorised by the compiler), then the radii (a library logarithm each)."""
    for i in range(ck.size):
        u[i], zc[i], zs[i] = _angle(ck[i], dh)
    for i in range(ck.size):
        r = _radius(u[i])
        zc[i] = zc[i] * r
        zs[i] = zs[i] * r


@numba.njit(**_JIT)
def normals_of_days(ck, dh, first_day, nt, out):
    """Test helper: ``out (nt, K)`` the normals of counters ``ck (K,)`` on the consecutive
    days ``first_day ..``; ``dh`` the hashes of their day pairs from ``first_day >> 1``."""
    first_pair = first_day >> 1
    for k in range(nt):
        day = first_day + k
        j = (day >> 1) - first_pair
        for i in range(ck.size):
            zc, zs = normal_pair(ck[i], dh[j])
            out[k, i] = zs if day & 1 else zc
