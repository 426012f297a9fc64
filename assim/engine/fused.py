"""The engine's block of days on the fused compiled kernel (:mod:`assim.kernels`).

:func:`advance` is :func:`assim.engine.advance` for the runs the kernel serves: a model with
a compiled form, no additive state noise, no estimated parameters and no hindcast issue in
the block. It returns the same :class:`assim.engine.BlockResult` (to 1e-12; see
``tests/test_kernels.py``), or None when a state went non-finite, and the caller then runs
the block on the numpy path, which names the first bad day and state.
"""

from __future__ import annotations

import numpy as np

from assim import perturb as pt
from assim.engine.analysis import _transform as _transform_of_settings
from assim.engine.analysis import desroziers_series
from assim.errors import ConfigError


def kernel_choice(model, settings) -> str | None:
    """Why the fused kernel cannot run ``settings`` with ``model``, None if it can."""
    from assim.kernels import compiled_model

    if compiled_model(model) is None:
        return f"model {model.name!r} has no compiled form"
    if any(v > 0 for v in settings.state_noise.values()):
        return "perturbation.state_noise is set"
    if settings.estimate:
        return "filter.parameters.estimate is set"
    if settings.adaptive_inflation:
        return "filter.inflation.adaptive is enabled"
    if settings.keeps_window:
        return "the fixed-lag smoother (filter.smoother.window_days > 0, or --mode reanalysis) runs on numpy"
    return None


def applicable(model, settings) -> bool:
    """Whether a block of this run goes to the fused kernel (``ensemble.kernel``)."""
    if settings.kernel == "numpy":
        return False
    why = kernel_choice(model, settings)
    if why is not None and settings.kernel == "compiled":
        raise ConfigError(f"the compiled kernel cannot run this: {why}", variable="ensemble.kernel")
    return why is None


