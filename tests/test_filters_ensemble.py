"""Tests of assim.filters.ensemble: one ensemble Kalman analysis for many basins."""

import itertools
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from assim.errors import InputError
from assim.filters import (
    Inflation,
    Transform,
    ensemble_update,
    kalman_predict,
    kalman_update,
)
from assim.models import get
from assim.models.linear_reservoir import observation, transition

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
import baseline_loop  # noqa: E402


def _stats(X):
    """Sample mean (..., n) and covariance (..., n, n), ddof = 1, over the member axis."""
    mean = X.mean(axis=-2)
    dev = X - mean[..., None, :]
    return mean, np.einsum("...in,...ik->...nk", dev, dev) / (X.shape[-2] - 1)


def _bits(a):
    return np.ascontiguousarray(a).view(np.int64)


def _planes(a):
    """The same array with the member axis fastest in memory and each state a contiguous
    (basin, member) plane: the layout of a model's Fortran-ordered (batch, n_state) array,
    which the engine passes."""
    return np.moveaxis(np.ascontiguousarray(np.moveaxis(a, -1, 0)), 0, -1)


def _layout(a, layout):
    return _planes(a) if layout == "planes" else np.ascontiguousarray(a)


def _linear_problem(rng, B, N, n, m):
    X = rng.normal(10.0, 3.0, (B, N, n)) + rng.normal(0, 1, (B, 1, n)) * rng.normal(0, 2, (B, N, 1))
    H = rng.normal(size=(B, m, n))
    Y = np.einsum("bmn,bin->bim", H, X)
    y = np.einsum("bmn,bn->bm", H, X.mean(axis=1)) + rng.normal(0, 2.0, (B, m))
    r = rng.uniform(0.3, 3.0, (B, m))
    return X, H, Y, y, r


# --- the deterministic square-root property ------------------------------------------------


@pytest.mark.parametrize("layout", ["C", "planes"])
@pytest.mark.parametrize("method", ["etkf", "eakf"])
@pytest.mark.parametrize("N", [2, 3, 5, 40, 500])
@pytest.mark.parametrize("m", [1, 3])
@pytest.mark.parametrize("gamma", [1.0, 1.25])
def test_square_root_filters_reproduce_the_kalman_update(method, N, m, gamma, layout):
    """Analysis mean and sample covariance equal the exact Kalman update of the forecast
    ensemble's own mean and sample covariance (times gamma^2 with multiplicative inflation),
    to 1e-10, for any ensemble size, batched, in both memory layouts.

    References: Hunt, Kostelich & Szunyogh (2007), eqs. 22-23 (mean and covariance of the
    transformed ensemble); Anderson (2001), the adjusted ensemble has the Kalman posterior
    moments; Anderson & Anderson (1999), inflation multiplies the prior covariance by
    gamma^2; reference numbers from assim.filters.kalman_update (checked against filterpy).
    """
    rng = np.random.default_rng(100 + N + 10 * m)
    X, H, Y, y, r = _linear_problem(rng, 6, N, 4, m)
    a = ensemble_update(_layout(X, layout), Y, y, r, method=method,
                        inflation=Inflation(multiplicative=gamma))
    mean, P = _stats(X)
    P = gamma**2 * P
    xk, Pk = kalman_update(mean, P, H, y, r[..., None] * np.eye(m))
    # The gain written out from the ensemble, K = P H^T (H P H^T + R)^-1, gives the same mean.
    HP = np.einsum("bmn,bnk->bmk", H, P)
    S = np.einsum("bmk,blk->bml", HP, H) + r[..., None] * np.eye(m)
    K = np.swapaxes(np.linalg.solve(S, HP), 1, 2)
    gain_mean = mean + np.einsum("bnm,bm->bn", K, y - np.einsum("bmn,bn->bm", H, mean))
    np.testing.assert_allclose(gain_mean, xk, rtol=0, atol=1e-10 * np.abs(xk).max())
    xa, Pa = _stats(a.states)
    np.testing.assert_allclose(xa, xk, rtol=0, atol=1e-10 * np.abs(xk).max())
    np.testing.assert_allclose(Pa, Pk, rtol=0, atol=1e-10 * np.abs(P).max())
    assert a.used.all() and a.updated.all()


@pytest.mark.parametrize("layout", ["C", "planes"])
@pytest.mark.parametrize("m", [1, 3])
def test_serial_eakf_equals_the_sequential_textbook_update(m, layout):
    """The serial adjustment, states read once for all observations, equals the plain
    sequential algorithm (observation by observation, states updated at each), with
    inflation and a missing reading, in both memory layouts (Anderson 2001, scalar
    adjustment; Anderson 2003, regression onto the states and the remaining predictions).
    """
    rng = np.random.default_rng(7)
    X, H, Y, y, r = _linear_problem(rng, 5, 12, 3, m)
    y[2, 0] = np.nan
    fast = ensemble_update(_layout(X, layout), Y, y, r, method="eakf",
                           inflation=Inflation(multiplicative=1.3))
    reference = _sequential_eakf(X, Y, y, r, 1.3)
    np.testing.assert_allclose(fast.states, reference, rtol=1e-11, atol=1e-11)


def _sequential_eakf(X, Y, y, r, gamma):
    """The serial ensemble adjustment written out plainly, one observation at a time and
    the states updated at each (Anderson 2001, scalar adjustment; Anderson 2003, linear
    regression onto the states and the remaining predicted observations)."""
    N = X.shape[1]
    g = np.where(np.isnan(y).all(axis=1), 1.0, gamma)[:, None, None]  # no reading: as is
    X = np.where(
        g == 1.0, X, X.mean(axis=1, keepdims=True) + g * (X - X.mean(axis=1, keepdims=True))
    )
    Y = Y.mean(axis=1, keepdims=True) + g * (Y - Y.mean(axis=1, keepdims=True))
    for b in range(X.shape[0]):
        for j in range(Y.shape[2]):
            if np.isnan(y[b, j]):
                continue
            yj = Y[b, :, j].copy()
            mean, var = yj.mean(), yj.var(ddof=1)
            post_var = 1.0 / (1.0 / var + 1.0 / r[b, j])
            post_mean = post_var * (mean / var + y[b, j] / r[b, j])
            dy = post_mean + np.sqrt(post_var / var) * (yj - mean) - yj
            dev = yj - mean
            X[b] += np.outer(dy, dev @ (X[b] - X[b].mean(axis=0)) / (N - 1) / var)
            Y[b] += np.outer(dy, dev @ (Y[b] - Y[b].mean(axis=0)) / (N - 1) / var)
    return X


