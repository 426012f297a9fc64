"""The fused compiled kernel (assim.kernels) is held to the numpy path, its specification.

References: the numpy path itself (assim.perturb.standard_normal, assim.models.gr4j.step,
assim.models.linear_reservoir.step, assim.filters.ensemble_update, assim.engine.run with
``kernel="numpy"``), and the independent member-by-member loop of benchmarks/baseline_loop.py
(Perrin et al. 2003 GR4J, Burgers et al. 1998 EnKF), itself held to assim in
tests/test_baselines.py.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from assim import engine, kernels, models
from assim import perturb as pt
from assim.errors import ConfigError, RunError
from assim.filters import Inflation, Transform, ensemble_update
from assim.kernels.block import METHOD_CODES, analyse_basin, pack_parameters, pinned_rows
from assim.kernels.normals import normals_of_days
from assim.settings import settings_from_config

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

import baseline_loop  # noqa: E402
from test_baselines import _Collect, _synthetic_basins  # noqa: E402


def test_normals_are_the_numbers_of_assim_perturb():
    """The compiled Box-Muller normals equal assim.perturb.standard_normal on consecutive
    days (even and odd first days, before and after 1970) to the last units of the log:
    every other operation is the same, in the same order."""
    rng = np.random.default_rng(3)
    for seed, first, nt in ((0, 16001, 9), (12345, 16000, 8), (7, -31, 5), (2**40, 0, 64)):
        ck = pt.counter_keys(seed, pt.basin_keys(["a", "b", "c"]), np.arange(50), int(rng.integers(1, 99)))
        days = np.arange(first, first + nt)
        want = pt.standard_normal(ck, days).reshape(nt, -1)
        dh = pt._day_hash(np.arange(first >> 1, (days[-1] >> 1) + 1, dtype=np.int64))
        got = np.empty_like(want)
        normals_of_days(ck.reshape(-1), dh, first, nt, got)
        np.testing.assert_allclose(got, want, rtol=4e-16 * 4, atol=1e-15)
        assert np.abs(want).max() > 2.0


@pytest.mark.parametrize("name", ["gr4j", "linear_reservoir", "gr4j+snow", "linear_reservoir+snow"])
def test_compiled_model_step_is_the_numpy_step(name):
    """The compiled model step (the model's element-wise formulas compiled by numba) gives
    the numpy step's states and runoff to 1e-12 over 60 days, for random parameters across
    the valid ranges (X4 from 0.5 to 10 d: every unit-hydrograph length). Behind the snow
    routine (assim.models.snow.day, compiled as it is): temperatures around the thresholds
    (snowfall, melt, mixed days, refreezing), a zero-width transition, basins with the
    routine off, and a snowpack and liquid water in the state from the first day."""
    from assim.kernels.block import step_basin

    m = models.get(name)
    rng = np.random.default_rng(11)
    n = 400
    params = {p.name: rng.uniform(p.low, p.high, n) for p in m.parameters}
    if "snow_routine" in params:
        params["snow_routine"] = (rng.random(n) < 0.8).astype(float)
        params["snow_interval"][rng.random(n) < 0.2] = 0.0
    prepared = m.prepare(params)
    code = kernels.compiled_model(m)
    assert (code >= kernels.block.SNOW) == name.endswith("+snow")
    P, kk = pack_parameters(code, prepared)
    x = m.initial_state(params)
    if name.endswith("+snow"):
        x[:, -2] = rng.gamma(0.5, 40.0, n)
        x[:, -1] = 0.1 * x[:, -2] * rng.random(n)
    X = np.ascontiguousarray(np.asarray(x).T)
    melt = snowfall = 0.0
    for t in range(60):
        p = np.where(rng.random(n) < 0.5, rng.gamma(0.7, 20.0, n), 0.0)
        e = rng.uniform(0.0, 7.0, n)
        temp = rng.normal(0.0, 4.0, n)
        on = rng.random(n) < 0.1  # on the transition's centre (the zero-width threshold's edge)
        if "snow_threshold" in params:
            temp[on] = params["snow_threshold"][on]
        x, fl = m.step(x, {"precipitation": p, "pet": e, "temperature": temp}, prepared)
        q = np.empty(n)
        for c0, c1 in ((0, 150), (150, n)):  # two "basins" of the batch
            step_basin(code, X, c0, c1 - c0, P, kk, p[c0:c1], e[c0:c1], temp[c0:c1], np.empty((4, c1 - c0)),
                       q[c0:c1])
        np.testing.assert_allclose(X.T, x, rtol=1e-12, atol=1e-12, err_msg=f"day {t}")
        np.testing.assert_allclose(q, fl["runoff"], rtol=1e-12, atol=1e-13)
        melt += fl.get("melt", np.zeros(1)).sum()
        snowfall += fl.get("snowfall", np.zeros(1)).sum()
    assert np.asarray(x).sum() > 0
    assert (melt > 1000 and snowfall > 1000) == name.endswith("+snow")


def _kernel_analysis(X, q, y, r, z, method, infl, gate, lower, upper, transform):
    """ensemble_update's one-observation analysis by the kernel, basin by basin."""
    B, N, n = X.shape
    Xa, qa = np.empty_like(X), np.empty_like(q)
    out = []
    tr = transform or Transform()
    kind = "log" if tr.kind == "boxcox" and tr.lam == 0.0 else tr.kind
    code = {"none": 0, "log": 1, "boxcox": 2}[kind]
    y = tr.forward(y)  # the reading in the assimilation space, as the engine passes it
    for b in range(B):
        Xk, qk = np.ascontiguousarray(X[b].T), q[b].copy()
        lo, hi = np.ascontiguousarray(lower[b].T), np.ascontiguousarray(upper[b].T)
        pinned = np.zeros(n, dtype=bool)
        pinned_rows(Xk, 0, N, np.arange(n), lo, hi, pinned)
        res = analyse_basin(Xk, 0, N, np.arange(n), qk, y[b], r[b], z[b], METHOD_CODES[method],
                            infl.multiplicative, infl.rtps, infl.rtpp, gate or 0.0, True, code,
                            tr.offset, tr.lam, lo, hi, np.empty(N), np.empty(N), np.empty(N), pinned)
        Xa[b], qa[b] = Xk.T, qk
        out.append(res)
    used, gated, innov, iv, clipped = (np.array(v) for v in zip(*out, strict=True))
    return Xa, qa, used, gated, innov, iv, clipped


def _random_case(rng):
    B = int(rng.integers(1, 6))
    N = int(rng.integers(2, 40))
    n = int(rng.integers(1, 4))
    scale = 10.0 ** rng.uniform(-1, 3, n)
    X = rng.normal(1.0, rng.uniform(0.01, 0.5), (B, N, n)) * scale
    q = np.abs(X[..., 0] * rng.uniform(0.01, 0.3) + rng.normal(0, rng.uniform(0.1, 3), (B, N)))
    y = q.mean(axis=1) * rng.uniform(0.5, 1.5, B) + rng.normal(0, 1, B)
    r = (rng.uniform(0.02, 0.5, B) * (np.abs(y) + 0.1)) ** 2
    y[rng.random(B) < 0.15] = np.nan  # gaps
    if rng.random() < 0.2:
        X[0, 0, 0] = np.nan  # a state gone bad: the basin is left alone
    kind = rng.choice(["none", "log", "boxcox"])
    transform = None if kind == "none" else Transform(kind, offset=0.01, lam=float(rng.choice([0.0, 0.3, 0.5])))
    if transform is not None:
        r = transform.variance(np.abs(y), r)
        y = np.abs(y)
    infl = Inflation(float(rng.choice([1.0, rng.uniform(1.0, 1.3)])),
                     float(rng.choice([0.0, rng.uniform(0, 1)])), float(rng.choice([0.0, rng.uniform(0, 1)])))
    gate = float(rng.choice([0.0, 1.0, 3.0]))
    mean = np.nanmean(X, axis=1, keepdims=True)
    sd = np.nanstd(X, axis=1, keepdims=True)
    lower = np.broadcast_to(mean - rng.uniform(0.3, 3) * sd, X.shape).copy()
    upper = np.broadcast_to(mean + rng.uniform(0.3, 3) * sd, X.shape).copy()
    if n > 1 and rng.random() < 0.3:  # a row held at 0 (a unit-hydrograph slot beyond X4) in one basin
        X[-1, :, -1] = lower[-1, :, -1] = upper[-1, :, -1] = 0.0
    return X, q, y, r, rng.standard_normal((B, N)), str(rng.choice(list(METHOD_CODES))), infl, gate, lower, upper, transform


def _close(got, want, scale, msg, tol=1e-12):
    """|got - want| <= tol * scale elementwise, NaN where the other is NaN."""
    got, want = np.asarray(got), np.asarray(want)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(want), err_msg=msg)
    ok = ~np.isnan(want)
    err = np.abs(got - want)[ok]
    limit = (tol * np.broadcast_to(scale, want.shape))[ok]
    assert (err <= limit).all(), f"{msg}: worst {(err / limit).max()} x the tolerance"