def advance(model, inputs, state, settings, t0, t1, *, members, first_output, first_analysis,
            collect=True, fixed=None):
    """:func:`assim.engine.advance` on the fused kernel (see the module docstring)."""
    from assim import engine as en
    from assim import kernels

    s = settings
    nb, nm, ns = inputs.n_basin, len(members), model.n_state
    days = inputs.days[t0:t1]
    nt = len(days)
    code = kernels.compiled_model(model)
    params = {k: np.array(v, dtype=np.float64) for k, v in state.parameters.items()}
    prepared, lower, upper = fixed if fixed is not None else en.fixed_parameters(model, params)
    P, kk = kernels.block.pack_parameters(code, prepared)
    X = np.array(np.asarray(state.states, dtype=np.float64).reshape(nb * nm, ns).T, order="C")
    ck = np.stack([pt.counter_keys(s.seed, inputs.keys, members, k)
                   for k in (pt.PRECIPITATION, pt.PET, pt.OBSERVATION)])
    e_prev = np.stack([np.asarray(state.ar1[n], dtype=np.float64).reshape(nb, nm) for n in en.FORCINGS])
    ar1 = []
    for err in (s.precipitation, s.pet):
        sigma = err.sigma
        ar1 += [err.phi, float(np.sqrt(1.0 - err.phi**2)), sigma, 0.5 * sigma * sigma]
    first_day = int(days[0]) if nt else 0
    n_pairs = ((int(days[-1]) >> 1) - (first_day >> 1) + 1) if nt else 0
    dh = pt._day_hash(np.arange(first_day >> 1, (first_day >> 1) + n_pairs, dtype=np.int64))
    area = inputs.area_km2 / en.SECONDS_PER_DAY_OVER_1000
    assim = s.assimilate
    upd = np.array([model.state_index(n) for n in s.update_states], dtype=np.int64)
    if assim:
        obs_blk = inputs.observed[:, t0:t1]
        has_blk = np.isfinite(obs_blk)
        var_blk = s.obs_error.variance(obs_blk)
        sd_blk = np.sqrt(np.where(has_blk, var_blk, np.inf))
        status_blk = np.where(inputs.rejected[:, t0:t1], en.OBS_REJECTED, en.OBS_MISSING).astype(np.int8)
        tr = _transform_of_settings(s)
        y = obs_blk if tr is None else tr.forward(obs_blk)
        r = var_blk if tr is None else tr.variance(obs_blk, var_blk)
        analysed = (t0 + np.arange(nt) >= first_analysis) & has_blk.any(axis=0)
    else:
        y = r = np.full((nb, nt), np.nan)
        analysed = np.zeros(nt, dtype=bool)
    transform = (s.transform, s.transform_offset, s.transform_lambda)
    wcols = [model.state_index(n) for n in s.write_states]
    ok, out = kernels.run_block(
        code, X, P, kk, np.ascontiguousarray(inputs.precipitation[:, t0:t1], dtype=np.float64),
        np.ascontiguousarray(inputs.pet[:, t0:t1], dtype=np.float64), first_day, dh, ck, e_prev, ar1, area,
        np.ascontiguousarray(y, dtype=np.float64), np.ascontiguousarray(r, dtype=np.float64), analysed,
        s.method, s.inflation, s.rtps, s.rtpp, s.gate_sigma, True, transform, upd,
        np.ascontiguousarray(lower[:, upd].T), np.ascontiguousarray(upper[:, upd].T), wcols, spreads=assim,
    )
    if not ok:
        return None

    out_idx = [k for k in range(nt) if t0 + k >= first_output]
    n_out = len(out_idx) if collect else 0
    k_out0 = out_idx[0] if out_idx else nt
    odt = np.float32 if s.float32 else np.float64
    arrays: dict[str, np.ndarray] = {}
    q_blk, qa_blk = out["discharge"], out["discharge_analysis"]
    if n_out:  # the names in the order of the numpy path
        arrays["discharge"] = q_blk[:, k_out0:].astype(odt)
        if assim:
            arrays["discharge_analysis"] = qa_blk[:, k_out0:].astype(odt)
        for j, n in enumerate(s.write_states):
            arrays[n] = out["states"][j][:, k_out0:].astype(odt)
    n_used = np.zeros(nb, dtype=np.int64)
    n_gated = np.zeros(nb, dtype=np.int64)
    collapse = np.array(state.collapse_days, dtype=np.int64)
    collapse_first = np.full(nb, -1, dtype=np.int64)
    if assim and nt:
        used_blk, gated_blk = out["used"], out["gated"]
        spread_b = out["spread_before"]
        n_used += used_blk.sum(axis=1)
        n_gated += gated_blk.sum(axis=1)
        a_days = np.flatnonzero(analysed)
        has = has_blk[:, a_days]
        low_spread = has & (spread_b[:, a_days] < s.collapse_ratio * sd_blk[:, a_days])
        collapse, collapse_first = en.collapse_counts(collapse, has, low_spread, days[a_days], s.collapse_days)
        if n_out:
            arrays["innovation"] = out["innovation"][:, k_out0:].copy()
            arrays["innovation_variance"] = out["innovation_variance"][:, k_out0:].copy()
            arrays["innovation_analysis"], arrays["obs_error_variance"] = desroziers_series(
                obs_blk[:, k_out0:], var_blk[:, k_out0:], qa_blk[:, k_out0:], used_blk[:, k_out0:], s)
            arrays["spread_before"] = spread_b[:, k_out0:].copy()
            arrays["spread_after"] = out["spread_after"][:, k_out0:].copy()
            arrays["observed_discharge"] = obs_blk[:, k_out0:].copy()
            arrays["clipped_water"] = out["clipped_water"][:, k_out0:].copy()
            arrays["obs_status"] = np.where(used_blk, en.OBS_USED, np.where(
                gated_blk, en.OBS_GATED, status_blk))[:, k_out0:].astype(np.int8)
    end = en.EnsembleState(
        day=int(days[-1]) if nt else state.day,
        states=X.T.reshape(nb, nm, ns).copy(),
        parameters=params,
        ar1={n: e_prev[j].copy() for j, n in enumerate(en.FORCINGS)} if nt else state.ar1,
        collapse_days=collapse,
    )
    return en.BlockResult(arrays, end, None, n_used, n_gated, collapse_first)