def test_etkf_and_serial_eakf_agree_on_moments_with_many_observations():
    """With several observations the serial adjustment (Anderson 2001) and the ensemble
    transform (Hunt et al. 2007) are different ensembles with the same Kalman moments."""
    rng = np.random.default_rng(21)
    X, H, Y, y, r = _linear_problem(rng, 4, 30, 5, 4)
    a = ensemble_update(X, Y, y, r, method="etkf")
    b = ensemble_update(X, Y, y, r, method="eakf")
    ma, Pa = _stats(a.states)
    mb, Pb = _stats(b.states)
    np.testing.assert_allclose(ma, mb, atol=1e-10 * np.abs(ma).max())
    np.testing.assert_allclose(Pa, Pb, atol=1e-10 * np.abs(Pa).max())
    assert not np.allclose(a.states, b.states)


# --- the stochastic EnKF -----------------------------------------------------------------


@pytest.mark.parametrize("layout", ["C", "planes"])
def test_enkf_large_ensemble_matches_the_exact_update(layout):
    """Stochastic EnKF, N = 4000, scalar linear-Gaussian problem in 8 basins, both memory
    layouts: analysis mean and variance lie within 5 Monte Carlo standard errors of the
    exact update.

    Reference: Burgers, van Leeuwen & Evensen (1998): with perturbed observations the
    analysis ensemble has the Kalman posterior moments in expectation. Tolerances (delta
    method, k = sf^2 / (sf^2 + R), centred perturbations so xa = xf + k^ (y - xf)):
    mean error (1 - k)(xf - mu) + (k^ - k)(y - xf) with sd
    sqrt((1-k)^2 sf^2 / N + (k (1-k))^2 (2 / (N-1)) (y - mu)^2);
    variance error from the prior sample variance, (1 - k)^2 sf^2 sqrt(2 / (N-1)), plus
    the perturbations, k^2 R sqrt(2 / (N-1)) and 2 k (1-k) sf sqrt(R) / sqrt(N-1), in
    quadrature.
    """
    rng = np.random.default_rng(4000)
    B, N = 8, 4000
    mu = rng.uniform(50, 150, B)
    sf = rng.uniform(2, 20, B)
    R = sf**2 * rng.uniform(0.2, 2.0, B)  # gains between 1/3 and 5/6
    y = mu + rng.normal(0, np.sqrt(sf**2 + R))
    X = mu[:, None, None] + sf[:, None, None] * rng.standard_normal((B, N, 1))
    a = ensemble_update(_layout(X, layout), X.copy(), y[:, None], R[:, None], method="enkf",
                        rng=rng)
    k = sf**2 / (sf**2 + R)
    mean_exact = mu + k * (y - mu)
    var_exact = (1 - k) * sf**2
    sd_mean = np.sqrt((1 - k) ** 2 * sf**2 / N + (k * (1 - k)) ** 2 * 2 / (N - 1) * (y - mu) ** 2)
    sd_var = np.sqrt(
        ((1 - k) ** 2 * sf**2) ** 2 * 2 / (N - 1)
        + (k**2 * R) ** 2 * 2 / (N - 1)
        + (2 * k * (1 - k) * sf * np.sqrt(R)) ** 2 / (N - 1)
    )
    mean_a = a.states[:, :, 0].mean(axis=1)
    var_a = a.states[:, :, 0].var(axis=1, ddof=1)
    assert np.all(np.abs(mean_a - mean_exact) < 5 * sd_mean)
    assert np.all(np.abs(var_a - var_exact) < 5 * sd_var)
    # Without the perturbed observations the variance would be (1 - k)^2 sf^2: far outside.
    assert np.all(np.abs((1 - k) ** 2 * sf**2 - var_exact) > 5 * sd_var)


def test_enkf_centred_perturbations_give_the_exact_mean_update():
    """With centred perturbations the EnKF mean is the Kalman update of the ensemble mean
    with the ensemble gain, exactly; uncentred, it moves by K times the perturbation mean
    (Burgers et al. 1998; centring: common practice, no published source)."""
    rng = np.random.default_rng(3)
    X, H, Y, y, r = _linear_problem(rng, 5, 20, 3, 2)
    z = rng.standard_normal(Y.shape)
    mean, P = _stats(X)
    xk, _ = kalman_update(mean, P, H, y, r[..., None] * np.eye(2))
    a = ensemble_update(X, Y, y, r, method="enkf", obs_noise=z)
    np.testing.assert_allclose(a.states.mean(axis=1), xk, atol=1e-10 * np.abs(xk).max())
    b = ensemble_update(X, Y, y, r, method="enkf", obs_noise=z, centre_noise=False)
    S = np.einsum("bmn,bnk,blk->bml", H, P, H) + r[..., None] * np.eye(2)
    K = np.einsum("bnk,bmk->bnm", P, H) @ np.linalg.inv(S)
    shift = np.einsum("bnm,bm->bn", K, np.sqrt(r) * z.mean(axis=1))
    np.testing.assert_allclose(b.states.mean(axis=1), xk + shift, atol=1e-10 * np.abs(xk).max())


def test_obs_noise_is_the_rng_draw_and_basins_are_independent():
    """Passing obs_noise equal to the generator's standard normal draw gives the same
    numbers as passing the generator; a basin's result does not depend on the other basins
    of the batch (DESIGN.md, Determinism)."""
    rng = np.random.default_rng(1)
    X, H, Y, y, r = _linear_problem(rng, 6, 10, 3, 1)
    a = ensemble_update(X, Y, y, r, rng=np.random.default_rng(9))
    z = np.random.default_rng(9).standard_normal(Y.shape)
    b = ensemble_update(X, Y, y, r, obs_noise=z)
    np.testing.assert_array_equal(a.states, b.states)
    part = ensemble_update(X[2:4], Y[2:4], y[2:4], r[2:4], obs_noise=z[2:4])
    np.testing.assert_array_equal(part.states, b.states[2:4])


# --- the whole analysis against textbook formulas, both layouts ---------------------------