def test_kernel_analysis_is_ensemble_update_on_thousands_of_cases():
    """On 3,000 random one-observation cases (1-5 basins, 2-39 members, 1-3 states of any
    scale, gaps, a bad state, gate, bounds, a row held at 0 by its bounds, multiplicative
    inflation, RTPS, RTPP, log and Box-Cox transforms, enkf/etkf/eakf), the kernel's analysis equals
    assim.filters.ensemble_update with the discharge as the last analysis column: states and
    discharge to 1e-12 of their scale, the innovation and its variance, which readings were
    used and gated, and the clipped water."""
    rng = np.random.default_rng(2026)
    n_used = n_gated = n_clipped = 0
    for case in range(3000):
        X, q, y, r, z, method, infl, gate, lower, upper, transform = _random_case(rng)
        B, N, n = X.shape
        full = np.concatenate([X, q[..., None]], axis=-1)
        lo = np.concatenate([lower, np.zeros((B, N, 1))], axis=-1)
        hi = np.concatenate([upper, np.full((B, N, 1), np.inf)], axis=-1)
        a = ensemble_update(full, q[..., None], y[:, None], r[:, None], method=method, inflation=infl,
                            gate_sigma=gate or None, lower=lo, upper=hi, transform=transform,
                            obs_noise=z[..., None])
        Xa, qa, used, gated, innov, iv, clipped = _kernel_analysis(X, q, y, r, z, method, infl, gate, lower,
                                                                  upper, transform)
        msg = f"case {case}: {method} {infl} gate {gate} {transform}"
        size = np.nanmax(np.abs(full), axis=1, keepdims=True) + 1.0
        np.testing.assert_array_equal(used, a.used[:, 0], err_msg=msg)
        np.testing.assert_array_equal(gated, a.gated[:, 0], err_msg=msg)
        _close(Xa, a.states[..., :n], size[..., :n], msg)
        _close(qa, a.states[..., n], size[..., n], msg)
        np.testing.assert_allclose(innov, a.innovation[:, 0], rtol=1e-12, atol=1e-12, err_msg=msg)
        np.testing.assert_allclose(iv, a.innovation_variance[:, 0], rtol=1e-12, atol=0, err_msg=msg)
        _close(clipped, a.clipped[:, :n].sum(axis=1), N * size[:, 0, :n].max(axis=-1), msg)
        n_used += used.sum()
        n_gated += gated.sum()
        n_clipped += (clipped != 0).sum()
    assert n_used > 3000 and n_gated > 300 and n_clipped > 1000  # every branch was taken


