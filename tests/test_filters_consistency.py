"""Tests of assim.filters.consistency: innovation statistics and the Desroziers estimate."""

import numpy as np
import pytest
from scipy import stats

from assim.filters import Inflation, ensemble_update
from assim.filters.consistency import STATISTICS, innovation_statistics
from assim.reporting import innovation_reading


def test_statistics_match_a_hand_computation():
    """Each statistic equals its definition computed basin by basin with plain loops: mean
    and variance (ddof 1) of d / sqrt(v), mean of its square, chi2.ppf(0.025 / 0.975, n) / n
    (scipy.stats), and Desroziers et al. (2005), eq. 3: mean of d_o-a d_o-b, beside mean R."""
    rng = np.random.default_rng(2)
    nb, nt = 4, 60
    d = rng.normal(0, 2, (nb, nt))
    v = rng.uniform(1, 5, (nb, nt))
    da = 0.4 * d + rng.normal(0, 0.3, (nb, nt))
    r = rng.uniform(0.5, 1.5, (nb, nt))
    gaps = rng.random((nb, nt)) < 0.3
    d[gaps] = np.nan
    da[gaps] = np.nan
    r[gaps] = np.nan
    d[3] = np.nan  # a basin with no reading
    out = innovation_statistics(d, v, da, r)
    assert set(out) == set(STATISTICS)
    for b in range(3):
        idx = [t for t in range(nt) if not np.isnan(d[b, t])]
        z = [d[b, t] / v[b, t] ** 0.5 for t in idx]
        n = len(z)
        mean = sum(z) / n
        assert out["innovation_count"][b] == n
        assert out["normalised_innovation_mean"][b] == pytest.approx(mean, rel=1e-12)
        assert out["normalised_innovation_variance"][b] == pytest.approx(
            sum((x - mean) ** 2 for x in z) / (n - 1), rel=1e-12)
        assert out["innovation_chi2"][b] == pytest.approx(sum(x * x for x in z) / n, rel=1e-12)
        assert out["innovation_chi2_lower"][b] == pytest.approx(stats.chi2.ppf(0.025, n) / n, rel=1e-12)
        assert out["innovation_chi2_upper"][b] == pytest.approx(stats.chi2.ppf(0.975, n) / n, rel=1e-12)
        assert out["obs_error_variance_desroziers"][b] == pytest.approx(
            sum(da[b, t] * d[b, t] for t in idx) / n, rel=1e-12)
        assert out["obs_error_variance_used"][b] == pytest.approx(sum(r[b, t] for t in idx) / n, rel=1e-12)
    assert out["innovation_count"][3] == 0 and np.isnan(out["innovation_chi2"][3])


def _twin(r_true, r_used, q_ens=1.0, B=8, N=100, T=1500, seed=4):
    """A cycled scalar linear-Gaussian twin, x' = 0.9 x + w (Q = 1), one reading a day with
    error variance r_true; the ensemble (ETKF, N members) forecasts with noise variance q_ens
    and assimilates with r_used. Returns the series innovation_statistics takes."""
    rng = np.random.default_rng(seed)
    truth = rng.normal(0, 2.0, B)
    ens = truth[:, None, None] + rng.normal(0, 2.0, (B, N, 1))
    rec = np.full((4, B, T), np.nan)
    for t in range(T):
        truth = 0.9 * truth + rng.normal(0, 1.0, B)
        ens = 0.9 * ens + rng.normal(0, np.sqrt(q_ens), (B, N, 1))
        y = (truth + rng.normal(0, np.sqrt(r_true), B))[:, None]
        a = ensemble_update(ens, ens, y, np.full((B, 1), r_used), method="etkf", inflation=Inflation())
        ens = a.states
        rec[:, :, t] = (a.innovation[:, 0], a.innovation_variance[:, 0], y[:, 0] - ens[:, :, 0].mean(axis=1),
                        np.full(B, r_used))
    return rec


def _row(out, b):
    return {k: v[b] for k, v in out.items()}


def test_consistent_twin_is_read_as_consistent():
    """A twin consistent by construction (the ensemble forecasts with the true model error
    and assimilates with the true observation error: the Kalman filter's own assumptions)
    has chi-square near 1: each basin's within 0.15 (4 sd of sqrt(2 / 1500) = 0.037, plus
    the sampling error of 100 members), and the Desroziers estimate within 10% of R. The
    reading of every basin is "consistent". References: the chi-square property of
    innovations of an optimal filter (e.g. Menard 2000); Desroziers et al. (2005), eq. 3."""
    out = innovation_statistics(*_twin(r_true=0.5, r_used=0.5))
    assert np.all(np.abs(out["innovation_chi2"] - 1.0) < 0.15)
    assert np.all(np.abs(out["normalised_innovation_mean"]) < 0.15)
    np.testing.assert_allclose(out["obs_error_variance_desroziers"], 0.5, rtol=0.1)
    assert all(innovation_reading(_row(out, b)) == "consistent" for b in range(8))


def test_underdispersed_twin_is_read_as_underdispersed():
    """The ensemble forecasts with a quarter of the true model error: chi-square well above
    1, and the reading says the ensemble is under-dispersed and suggests inflation."""
    out = innovation_statistics(*_twin(r_true=0.5, r_used=0.5, q_ens=0.25))
    assert np.all(out["innovation_chi2"] > 1.3)
    for b in range(8):
        assert innovation_reading(_row(out, b)).startswith("ensemble under-dispersed")


def test_desroziers_recovers_a_misspecified_observation_error():
    """Observation error variance used 4 times too small (0.5 used, 2.0 true). The first
    pass flags it ("observation error looks too small"); the Desroziers estimate used as the
    next pass's R, a fixed-point iteration (Desroziers et al. 2005, section 3; Desroziers &
    Ivanov 2001), converges to the true 2.0: after 4 passes the mean over 8 basins within
    7% (the fixed point contracts by about half a pass here, 2 x 0.5^4 = 0.125 -> ~4%, plus
    sampling error of 12000 products, about 2%)."""
    r_used = 0.5
    out = innovation_statistics(*_twin(r_true=2.0, r_used=r_used))
    assert all("observation error looks too small" in innovation_reading(_row(out, b)) for b in range(8))
    for _ in range(4):
        r_used = float(np.mean(out["obs_error_variance_desroziers"]))
        out = innovation_statistics(*_twin(r_true=2.0, r_used=r_used))
    assert r_used == pytest.approx(2.0, rel=0.07)


def test_too_few_readings_are_not_judged():
    """Fewer than the documented minimum of readings: no judgement (common practice, no
    published source)."""
    out = innovation_statistics(*_twin(r_true=0.5, r_used=0.5, B=1, T=10))
    assert innovation_reading(_row(out, 0)).startswith("too few readings")