def _textbook(method, X, Y, y, r, *, z=None, gamma=1.0, rtps=0.0, rtpp=0.0, lower=None,
              upper=None, gate=None, mask=None):
    """The analysis written out from the papers, basin by basin, with dense matrices:
    expected states (B, N, n) and clipped water (B, n).

    - prior: perturbations of states and predictions multiplied by gamma (Anderson &
      Anderson 1999); the gate from the inflated predicted variance plus R;
    - enkf: x_i + K (y + R^1/2 (z_i - mean z) - y_i), K = P H^T (H P H^T + R)^-1 from the
      ensemble (Burgers et al. 1998; Evensen 2003, eqs. 48-52, with centred perturbations);
    - etkf: Pa~ = [(N - 1) I + Y'^T R^-1 Y']^-1, wbar = Pa~ Y'^T R^-1 (y - ybar),
      Wa = [(N - 1) Pa~]^1/2 (symmetric), x_i = xbar + X' (wbar + Wa_i) (Hunt et al. 2007,
      section 2.3, eqs. 20-24; Bishop et al. 2001);
    - eakf: one observation at a time, the scalar adjustment regressed onto the states
      (Anderson 2001; Anderson 2003), :func:`_sequential_eakf`;
    - RTPP: X'a <- (1 - a) X'a + a X'b (Zhang et al. 2004), then RTPS: X'a scaled by
      a (sb - sa) / sa + 1 (Whitaker & Hamill 2012), X'b the inflated prior;
    - bounds: numpy.clip of the updated columns of updated basins; the clipped water is
      the clipped minus the unclipped states, summed over members.
    """
    B, N, n = X.shape
    out = np.array(X, dtype=np.float64, order="C")
    water = np.zeros((B, n))
    cols = np.ones(n, bool) if mask is None else mask
    lo = np.broadcast_to(-np.inf if lower is None else lower, X.shape)
    hi = np.broadcast_to(np.inf if upper is None else upper, X.shape)
    for b in range(B):
        ybar, var = Y[b].mean(axis=0), Y[b].var(axis=0, ddof=1)
        use = np.isfinite(y[b]) & np.isfinite(r[b])
        if gate:
            use &= ~(np.abs(y[b] - ybar) > gate * np.sqrt(gamma**2 * var + r[b]))
        if not use.any():
            continue
        xbar = X[b].mean(axis=0)
        Xf = gamma * (X[b] - xbar)
        Yf = gamma * (Y[b][:, use] - ybar[use])
        yo, ro = y[b, use], r[b, use]
        if method == "enkf":
            K = (Xf.T @ Yf) @ np.linalg.inv(Yf.T @ Yf + (N - 1) * np.diag(ro))
            zc = z[b][:, use] - z[b][:, use].mean(axis=0)
            D = yo + np.sqrt(ro) * zc
            Xa = xbar + Xf + (D - (ybar[use] + Yf)) @ K.T
        elif method == "etkf":
            Rinv = np.diag(1.0 / ro)
            Pt = np.linalg.inv((N - 1) * np.eye(N) + Yf @ Rinv @ Yf.T)
            wbar = Pt @ Yf @ Rinv @ (yo - ybar[use])
            lam, V = np.linalg.eigh((N - 1) * Pt)
            Wa = (V * np.sqrt(lam)) @ V.T
            Xa = xbar + (wbar[:, None] + Wa).T @ Xf
        else:
            Xa = _sequential_eakf(X[b : b + 1], Y[b : b + 1][..., use], yo[None], ro[None],
                                  gamma)[0]
        mean = Xa.mean(axis=0)
        if rtpp:
            Xa = mean + (1.0 - rtpp) * (Xa - mean) + rtpp * Xf
        if rtps:
            sa, sb = Xa.std(axis=0, ddof=1), Xf.std(axis=0, ddof=1)
            Xa = mean + (rtps * (sb - sa) / sa + 1.0) * (Xa - mean)
        Xc = np.clip(Xa, lo[b], hi[b])
        water[b, cols] = (Xc - Xa).sum(axis=0)[cols]
        out[b][:, cols] = Xc[:, cols]
    return out, water


def _bounded_problem(rng, B, N, n, m):
    """Stores around 100 mm, predictions linear in them, readings about two spreads away
    (the analysis moves every basin), a missing reading in basin 3 and a gated one in
    basin 4 (at 4 sigma)."""
    X = rng.normal(100.0, 10.0, (B, N, n)) * rng.uniform(0.5, 1.5, (B, 1, n))
    H = rng.uniform(0.2, 1.0, (B, m, n))
    Y = np.einsum("bmn,bin->bim", H, X)
    y = Y.mean(axis=1) + 2.0 * Y.std(axis=1) * rng.choice([-1.0, 1.0], (B, m))
    r = (0.3 * Y.std(axis=1)) ** 2
    y[3, 0] = np.nan
    y[4] = Y[4].mean(axis=0) + 50.0 * Y[4].std(axis=0)
    return X, Y, y, r


def _bounds_case(X, case):
    """Bounds (B, 1, n) in few basins (0 and 1: the clipping path of a few basins) or in
    every basin (the in-place path): lower bounds at the prior mean less 0.2 spreads on
    every column, an upper bound at the mean plus 0.2 spreads on column 2."""
    mean, sd = X.mean(axis=1, keepdims=True), X.std(axis=1, ddof=1, keepdims=True)
    lower = np.full(mean.shape, -np.inf)
    upper = np.full(mean.shape, np.inf)
    basins = slice(0, 2) if case == "few" else slice(None)
    lower[basins] = (mean - 0.2 * sd)[basins]
    upper[basins, :, 2] = (mean + 0.2 * sd)[basins, :, 2]
    return lower, upper


OPTIONS = {
    "plain": dict(),
    "inflated": dict(gamma=1.2),
    "rtps": dict(gamma=1.1, rtps=0.6),
    "rtpp": dict(rtpp=0.4),
    "rtpp+rtps": dict(gamma=1.1, rtps=0.3, rtpp=0.2),
}


@pytest.mark.parametrize("layout", ["C", "planes"])
@pytest.mark.parametrize("m", [1, 2])
@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
@pytest.mark.parametrize("option", list(OPTIONS))
@pytest.mark.parametrize("bounds", ["few", "many"])
def test_analysis_equals_the_textbook_update(method, m, layout, option, bounds):
    """States and clipped water equal the analysis written out from the papers
    (:func:`_textbook`: Burgers et al. 1998 and Evensen 2003; Bishop et al. 2001 and Hunt
    et al. 2007; Anderson 2001/2003; Anderson & Anderson 1999; Zhang et al. 2004 RTPP;
    Whitaker & Hamill 2012 RTPS; clipping by numpy.clip) to 1e-10 of the states'
    magnitude, with a gate (4 sigma), a missing reading and bounds met by a few basins or
    by every basin, for one and two observations and both memory layouts."""
    rng = np.random.default_rng(31 + m)
    B, N, n = 16, 20, 3
    X, Y, y, r = _bounded_problem(rng, B, N, n, m)
    z = rng.standard_normal(Y.shape)
    lower, upper = _bounds_case(X, bounds)
    opts = OPTIONS[option]
    infl = Inflation(multiplicative=opts.get("gamma", 1.0), rtps=opts.get("rtps", 0.0),
                     rtpp=opts.get("rtpp", 0.0))
    a = ensemble_update(_layout(X, layout), Y, y, r, method=method, obs_noise=z, inflation=infl,
                        gate_sigma=4.0, lower=lower, upper=upper)
    expected, water = _textbook(method, X, Y, y, r, z=z, gate=4.0, lower=lower, upper=upper,
                                **opts)
    scale = np.abs(X).max()
    np.testing.assert_allclose(a.states, expected, rtol=0, atol=1e-10 * scale)
    np.testing.assert_allclose(a.clipped, water, rtol=0, atol=1e-10 * scale * N)
    # the case is what it says: both bounds met, in few or many basins; gate and missing
    assert (water > 0).any() and (water < 0).any()
    met = (np.abs(water) > 0).any(axis=1).sum()
    assert met == 2 if bounds == "few" else met > B // 8
    assert a.gated[4].all() and a.missing[3, 0] and a.updated.sum() == B - (2 if m == 1 else 1)
    np.testing.assert_array_equal(_bits(a.states[4]), _bits(X[4]))
    np.testing.assert_allclose(a.spread_after, a.states.std(axis=1, ddof=1), rtol=1e-9,
                               atol=1e-12 * scale)