def _inputs(n_basin=3, n_days=150, seed=2):
    p, e, obs, area, params, ids, days = _synthetic_basins(n_basin=n_basin, n_days=n_days, seed=seed)
    rej = np.zeros(obs.shape, bool)
    rej[0, 5:9] = True
    return engine.Inputs(ids, pt.basin_keys(ids), area, days, p, e, obs, rej, params)


def _run(inputs, kernel, model="gr4j", until_day=None, **kw):
    m = models.get(model)
    base = dict(mode="assimilate", members=12, seed=9, update_states=m.default_updated_states(), float32=False,
                scheduler="synchronous", time_block_days=40, gate_sigma=5.0, spinup_days=10,
                write_states=m.state_names[:2], kernel=kernel)
    base.update(kw)
    sink = _Collect()
    summary = engine.run(m, inputs, engine.Settings(**base), sink, until_day=until_day)
    return sink, summary


RUNS = [
    dict(),
    dict(method="etkf"),
    dict(method="eakf", inflation=1.1),
    dict(method="enkf", rtpp=0.3, inflation=1.05, transform="log"),
    dict(method="etkf", transform="boxcox", gate_sigma=2.0),
    dict(method="enkf", rtps=0.5, parameter_sd={"x1": 0.2, "x3": 0.1}),
    dict(mode="openloop", member_chunk=5, time_block_days=33),
    dict(basin_chunk=2, time_block_days=7),
]


def _assert_runs_close(a, sa, b, sb, tol):
    assert list(a.blocks[0]) == list(b.blocks[0])
    for name in a.blocks[0]:
        x, y = a[name], b[name]
        assert x.dtype == y.dtype, name
        if x.dtype.kind == "f":
            np.testing.assert_array_equal(np.isnan(x), np.isnan(y), err_msg=name)
            # the clipped water is a member sum of state changes: its rounding is that of the states
            scale = 12 * np.abs(sa.state.states).max() if name == "clipped_water" else np.nanmax(np.abs(x))
            np.testing.assert_allclose(y, x, rtol=tol, atol=tol * scale, err_msg=name)
        else:
            np.testing.assert_array_equal(y, x, err_msg=name)
    np.testing.assert_allclose(sb.state.states, sa.state.states, rtol=tol, atol=tol * 1e3)
    assert sorted(sb.state.ar1) == sorted(sa.state.ar1)
    for n in sa.state.ar1:
        np.testing.assert_allclose(sb.state.ar1[n], sa.state.ar1[n], rtol=1e-13, atol=1e-14, err_msg=n)
    np.testing.assert_array_equal(sb.n_used, sa.n_used)
    np.testing.assert_array_equal(sb.n_gated, sa.n_gated)
    np.testing.assert_array_equal(sb.state.collapse_days, sa.state.collapse_days)


