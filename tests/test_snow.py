"""Tests of assim.models.snow: the degree-day snow routine in front of any model."""

from __future__ import annotations

import numpy as np
import pytest

from assim import models
from assim.models import snow

PARAMS = {"snow_routine": 1.0, "snow_threshold": 0.0, "snow_interval": 2.0, "melt_threshold": 0.5,
          "degree_day_factor": 3.0, "water_holding": 0.1, "refreezing": 0.05}


def _p(**kw):
    return {k: np.array([v], dtype=float) for k, v in {**PARAMS, **kw}.items()}


@pytest.fixture(params=["numpy", "compiled"])
def _day(request):
    """One day of the routine on one element: the numpy step, or the same formulas
    (assim.models.snow.day) as the compiled kernel runs them."""

    def numpy_day(pack, liquid, p, t, **kw):
        a = [np.array([x], dtype=float) for x in (pack, liquid, p, t)]
        pk, lq, fl = snow.snow_step(*a, _p(**kw))
        return float(pk[0]), float(lq[0]), {k: float(v[0]) for k, v in fl.items()}

    def compiled_day(pack, liquid, p, t, **kw):
        from assim.kernels.block import _snow_day

        q = _p(**kw)
        q["_rain_from"] = snow.rain_from(q)
        pk, lq, *fl = _snow_day(pack, liquid, p, t, *(float(q[n][0]) for n in snow.KERNEL_ROWS))
        return pk, lq, dict(zip(snow.FLUXES, fl, strict=True))

    return numpy_day if request.param == "numpy" else compiled_day


def test_accumulation_day(_day):
    """T = -5 degC, P = 10 mm, empty pack: all snow (rain fraction clip(-5/2 + 1/2) = 0), no
    melt (T below the melt threshold), no outflow. Hand-worked from the Hock (2003) form."""
    pack, liquid, f = _day(0.0, 0.0, 10.0, -5.0)
    assert f["snowfall"] == 10.0 and f["rainfall"] == 0.0 and f["melt"] == 0.0
    assert pack == 10.0 and liquid == 0.0 and f["snow_outflow"] == 0.0


def test_melt_day(_day):
    """Pack 20 mm, T = 4 degC, no precipitation: melt = DDF (T - Tm) = 3 x 3.5 = 10.5 mm
    (Hock 2003, eq. 1); the pack keeps 9.5 mm and holds 0.1 x 9.5 = 0.95 mm of the melt as
    liquid; 9.55 mm leaves."""
    pack, liquid, f = _day(20.0, 0.0, 0.0, 4.0)
    assert f["melt"] == pytest.approx(10.5, abs=1e-12)
    assert pack == pytest.approx(9.5, abs=1e-12)
    assert liquid == pytest.approx(0.95, abs=1e-12)
    assert f["snow_outflow"] == pytest.approx(9.55, abs=1e-12)


def test_melt_is_limited_by_the_pack(_day):
    """Pack 2 mm, T = 10 degC: potential melt 28.5 mm, actual 2 mm; with the rain, everything
    leaves (no pack left to hold water)."""
    pack, liquid, f = _day(2.0, 0.5, 4.0, 10.0)
    assert f["melt"] == 2.0 and f["rainfall"] == 4.0
    assert pack == 0.0 and liquid == 0.0
    assert f["snow_outflow"] == pytest.approx(6.5, abs=1e-12)


def test_mixed_day_with_refreezing(_day):
    """T = 0.25 degC inside the transition: rain fraction 0.25/2 + 1/2 = 0.625, so P = 8 mm
    gives 5 mm rain and 3 mm snow; no melt (T < Tm = 0.5); the 1 mm of liquid held from the
    day before refreezes at 0.05 x 3 x (0.5 - 0.25) = 0.0375 mm; the pack (10 + 3 + 0.0375)
    holds 10 % of its solid water as liquid, the rest of the rain leaves."""
    pack, liquid, f = _day(10.0, 1.0, 8.0, 0.25)
    assert f["rainfall"] == pytest.approx(5.0, abs=1e-12)
    assert f["snowfall"] == pytest.approx(3.0, abs=1e-12)
    assert f["melt"] == 0.0
    assert f["refreezing"] == pytest.approx(0.0375, abs=1e-12)
    assert pack == pytest.approx(13.0375, abs=1e-12)
    assert liquid == pytest.approx(1.30375, abs=1e-12)
    assert f["snow_outflow"] == pytest.approx(1.0 - 0.0375 + 5.0 - 1.30375, abs=1e-12)


def test_sharp_transition_and_switched_off_basin(_day):
    """A zero-width transition is a plain threshold; snow_routine 0 turns all snow to rain."""
    assert _day(0.0, 0.0, 5.0, -0.1, snow_interval=0.0)[2]["snowfall"] == 5.0
    assert _day(0.0, 0.0, 5.0, 0.1, snow_interval=0.0)[2]["rainfall"] == 5.0
    pack, liquid, f = _day(0.0, 0.0, 5.0, -20.0, snow_routine=0.0)
    assert f["rainfall"] == 5.0 and pack == 0.0 and f["snow_outflow"] == 5.0


