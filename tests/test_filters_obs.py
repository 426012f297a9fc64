"""Tests of assim.filters.obs: observation error variances and assimilation transforms."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import special

from assim.errors import ConfigError
from assim.filters import Transform, obs_variance


def test_absolute_variance_is_sd_squared_and_nan_where_missing():
    """Absolute errors: variance sd^2 everywhere a reading exists (common practice, no
    published source)."""
    q = np.array([[1.0, np.nan, 30.0]])
    np.testing.assert_array_equal(obs_variance(q, "absolute", sd=2.0), [[4.0, np.nan, 4.0]])


def test_relative_variance_with_floor():
    """Relative errors: sd = max(relative |q|, floor) (common practice, no published
    source): 10 % of 100 is 10; 10 % of 0.2 is below the floor 0.05."""
    q = np.array([100.0, 0.2, np.nan, 0.0])
    np.testing.assert_allclose(
        obs_variance(q, "relative", relative=0.1, floor=0.05), [100.0, 0.0025, np.nan, 0.0025]
    )


@pytest.mark.parametrize(
    "kwargs, variable",
    [
        (dict(kind="absolute"), "sd"),
        (dict(kind="absolute", sd=0.0), "sd"),
        (dict(kind="relative"), "relative"),
        (dict(kind="relative", relative=0.1, floor=-1.0), "floor"),
        (dict(kind="percent", sd=1.0), "kind"),
    ],
)
def test_bad_error_options_raise(kwargs, variable):
    """Bad options raise assim.errors.ConfigError naming the option."""
    with pytest.raises(ConfigError) as info:
        obs_variance(np.ones(2), **kwargs)
    assert info.value.variable == variable


@pytest.mark.parametrize(
    "transform",
    [
        Transform(),
        Transform("log", offset=0.01),
        Transform("boxcox", offset=0.01, lam=0.3),
        Transform("boxcox", offset=1.0, lam=-0.5),
        Transform("boxcox", offset=0.1, lam=0.0),
    ],
)
@settings(max_examples=100, deadline=None)
@given(q=st.floats(0.0, 1e4))
def test_transforms_invert_exactly(transform, q):
    """inverse(forward(q)) == q to rounding for every kind (common practice, no published
    source)."""
    back = transform.inverse(transform.forward(np.array([q])))
    np.testing.assert_allclose(back, [q], rtol=1e-12, atol=1e-12)


def test_forward_against_scipy_boxcox():
    """Box-Cox of q + offset against scipy.special.boxcox (reference library), lambda = 0
    against numpy.log."""
    q = np.array([0.0, 0.5, 3.0, 250.0])
    for lam in (0.3, -0.5, 1.0, 0.0):
        np.testing.assert_allclose(
            Transform("boxcox", offset=0.1, lam=lam).forward(q),
            special.boxcox(q + 0.1, lam),
            rtol=1e-13,
        )
    np.testing.assert_allclose(Transform("log", offset=0.1).forward(q), np.log(q + 0.1), rtol=1e-15)


def test_outside_the_domain_is_nan():
    """q + offset <= 0 has no image: NaN, which the filter treats as unusable."""
    t = Transform("log", offset=0.5)
    out = t.forward(np.array([-0.5, -1.0, 0.0]))
    assert np.isnan(out[:2]).all() and np.isfinite(out[2])
    assert np.isnan(Transform("boxcox", lam=0.5).inverse(np.array([-3.0])))[0]


def test_variance_by_the_delta_method():
    """var_T = (dT/dq)^2 var at the observed value (first-order delta method, common
    practice, no published source); the derivative is checked against a central finite
    difference of forward."""
    q = np.array([0.3, 2.0, 40.0])
    var = np.array([0.01, 0.04, 4.0])
    for t in (Transform("log", offset=0.05), Transform("boxcox", offset=0.05, lam=0.25)):
        h = 1e-6 * (q + 1.0)
        numeric = (t.forward(q + h) - t.forward(q - h)) / (2 * h)
        np.testing.assert_allclose(t.derivative(q), numeric, rtol=1e-7)
        np.testing.assert_allclose(t.variance(q, var), numeric**2 * var, rtol=1e-6)
    np.testing.assert_array_equal(Transform().variance(q, var), var)


def test_bad_transform_options_raise():
    """Unknown kind, negative offset, non-finite lambda raise ConfigError."""
    for kwargs in (
        dict(kind="sqrt"),
        dict(kind="log", offset=-1.0),
        dict(kind="boxcox", lam=np.nan),
    ):
        with pytest.raises(ConfigError):
            Transform(**kwargs)
