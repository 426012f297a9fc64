"""Tests of the one-observation path of assim.filters.ensemble_update.

With one observation per basin, ensemble_update takes a fused path (no observation-space
matrices, no solve). These tests hold it to the general path, which is itself tested against
the exact Kalman update in tests/test_filters_ensemble.py.
"""

import itertools

import numpy as np
import pytest

from assim.filters import Inflation, Transform, ensemble_update
from assim.filters import ensemble as ens

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


def _problem(rng, B=9, N=16, n=4):
    """Stores around 100 mm, predictions linear in them plus noise, readings near the
    ensemble; basin 1 has no reading, basin 2 a reading far outside (gated at 3 sigma),
    basin 3 a NaN state in column 1, basin 4 a mean 1e5 times its spread (cancellation)."""
    X = rng.normal(100.0, 10.0, (B, N, n)) * rng.uniform(0.3, 2.0, (B, 1, n))
    X[4] = 1e6 + rng.normal(0.0, 10.0, (N, n))
    Y = np.einsum("bin,n->bi", X, rng.uniform(0.0, 0.05, n))[..., None]
    Y = np.abs(Y + rng.normal(0.0, 0.3, Y.shape))
    Y[4] = np.abs(rng.normal(5.0, 0.5, (N, 1)))
    y = Y.mean(axis=1) + 2.0 * Y.std(axis=1) * rng.standard_normal((B, 1))
    y = np.abs(y)
    r = (0.02 * y) ** 2
    y[1, 0] = np.nan
    y[2, 0] += 50.0 * Y[2].std()
    X[3, 5, 1] = np.nan
    return X, Y, y, r


def _planes(a):
    """The same array with the member axis fastest in memory and each state a contiguous
    (basin, member) plane: the layout of a model's Fortran-ordered (batch, n_state) array,
    which the engine passes."""
    return np.moveaxis(np.ascontiguousarray(np.moveaxis(a, -1, 0)), 0, -1)


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


@pytest.mark.parametrize("layout", ["C", "planes"])
@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_one_observation_path_equals_the_general_path(method, layout):
    """For n_obs = 1 the fused path gives the general path's states and diagnostics to
    1e-12, with and without inflation (multiplicative, RTPS, RTPP), gate, bounds (clipping),
    update mask, log transform and missing, gated and invalid readings, for C-ordered
    states and for states laid out as (state, basin, member) planes. Reference: the
    general path of the same module (Burgers et al. 1998; Hunt et al. 2007, eqs. 20 and 24;
    Anderson 2001 for one observation), tested against the exact Kalman update."""
    rng = np.random.default_rng(42)
    X, Y, y, r = _problem(rng)
    if layout == "planes":
        X = _planes(X)
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
        fast = ensemble_update(X, Y, y, r, **kw)
        general = ens._analysis(
            X, Y, y, r, method, None, infl, gate, kw.get("lower"), kw.get("upper"),
            kw.get("update_mask"), kw.get("transform"), kw.get("obs_noise"), True, False,
        )
        _assert_same(fast, general)
        if layout == "planes" and not masked:  # the analysis keeps the states' layout
            assert fast.states.strides == X.strides
        assert fast.updated.sum() >= 5  # the analysis did something
        assert np.nanmax(np.abs(fast.states - X)) > 1.0
        clipped_somewhere |= bool(np.abs(fast.clipped).max() > 0.0)
        if gate:
            assert fast.gated[2, 0] and not fast.used[2, 0]
        assert fast.missing[1, 0] and fast.invalid[3, 0] != masked
    assert clipped_somewhere


@pytest.mark.parametrize("layout", ["C", "planes"])
@pytest.mark.parametrize("method", ["enkf", "etkf", "eakf"])
def test_one_observation_path_does_not_depend_on_the_other_basins(method, layout):
    """A basin's analysis is the same, bit for bit, whatever other basins share the call
    and wherever it sits in the batch, in a large batch and in a small one (DESIGN.md,
    Determinism; common practice, no published source)."""
    rng = np.random.default_rng(3)
    X, Y, y, r = _problem(rng, B=300)  # (large enough for the plane-by-plane update)
    noise = rng.standard_normal(Y.shape)
    kw = dict(method=method, gate_sigma=3.0, lower=85.0, inflation=Inflation(1.1, rtps=0.5))
    prepare = _planes if layout == "planes" else np.ascontiguousarray
    whole = ensemble_update(prepare(X), Y, y, r, obs_noise=noise, **kw)
    order = np.array([7, 0, 5, 250])
    part = ensemble_update(
        prepare(X[order]), Y[order], y[order], r[order], obs_noise=noise[order], **kw
    )
    for name in FIELDS + FLAGS:
        a = np.ascontiguousarray(getattr(part, name))
        b = np.ascontiguousarray(getattr(whole, name)[order])
        np.testing.assert_array_equal(a.view(np.uint8), b.view(np.uint8), err_msg=name)