def _forcing(n, n_days, seed, cold=True):
    rng = np.random.default_rng(seed)
    p = np.where(rng.random((n_days, n)) < 0.5, rng.gamma(0.8, 8.0, (n_days, n)), 0.0)
    day = np.arange(n_days)[:, None]
    base = -2.0 + 10.0 * np.sin(2 * np.pi * (day - 100) / 365.25) if cold else 25.0 + 0 * day
    t = base + rng.normal(0, 3.0, (n_days, n))
    e = np.clip(2.0 + 1.5 * np.sin(2 * np.pi * (day - 100) / 365.25), 0.1, None) + 0 * t
    return p, e, t


def _params(model, n, seed):
    rng = np.random.default_rng(seed)
    out = {}
    for p in model.parameters:
        lo, hi = p.low, p.high
        if p.name == "x4":
            hi = 4.0
        if p.name in ("x1", "x3"):
            lo, hi = 50.0, 800.0
        out[p.name] = rng.uniform(lo, hi, n)
    out["snow_routine"] = np.ones(n)
    return out


@pytest.mark.parametrize("base", ["gr4j", "linear_reservoir"])
def test_water_balance_closes_with_the_snowpack(base):
    """sum(states) change = precipitation + exchange - evaporation - runoff every day, to 1e-9,
    over three years of cold winters (snowpack and liquid water included); states in bounds.
    Reference: conservation of mass (the balance the model declares)."""
    m = models.get(base + "+snow")
    n, n_days = 64, 3 * 365
    params = _params(m, n, 1)
    p, e, t = _forcing(n, n_days, 2)
    prepared = m.prepare(params)
    x = m.initial_state(prepared)
    lower, upper = m.bounds(params)
    peak = 0.0
    for d in range(n_days):
        new, fl = m.step(x, {"precipitation": p[d], "pet": e[d], "temperature": t[d]}, prepared)
        gain = sum(fl[k] for k in m.balance.inputs) - sum(fl[k] for k in m.balance.outputs)
        np.testing.assert_allclose(new.sum(axis=1) - x.sum(axis=1), gain, rtol=0, atol=1e-9)
        assert (new >= lower - 1e-12).all() and (new <= upper + 1e-9).all()
        peak = max(peak, float(new[:, m.state_index("snowpack")].max()))
        x = new
    assert peak > 50.0  # the winters did build a pack


@pytest.mark.parametrize("base", ["gr4j", "linear_reservoir"])
def test_rain_only_is_bit_identical_to_the_model_alone(base):
    """No snow falls (warm days), or the basin's snow_routine is 0 (cold days): the wrapped
    model's states and fluxes equal the model alone bit for bit."""
    plain, wrapped = models.get(base), models.get(base + "+snow")
    n, n_days = 16, 400
    params = _params(wrapped, n, 3)
    for cold, routine in ((False, 1.0), (True, 0.0)):
        params["snow_routine"] = np.full(n, routine)
        p, e, t = _forcing(n, n_days, 4, cold=cold)
        qa, qb = plain.prepare({k: params[k] for k in plain.parameter_names}), wrapped.prepare(params)
        xa, xb = plain.initial_state(qa), wrapped.initial_state(qb)
        for d in range(n_days):
            xa, fa = plain.step(xa, {"precipitation": p[d], "pet": e[d]}, qa)
            xb, fb = wrapped.step(xb, {"precipitation": p[d], "pet": e[d], "temperature": t[d]}, qb)
            assert np.array_equal(xa, xb[:, :plain.n_state])
            assert (xb[:, plain.n_state:] == 0).all()
            for k in plain.fluxes:
                assert np.array_equal(fa[k], fb[k]), k


def test_batch_equals_element_runs():
    """A batch gives each element the result it gets alone (bit for bit)."""
    m = models.get("gr4j+snow")
    n = 6
    params = _params(m, n, 5)
    p, e, t = _forcing(n, 200, 6)
    q = m.prepare(params)
    x = m.initial_state(q)
    for d in range(200):
        x, _ = m.step(x, {"precipitation": p[d], "pet": e[d], "temperature": t[d]}, q)
    for i in range(n):
        qi = m.prepare({k: v[i:i + 1] for k, v in params.items()})
        xi = m.initial_state(qi)
        for d in range(200):
            xi, _ = m.step(xi, {"precipitation": p[d, i:i + 1], "pet": e[d, i:i + 1],
                                "temperature": t[d, i:i + 1]}, qi)
        assert np.array_equal(xi[0], x[i])


def test_wrapped_model_declares_the_snow_states_and_parameters():
    m = models.get("gr4j+snow")
    assert m.state_names[-2:] == ("snowpack", "snow_liquid")
    assert "snowpack" in m.default_updated_states()
    assert m.forcings == ("precipitation", "pet", "temperature")
    assert set(snow.NAMES) <= set(m.parameter_names)
    with pytest.raises(KeyError, match="unknown model"):
        models.get("nope+snow")
