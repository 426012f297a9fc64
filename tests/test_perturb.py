"""Tests of the counter-based random numbers and the ensemble's error model (assim.perturb)."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
from scipy import stats
from statsmodels.tsa.stattools import acf

from assim import perturb as pt


def test_mix_is_splitmix64():
    """splitmix64 of Steele, Lea & Flood (2014) seeded with 1234567 gives 6457827717110365317,
    3203168211198807973, 9817491932198370423, 4593380528125082431, 16408922859458223821
    (values recalled from memory of the reference C implementation's output)."""
    expected = [6457827717110365317, 3203168211198807973, 9817491932198370423,
                4593380528125082431, 16408922859458223821]
    state = np.arange(1, 6, dtype=np.uint64) * pt._GOLDEN + np.uint64(1234567)
    assert [int(v) for v in pt._mix(state)] == expected


def test_basin_keys_do_not_depend_on_python_hash_salt():
    """Keys are the same in processes with different PYTHONHASHSEED (common practice, no
    published source: Python's str hash is salted per process)."""
    code = "from assim.perturb import basin_keys; print(int(basin_keys(['river-a'])[0]))"
    out = set()
    for salt in ("1", "2", "3"):
        env = dict(os.environ, PYTHONHASHSEED=salt)
        out.add(subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                               check=True).stdout.strip())
    assert out == {str(int(pt.basin_keys(["river-a"])[0]))}
    assert pt.basin_keys(["a"])[0] != pt.basin_keys(["b"])[0]


def test_standard_normal_matches_the_normal_distribution():
    """Kolmogorov-Smirnov test against scipy.stats.norm (reference library), and the first
    four moments of a large sample."""
    keys = pt.basin_keys([f"b{i}" for i in range(50)])
    z = pt.standard_normal(pt.counter_keys(7, keys, np.arange(40), pt.PRECIPITATION), np.arange(100)).ravel()
    assert z.size == 200_000
    assert stats.kstest(z, "norm").pvalue > 1e-3
    assert abs(z.mean()) < 0.01 and abs(z.std() - 1) < 0.01
    assert abs(stats.skew(z)) < 0.03 and abs(stats.kurtosis(z)) < 0.05
    # no visible correlation between neighbouring members, basins or days
    zz = z.reshape(100, 50, 40)
    for a, b in ((zz[:, :, 1:], zz[:, :, :-1]), (zz[:, 1:], zz[:, :-1]), (zz[1:], zz[:-1])):
        assert abs(np.corrcoef(a.ravel(), b.ravel())[0, 1]) < 0.01


def test_numbers_depend_only_on_seed_basin_member_day_and_stream():
    """Adding basins, taking a subset of members or days never changes a number (the
    design's determinism rule)."""
    ids = ["north", "south", "east"]
    keys = pt.basin_keys(ids)
    days = np.arange(18000, 18030)
    full = pt.standard_normal(pt.counter_keys(11, keys, np.arange(8), pt.PET), days)
    alone = pt.standard_normal(pt.counter_keys(11, pt.basin_keys(["south"]), np.arange(8), pt.PET), days)
    np.testing.assert_array_equal(full[:, 1:2], alone)
    some = pt.standard_normal(pt.counter_keys(11, keys, np.array([5, 2]), pt.PET), days[10:12])
    np.testing.assert_array_equal(some, full[10:12][:, :, [5, 2]])
    one_day = pt.standard_normal(pt.counter_keys(11, keys, np.arange(8), pt.PET), int(days[3]))
    np.testing.assert_array_equal(one_day, full[3])
    # another seed, stream or basin gives other numbers
    for other in (pt.counter_keys(12, keys, np.arange(8), pt.PET),
                  pt.counter_keys(11, keys, np.arange(8), pt.PRECIPITATION)):
        assert not np.any(pt.standard_normal(other, days) == full)


def test_lognormal_ar1_mean_cv_and_autocorrelation():
    """For w = exp(s e - s^2/2), e stationary AR(1) with unit variance and lag-one
    correlation phi, s^2 = ln(1 + cv^2): E[w] = 1, CV[w] = cv and
    corr(w_t, w_t-1) = (exp(phi s^2) - 1) / (exp(s^2) - 1) (lognormal moments, e.g. Johnson,
    Kotz & Balakrishnan, Continuous Univariate Distributions vol. 1, ch. 14). The sample
    lag-one autocorrelation is computed with statsmodels.tsa.stattools.acf (reference
    library). Tolerances are about 4 Monte Carlo standard errors."""
    err = pt.LognormalAR1(cv=0.3, phi=0.6)
    keys = pt.basin_keys([f"b{i}" for i in range(20)])
    members = np.arange(50)
    ck = pt.counter_keys(3, keys, members, pt.PRECIPITATION)
    days = np.arange(2000)
    e0 = pt.standard_normal(ck, -1)
    e = err.series(e0, pt.standard_normal(ck, days))  # (day, basin, member)
    w = err.multiplier(e)
    n = w.size
    assert abs(w.mean() - 1.0) < 4 * 0.3 / np.sqrt(n / 4)  # AR(1) inflates the standard error
    assert abs(w.std() / w.mean() - 0.3) < 0.005
    assert abs(e.var() - 1.0) < 0.01  # stationary from the first day
    assert abs(e[0].var() - 1.0) < 0.15  # 1000 draws: sd of the variance about 0.045
    expected = np.expm1(0.6 * err.sigma**2) / np.expm1(err.sigma**2)
    assert expected == pytest.approx(err.lag1_autocorrelation())
    assert expected < 0.6  # the multiplier is less correlated than its logarithm
    series = w.reshape(len(days), -1)
    r1 = np.mean([acf(series[:, j], nlags=1, fft=True)[1] for j in range(0, series.shape[1], 10)])
    assert r1 == pytest.approx(expected, abs=0.01)
    re = np.mean([acf(e.reshape(len(days), -1)[:, j], nlags=1, fft=True)[1] for j in range(0, 1000, 10)])
    assert re == pytest.approx(0.6, abs=0.01)