@pytest.mark.parametrize("layout", ["C", "planes"])
def test_update_mask_equals_the_textbook_update(layout):
    """With update_mask the updated columns equal the textbook analysis (Hunt et al. 2007,
    each column regressed on its own), bounds clip only those, the others are returned bit
    for bit."""
    rng = np.random.default_rng(35)
    X, Y, y, r = _bounded_problem(rng, 12, 15, 3, 1)
    mask = np.array([True, False, True])
    lower, upper = _bounds_case(X, "many")
    infl = Inflation(multiplicative=1.2, rtps=0.5)
    a = ensemble_update(_layout(X, layout), Y, y, r, method="etkf", inflation=infl,
                        lower=lower, upper=upper, update_mask=mask)
    expected, water = _textbook("etkf", X, Y, y, r, gamma=1.2, rtps=0.5, lower=lower,
                                upper=upper, mask=mask)
    np.testing.assert_allclose(a.states, expected, rtol=0, atol=1e-10 * np.abs(X).max())
    np.testing.assert_allclose(a.clipped, water, rtol=0, atol=1e-8 * np.abs(X).max())
    np.testing.assert_array_equal(_bits(a.states[..., 1]), _bits(X[..., 1]))
    assert (water[:, 0] > 0).any() and not water[:, 1].any()


@pytest.mark.parametrize("layout", ["C", "planes"])
@pytest.mark.parametrize("m", [1, 2])
def test_enkf_equals_the_member_loop(m, layout):
    """The stochastic EnKF equals benchmarks/baseline_loop.py's member-by-member EnKF
    (Burgers et al. 1998, centred perturbed observations) from the same standard normals,
    with a missing reading, a gated one and bounds met, in both memory layouts."""
    rng = np.random.default_rng(36)
    X, Y, y, r = _bounded_problem(rng, 10, 24, 3, m)
    z = rng.standard_normal(Y.shape)
    lower, upper = (np.broadcast_to(v, X.shape) for v in _bounds_case(X, "many"))
    a = ensemble_update(_layout(X, layout), Y, y, r, method="enkf", obs_noise=z,
                        gate_sigma=4.0, lower=lower, upper=upper)
    b = baseline_loop.enkf_update(X, Y, y, r, z, gate_sigma=4.0, lower=lower, upper=upper)
    np.testing.assert_allclose(a.states, b, rtol=0, atol=1e-10 * np.abs(X).max())
    assert np.abs(a.clipped).max() > 0


# --- the memory layouts and basin independence --------------------------------------------


FIELDS = (
    "states", "innovation", "innovation_variance", "predicted_spread", "spread_before",
    "spread_after", "clipped",
)
FLAGS = ("used", "gated", "missing", "invalid", "updated")

INFLATIONS = (
    None,
    Inflation(multiplicative=1.2),
    Inflation(rtps=0.6),
    Inflation(rtpp=0.4),
    Inflation(multiplicative=1.1, rtps=0.3, rtpp=0.2),
)


def _problem(rng, B=9, N=16, n=4, m=1):
    """Stores around 100 mm, predictions linear in them plus noise, readings near the
    ensemble; basin 1 has no reading, basin 2 a reading far outside (gated at 3 sigma),
    basin 3 a NaN state in column 1, basin 4 a mean 1e5 times its spread (cancellation)."""
    X = rng.normal(100.0, 10.0, (B, N, n)) * rng.uniform(0.3, 2.0, (B, 1, n))
    X[4] = 1e6 + rng.normal(0.0, 10.0, (N, n))
    Y = np.einsum("bin,nm->bim", X, rng.uniform(0.0, 0.05, (n, m)))
    Y = np.abs(Y + rng.normal(0.0, 0.3, Y.shape))
    Y[4] = np.abs(rng.normal(5.0, 0.5, (N, m)))
    y = Y.mean(axis=1) + 2.0 * Y.std(axis=1) * rng.standard_normal((B, m))
    y = np.abs(y)
    r = (0.02 * y) ** 2
    y[1, 0] = np.nan
    y[2, 0] += 50.0 * Y[2].std()
    X[3, 5, 1] = np.nan
    return X, Y, y, r


def _assert_same(fast, general):
    # A spread or a clipped amount computed from the states is as precise as the states:
    # 1e-12 of the basin's largest state (the cancellation basin's states are 1e6).
    magnitude = np.nanmax(np.abs(general.states), axis=(-2, -1))[:, None]
    for name in FIELDS:
        a, b = getattr(fast, name), getattr(general, name)
        assert a.shape == b.shape, name
        np.testing.assert_array_equal(np.isnan(a), np.isnan(b), err_msg=name)
        scale = max(1.0, float(np.nanmax(np.abs(b))) if np.isfinite(b).any() else 1.0)
        if name in ("spread_before", "spread_after", "clipped"):
            scale = np.maximum(magnitude, 1.0)
        np.testing.assert_array_less(
            np.abs(np.nan_to_num(a - b)), 1e-12 * (np.abs(np.nan_to_num(b)) + scale), err_msg=name
        )
    for name in FLAGS:
        np.testing.assert_array_equal(getattr(fast, name), getattr(general, name), err_msg=name)


