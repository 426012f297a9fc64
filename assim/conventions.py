"""Conventions every layer shares: the time axis and the status codes of gauge readings.

Pure numpy, importable by the core, the data layer, the engine and the entry points alike.
A day is an integer day number, days since 1970-01-01 (the CF time axis of every file).
"""

from __future__ import annotations

import numpy as np

EPOCH = np.datetime64("1970-01-01", "D")
TIME_UNITS = "days since 1970-01-01"  # CF time units of every file
CALENDAR = "standard"

# What became of a day's reading in an analysis (``obs_status`` of analysis.nc, CF flags)
OBS_STATUS = {"used": 0, "missing": 1, "gated": 2, "rejected": 3}
OBS_USED, OBS_MISSING, OBS_GATED, OBS_REJECTED = (OBS_STATUS[k] for k in ("used", "missing", "gated", "rejected"))


def iso(day) -> str:
    """Day number (or a datetime64) -> 'YYYY-MM-DD'."""
    if isinstance(day, np.datetime64):
        return str(day.astype("datetime64[D]"))
    return str(EPOCH + int(day))


def day_number(text) -> int:
    """'YYYY-MM-DD' (or a datetime64) -> day number.

    Raises
    ------
    ValueError
        if ``text`` is not a date.
    """
    return int((np.datetime64(str(text), "D") - EPOCH).astype(np.int64))