def test_lognormal_zero_cv_is_no_error():
    err = pt.LognormalAR1(cv=0.0, phi=0.5)
    assert np.all(err.multiplier(np.linspace(-3, 3, 7)) == 1.0)


def test_parameter_draws_respect_the_range_and_the_relative_sd():
    """Draws stay inside the valid range; near the middle of a wide range the sd in
    parameter units is relative x value (first order); a value on a bound stays there
    (common practice, no published source)."""
    keys = pt.basin_keys(["a", "b", "c", "d"])
    members = np.arange(4000)
    params = {"x1": np.array([350.0, 2990.0, 3000.0, 10.0]), "x2": np.array([0.5, -9.0, 0.0, 2.0])}
    ranges = {"x1": pt.ParameterRange(1.0, 3000.0), "x2": pt.ParameterRange(-10.0, 10.0)}
    out = pt.perturb_parameters(params, {"x1": 0.1}, ranges, seed=5, keys=keys, members=members)
    x1 = out["x1"]
    assert x1.shape == (4, 4000)
    assert np.all((x1 >= 1.0) & (x1 <= 3000.0))
    assert x1[0].std() == pytest.approx(35.0, rel=0.06)
    assert np.median(x1[0]) == pytest.approx(350.0, rel=0.01)
    assert np.all(x1[2] == 3000.0)  # on the upper bound
    assert x1[1].max() <= 3000.0 and x1[1].std() < 0.1 * 2990.0  # squeezed by the bound
    np.testing.assert_array_equal(out["x2"], np.repeat(params["x2"][:, None], 4000, axis=1))
    # open range above: log space
    op = pt.perturb_parameters({"k": np.array([2.0])}, {"k": 0.2}, {"k": pt.ParameterRange(0.0, np.inf)},
                               seed=5, keys=keys[:1], members=members)["k"]
    assert op.min() > 0 and np.std(np.log(op)) == pytest.approx(0.2, rel=0.05)
    # the draw of a basin does not depend on the other basins
    alone = pt.perturb_parameters({"x1": params["x1"][1:2]}, {"x1": 0.1}, {"x1": ranges["x1"]}, seed=5,
                                  keys=keys[1:2], members=members)["x1"]
    np.testing.assert_array_equal(alone[0], x1[1])


def test_state_noise_is_clipped_and_the_added_water_reported():
    """Additive noise then clipping to [lower, upper]; the returned water is the actual
    change summed over states (common practice, no published source)."""
    states = np.array([[1.0, 50.0, 3.0], [0.2, 99.0, 3.0]])
    lower = np.zeros_like(states)
    upper = np.array([[10.0, 100.0, 5.0], [10.0, 100.0, 5.0]])
    noise = pt.StateNoise.from_names({"s0": 1.0, "s1": 5.0}, ["s0", "s1", "s2"])
    assert noise.columns == (0, 1)
    z = [np.array([-2.0, -2.0]), np.array([0.5, 1.0])]
    out, added = pt.add_state_noise(states, noise, z, lower, upper)
    np.testing.assert_allclose(out, [[0.0, 52.5, 3.0], [0.0, 100.0, 3.0]])
    np.testing.assert_allclose(added, [-1.0 + 2.5, -0.2 + 1.0])
    np.testing.assert_array_equal(states[:, 2], out[:, 2])


def test_standard_normal_is_the_box_muller_transform_of_its_hashed_uniforms():
    """Box & Muller (1958), Ann. Math. Stat. 29, 610: z = sqrt(-2 ln u1) cos(2 pi u2) on the
    even day of a pair and sqrt(-2 ln u1) sin(2 pi u2) on the odd day, u1 and u2 from the
    hashed counter of (seed, basin, member, day // 2, stream); reference: numpy's log, cos and
    sin (to 1e-13). One day alone gives its number inside a block bit for bit, also before 1970."""
    ck = pt.counter_keys(5, pt.basin_keys(["a", "b", "c"]), np.arange(7), pt.OBSERVATION)
    days = np.arange(-9, 31)
    z = pt.standard_normal(ck, days)
    for i, d in enumerate(days):
        h1 = pt._mix(ck ^ pt._day_hash(np.array([d >> 1]))[0])
        with np.errstate(over="ignore"):
            h2 = pt._mix(h1 + pt._GOLDEN)
        u1 = ((h1 >> np.uint64(11)).astype(np.float64) + 0.5) * 2.0**-53
        u2 = (h2 >> np.uint64(11)).astype(np.float64) * 2.0**-53
        r = np.sqrt(-2.0 * np.log(u1))
        ref = r * (np.sin(2 * np.pi * u2) if d % 2 else np.cos(2 * np.pi * u2))
        np.testing.assert_allclose(z[i], ref, rtol=0, atol=1e-13)
        np.testing.assert_array_equal(pt.standard_normal(ck, int(d)), z[i])