@pytest.mark.parametrize("m", [1, 2])
@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_both_memory_layouts_give_the_same_analysis(method, m):
    """States laid out as (state, basin, member) planes (member axis fastest, the engine's
    layout) and C-ordered states give the same states and diagnostics to 1e-12, with and
    without inflation (multiplicative, RTPS, RTPP), gate, bounds (clipping), update mask,
    log transform and missing, gated and invalid readings; planes come back as planes
    (common practice, no published source: the layout must not change the numbers)."""
    rng = np.random.default_rng(42)
    X, Y, y, r = _problem(rng, m=m)
    Xp = _planes(X)
    noise = rng.standard_normal(Y.shape)
    mask = np.array([True, False, True, True])
    lower, upper = np.full(X.shape, 80.0), np.full(X.shape, np.inf)
    upper[..., 2] = 120.0
    clipped_somewhere = False
    for infl, gate, bounds, masked, transform in itertools.product(
        INFLATIONS, (None, 3.0), (False, True), (False, True), (None, "log")
    ):
        kw = dict(method=method, inflation=infl, gate_sigma=gate)
        if method == "enkf":
            kw["obs_noise"] = noise
        if bounds:
            kw.update(lower=lower, upper=upper)
        if masked:
            kw["update_mask"] = mask
        if transform:
            kw["transform"] = Transform("log", offset=1.0)
        planes = ensemble_update(Xp, Y, y, r, **kw)
        c_order = ensemble_update(X, Y, y, r, **kw)
        _assert_same(planes, c_order)
        assert planes.states.strides == Xp.strides  # the analysis keeps the states' layout
        assert c_order.states.flags.c_contiguous
        assert planes.updated.sum() >= 5  # the analysis did something
        assert np.nanmax(np.abs(planes.states - X)) > 1.0
        clipped_somewhere |= bool(np.abs(planes.clipped).max() > 0.0)
        if gate:
            assert planes.gated[2, 0] and not planes.used[2, 0]
        assert planes.missing[1, 0] and planes.invalid[3, 0] != masked
    assert clipped_somewhere


@pytest.mark.parametrize("layout", ["C", "planes"])
@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_analysis_does_not_depend_on_the_other_basins(method, layout):
    """A basin's analysis is the same, bit for bit, whatever other basins share the call
    and wherever it sits in the batch, in a large batch and in a small one (DESIGN.md,
    Determinism; common practice, no published source)."""
    rng = np.random.default_rng(3)
    X, Y, y, r = _problem(rng, B=300)  # (large enough for the plane-by-plane update)
    noise = rng.standard_normal(Y.shape)
    kw = dict(method=method, gate_sigma=3.0, lower=85.0, inflation=Inflation(1.1, rtps=0.5))
    whole = ensemble_update(_layout(X, layout), Y, y, r, obs_noise=noise, **kw)
    order = np.array([7, 0, 5, 250])
    part = ensemble_update(
        _layout(X[order], layout), Y[order], y[order], r[order], obs_noise=noise[order], **kw
    )
    for name in FIELDS + FLAGS:
        a = np.ascontiguousarray(getattr(part, name))
        b = np.ascontiguousarray(getattr(whole, name)[order])
        np.testing.assert_array_equal(a.view(np.uint8), b.view(np.uint8), err_msg=name)


# --- cycling on the linear reservoir -----------------------------------------------------


def _exact_draws(rng, B, N, var, against=None):
    """Draws (B, N) with sample mean 0, sample variance var (ddof = 1) and no sample
    covariance with ``against``: second-order exact sampling (common practice)."""
    g = rng.standard_normal((B, N))
    g -= g.mean(axis=1, keepdims=True)
    if against is not None:
        dev = against - against.mean(axis=1, keepdims=True)
        norm = np.einsum("bi,bi->b", dev, dev)
        g -= (np.einsum("bi,bi->b", g, dev) / np.where(norm > 0, norm, 1.0))[:, None] * dev
    g *= np.sqrt(var * (N - 1) / np.einsum("bi,bi->b", g, g))[:, None]
    return g


def _cycle(method, N, days=365, seed=0):
    """Run an ensemble filter and the exact Kalman filter side by side on the linear
    reservoir (assim.models.linear_reservoir) with linear runoff observations; return the
    daily ensemble and exact means and variances and the exact gains."""
    rng = np.random.default_rng(seed)
    model = get("linear_reservoir")
    B = 3
    k = np.array([0.05, 0.1, 0.3])
    c = np.array([0.01, 0.02, 0.05])
    q = np.array([4.0, 1.0, 9.0])  # model error variance added to the store, mm2
    r = np.array([0.04, 0.01, 0.25])  # runoff error variance, (mm d-1)2
    params_b = {"k": k, "c": c}
    params = {name: np.repeat(v, N) for name, v in params_b.items()}
    x = np.full(B, 40.0)
    P = np.full(B, 100.0)
    S = x[:, None] + _exact_draws(rng, B, N, P)
    truth = x + np.sqrt(P) * rng.standard_normal(B)
    out = {key: [] for key in ("mean", "var", "kf_mean", "kf_var", "gain", "a", "h", "pf")}
    for day in range(days):
        forcing_b = {
            "precipitation": rng.exponential(3.0, B) * (rng.random(B) < 0.4),
            "pet": rng.uniform(0.5, 4.0, B),
        }
        forcing = {name: np.repeat(v, N) for name, v in forcing_b.items()}
        a, b = transition(forcing_b, params_b)
        h = observation(forcing_b, params_b)
        # model error enters at the start of the day: S_new = a (S + eta) + b
        S = S + _exact_draws(rng, B, N, q, against=S)
        state, fluxes = model.step(S.reshape(-1, 1), forcing, params)
        S = state[:, 0].reshape(B, N)
        predicted = fluxes["runoff"].reshape(B, N)
        truth = a * (truth + np.sqrt(q) * rng.standard_normal(B)) + b
        y = h * truth + np.sqrt(r) * rng.standard_normal(B)
        if day % 11 == 5:
            y[day % 3] = np.nan
        xs, Ps = kalman_predict(
            x[:, None], P[:, None, None], a[:, None, None], (a * a * q)[:, None, None], u=b[:, None]
        )
        pf = Ps[:, 0, 0]
        an = ensemble_update(
            S[:, :, None], predicted[:, :, None], y[:, None], r[:, None], method=method, rng=rng
        )
        xs, Ps = kalman_update(xs, Ps, h[:, None, None], y[:, None], r[:, None, None])
        x, P = xs[:, 0], Ps[:, 0, 0]
        S = an.states[:, :, 0]
        out["mean"].append(S.mean(axis=1))
        out["var"].append(S.var(axis=1, ddof=1))
        out["kf_mean"].append(x)
        out["kf_var"].append(P)
        out["gain"].append(np.where(np.isnan(y), 0.0, pf * h * h / (pf * h * h + r)))
        out["a"].append(a)
        out["h"].append(h)
        out["pf"].append(pf)
    out = {key: np.array(v) for key, v in out.items()}
    out.update(q=q, r=r, N=N)
    return out