@pytest.mark.parametrize("kw", RUNS, ids=[str(k) for k in RUNS])
def test_engine_on_the_kernel_equals_the_numpy_engine(kw):
    """assim.engine.run with the fused kernel equals the numpy engine (the specification)
    over a whole 150-day run: every recorded output, the counters, the end state (ensemble,
    AR(1) errors). Discharge and states to 1e-12 relative; with RTPS to 1e-9, where the numpy
    path takes the analysis spread from sums of small quantities (about 1e-10 precise) and
    the kernel from deviations."""
    inputs = _inputs()
    (a, sa), (b, sb) = _run(inputs, "numpy", **kw), _run(inputs, "compiled", **kw)
    _assert_runs_close(a, sa, b, sb, 1e-9 if kw.get("rtps") else 1e-12)
    if kw.get("mode") != "openloop":
        assert sa.n_used.sum() > 200


class _Issues(_Collect):
    def __init__(self):
        super().__init__()
        self.issues = []

    def write_issues(self, start, discharge):
        assert start == sum(d.shape[1] for d in self.issues)
        self.issues.append(np.array(discharge))


HINDCASTS = [
    dict(gate_sigma=2.0),
    dict(method="eakf", inflation=1.1, rtpp=0.3),
    dict(method="etkf", transform="log", basin_chunk=2),
    dict(mode="openloop", member_chunk=5),
]


@pytest.mark.parametrize("kw", HINDCASTS, ids=[str(k) for k in HINDCASTS])
def test_hindcast_on_the_kernel_equals_the_numpy_engine(kw, monkeypatch):
    """A hindcast whose blocks run on the fused kernel (the ensemble and its AR(1) errors kept
    at the end of each issue day, the leads run from them) equals the numpy engine, the
    specification: every forecast of every issue to 1e-12, the end state and the reading
    counts. Blocks of 21 days with issues every 10 days from day 21: an issue on a block's
    first day (21) and last day (41), two issues in a block, a block without issues; gaps
    in the readings, the gate, bounds, inflation, RTPP and a log transform."""
    from assim.engine import fused

    inputs = _inputs(n_days=120)
    on_kernel = []
    monkeypatch.setattr(fused, "advance", lambda *a, _f=fused.advance, **k: on_kernel.append(k) or _f(*a, **k))
    runs = []
    for kernel in ("numpy", "compiled"):
        m = models.get("gr4j")
        base = dict(mode="assimilate", members=12, seed=9, update_states=m.default_updated_states(),
                    float32=False, scheduler="synchronous", time_block_days=21, gate_sigma=5.0, spinup_days=21,
                    kernel=kernel)
        base.update(kw)
        sink = _Issues()
        summary = engine.run(m, inputs, engine.Settings(**base), sink, hindcast=(10, 6, "observed"))
        runs.append((np.concatenate(sink.issues, axis=1), summary))
    (a, sa), (b, sb) = runs
    assert a.shape == (3, 10, 6, 12)  # issues on days 21, 31, ..., 111
    n_chunks = 2 if kw.get("basin_chunk") else 3 if kw.get("member_chunk") else 1
    assert sum(len(k["issue_index"]) for k in on_kernel) == 10 * n_chunks  # every issue on the kernel
    np.testing.assert_allclose(b, a, rtol=1e-12, atol=1e-12 * np.abs(a).max())
    np.testing.assert_allclose(sb.state.states, sa.state.states, rtol=1e-12, atol=1e-9)
    for n in ("precipitation", "pet"):
        np.testing.assert_allclose(sb.state.ar1[n], sa.state.ar1[n], rtol=1e-13, atol=1e-14)
    np.testing.assert_array_equal(sb.n_used, sa.n_used)
    np.testing.assert_array_equal(sb.n_gated, sa.n_gated)
    if kw.get("mode") != "openloop":
        assert sa.n_used.sum() > 100
    assert np.abs(a).max() > 0


@pytest.mark.parametrize("model", ["gr4j", "linear_reservoir"])
def test_forecast_leads_on_the_kernel_equal_the_numpy_leads(model, monkeypatch):
    """An operational forecast's leads on the compiled kernel (assim.kernels.run_leads, many
    columns over every lead in cache) equal the numpy model steps, the specification, to
    1e-12, from an analysed ensemble; with kept states the leads stay on numpy."""
    from assim import kernels as kmod

    inputs = _inputs(n_days=80)
    if model == "linear_reservoir":
        inputs = engine.Inputs(inputs.basin_ids, inputs.keys, inputs.area_km2, inputs.days, inputs.precipitation,
                               inputs.pet, inputs.observed, inputs.rejected,
                               {"k": np.array([0.1, 0.3, 0.05]), "c": np.array([0.02, 0.0, 0.05])})
    _, summary = _run(inputs, "numpy", model=model, write_states=(), until_day=int(inputs.days[60]))
    calls = []
    monkeypatch.setattr(kmod, "run_leads", lambda *a, _f=kmod.run_leads, **k: calls.append(1) or _f(*a, **k))
    m = models.get(model)
    got = {}
    for kernel in ("numpy", "auto"):
        s = engine.Settings(mode="assimilate", members=12, seed=9, update_states=m.default_updated_states(),
                            kernel=kernel)
        got[kernel] = engine.forecast_issue(m, inputs, s, summary.state, 15, "observed")
    assert len(calls) == 1
    a, b = got["numpy"], got["auto"]
    assert a.shape == (3, 15, 12) and np.abs(a).max() > 0
    np.testing.assert_allclose(b, a, rtol=1e-12, atol=1e-12 * np.abs(a).max())


