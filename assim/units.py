"""Units at the data boundary: discharge in m3 s-1 against depth over the basin in mm d-1,
and the spellings of units that readers accept.

``q[mm d-1] = Q[m3 s-1] * 86.4 / area[km2]``: one m3 s-1 for a day is 86 400 m3, which over
one km2 (1e6 m2) is 86.4 mm. numpy only.
"""

from __future__ import annotations

import re

import numpy as np

SECONDS_PER_DAY = 86400.0
_M3S_KM2_TO_MM_D = 86.4  # 86 400 s d-1 * 1000 mm m-1 / 1e6 m2 km-2


def discharge_to_depth(discharge, area_km2):
    """Discharge as a depth of water over the basin.

    Parameters
    ----------
    discharge : array_like float64, m3 s-1
    area_km2 : array_like float64, km2, broadcastable against ``discharge``
        (e.g. shape (basin, 1) for discharge on (basin, time)).

    Returns
    -------
    ndarray float64, mm d-1
    """
    return np.asarray(discharge, dtype=float) * _M3S_KM2_TO_MM_D / np.asarray(area_km2, dtype=float)


def depth_to_discharge(depth, area_km2):
    """Depth of water over the basin per day as discharge.

    Parameters
    ----------
    depth : array_like float64, mm d-1
    area_km2 : array_like float64, km2, broadcastable against ``depth``

    Returns
    -------
    ndarray float64, m3 s-1
    """
    return np.asarray(depth, dtype=float) * np.asarray(area_km2, dtype=float) / _M3S_KM2_TO_MM_D


_ALIASES = {
    "day": "d",
    "days": "d",
    "sec": "s",
    "second": "s",
    "seconds": "s",
    "meter": "m",
    "metre": "m",
    "meters": "m",
    "metres": "m",
    "millimeter": "mm",
    "millimetre": "mm",
    "millimeters": "mm",
    "millimetres": "mm",
    "degree_north": "degrees_north",
    "degree_n": "degrees_north",
    "degrees_n": "degrees_north",
    "degree_east": "degrees_east",
    "degree_e": "degrees_east",
    "degrees_e": "degrees_east",
    **dict.fromkeys(("degc", "celsius", "degree_celsius", "degrees_celsius", "deg_c", "degree_c", "degrees_c"),
                    "degC"),
}
_TOKEN = re.compile(r"^([a-z_]+)(-?\d+)?$")

# What each kind of quantity is written as in assim's own files; readers accept any spelling
# that canonical_unit maps to the same text.
CANONICAL = {
    "discharge": "m3 s-1",
    "depth_rate": "mm d-1",
    "area": "km2",
    "length": "m",
    "latitude": "degrees_north",
    "longitude": "degrees_east",
    "temperature": "degC",
}
_EXTRA = {"cumecs": "m3 s-1", "mm/day": "mm d-1", "kg m-2 d-1": "mm d-1"}


def canonical_unit(text: str) -> str | None:
    """A unit string in one canonical spelling, or None when it cannot be parsed.

    Accepts the common spellings of products of powers: ``m3/s``, ``m^3/s``, ``m**3 s**-1``,
    ``m3.s-1``, ``m3 s-1`` all give ``"m3 s-1"``; ``mm/d``, ``mm day-1``, ``mm/day`` give
    ``"mm d-1"``; ``km^2`` gives ``"km2"``. Order of factors is kept, exponent 1 is dropped.
    """
    if not isinstance(text, str):
        return None
    s = " ".join(text.strip().lower().split())
    if s in _EXTRA:
        return _EXTRA[s]
    s = s.replace("**", "").replace("^", "")
    parts = s.split("/")
    factors: list[tuple[str, int]] = []
    for k, part in enumerate(parts):
        tokens = [t for t in re.split(r"[\s.*·]+", part) if t]
        if not tokens:
            return None
        for tok in tokens:
            m = _TOKEN.match(tok)
            if m is None:
                return None
            name = _ALIASES.get(m.group(1), m.group(1))
            power = int(m.group(2)) if m.group(2) else 1
            factors.append((name, -power if k > 0 else power))
    out = " ".join(name if p == 1 else f"{name}{p}" for name, p in factors)
    return _EXTRA.get(out, out)


def same_unit(text: str, kind: str) -> bool:
    """Whether ``text`` spells the unit of ``kind`` (a key of :data:`CANONICAL`)."""
    return canonical_unit(text) == CANONICAL[kind]