@pytest.mark.parametrize("method", ["etkf", "eakf"])
@pytest.mark.parametrize("N", [3, 16])
def test_deterministic_filters_track_the_kalman_filter_on_the_linear_reservoir(method, N):
    """365 days of cycling on the linear reservoir with linear runoff observations: with
    second-order exact initial ensemble and model-error draws, the square-root filters
    reproduce the exact Kalman filter's mean and variance every day to 1e-8 (relative),
    for any N >= 3 (Hunt et al. 2007, eqs. 22-23; Anderson 2001; reference numbers from
    kalman_predict/kalman_update)."""
    out = _cycle(method, N)
    np.testing.assert_allclose(out["mean"], out["kf_mean"], rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(out["var"], out["kf_var"], rtol=1e-8, atol=1e-10)


def test_enkf_tracks_the_kalman_filter_on_the_linear_reservoir():
    """365 days of stochastic EnKF (N = 400) against the exact Kalman filter on the linear
    reservoir: the daily ensemble variance and mean stay within 5 standard errors derived
    from N (Burgers et al. 1998; derivation, delta method, g = gain in observation units,
    K = g / h, rho = a^2 (1 - g)^2):
    per-day noise of the analysis variance sd_n = sqrt(2 K^4 R^2 + 4 (1-g)^2 K^2 Pf R) /
    sqrt(N - 1), damped over days to sd_v = sd_n / sqrt(1 - rho^2); the mean then errs by the
    gain error dK = h R / (h^2 Pf + R)^2 a^2 sd_v times the innovation (sd
    sqrt(h^2 Pf + R)), damped the same way, sd_m = that / sqrt(1 - rho)."""
    out = _cycle("enkf", 400, seed=2)
    N, r = out["N"], out["r"]
    g, pf, a, h = out["gain"], out["pf"], out["a"], out["h"]
    hh = h * h
    K = h * pf / (hh * pf + r)
    sd_n = np.sqrt(2 * K**4 * r**2 + 4 * (1 - g) ** 2 * K**2 * pf * r) / np.sqrt(N - 1)
    rho = (a * (1 - g)) ** 2
    sd_v = sd_n.max(axis=0) / np.sqrt(1 - rho.max(axis=0) ** 2)
    dk = h * r / (hh * pf + r) ** 2 * a**2 * sd_v
    sd_m = (dk * np.sqrt(hh * pf + r)).max(axis=0) / np.sqrt(1 - rho.max(axis=0))
    err_v = np.abs(out["var"] - out["kf_var"])
    err_m = np.abs(out["mean"] - out["kf_mean"])
    assert np.all(err_v < 5 * sd_v), (err_v.max(axis=0), sd_v)
    assert np.all(err_m < 5 * sd_m), (err_m.max(axis=0), sd_m)
    # The test has teeth: the average variance is right to within a few percent.
    np.testing.assert_allclose(out["var"].mean(axis=0), out["kf_var"].mean(axis=0), rtol=0.05)


# --- missing, gated, invalid, bounds, mask -----------------------------------------------


@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_basins_without_usable_observation_are_returned_bit_for_bit(method):
    """A basin whose readings are all missing (or gated) is returned bit for bit, with
    inflation, bounds and odd values (-0.0, NaN in a state) present (common practice, no
    published source)."""
    rng = np.random.default_rng(5)
    X, H, Y, y, r = _linear_problem(rng, 4, 8, 3, 2)
    X[1, 0, 0] = -0.0
    X[1, 3, 2] = np.nan
    X[3, 2, 1] = -0.0
    y[1] = np.nan
    y[3] = Y[3].mean(axis=0) + 1e3  # both readings far outside the gate
    a = ensemble_update(
        X,
        Y,
        y,
        r,
        method=method,
        rng=rng,
        gate_sigma=4.0,
        lower=-1e9,
        upper=1e9,
        inflation=Inflation(multiplicative=1.3, rtps=0.5),
    )
    for b in (1, 3):
        np.testing.assert_array_equal(_bits(a.states[b]), _bits(X[b]))
    assert a.missing[1].all() and not a.used[1].any()
    assert a.gated[3].all() and not a.used[3].any()
    np.testing.assert_array_equal(a.updated, [True, False, True, False])
    np.testing.assert_array_equal(a.clipped[[1, 3]], 0.0)
    assert not np.array_equal(a.states[0], X[0])


def test_partly_missing_readings_equal_assimilating_the_present_ones():
    """A NaN reading in one basin is skipped: the result equals the analysis with that
    observation column removed, basin by basin (common practice, no published source)."""
    rng = np.random.default_rng(6)
    X, H, Y, y, r = _linear_problem(rng, 3, 12, 3, 3)
    y[0, 1] = np.nan
    r[2, 2] = np.nan
    for method in ("etkf", "eakf"):
        a = ensemble_update(X, Y, y, r, method=method)
        one = ensemble_update(X[0], Y[0][:, [0, 2]], y[0][[0, 2]], r[0][[0, 2]], method=method)
        two = ensemble_update(X[2], Y[2][:, :2], y[2][:2], r[2][:2], method=method)
        np.testing.assert_allclose(a.states[0], one.states, rtol=1e-12)
        np.testing.assert_allclose(a.states[2], two.states, rtol=1e-12)
        assert a.missing[0, 1] and a.missing[2, 2] and a.missing.sum() == 2


def test_gate_rejects_large_innovations_and_reports_them():
    """Reject a reading when |innovation| > k sqrt(HPH^T + R), HPH^T the ensemble variance of
    predicted (common practice, no published source); the other reading is still used."""
    rng = np.random.default_rng(8)
    X, H, Y, y, r = _linear_problem(rng, 2, 50, 3, 2)
    sd = np.sqrt(Y.var(axis=1, ddof=1) + r)
    y = Y.mean(axis=1) + np.array([[2.9, 3.1], [-3.1, 0.0]]) * sd
    a = ensemble_update(X, Y, y, r, method="etkf", gate_sigma=3.0)
    np.testing.assert_array_equal(a.gated, [[False, True], [True, False]])
    np.testing.assert_array_equal(a.used, ~a.gated)
    np.testing.assert_allclose(a.innovation, y - Y.mean(axis=1), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(a.innovation_variance, sd**2, rtol=1e-12)
    keep = ensemble_update(X[0], Y[0][:, :1], y[0][:1], r[0][:1], method="etkf")
    np.testing.assert_allclose(a.states[0], keep.states, rtol=1e-12)


def test_bounds_are_honoured_and_the_clipped_water_reported():
    """States pushed outside [lower, upper] are clipped (numpy.clip of the unbounded
    analysis); Analysis.clipped is the signed water added per basin and state, summed over
    members: the clipped minus the unbounded analysis (common practice, no published
    source)."""
    rng = np.random.default_rng(9)
    B, N = 4, 30
    X = np.stack([rng.uniform(0, 10, (B, N)), rng.uniform(40, 50, (B, N))], axis=-1)
    Y = X[:, :, :1] + X[:, :, 1:]
    y = np.array([[0.0], [200.0], [30.0], [np.nan]])
    r = np.ones((B, 1))
    lower = np.array([0.0, 0.0])
    upper = np.array([np.inf, 60.0])
    free = ensemble_update(X, Y, y, r, method="eakf")
    a = ensemble_update(X, Y, y, r, method="eakf", lower=lower, upper=upper)
    expected = np.clip(free.states, lower, upper)
    expected[3] = X[3]  # no reading: returned as it is
    np.testing.assert_array_equal(a.states, expected)
    np.testing.assert_allclose(a.clipped, (expected - free.states).sum(axis=1), atol=1e-12)
    assert a.clipped[0, 0] > 0 and a.clipped[1, 1] < 0  # water added, water removed
    np.testing.assert_array_equal(a.clipped[3], 0.0)
    np.testing.assert_allclose(a.clipped_total, a.clipped.sum(axis=-1))
    inside = (free.states >= lower) & (free.states <= upper)
    np.testing.assert_array_equal(a.states[inside], free.states[inside])


def test_clipping_many_basins_reports_the_same_water():
    """When most basins leave their bounds (the in-place path), the states are still
    numpy.clip of the unbounded analysis, the clipped water the clipped minus the unbounded
    analysis, and exactly zero in columns never clipped."""
    rng = np.random.default_rng(19)
    B, N = 40, 16
    X = np.stack([rng.uniform(0, 10, (B, N)), rng.uniform(40, 50, (B, N))], axis=-1)
    Y = X[:, :, :1] + X[:, :, 1:]
    y = np.full((B, 1), 20.0)
    free = ensemble_update(X, Y, y, np.ones((B, 1)), method="etkf")
    a = ensemble_update(X, Y, y, np.ones((B, 1)), method="etkf", lower=0.0)
    assert (a.clipped[:, 0] > 0).sum() > B // 8
    expected = np.clip(free.states, 0.0, None)
    np.testing.assert_array_equal(a.states, expected)
    np.testing.assert_allclose(a.clipped, (expected - free.states).sum(axis=1), atol=1e-10)
    np.testing.assert_array_equal(a.clipped[:, 1], 0.0)
    np.testing.assert_allclose(a.spread_after, a.states.std(axis=1, ddof=1), rtol=1e-10)
    assert np.all(a.states >= 0.0)


def test_bounds_broadcast_per_member():
    """Bounds may differ per basin and member (e.g. a store bounded by a member's
    parameter), broadcast to the states' shape."""
    rng = np.random.default_rng(10)
    X, H, Y, y, r = _linear_problem(rng, 3, 6, 2, 1)
    upper = X.max(axis=(1, 2))[:, None, None] - rng.uniform(0, 1, (3, 6, 1))
    a = ensemble_update(X, Y, y, r, method="etkf", upper=upper)
    assert np.all(a.states <= upper)


def test_update_mask_leaves_other_columns_bit_for_bit():
    """Columns outside update_mask are returned bit for bit; the updated columns equal the
    full analysis (each column is regressed on its own: Hunt et al. 2007, eq. 22)."""
    rng = np.random.default_rng(11)
    X, H, Y, y, r = _linear_problem(rng, 3, 10, 4, 2)
    mask = np.array([True, False, True, False])
    for method in ("enkf", "etkf", "eakf"):
        full = ensemble_update(X, Y, y, r, method=method, obs_noise=np.ones(Y.shape))
        part = ensemble_update(
            X, Y, y, r, method=method, obs_noise=np.ones(Y.shape), update_mask=mask
        )
        np.testing.assert_array_equal(_bits(part.states[..., ~mask]), _bits(X[..., ~mask]))
        np.testing.assert_allclose(part.states[..., mask], full.states[..., mask], rtol=1e-12)
        np.testing.assert_allclose(part.spread_before, full.spread_before, rtol=1e-12)


def test_nan_never_leaks_into_states():
    """Unusable inputs (a NaN member prediction, a prediction outside the transform's domain,
    a NaN in a state outside update_mask) never put NaN into finite states; the readings
    concerned are reported invalid."""
    rng = np.random.default_rng(12)
    X, H, Y, y, r = _linear_problem(rng, 4, 10, 3, 2)
    Y = np.abs(Y) + 1.0
    y = np.abs(y) + 1.0
    Y[0, 4, 1] = np.nan
    Y[1, 2, 0] = -5.0  # log(-5 + 1) undefined
    X[2, 7, 2] = np.nan
    mask = np.array([True, True, False])
    for method in ("enkf", "etkf", "eakf"):
        a = ensemble_update(
            X,
            Y,
            y,
            r,
            method=method,
            rng=rng,
            update_mask=mask,
            transform=Transform("log", offset=1.0),
        )
        finite = np.isfinite(X)
        assert np.all(np.isfinite(a.states[finite]))
        np.testing.assert_array_equal(
            a.invalid, [[False, True], [True, False], [False, False], [False, False]]
        )
        assert a.used[2].all()


def test_transformed_space_is_the_linear_problem_in_that_space():
    """Assimilating in log space a prediction that is exp-linear in the states is the exact
    Kalman update in log space (square-root property, Hunt et al. 2007, eqs. 22-23); the
    variance passed is already in log space."""
    rng = np.random.default_rng(13)
    X, H, _, _, r = _linear_problem(rng, 3, 15, 3, 1)
    H = 0.05 * H
    offset = 0.5
    Y = np.exp(np.einsum("bmn,bin->bim", H, X)) - offset
    y = np.exp(np.einsum("bmn,bn->bm", H, X.mean(axis=1)) + 0.3) - offset
    a = ensemble_update(X, Y, y, 0.1 * r, method="etkf", transform=Transform("log", offset=offset))
    mean, P = _stats(X)
    xk, Pk = kalman_update(mean, P, H, np.log(y + offset), 0.1 * r[..., None] * np.eye(1))
    xa, Pa = _stats(a.states)
    np.testing.assert_allclose(xa, xk, atol=1e-10 * np.abs(xk).max())
    np.testing.assert_allclose(Pa, Pk, atol=1e-10 * np.abs(P).max())
    np.testing.assert_allclose(a.innovation, np.log(y + offset) - np.log(Y + offset).mean(axis=1))


def test_diagnostics_against_numpy():
    """Innovation, its variance, spreads and predicted spread against direct numpy
    computations (numpy.mean, numpy.var with ddof = 1)."""
    rng = np.random.default_rng(14)
    X, H, Y, y, r = _linear_problem(rng, 3, 25, 2, 2)
    a = ensemble_update(X, Y, y, r, method="etkf", inflation=Inflation(multiplicative=1.1))
    np.testing.assert_allclose(a.innovation, y - Y.mean(axis=1), rtol=1e-12)
    np.testing.assert_allclose(a.innovation_variance, 1.21 * Y.var(axis=1, ddof=1) + r, rtol=1e-12)
    np.testing.assert_allclose(a.predicted_spread, Y.std(axis=1, ddof=1), rtol=1e-12)
    np.testing.assert_allclose(a.spread_before, X.std(axis=1, ddof=1), rtol=1e-12)
    np.testing.assert_allclose(a.spread_after, a.states.std(axis=1, ddof=1), rtol=1e-10)


@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_spreads_stay_exact_when_sums_of_squares_would_cancel(method):
    """States with a mean 1e9 times their spread (a collapsed parameter column), a clipped
    basin and an RTPS run: spread_before and spread_after still equal the two-pass
    numpy.std (ddof = 1) to 1e-9, and RTPS reaches its target spread to 1e-7 (the
    precision left by rounding the states themselves, eps * mean / sd)."""
    rng = np.random.default_rng(16)
    X, H, Y, y, r = _linear_problem(rng, 8, 20, 3, 1)
    X[:6, :, 2] = 1e4 + 1e-5 * rng.standard_normal((6, 20))  # most basins: whole-batch path
    X[1, :, 1] -= X[1, :, 1].min() + 1.0  # basin 1 sits near the lower bound of 0 ...
    Y = np.einsum("bmn,bin->bim", H, X)
    y[1] = Y[1].mean(axis=0) - 3 * np.sign(H[1, 0, 1]) * Y[1].std(axis=0)  # ... and is pushed below
    z = rng.standard_normal(Y.shape)
    for infl, few in itertools.product((None, Inflation(rtps=0.5)), (False, True)):
        Xi = X.copy()
        if few:  # one collapsed basin only: the gathered path
            Xi[[0, 2, 3, 4, 5], :, 2] = rng.normal(50, 5, (5, 20))
        a = ensemble_update(
            Xi, Y, y, r, method=method, rng=rng, lower=np.array([-np.inf, 0.0, 0.0]), inflation=infl
        )
        np.testing.assert_allclose(a.spread_before, Xi.std(axis=1, ddof=1), rtol=1e-9)
        np.testing.assert_allclose(a.spread_after, a.states.std(axis=1, ddof=1), rtol=1e-9)
        assert a.clipped[1, 1] > 0
        if infl is not None:  # RTPS reaches its target spread in the collapsed column too
            plain = ensemble_update(Xi, Y, y, r, method=method, obs_noise=z)
            relaxed = ensemble_update(Xi, Y, y, r, method=method, obs_noise=z, inflation=infl)
            target = 0.5 * plain.spread_before + 0.5 * plain.spread_after
            np.testing.assert_allclose(relaxed.spread_after, target, rtol=1e-7)


# --- shapes, errors, properties ----------------------------------------------------------


@settings(max_examples=40, deadline=None)
@given(
    batch=st.lists(st.integers(1, 3), min_size=0, max_size=2).map(tuple),
    N=st.integers(2, 6),
    n=st.integers(1, 4),
    m=st.integers(1, 3),
    method=st.sampled_from(["enkf", "etkf", "eakf"]),
    seed=st.integers(0, 2**16),
    missing_fraction=st.floats(0, 1),
)
def test_property_shapes_and_unchanged_when_missing(batch, N, n, m, method, seed, missing_fraction):
    """Any batch shape, N >= 2, any n_state and n_obs: output shapes follow the input, a
    basin with every reading missing is returned bit for bit (DESIGN.md, Filters) and the
    reported spreads are those of the states (numpy.std, ddof = 1)."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=batch + (N, n))
    Y = X[..., :1] * rng.normal(size=(m,)) + rng.normal(size=batch + (N, m))
    y = rng.normal(size=batch + (m,))
    y[rng.random(batch + (m,)) < missing_fraction] = np.nan
    a = ensemble_update(X, Y, y, np.ones(m), method=method, rng=rng)
    assert a.states.shape == X.shape
    assert a.innovation.shape == a.used.shape == a.missing.shape == batch + (m,)
    assert a.spread_before.shape == a.spread_after.shape == a.clipped.shape == batch + (n,)
    assert a.updated.shape == batch
    none = np.isnan(y).all(axis=-1)
    np.testing.assert_array_equal(_bits(a.states[none]), _bits(X[none]))
    np.testing.assert_allclose(a.spread_before, X.std(axis=-2, ddof=1), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(a.spread_after, a.states.std(axis=-2, ddof=1), rtol=1e-8, atol=1e-10)
    assert np.all(np.isfinite(a.states))
    np.testing.assert_array_equal(a.updated, ~none)


@pytest.mark.parametrize(
    "change, variable",
    [
        (dict(method="kalman"), "method"),
        (dict(states=np.zeros((3, 1, 2))), "states"),
        (dict(predicted=np.zeros((3, 4, 1, 1))), "predicted"),
        (dict(observed=np.zeros((3, 2))), "observed"),
        (dict(obs_variance=np.zeros((3, 1))), "obs_variance"),
        (dict(obs_variance=np.ones((2, 1))), "obs_variance"),
        (dict(update_mask=np.ones(3, bool)), "update_mask"),
        (dict(obs_noise=np.zeros((3, 4))), "obs_noise"),
        (dict(rng=None), "rng"),
        (dict(lower=np.zeros(3)), "lower"),
        (dict(upper=np.zeros((2, 4, 2))), "upper"),
    ],
)
def test_bad_input_raises_input_error_naming_the_variable(change, variable):
    """Bad shapes and values raise assim.errors.InputError naming the variable."""
    args = dict(
        states=np.zeros((3, 4, 2)),
        predicted=np.zeros((3, 4, 1)),
        observed=np.zeros((3, 1)),
        obs_variance=np.ones((3, 1)),
        method="enkf",
        rng=np.random.default_rng(0),
    )
    args.update(change)
    with pytest.raises(InputError) as info:
        ensemble_update(
            args.pop("states"),
            args.pop("predicted"),
            args.pop("observed"),
            args.pop("obs_variance"),
            **args,
        )
    assert info.value.variable == variable


def test_single_basin_without_leading_dimension():
    """states (member, n_state), predicted (member, n_obs), observed (n_obs,) work."""
    rng = np.random.default_rng(15)
    X, H, Y, y, r = _linear_problem(rng, 1, 7, 2, 1)
    a = ensemble_update(X[0], Y[0], y[0], r[0], method="eakf")
    b = ensemble_update(X, Y, y, r, method="eakf")
    np.testing.assert_array_equal(a.states, b.states[0])
    assert a.updated.shape == ()
