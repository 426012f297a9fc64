"""Tests of the statistics over the member axis (assim.members)."""

from __future__ import annotations

import numpy as np
import pytest

from assim.members import exceedance_probability, fraction_above, member_quantiles


@pytest.mark.parametrize("n", [2, 5, 64, 128])
def test_member_quantiles_match_numpy_and_hand_values(n):
    """Hyndman & Fan (1996), definition 7, worked by hand on 1..5: the 0.3 quantile is at
    position 0.3 x 4 = 1.2, 2 + 0.2 = 2.2; the median 3; extremes the min and the max. On
    random rows equal to numpy.quantile (general-purpose reference) bit for bit, so the
    engine's quantile outputs and the forecast product's quantiles are one rule."""
    q = np.array([0.0, 0.05, 0.25, 0.3, 0.5, 0.7, 0.75, 0.95, 1.0])
    np.testing.assert_allclose(member_quantiles(np.array([5.0, 1.0, 4.0, 2.0, 3.0]), [0.3, 0.5, 0.0, 1.0]),
                               [2.2, 3.0, 1.0, 5.0], rtol=1e-15)
    x = np.random.default_rng(n).gamma(2.0, 3.0, (7, 11, n))
    assert np.array_equal(member_quantiles(x, q), np.moveaxis(np.quantile(x, q, axis=-1), 0, -1))


def test_exceedance_probability_counts_members_above():
    """Fraction of members strictly above the threshold (common practice, no published
    source); NaN where a basin lacks the level or a member is NaN."""
    q = np.array([[[1.0, 2.0, 3.0, 4.0]], [[5.0, 5.0, 5.0, 6.0]]])  # (basin 2, lead 1, member 4)
    thr = np.array([[2.0, 10.0], [5.0, np.nan]])  # (basin, threshold)
    p = exceedance_probability(q[:, :, None, :], thr[:, None, :])  # (basin, lead, threshold)
    np.testing.assert_array_equal(p[0, 0], [0.5, 0.0])
    assert p[1, 0, 0] == 0.25 and np.isnan(p[1, 0, 1])
    assert np.isnan(exceedance_probability([1.0, np.nan], 0.5))
    assert fraction_above(np.array([1.0, np.nan, 3.0]), np.array(0.5)) == 2 / 3