def test_linear_reservoir_on_the_kernel_equals_the_numpy_engine():
    """The linear reservoir's compiled form (assim.models.linear_reservoir.store) in the whole
    run equals the numpy engine to 1e-12."""
    inputs = _inputs()
    inputs = engine.Inputs(inputs.basin_ids, inputs.keys, inputs.area_km2, inputs.days, inputs.precipitation,
                           inputs.pet, inputs.observed, inputs.rejected,
                           {"k": np.array([0.1, 0.3, 0.05]), "c": np.array([0.02, 0.0, 0.05])})
    kw = dict(model="linear_reservoir", write_states=("store",), method="etkf")
    (a, sa), (b, _) = _run(inputs, "numpy", **kw), _run(inputs, "compiled", **kw)
    for name in ("discharge", "discharge_analysis", "store", "innovation"):
        np.testing.assert_allclose(b[name], a[name], rtol=1e-12, atol=1e-12 * np.nanmax(np.abs(a[name])))
    assert sa.n_used.sum() > 200


def test_kernel_run_equals_the_loop_baseline():
    """benchmarks/baseline_loop.py, an independent member loop (Perrin et al. 2003 GR4J;
    Burgers et al. 1998 EnKF with centred perturbed observations), equals the engine on the
    fused kernel over a whole run: prior and analysed discharge every day and the end states
    to 1e-9."""
    p, e, obs, area, params, ids, days = _synthetic_basins()
    m = models.get("gr4j")
    inputs = engine.Inputs(ids, pt.basin_keys(ids), area, days, p, e, obs, np.zeros(obs.shape, bool), params)
    settings = engine.Settings(mode="assimilate", members=12, seed=9, update_states=("production_store", "routing_store"),
                               float32=False, scheduler="synchronous", time_block_days=40, gate_sigma=5.0,
                               kernel="compiled")
    sink = _Collect()
    summary = engine.run(m, inputs, settings, sink)
    loop = baseline_loop.run(p, e, obs, area, params, ids, days, members=12, seed=9, gate_sigma=5.0)
    np.testing.assert_allclose(loop["discharge"], sink["discharge"], rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(loop["discharge_analysis"], sink["discharge_analysis"], rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(loop["states"], summary.state.states, rtol=1e-9, atol=1e-9)
    assert summary.n_used.sum() > 100


def test_runs_the_kernel_cannot_serve_take_the_numpy_path():
    """State noise, joint parameter estimation and a user model without a compiled form run
    on the numpy path (common practice, no published source: a fallback must give the
    specification's numbers): bit for bit the numpy engine's."""
    inputs = _inputs(n_days=60)
    for kw in (dict(state_noise={"routing_store": 0.5}), dict(estimate=("x1",), parameter_sd={"x1": 0.2})):
        (a, _), (b, _) = _run(inputs, "numpy", **kw), _run(inputs, "auto", **kw)
        for name in a.blocks[0]:
            np.testing.assert_array_equal(a[name], b[name])
    m = models.get("gr4j")
    user = models.Model(**{**{f: getattr(m, f) for f in m.__dataclass_fields__}, "name": "gr4j",
                           "step": lambda s, f, p: m.step(s, f, p)})
    assert kernels.compiled_model(user) is None
    assert engine.Settings().kernel == "auto"


def test_asking_for_the_kernel_where_it_cannot_serve_is_a_config_error():
    """ensemble.kernel: compiled with state noise is refused with the key named, before the
    run (common practice, no published source: a setting that cannot be honoured is an
    error, not silently ignored)."""
    from assim.config import load_config

    cfg = load_config(Path(__file__).resolve().parents[1] / "config" / "config.yaml",
                      ensemble={"kernel": "compiled"}, perturbation={"state_noise": {"routing_store": 0.5}})
    with pytest.raises(ConfigError, match="ensemble.kernel"):
        settings_from_config(cfg, models.get("gr4j"), "assimilate")
    with pytest.raises(ConfigError, match="state_noise"):
        _run(_inputs(n_days=20), "compiled", state_noise={"routing_store": 0.5})
    cfg = load_config(Path(__file__).resolve().parents[1] / "config" / "config.yaml")
    assert settings_from_config(cfg, models.get("gr4j"), "assimilate").kernel == "auto"


def test_a_state_gone_bad_on_the_kernel_is_named():
    """A non-finite state stops the run with the basin, date and state named, as on the numpy
    path (the block is run again there, checked every day)."""
    inputs = _inputs(n_days=60)
    prec = inputs.precipitation.copy()
    prec[1, 25] = np.inf
    bad = engine.Inputs(inputs.basin_ids, inputs.keys, inputs.area_km2, inputs.days, prec, inputs.pet,
                        inputs.observed, inputs.rejected, inputs.parameters)
    with pytest.raises(RunError) as err:
        _run(bad, "compiled")
    text = str(err.value)
    assert "basin-1" in text and str(np.datetime64(int(inputs.days[25]), "D")) in text


def test_cache_folder_rule(tmp_path):
    """A read-only install caches in $XDG_CACHE_HOME/assim/numba (default ~/.cache); a
    writable one beside the sources (numba's default); an explicit NUMBA_CACHE_DIR always
    wins. Common practice, no published source (the XDG base directory convention)."""
    env = {"XDG_CACHE_HOME": str(tmp_path / "c")}
    assert kernels.cache_dir(tmp_path, env, writable=lambda p: False) == str(tmp_path / "c" / "assim" / "numba")
    assert kernels.cache_dir(tmp_path, {}, writable=lambda p: False) == str(Path.home() / ".cache" / "assim" / "numba")
    assert kernels.cache_dir(tmp_path, env, writable=lambda p: True) is None
    assert kernels.cache_dir(tmp_path, {**env, "NUMBA_CACHE_DIR": "/x"}, writable=lambda p: False) is None


def test_compiled_code_is_cached_in_the_user_folder_and_reused(tmp_path):
    """With a read-only copy of the package and the cache in a user folder (as the rule above
    chooses), the first process compiles into that folder, nothing is written into the
    package, and a second process (a fresh dask worker, say) loads the compiled code from the
    cache instead of compiling (numba's dispatcher counts a cache hit)."""
    src = Path(kernels.__file__).resolve().parents[2]
    pkg = tmp_path / "site" / "assim"
    shutil.copytree(src / "assim", pkg, ignore=shutil.ignore_patterns("__pycache__"))
    for root, _, files in os.walk(pkg):
        for f in files:
            os.chmod(Path(root) / f, 0o444)
    cache = tmp_path / "cache" / "assim" / "numba"
    env = dict(os.environ, PYTHONPATH=str(pkg.parent), NUMBA_CACHE_DIR=str(cache))
    code = ("import assim.kernels.normals as n, numpy as np; "
            "print(n.normal_pair(np.uint64(1), np.uint64(2)), sum(n.normal_pair.stats.cache_hits.values()))")
    runs = [subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                           cwd=tmp_path, timeout=300) for _ in range(2)]
    for run in runs:
        assert run.returncode == 0, run.stderr
    first, second = (r.stdout.rsplit(" ", 1) for r in runs)
    assert first[0] == second[0]  # the same numbers
    assert first[1].strip() == "0" and second[1].strip() == "1"  # compiled, then loaded from the cache
    assert list(cache.rglob("*.nbi"))
    assert not list(pkg.rglob("*.nbi"))


# ---------------------------------------------------------------- the snow routine on the kernel


SNOW_PARAMS = {"snow_threshold": 0.5, "snow_interval": 2.0, "melt_threshold": 0.0, "degree_day_factor": 3.5,
               "water_holding": 0.1, "refreezing": 0.05}


def _snow_inputs(n_basin=3, n_days=150, seed=2, routine=(1.0, 0.0, 1.0), intervals=(2.0, 2.0, 0.0)):
    """The synthetic basins with a winter's temperature (accumulation from the first days,
    mixed days around the threshold, melt in spring) and the snow routine's parameters:
    basin-1 rain only (snow_routine 0) between two snow basins, one with a zero-width
    transition."""
    inputs = _inputs(n_basin, n_days, seed)
    rng = np.random.default_rng(seed + 100)
    day = np.arange(n_days)
    temp = -4.0 + 9.0 * (day / n_days) ** 2 + rng.normal(0.0, 3.0, (n_basin, n_days))
    params = {**inputs.parameters, **{k: np.full(n_basin, v) for k, v in SNOW_PARAMS.items()}}
    params["snow_routine"] = np.array(routine[:n_basin])
    params["snow_interval"] = np.array(intervals[:n_basin])
    return engine.Inputs(inputs.basin_ids, inputs.keys, inputs.area_km2, inputs.days, inputs.precipitation,
                         inputs.pet, inputs.observed, inputs.rejected, params, temperature=temp)


SNOW_RUNS = [
    dict(),
    dict(method="etkf", temperature=pt.GaussianAR1(2.0, 0.8)),
    dict(method="eakf", inflation=1.03, temperature=pt.GaussianAR1(1.0, 0.0)),
    dict(method="enkf", rtpp=0.3, inflation=1.02, transform="log", temperature=pt.GaussianAR1(1.5, 0.6)),
    dict(method="etkf", transform="boxcox", gate_sigma=2.0, temperature=pt.GaussianAR1(1.5, 0.6)),
    dict(method="enkf", rtps=0.5, temperature=pt.GaussianAR1(1.5, 0.6)),
    dict(mode="openloop", member_chunk=5, time_block_days=33, temperature=pt.GaussianAR1(1.5, 0.6)),
    dict(basin_chunk=2, time_block_days=7, temperature=pt.GaussianAR1(1.5, 0.6)),
]


@pytest.mark.parametrize("kw", SNOW_RUNS, ids=[str(k) for k in SNOW_RUNS])
def test_snow_on_the_kernel_equals_the_numpy_engine(kw):
    """gr4j+snow on the fused kernel (the snow routine's element-wise formulas compiled as
    they are, the temperature error from the same counter-based normals of stream 5) equals
    the numpy engine, its specification, over a 150-day winter: accumulation, mixed days,
    melt, a zero-width transition, a rain-only basin, gaps and rejected readings, the gate,
    the snowpack updated by the filter and clipped at zero, enkf/etkf/eakf with inflation,
    RTPP, RTPS; every recorded output, the counters and the end state (snowpack and the
    temperature's AR(1) error included) to 1e-12 (RTPS 1e-9, as above). The inflation is
    mild: with 1.1 on every analysis the snowpack's spread only grows, and the run itself
    (numpy against numpy) turns a 1e-15 change of the precipitation into 1e-8 by spring."""
    inputs = _snow_inputs()
    run_kw = dict(model="gr4j+snow", write_states=("snowpack", "snow_liquid", "production_store"), **kw)
    (a, sa), (b, sb) = _run(inputs, "numpy", **run_kw), _run(inputs, "compiled", **run_kw)
    _assert_runs_close(a, sa, b, sb, 1e-9 if kw.get("rtps") else 1e-12)
    pack = a["snowpack"]
    assert pack[0].max() > 20.0 and pack[2].max() > 20.0 and (pack[1] == 0).all()  # snow, and none in basin-1
    assert (np.diff(pack[0].mean(axis=-1)) < -1.0).any()  # it melted
    if kw.get("mode") != "openloop":
        assert sa.n_used.sum() > 150
        assert np.abs(b["discharge_analysis"] - b["discharge"]).max() > 0.1


def test_snow_hindcast_and_forecast_on_the_kernel_equal_the_numpy_engine(monkeypatch):
    """gr4j+snow in a hindcast whose blocks run on the kernel (the ensemble, the forcing
    errors and the temperature's AR(1) error kept at each issue day) and whose leads run on
    the kernel too (kernels.run_leads behind the snow routine) equals the numpy engine to
    1e-12: every forecast of every issue through a winter, the end state and its errors."""
    from assim import kernels as kmod
    from assim.engine import fused

    inputs = _snow_inputs()
    on_kernel, leads = [], []
    monkeypatch.setattr(fused, "advance", lambda *a, _f=fused.advance, **k: on_kernel.append(k) or _f(*a, **k))
    monkeypatch.setattr(kmod, "run_leads", lambda *a, _f=kmod.run_leads, **k: leads.append(k) or _f(*a, **k))
    runs = []
    for kernel in ("numpy", "compiled"):
        m = models.get("gr4j+snow")
        s = engine.Settings(mode="assimilate", members=12, seed=9, update_states=m.default_updated_states(),
                            float32=False, scheduler="synchronous", time_block_days=21, gate_sigma=5.0,
                            spinup_days=21, kernel=kernel, temperature=pt.GaussianAR1(1.5, 0.6))
        sink = _Issues()
        summary = engine.run(m, inputs, s, sink, hindcast=(10, 6, "observed"))
        runs.append((np.concatenate(sink.issues, axis=1), summary))
    (a, sa), (b, sb) = runs
    assert a.shape[:2] == (3, 13) and np.abs(a).max() > 0
    assert sum(len(k["issue_index"]) for k in on_kernel) == 13
    assert leads and all(k["temperature"] is not None for k in leads)
    np.testing.assert_allclose(b, a, rtol=1e-12, atol=1e-12 * np.abs(a).max())
    np.testing.assert_allclose(sb.state.states, sa.state.states, rtol=1e-12, atol=1e-9)
    assert sorted(sb.state.ar1) == sorted(sa.state.ar1) == ["pet", "precipitation", "temperature"]
    for n in sa.state.ar1:
        np.testing.assert_allclose(sb.state.ar1[n], sa.state.ar1[n], rtol=1e-13, atol=1e-14, err_msg=n)


def test_linear_reservoir_behind_the_snow_routine_on_the_kernel():
    """linear_reservoir+snow on the kernel equals the numpy engine to 1e-12 (any model with a
    compiled form has one behind the snow routine)."""
    inputs = _snow_inputs()
    params = {**{k: v for k, v in inputs.parameters.items() if not k.startswith("x")},
              "k": np.array([0.1, 0.3, 0.05]), "c": np.array([0.02, 0.0, 0.05])}
    inputs = engine.Inputs(inputs.basin_ids, inputs.keys, inputs.area_km2, inputs.days, inputs.precipitation,
                           inputs.pet, inputs.observed, inputs.rejected, params, temperature=inputs.temperature)
    kw = dict(model="linear_reservoir+snow", write_states=("store", "snowpack"), method="etkf",
              temperature=pt.GaussianAR1(1.0, 0.5))
    (a, sa), (b, sb) = _run(inputs, "numpy", **kw), _run(inputs, "compiled", **kw)
    _assert_runs_close(a, sa, b, sb, 1e-12)
    assert a["snowpack"][0].max() > 20.0 and sa.n_used.sum() > 150


def test_a_rain_only_basin_beside_snow_basins_is_bit_identical_on_the_kernel():
    """A run with snow basins is one gr4j+snow run in which a rain-only basin has
    snow_routine 0: on the kernel that basin's numbers (every output, its end state and
    AR(1) errors) are bit for bit those of the same basin in a gr4j run without any snow
    basin, whatever the chunking (the snow routine passes its precipitation through with
    exact zeros; its snowpack has no spread, so the analysis leaves it at zero). Reference:
    issue #15 ("a rain-only basin pays nothing"); the model alone (assim.models.gr4j)."""
    snowy = _snow_inputs(routine=(1.0, 0.0, 1.0), intervals=(2.0, 2.0, 2.0))
    plain = engine.Inputs(snowy.basin_ids, snowy.keys, snowy.area_km2, snowy.days, snowy.precipitation, snowy.pet,
                          snowy.observed, snowy.rejected, {k: snowy.parameters[k] for k in ("x1", "x2", "x3", "x4")})
    for kw in (dict(method="eakf", inflation=1.1), dict(method="enkf", basin_chunk=1, rtps=0.4),
               dict(method="etkf", basin_chunk=2, transform="log")):
        a, sa = _run(plain, "compiled", write_states=("production_store", "routing_store"), **kw)
        b, sb = _run(snowy, "compiled", model="gr4j+snow", temperature=pt.GaussianAR1(1.5, 0.6),
                     write_states=("production_store", "routing_store", "snowpack"), **kw)
        for name in a.blocks[0]:
            np.testing.assert_array_equal(b[name][1], a[name][1], err_msg=name)
        assert (b["snowpack"][1] == 0).all() and b["snowpack"][0].max() > 20.0
        np.testing.assert_array_equal(sb.state.states[1, :, :-2], sa.state.states[1])
        for n in ("precipitation", "pet"):
            np.testing.assert_array_equal(sb.state.ar1[n][1], sa.state.ar1[n][1])
        assert not np.array_equal(b["discharge"][0], a["discharge"][0])  # the snow basin did differ
        assert sa.n_used[1] > 50 and sb.n_used[1] == sa.n_used[1]


def test_the_snow_routine_keeps_its_compiled_form_in_another_process():
    """A model travels to a process worker by value (cloudpickle): gr4j+snow still has its
    compiled form there, so every scheduler runs it on the kernel."""
    import cloudpickle

    m = models.get("gr4j+snow")
    copy = cloudpickle.loads(cloudpickle.dumps(m))
    assert kernels.compiled_model(copy) == kernels.compiled_model(m) == kernels.block.GR4J + kernels.block.SNOW
    assert kernels.compiled_model(models.get("linear_reservoir+snow")) == kernels.block.LINEAR_RESERVOIR + 2
    user = models.Model(**{**{f: getattr(m, f) for f in m.__dataclass_fields__},
                           "step": lambda s, f, p: m.step(s, f, p)})
    assert kernels.compiled_model(user) is None


@pytest.mark.parametrize("base", ["gr4j", "linear_reservoir"])
def test_water_balance_closes_with_the_snowpack_on_the_kernel(base):
    """The compiled step behind the snow routine conserves water: every day of three years
    of cold winters, the change of all its states (snowpack and liquid water included) equals
    precipitation + exchange - evaporation - the kernel's runoff to 1e-9 (the evaporation
    and exchange from the numpy step of the same start-of-day state, which the kernel
    matches to 1e-12). Reference: conservation of mass (the balance the model declares)."""
    from test_snow import _forcing, _params

    from assim.kernels.block import step_basin

    m = models.get(base + "+snow")
    n, n_days = 64, 3 * 365
    params = _params(m, n, 1)
    p, e, t = _forcing(n, n_days, 2)
    prepared = m.prepare(params)
    code = kernels.compiled_model(m)
    P, kk = pack_parameters(code, prepared)
    X = np.ascontiguousarray(m.initial_state(prepared).T)
    assert "runoff" in m.balance.outputs
    peak = 0.0
    for d in range(n_days):
        before = X.copy()
        _, fl = m.step(before.T, {"precipitation": p[d], "pet": e[d], "temperature": t[d]}, prepared)
        q = np.empty(n)
        step_basin(code, X, 0, n, P, kk, p[d], e[d], t[d], np.empty((4, n)), q)
        gain = sum(fl[k] for k in m.balance.inputs) - sum(fl[k] for k in m.balance.outputs if k != "runoff") - q
        np.testing.assert_allclose(X.sum(axis=0) - before.sum(axis=0), gain, rtol=0, atol=1e-9)
        peak = max(peak, float(X[m.state_index("snowpack")].max()))
    assert peak > 50.0  # the winters did build a pack
