"""Tests of the shared conventions (assim.conventions)."""

from __future__ import annotations

import numpy as np
import pytest

from assim.conventions import OBS_STATUS, OBS_USED, day_number, iso


def test_day_numbers_and_dates():
    """Days since 1970-01-01: 2015-01-01 is day 16436 and 2000-02-29 day 11016 (value
    recalled from memory, checked by counting: 45 years with 11 leap days x 365)."""
    assert day_number("2015-01-01") == 16436 == 45 * 365 + 11
    assert iso(16436) == "2015-01-01" and iso(np.int64(-1)) == "1969-12-31"
    assert iso(np.datetime64("2000-02-29T13:00")) == "2000-02-29" == iso(day_number("2000-02-29"))
    with pytest.raises(ValueError):
        day_number("2015-13-01")


def test_observation_status_codes():
    """The flag values written to analysis.nc, in the order of their meanings."""
    assert list(OBS_STATUS) == ["used", "missing", "gated", "rejected"]
    assert list(OBS_STATUS.values()) == [0, 1, 2, 3] and OBS_USED == 0
