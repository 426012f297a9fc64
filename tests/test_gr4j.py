"""Tests of assim.models.gr4j against the equations of Perrin, Michel & Andréassian (2003),
J. Hydrol. 279, 275-289, appendix (the model equations), and against exact invariants."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from assim.models import get, gr4j

MODEL = get("gr4j")
N = gr4j.N_STATE
C1, C2 = 2, 2 + gr4j.N_SLOT1  # first columns of the UH1 and UH2 slots


def _state(S, R, uh1=(), uh2=()):
    x = np.zeros((1, N))
    x[0, 0], x[0, 1] = S, R
    x[0, C1:C1 + len(uh1)] = uh1
    x[0, C2:C2 + len(uh2)] = uh2
    return x


def _params(x1, x2, x3, x4, n=1):
    values = (x1, x2, x3, x4)
    return {k: np.full(n, float(v)) for k, v in zip(("x1", "x2", "x3", "x4"), values, strict=True)}


def _one(state, P, E, params):
    return MODEL.step(state, {"precipitation": np.array([P]), "pet": np.array([E])}, params)


def _random_params(rng, n):
    return {p.name: rng.uniform(p.low, p.high, n) for p in MODEL.parameters}


def _random_forcing(rng, n_days, n):
    wet = rng.random((n_days, n)) < 0.45
    p = np.where(wet, rng.gamma(0.7, 9.0, (n_days, n)), 0.0)
    day = np.arange(n_days)[:, None]
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * day / 365.25) + rng.normal(0, 0.5, (n_days, n)), 0, None)
    return p, e


def _storage_change_residual(before, after, f):
    inputs = sum(f[k] for k in MODEL.balance.inputs)
    outputs = sum(f[k] for k in MODEL.balance.outputs)
    return after.sum(axis=1) - before.sum(axis=1) - (inputs - outputs)


# --- one-step values computed by hand ---------------------------------------------------


def test_one_step_rain_day_by_hand():
    """Perrin et al. (2003), appendix, worked by hand (calculator for tanh and roots).

    X1=100 mm, X2=1 mm/d, X3=50 mm, X4=1 d; S=50, R=25, empty unit hydrographs; P=10, E=2.
    Interception: Pn = 10-2 = 8, En = 0, evaporation 2 (all from interception).
    s = S/X1 = 0.5; tanh(Pn/X1) = tanh(0.08) = 0.0798297691111314.
    Ps = X1 (1 - s^2) tanh / (1 + s tanh) = 100*0.75*0.0798297691 / 1.0399148846 = 5.7574257011.
    S' = 50 + 5.7574257011 = 55.7574257011.
    Perc = S' (1 - (1 + (4/9 * 0.557574257)^4)^(-1/4)) = 0.0524446943; S_end = 55.7049810069.
    Pr = Perc + (Pn - Ps) = 0.0524446943 + 2.2425742989 = 2.2950189931.
    X4=1: UH1 ordinates [1]; UH2 ordinates [SH2(1), SH2(2)-SH2(1)] = [0.5, 0.5].
    Q9 = 0.9 Pr = 2.0655170938; Q1 = 0.1 Pr 0.5 = 0.1147509497; uh2_1 = 0.1147509497.
    F = X2 (R/X3)^(7/2) = 0.5^3.5 = 0.0883883476.
    R' = 25 + 2.0655170938 + 0.0883883476 = 27.1539054415;
    Qr = R' (1 - (1 + (R'/X3)^4)^(-1/4)) = 0.5603553486; R_end = 26.5935500929.
    Qd = max(0, Q1 + F) = 0.2031392973; Q = Qr + Qd = 0.7634946459; exchange = 2F.
    """
    new, f = _one(_state(50.0, 25.0), 10.0, 2.0, _params(100, 1, 50, 1.0))
    assert tuple(f) == MODEL.fluxes  # every declared flux, nothing else
    expected_state = {0: 55.70498100687396, 1: 26.593550092889878, C2: 0.11475094965630209}
    for col, value in expected_state.items():
        assert new[0, col] == pytest.approx(value, rel=1e-12)
    assert np.count_nonzero(new[0]) == 3
    expected = {
        "net_rainfall": 8.0,
        "actual_evaporation": 2.0,
        "percolation": 0.0524446942627748,
        "exchange": 0.17677669529663673,
        "routed_runoff": 0.5603553485718789,
        "direct_runoff": 0.20313929730462055,
        "runoff": 0.7634946458764994,
    }
    for name, value in expected.items():
        assert f[name][0] == pytest.approx(value, rel=1e-12), name


def test_one_step_dry_day_by_hand():
    """Perrin et al. (2003), appendix, worked by hand: evaporation from the production store.

    X1=100, X2=-2, X3=50, X4=1; S=80, R=10; P=1, E=5: Pn = 0, En = 4, interception 1.
    s = 0.8; tanh(En/X1) = tanh(0.04) = 0.0399786803.
    Es = S (2 - s) tanh / (1 + (1 - s) tanh) = 80*1.2*0.0399786803/1.0079957361 = 3.8075094691.
    S' = 76.1924905309; Perc = 0.2484401911; S_end = 75.9440503398; Pr = Perc (Pn = Ps = 0).
    Q9 = 0.9 Pr = 0.2235961720; Q1 = 0.05 Pr = 0.0124220096.
    F = -2 (10/50)^3.5 = -0.0071554175.
    R' = 10 + 0.2235961720 - 0.0071554175 = 10.2164407544; Qr = 0.0044471863;
    R_end = 10.2119935681; Qd = 0.0124220096 - 0.0071554175 = 0.0052665920.
    Actual evaporation = 1 + 3.8075094691.
    """
    new, f = _one(_state(80.0, 10.0), 1.0, 5.0, _params(100, -2, 50, 1.0))
    assert new[0, 0] == pytest.approx(75.94405033982717, rel=1e-12)
    assert new[0, 1] == pytest.approx(10.211993568131788, rel=1e-12)
    assert new[0, C2] == pytest.approx(0.01242200955352584, rel=1e-12)
    assert f["net_rainfall"][0] == 0.0
    assert f["actual_evaporation"][0] == pytest.approx(4.807509469102309, rel=1e-12)
    assert f["percolation"][0] == pytest.approx(0.24844019107051676, rel=1e-12)
    assert f["exchange"][0] == pytest.approx(-0.014310835055998804, rel=1e-12)
    assert f["routed_runoff"][0] == pytest.approx(0.004447186303676487, rel=1e-12)
    assert f["direct_runoff"][0] == pytest.approx(0.005266592025526511, rel=1e-12)
    assert f["runoff"][0] == pytest.approx(0.009713778329202997, rel=1e-12)


def test_one_step_exchange_limited_by_empty_routing_store_by_hand():
    """Perrin et al. (2003), appendix: R = max(0, R + Q9 + F) and Qd = max(0, Q1 + F).

    X1=100, X2=-10, X3=5, X4=2.5; S=30, R=4; uh1 = [0.3, 0.5], uh2 = [0.2, 0.1, 0.05, 0];
    no rain, no PET. UH1 ordinates (X4=2.5): SH1(1) = 0.4^2.5 = 0.1011928851,
    SH1(2)-SH1(1) = 0.8^2.5 - 0.4^2.5 = 0.4712405171, 1 - 0.8^2.5 = 0.4275665978.
    UH2 ordinates: 0.5*0.4^2.5 = 0.0505964426, 0.5*0.8^2.5 - 0.0505964426 = 0.2356202586,
    (1 - 0.5*0.8^2.5) - 0.5*0.8^2.5 = 0.4275665978, then the mirror 0.2356202586, 0.0505964426.
    Perc = 30 (1 - (1 + (4/9*0.3)^4)^(-1/4)) = 0.0023699023 = Pr.
    Q9 = 0.9 Pr 0.1011928851 + 0.3 = 0.3002158355; Q1 = 0.1 Pr 0.0505964426 + 0.2 = 0.2000119909.
    F = -10 (4/5)^3.5 = -4.5794672179: R + Q9 + F < 0 so R' = 0, Qr = 0 and the routing
    store loses only R + Q9 = 4.3002158355; Q1 + F < 0 so Qd = 0 and the direct branch loses
    Q1. Actual exchange = -(4.3002158355 + 0.2000119909) = -4.5002278264, not 2F = -9.159.
    New uh1 = [0.5 + 0.9 Pr 0.4712405171, 0.9 Pr 0.4275665978] = [0.5010051146, 0.0009119619].
    """
    state = _state(30.0, 4.0, (0.3, 0.5), (0.2, 0.1, 0.05, 0.0))
    new, f = _one(state, 0.0, 0.0, _params(100, -10, 5, 2.5))
    assert new[0, 0] == pytest.approx(29.99763009773998, rel=1e-12)
    assert new[0, 1] == 0.0
    assert f["routed_runoff"][0] == 0.0
    assert f["direct_runoff"][0] == 0.0
    assert f["runoff"][0] == 0.0
    assert f["exchange"][0] == pytest.approx(-4.500227826384799, rel=1e-12)
    np.testing.assert_allclose(new[0, C1:C1 + 2], [0.5010051145698714, 0.0009119619417073582],
                               rtol=1e-12)
    np.testing.assert_allclose(
        new[0, C2:C2 + 4],
        [0.1000558396983262, 0.050101329104634156, 5.583969832618859e-05, 1.1990862357840665e-05],
        rtol=1e-12,
    )
    assert not new[0, C1 + 2:C2].any() and not new[0, C2 + 4:].any()


# --- unit hydrographs ---------------------------------------------------------------------


@pytest.mark.parametrize("x4", [0.5, 1.0, 1.7, 4.3, 9.9])
def test_unit_hydrograph_ordinates_sum_to_one(x4):
    """Perrin et al. (2003), appendix: the ordinates are differences of an S-curve going from
    0 to 1, so they sum to 1; UH1 has ceil(X4) non-zero ordinates and UH2 ceil(2 X4)."""
    uh1, uh2 = gr4j.uh_ordinates(np.array([x4]))
    assert uh1.sum() == pytest.approx(1.0, abs=1e-14)
    assert uh2.sum() == pytest.approx(1.0, abs=1e-14)
    assert (uh1 >= 0).all() and (uh2 >= 0).all()
    assert np.count_nonzero(uh1) == math.ceil(x4)
    assert np.count_nonzero(uh2) == math.ceil(2 * x4)


def test_unit_hydrograph_values_for_x4_1_7():
    """Perrin et al. (2003), appendix, by hand for X4 = 1.7 d.

    SH1(1) = (1/1.7)^2.5 = 0.5882353^2 * sqrt(0.5882353) = 0.3460208 * 0.7669650 = 0.2653858,
    so UH1 = [0.2653858, 0.7346142].
    SH2(1) = 0.5 * 0.2653858 = 0.1326929; SH2(2) = 1 - 0.5 (2 - 2/1.7)^2.5 = 1 - 0.5*0.6154571
    = 0.6922715; SH2(3) = 1 - 0.5 (2 - 3/1.7)^2.5 = 1 - 0.5*0.0268552 = 0.9865724; SH2(4) = 1,
    so UH2 = [0.1326929, 0.5595786, 0.2943010, 0.0134276].
    """
    uh1, uh2 = gr4j.uh_ordinates(np.array([1.7]))
    np.testing.assert_allclose(uh1[0, :2], [0.2653858, 0.7346142], atol=1e-7)
    np.testing.assert_allclose(uh2[0, :4], [0.1326929, 0.5595786, 0.2943010, 0.0134276], atol=1e-7)


# --- water balance and bounds ---------------------------------------------------------------


def test_water_balance_closes_over_20_years_for_1000_parameter_sets():
    """Conservation of mass (common practice, no published source): over 20 years of random
    daily forcing, for 1,000 random parameter sets from the valid ranges, every step closes
    the declared balance to 1e-9 mm, and so does the whole period."""
    rng = np.random.default_rng(2003)
    n, n_days = 1000, 20 * 365
    params = MODEL.prepare(_random_params(rng, n))
    p, e = _random_forcing(rng, n_days, n)
    state = MODEL.initial_state(params)
    start = state.sum(axis=1)
    net = np.zeros(n)
    worst = 0.0
    gained = lost = dried = False
    for t in range(n_days):
        new, f = MODEL.step(state, {"precipitation": p[t], "pet": e[t]}, params)
        worst = max(worst, float(np.abs(_storage_change_residual(state, new, f)).max()))
        net += sum(f[k] for k in MODEL.balance.inputs) - sum(f[k] for k in MODEL.balance.outputs)
        gained |= bool((f["exchange"] > 0).any())
        lost |= bool((f["exchange"] < 0).any())
        dried |= bool((new[:, 1] == 0).any())  # exchange limited by an empty routing store
        state = new
    assert worst < 1e-9
    assert np.abs(state.sum(axis=1) - start - net).max() < 1e-9
    assert gained and lost and dried  # the run went through every branch of the exchange


_finite = {"allow_nan": False, "allow_infinity": False}


@settings(max_examples=60, deadline=None)
@given(
    unit=st.lists(st.floats(0, 1, **_finite), min_size=4, max_size=4),
    fill=st.lists(st.floats(0, 1, **_finite), min_size=2, max_size=2),
    days=st.lists(
        st.tuples(st.floats(0, 2000, **_finite), st.floats(0, 50, **_finite)),
        min_size=1,
        max_size=8,
    ),
)
def test_storages_stay_within_bounds_for_any_nonnegative_forcing(unit, fill, days):
    """Perrin et al. (2003), appendix: 0 <= S <= X1 (Ps <= X1 - S, Es <= S), 0 <= R and the
    stored R' (1 + (R'/X3)^4)^(-1/4) < X3; unit-hydrograph water >= 0 and zero beyond the
    time base. Checked under rounding for extreme forcing (hypothesis)."""
    lo = np.array([p.low for p in MODEL.parameters])
    hi = np.array([p.high for p in MODEL.parameters])
    x = lo + np.array(unit) * (hi - lo)
    params = _params(*x)
    state = _state(fill[0] * x[0], fill[1] * x[2])
    lower, upper = MODEL.bounds(params)
    for p, e in days:
        state, f = _one(state, p, e, params)
        assert np.isfinite(state).all()
        assert (state >= lower).all() and (state <= upper).all()
        assert f["runoff"][0] >= 0 and f["actual_evaporation"][0] <= e + 1e-12


def test_bounds_hold_where_rounding_would_break_them():
    """Perrin et al. (2003), appendix: Es <= S and R (1 + (R/X3)^4)^(-1/4) < X3 hold exactly,
    but in floating point Es rounds above S once tanh(En/X1) rounds to 1 (here X1 = 1 mm,
    S = 0.31 mm, PET 40 mm/d), and the stored routing level rounds above X3 for an inflow
    of about 10^4 X3 (absurd, but the bound is declared for any forcing). Both cases were
    found by searching the unclipped formulas."""
    new, f = _one(_state(0.31, 0.0), 0.0, 40.0, _params(1.0, 0.0, 50.0, 0.5))
    assert new[0, 0] >= 0.0 and f["actual_evaporation"][0] == pytest.approx(0.31, abs=1e-15)
    x3 = 816.0377005674106
    new, f = _one(_state(1.0, 0.0), 34526561.486427255, 0.0, _params(1.0, 0.0, x3, 0.5))
    assert new[0, 1] <= x3
    assert abs(new[0, 1] + f["routed_runoff"][0] - 0.9 * 34526561.486427255) < 1e-6 * 3.5e7


def test_routing_store_can_exceed_x3_only_inside_the_step():
    """Perrin et al. (2003), appendix: a large inflow lifts R' above X3, but the stored level
    after the outflow stays below X3 (the bound declared for ``routing_store``)."""
    params = _params(300, 0, 20, 1.0)
    new, f = _one(_state(300.0, 19.0), 500.0, 0.0, params)
    r_before_outflow = new[0, 1] + f["routed_runoff"][0]
    assert r_before_outflow > 20.0
    assert new[0, 1] < 20.0


# --- batching ---------------------------------------------------------------------------------


def test_batched_run_equals_element_by_element_runs(monkeypatch):
    """Vectorisation must not change results (common practice, no published source): a batch
    of members with different parameters (X4 over its whole range), run together, in small
    blocks, or one by one, gives bit-identical states and fluxes."""
    rng = np.random.default_rng(7)
    n, n_days = 40, 60
    params = _random_params(rng, n)
    params["x4"][:4] = [0.5, 1.0, 9.99, 10.0]
    p, e = _random_forcing(rng, n_days, n)

    def run(par, idx):
        x = MODEL.initial_state(par)
        runoff = []
        for t in range(n_days):
            x, f = MODEL.step(x, {"precipitation": p[t, idx], "pet": e[t, idx]}, par)
            runoff.append(f["runoff"])
        return x, np.array(runoff)

    everything = np.arange(n)
    batch_state, batch_runoff = run(params, everything)
    prepared_state, prepared_runoff = run(MODEL.prepare(params), everything)
    assert np.array_equal(batch_state, prepared_state)
    assert np.array_equal(batch_runoff, prepared_runoff)
    for i in range(n):
        one_state, one_runoff = run({k: v[i:i + 1] for k, v in params.items()}, [i])
        assert np.array_equal(one_state, batch_state[i:i + 1]), i
        assert np.array_equal(one_runoff[:, 0], batch_runoff[:, i]), i
    monkeypatch.setattr(gr4j, "BLOCK", 7)
    blocked_state, blocked_runoff = run(params, everything)
    assert np.array_equal(blocked_state, batch_state)
    assert np.array_equal(blocked_runoff, batch_runoff)


def test_step_does_not_modify_its_input_state():
    """The filter keeps the prior: step returns a new array (protocol in DESIGN.md)."""
    rng = np.random.default_rng(3)
    params = _random_params(rng, 20)
    state = MODEL.initial_state(params)
    for _ in range(5):
        state, _ = MODEL.step(state, {"precipitation": np.full(20, 30.0), "pet": np.ones(20)}, params)
    before = state.copy()
    new, _ = MODEL.step(state, {"precipitation": np.full(20, 5.0), "pet": np.ones(20)}, params)
    assert np.array_equal(state, before)
    assert not np.shares_memory(new, state)
    assert new.shape == (20, MODEL.n_state)


def test_c_ordered_state_gives_the_same_step():
    """Memory order is an implementation detail (common practice, no published source)."""
    rng = np.random.default_rng(4)
    params = _random_params(rng, 30)
    state = MODEL.initial_state(params)
    forcing = {"precipitation": rng.uniform(0, 40, 30), "pet": rng.uniform(0, 5, 30)}
    for _ in range(3):
        state, _ = MODEL.step(state, forcing, params)
    a, fa = MODEL.step(np.ascontiguousarray(state), forcing, params)
    b, fb = MODEL.step(np.asfortranarray(state), forcing, params)
    assert np.array_equal(a, b) and np.array_equal(fa["runoff"], fb["runoff"])


# --- exchange and recession -----------------------------------------------------------------


def test_no_exchange_when_x2_is_zero():
    """Perrin et al. (2003), appendix: F = X2 (R/X3)^(7/2) vanishes with X2, so the direct
    runoff is the UH2 output and the balance has no exchange term."""
    rng = np.random.default_rng(5)
    n = 200
    params = _random_params(rng, n)
    params["x2"] = np.zeros(n)
    state = MODEL.initial_state(params)
    p, e = _random_forcing(rng, 100, n)
    for t in range(100):
        state, f = MODEL.step(state, {"precipitation": p[t], "pet": e[t]}, params)
        assert not f["exchange"].any()


def test_stores_recede_without_rain():
    """Perrin et al. (2003), appendix: with P = 0 there is no Ps, so S only loses (Es, Perc);
    with X2 <= 0 the total storage only loses; and once S and the unit hydrographs are empty
    the routing store and the runoff recede monotonically."""
    rng = np.random.default_rng(6)
    n = 300
    params = _random_params(rng, n)
    params["x2"] = -np.abs(params["x2"])
    state = MODEL.initial_state(params)
    for _ in range(10):  # fill the stores and the unit hydrographs
        state, _ = MODEL.step(state, {"precipitation": np.full(n, 40.0), "pet": np.zeros(n)}, params)
    dry = {"precipitation": np.zeros(n), "pet": np.full(n, 3.0)}
    for _ in range(60):
        new, f = MODEL.step(state, dry, params)
        assert (new[:, 0] <= state[:, 0]).all()
        assert (new.sum(axis=1) <= state.sum(axis=1) + 1e-12).all()
        state = new
    state[:, 0] = 0.0
    state[:, 2:] = 0.0
    previous_runoff = np.full(n, np.inf)
    for _ in range(30):
        new, f = MODEL.step(state, dry, params)
        assert (new[:, 1] <= state[:, 1]).all()
        assert (f["runoff"] <= previous_runoff).all()
        previous_runoff, state = f["runoff"], new


def test_prepared_parameters_can_be_sliced_along_the_batch():
    """Every prepared array has the batch as its first axis, so a chunk of a prepared dict
    steps exactly like the chunk of the whole batch (common practice, no published source)."""
    rng = np.random.default_rng(8)
    n = 30
    params = _random_params(rng, n)
    prepared = MODEL.prepare(params)
    assert all(np.shape(v)[0] == n for v in prepared.values())
    state = MODEL.initial_state(params)
    forcing = {"precipitation": rng.uniform(0, 60, n), "pet": rng.uniform(0, 5, n)}
    whole, f_whole = MODEL.step(state, forcing, prepared)
    idx = np.arange(3, 17)
    chunk = {k: v[idx] for k, v in prepared.items()}
    part, f_part = MODEL.step(state[idx], {k: v[idx] for k, v in forcing.items()}, chunk)
    assert np.array_equal(part, whole[idx])
    assert np.array_equal(f_part["runoff"], f_whole["runoff"][idx])


def test_x4_beyond_the_state_layout_is_refused():
    """The state holds 9 + 19 unit-hydrograph slots, enough for X4 <= 10 d: a longer time base
    would drop water, so prepare refuses it (common practice, no published source)."""
    with pytest.raises(ValueError, match="X4"):
        MODEL.prepare(_params(350, 0, 90, 10.5))
    with pytest.raises(ValueError, match="X1"):
        MODEL.prepare(_params(0, 0, 90, 1.7))
