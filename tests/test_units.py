"""Tests of assim.units: discharge <-> depth over the basin and unit spellings."""

import numpy as np
import pytest

from assim.units import canonical_unit, depth_to_discharge, discharge_to_depth, same_unit


def test_discharge_to_depth_hand_values():
    """q[mm d-1] = Q[m3 s-1] 86.4 / area[km2] (common practice, no published source):
    1 m3 s-1 over 86.4 km2 is 1 mm d-1; 10 m3 s-1 over 100 km2 is 8.64 mm d-1."""
    assert discharge_to_depth(1.0, 86.4) == pytest.approx(1.0)
    assert discharge_to_depth(10.0, 100.0) == pytest.approx(8.64)
    assert depth_to_discharge(8.64, 100.0) == pytest.approx(10.0)


def test_conversion_broadcasts_and_round_trips():
    """(basin, time) discharge against (basin, 1) areas; the two functions are inverse."""
    q = np.array([[1.0, 2.0, 0.0], [5.0, 50.0, 500.0]])
    area = np.array([[48.5], [915.0]])
    d = discharge_to_depth(q, area)
    assert d.shape == (2, 3)
    assert d[1, 2] == pytest.approx(500 * 86.4 / 915.0)
    np.testing.assert_allclose(depth_to_discharge(d, area), q, rtol=1e-14)


@pytest.mark.parametrize("text", ["m3 s-1", "m3/s", "m^3/s", "m**3/s", "m3.s-1", "m^3 s^-1", "M3/S", " m3  s-1 "])
def test_discharge_spellings(text):
    """Common spellings of cubic metres per second are accepted (common practice)."""
    assert same_unit(text, "discharge")


@pytest.mark.parametrize("text", ["mm/d", "mm d-1", "mm day-1", "mm/day", "mm.d-1", "mm days-1"])
def test_depth_rate_spellings(text):
    """Common spellings of millimetres per day are accepted (common practice)."""
    assert canonical_unit(text) == "mm d-1"


@pytest.mark.parametrize("text", ["m3", "l/s", "mm h-1", "mm", "ft3/s", "", "m3 s-1 s", "///"])
def test_other_units_rejected(text):
    """Different quantities or scalings are not taken for discharge or mm per day."""
    assert not same_unit(text, "discharge")
    assert not same_unit(text, "depth_rate")
