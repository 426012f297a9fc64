"""The fused block loop: a chunk of basins over a block of days in one compiled call.

For each basin, and in it each day, and in it each member (a basin's members stay in cache
for the whole block):

1. the forcing errors: the AR(1) log errors of precipitation and PET from the day's
   counter-based normals (:mod:`assim.kernels.normals`), turned into lognormal multipliers
   as :class:`assim.perturb.LognormalAR1` does; with the snow routine, the temperature's
   additive AR(1) error (:class:`assim.perturb.GaussianAR1`, stream 5);
2. the model step, compiled from the model's element-wise formulas
   (:func:`assim.models.gr4j.production`, :func:`assim.models.gr4j.routing`,
   :func:`assim.models.linear_reservoir.store`; behind :func:`assim.models.snow.day` for
   ``<model>+snow``), and the discharge in m3 s-1;
3. on an analysed day with a reading, the one-observation analysis of
   :func:`assim.filters.ensemble_update` (enkf, etkf, eakf; multiplicative inflation, RTPP,
   RTPS; log or Box-Cox transform; gate; bounds with the clipped water), with the analysis
   vector (updated states, discharge) as the engine builds it;
4. the recorded outputs: discharge before and after the analysis, the innovation and its
   variance, the clipped water, which readings were used or gated, chosen state columns.

Layout: the state is ``(n_state, basin * member)`` C-ordered, so each state variable of a
basin is a contiguous row over its members (the transpose of a model's Fortran-ordered
``(batch, n_state)`` array, without a copy). The analysis is computed from deviations about
the ensemble means (two passes), where the numpy path uses sums of squares with a fallback:
the two agree to rounding (tests: 1e-12).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from assim.kernels.normals import normal_row
from assim.models import gr4j, linear_reservoir, snow

_JIT = dict(cache=True, nogil=True, error_model="numpy", fastmath=False)

# The model formulas, written once in assim.models and compiled here as they are.
_production = numba.njit(**_JIT)(gr4j.production)
_routing = numba.njit(**_JIT)(gr4j.routing)
_store = numba.njit(**_JIT)(linear_reservoir.store)
_snow_day = numba.njit(**_JIT)(snow.day)

GR4J, LINEAR_RESERVOIR = 0, 1
COMPILED_MODELS = {"gr4j": GR4J, "linear_reservoir": LINEAR_RESERVOIR}
SNOW = 2  # added to a model's code: the model behind the degree-day snow routine
METHOD_CODES = {"enkf": 0, "etkf": 1, "eakf": 2}
TRANSFORM_CODES = {"none": 0, "log": 1, "boxcox": 2}
_P0 = 6  # GR4J: first row of the UH ordinates in the packed parameters


def compiled_model(model) -> int | None:
    """The code of ``model``'s compiled form, None when it has none (a user model).

    A model has a compiled form when it is the registered built-in (same step function), or
    such a model behind the snow routine (:func:`assim.models.snow.wrap`; code + ``SNOW``)."""
    base = snow.unwrap(model)
    if base is not None:
        code = compiled_model(base)
        return None if code is None else code + SNOW
    code = COMPILED_MODELS.get(model.name)
    if code is None:
        return None
    own = gr4j.step if code == GR4J else linear_reservoir.step
    return code if model.step is own else None


def pack_parameters(code: int, prepared) -> tuple[np.ndarray, np.ndarray]:
    """Prepared parameters (dict of (batch, ...)) -> (rows, batch) float64 and (4,) int64.

    The integers: the GR4J unit-hydrograph lengths k1, k2; with the snow routine, the first
    row of its parameters (:data:`assim.models.snow.KERNEL_ROWS`, after the model's) and the
    state row of the snowpack (after the model's states; the liquid water follows)."""
    kk = np.zeros(4, dtype=np.int64)
    if code % SNOW == GR4J:
        o1, o2 = prepared["_uh1"], prepared["_uh2"]
        kk[:2] = o1.shape[1], o2.shape[1]
        rows = [prepared[n] for n in ("x1", "x3", "_inv_x1", "_perc_x1", "_inv_x3", "_exchange")] + [o1.T, o2.T]
        kk[3] = gr4j.N_STATE
    else:
        rows = [prepared["k"], prepared["c"]]
        kk[3] = len(linear_reservoir.MODEL.states)
    if code >= SNOW:
        kk[2] = sum(np.atleast_2d(r).shape[0] for r in rows)
        rows += [prepared[n] for n in snow.KERNEL_ROWS]
    return np.ascontiguousarray(np.vstack(rows)), kk


@numba.njit(**_JIT)
def _gr4j_basin(X, c0, N, P, k1, k2, p, e, pr, q9, q1, runoff):
    """One GR4J day of the members ``c0 .. c0 + N - 1``, in place, their runoff (mm d-1) in
    ``runoff``; ``pr``, ``q9``, ``q1`` (N,) scratch. Each stage runs over the members, so
    every state and parameter row is read and written contiguously (member by member, the
    ~25 rows of a member, a batch apart, conflict in the cache: 55 ns a member-step for the
    unit hydrographs against about 5 row by row)."""
    c1 = c0 + N
    S, x1, ix1, px1 = X[0, c0:c1], P[0, c0:c1], P[2, c0:c1], P[3, c0:c1]  # rows of the basin
    for i in range(N):
        S[i], pn, ae, perc, pr[i] = _production(S[i], p[i], e[i], x1[i], ix1[i], px1[i])
    # the unit hydrographs: today's share leaves, the rest moves one day closer
    c2 = 2 + gr4j.N_SLOT1
    _unit_hydrograph(X, c0, N, P, _P0 + k1, k2, c2, pr, q1)  # UH2
    _unit_hydrograph(X, c0, N, P, _P0, k1, 2, pr, q9)  # UH1
    R, x3, ix3, cx = X[1, c0:c1], P[1, c0:c1], P[4, c0:c1], P[5, c0:c1]
    for i in range(N):  # (a loop the compiler vectorises: no library call)
        R[i], qr, qd, ex, runoff[i] = _routing(R[i], q9[i], q1[i], x3[i], ix3[i], cx[i])


@numba.njit(**_JIT)
def _unit_hydrograph(X, c0, N, P, p0, k, s0, pr, out):
    """Route ``pr`` through a unit hydrograph of ``k`` ordinates (parameter rows ``p0 ..``,
    slots in state rows ``s0 ..``): ``out`` gets today's share, each slot the next one's
    share plus its own (row by row over the members: loops the compiler vectorises)."""
    c1 = c0 + N
    o = P[p0, c0:c1]
    if k == 1:
        for i in range(N):
            out[i] = o[i] * pr[i]
        return
    x = X[s0, c0:c1]
    for i in range(N):
        out[i] = o[i] * pr[i] + x[i]
    for j in range(1, k):
        o = P[p0 + j, c0:c1]
        dst = X[s0 + j - 1, c0:c1]
        if j < k - 1:
            x = X[s0 + j, c0:c1]
            for i in range(N):
                dst[i] = o[i] * pr[i] + x[i]
        else:
            for i in range(N):
                dst[i] = o[i] * pr[i]


@numba.njit(**_JIT)
def _model_basin(code, X, c0, N, P, kk, p, e, scratch, runoff):
    """One day of the model without snow (``code`` < ``SNOW``); see :func:`step_basin`."""
    if code == GR4J:
        _gr4j_basin(X, c0, N, P, kk[0], kk[1], p, e, scratch[0], scratch[1], scratch[2], runoff)
        return
    c1 = c0 + N
    S, k, c = X[0, c0:c1], P[0, c0:c1], P[1, c0:c1]
    for i in range(N):
        S[i], ev, runoff[i] = _store(S[i], p[i], e[i], k[i], c[i])


@numba.njit(**_JIT)
def _snow_basin(X, c0, N, P, kk, p, t, outflow):
    """The snow routine's day (:func:`assim.models.snow.day`) of the members ``c0 .. c0 + N
    - 1``, in place; the water leaving the pack and the rain on bare ground in ``outflow``."""
    r, s = kk[2], kk[3]
    c1 = c0 + N
    pack, liquid = X[s, c0:c1], X[s + 1, c0:c1]
    a0, a1, a2, a3, a4, a5 = P[r, c0:c1], P[r + 1, c0:c1], P[r + 2, c0:c1], P[r + 3, c0:c1], P[r + 4, c0:c1], P[r + 5, c0:c1]
    for i in range(N):
        pack[i], liquid[i], rain, snowfall, melt, refreeze, outflow[i] = _snow_day(
            pack[i], liquid[i], p[i], t[i], a0[i], a1[i], a2[i], a3[i], a4[i], a5[i])


@numba.njit(**_JIT)
def step_basin(code, X, c0, N, P, kk, p, e, t, scratch, runoff):
    """One model day of the members ``c0 .. c0 + N - 1`` of ``X`` (n_state, batch), in place,
    forced by ``p``, ``e`` (N,) mm d-1 and, behind the snow routine (``code >= SNOW``), the
    temperature ``t`` (N,) degC (else not read); their runoff (mm d-1) in ``runoff`` (N,);
    ``scratch`` (4, N)."""
    if code >= SNOW:
        _snow_basin(X, c0, N, P, kk, p, t, scratch[3])
        _model_basin(code - SNOW, X, c0, N, P, kk, scratch[3], e, scratch, runoff)
    else:
        _model_basin(code, X, c0, N, P, kk, p, e, scratch, runoff)


@numba.njit(**_JIT)
def _leads(code, X, P, kk, prec, pet, temp, runoff, width):
    """Every lead of every column of ``X``, ``width`` columns at a time (they stay in cache
    over the leads)."""
    nl, n = prec.shape
    scratch = np.empty((4, width))
    for c0 in range(0, n, width):
        w = min(width, n - c0)
        for lead in range(nl):
            step_basin(code, X, c0, w, P, kk, prec[lead, c0:c0 + w], pet[lead, c0:c0 + w], temp[lead, c0:c0 + w],
                       scratch[:, :w], runoff[lead, c0:c0 + w])


def run_leads(code, X, P, kk, prec, pet, width=256, temperature=None):
    """Forecast leads without analysis: the model over days ``prec``, ``pet`` (lead, batch)
    mm d-1 (and behind the snow routine ``temperature`` (lead, batch) degC) from the states
    ``X`` (n_state, batch), C-ordered, advanced in place; returns the runoff (lead, batch)
    mm d-1."""
    runoff = np.empty(prec.shape)
    prec = np.ascontiguousarray(prec, dtype=np.float64)
    temp = prec if temperature is None else np.ascontiguousarray(temperature, dtype=np.float64)  # (not read)
    _leads(code, X, P, kk, prec, np.ascontiguousarray(pet, dtype=np.float64), temp, runoff, int(width))
    return runoff


@numba.njit(**_JIT)
def _forward(q, kind, offset, lam):
    """assim.filters.Transform.forward of one value (kind 0 none, 1 log, 2 Box-Cox)."""
    if kind == 0:
        return q
    shifted = q + offset
    if not shifted > 0.0:
        return np.nan
    if kind == 1:
        return math.log(shifted)
    return math.expm1(lam * math.log(shifted)) / lam  # Box & Cox (1964), eq. 1


@numba.njit(**_JIT)
def analyse_basin(X, c0, N, upd, q, y, r, z, method, gamma, rtps, rtpp, gate, centre,
                  tr_kind, tr_off, tr_lam, lo, hi, yp, u, d, pinned):
    """The one-observation analysis of one basin, in place.

    X : (n_state, batch) states, the basin's members in columns c0 .. c0 + N - 1;
    upd : (n_u,) int, the updated state rows; q : (N,) discharge, the last column of the
    analysis vector (updated in place); y, r : the reading and its error variance in the
    assimilation space (NaN: missing); z : (N,) observation normals (enkf); lo, hi :
    (n_u, batch) bounds of the updated states (discharge is bounded below by 0);
    yp, u, d : (N,) scratch; pinned : (n_u,) bool, rows held at 0 (:func:`pinned_rows`),
    which the analysis leaves as they are.

    Returns (used, gated, innovation, innovation variance, clipped water of the states
    summed over members and columns), the innovation and its variance NaN where the reading
    is missing or the innovation not finite. The formulas are those of
    :func:`assim.filters.ensemble_update` with one observation (see there for sources).
    """
    nu = upd.size
    ybar = 0.0
    for i in range(N):
        yp[i] = _forward(q[i], tr_kind, tr_off, tr_lam)
        ybar += yp[i]
    ybar /= N
    var_y = 0.0
    for i in range(N):
        yp[i] -= ybar
        var_y += yp[i] * yp[i]
    var_y /= N - 1
    innovation = y - ybar
    iv = var_y + r if gamma == 1.0 else gamma**2 * var_y + r
    present = math.isfinite(y) and math.isfinite(r)
    ok = True
    for i in range(N):
        if not math.isfinite(q[i]):
            ok = False
    for j in range(nu):
        for i in range(N):
            if not math.isfinite(X[upd[j], c0 + i]):
                ok = False
    usable = present and math.isfinite(innovation) and math.isfinite(var_y) and ok
    gated = usable and gate > 0.0 and abs(innovation) > gate * math.sqrt(max(iv, 0.0))
    used = usable and not gated
    if not (present and math.isfinite(innovation)):
        innovation, iv = np.nan, np.nan
    if not used:
        return False, gated, innovation, iv, 0.0

    s = 1.0 / math.sqrt(r)
    dw = innovation * s
    a = var_y * (s * s)
    for i in range(N):
        yp[i] *= s
    if gamma != 1.0:
        a = gamma**2 * a
    if method == 0:
        # Burgers et al. (1998): w_i = g^2 (a + 1)^-1 (d + z_i - g y'_i) = f u_i
        if centre:
            zs = 0.0
            for i in range(N):
                zs += z[i]
            dw = dw - zs / N
        f = gamma**2 / (1.0 + a)
        usum = 0.0
        for i in range(N):
            ui = z[i] - yp[i] if gamma == 1.0 else yp[i] * -gamma + z[i]
            u[i] = ui + dw
            usum += u[i]
        wbar = f * (usum / N)
    else:
        # Hunt et al. (2007), eqs. 20 and 24: w_i = wbar + p y'_i = p u_i
        wbar = gamma**2 * dw / (1.0 + a)
        root = math.sqrt(1.0 + max(a, 0.0))
        f = gamma**3 * (-1.0 / (root * (1.0 + root)))
        for i in range(N):
            u[i] = yp[i] + wbar / f
    if rtpp > 0.0:
        # Zhang et al. (2004): the weight perturbations relaxed towards zero
        ubar = wbar / f
        for i in range(N):
            u[i] = ubar + ((1.0 - rtpp) * (u[i] - ubar) + rtpp * 0.0)
    umean = 0.0
    for i in range(N):
        umean += u[i]
    umean /= N

    clipped = 0.0
    c1 = c0 + N
    for j in range(nu + 1):
        xr = X[upd[j], c0:c1] if j < nu else q  # the analysed row of the basin's members
        if j < nu and pinned[j]:
            continue
        xbar = 0.0
        for i in range(N):
            xbar += xr[i]
        xbar /= N
        ct = 0.0
        for i in range(N):
            ct += (xr[i] - xbar) * yp[i]
        ct /= N - 1
        K = f * ct
        if rtps > 0.0:
            # Whitaker & Hamill (2012): the analysis perturbations scaled towards the prior spread
            vb = 0.0
            va = 0.0
            for i in range(N):
                dev = xr[i] - xbar
                vb += dev * dev
                d[i] = gamma * dev + (u[i] - umean) * K
                va += d[i] * d[i]
            sd_b = gamma * math.sqrt(vb / (N - 1))
            sd_a = math.sqrt(va / (N - 1))
            scale = rtps * (sd_b - sd_a) / sd_a + 1.0 if sd_a > 0.0 else 1.0
            mean_a = xbar + umean * K
            for i in range(N):
                d[i] = mean_a + scale * d[i]
        elif gamma == 1.0:
            for i in range(N):
                d[i] = u[i] * K + xr[i]
        else:
            # Anderson & Anderson (1999): (X + u K / g) g + (1 - g) xbar
            kg = K / gamma
            cg = (1.0 - gamma) * xbar
            for i in range(N):
                d[i] = (u[i] * kg + xr[i]) * gamma + cg
        if j < nu:
            low, high = lo[j, c0:c1], hi[j, c0:c1]
            for i in range(N):
                v = d[i]
                xr[i] = min(max(v, low[i]), high[i])
                d[i] = xr[i] - v
            for i in range(N):  # (the member order of the sum kept)
                clipped += d[i]
        else:
            for i in range(N):
                q[i] = max(d[i], 0.0)
    return True, False, innovation, iv, clipped


@numba.njit(**_JIT)
def pinned_rows(X, c0, N, upd, lo, hi, out):
    """Which updated rows of a basin are held at 0: every member 0 with both bounds 0 (GR4J's
    unit-hydrograph slots beyond the basin's time base, about 20 of its 30 states at
    X4 = 1.7 d, which the model step keeps at 0: their ordinates are 0). The analysis of
    such a row is exactly no change (its cross-covariance with the prediction is 0, any
    method, inflation, RTPS, RTPP, and the bounds hold it at 0), so it is skipped."""
    for j in range(upd.size):
        out[j] = True
        for i in range(N):
            if X[upd[j], c0 + i] != 0.0 or lo[j, c0 + i] != 0.0 or hi[j, c0 + i] != 0.0:
                out[j] = False
                break


@numba.njit(**_JIT)
def _spread(a, N):
    """Ensemble standard deviation (ddof = 1) of a (N,) row, two passes."""
    mean = 0.0
    for i in range(N):
        mean += a[i]
    mean /= N
    ss = 0.0
    for i in range(N):
        ss += (a[i] - mean) * (a[i] - mean)
    return math.sqrt(ss / (N - 1))


@numba.njit(**_JIT)
def _block(code, X, P, kk, prec, pet, first_day, dh, ck_p, ck_e, ck_o, e_p, e_e, ar1, area,
           y, r, analyse, method, gamma, rtps, rtpp, gate, centre, tr_kind, tr_off, tr_lam,
           upd, lo, hi, wcols, q_out, qa_out, w_out, innov, ivar, clip, used, gated, sd_b, sd_a,
           snap_k, snap_x, snap_e, temp, ck_t, e_t):
    """Every basin of the chunk over the block's days; returns False if a discharge or a
    state went non-finite (the caller then runs the block on the numpy path, which names
    the first bad day). The states and AR(1) errors at the end of the days ``snap_k``
    (increasing) are copied into ``snap_x`` and ``snap_e`` (hindcast issues). With the snow
    routine (``code >= SNOW``), ``temp`` (basin, day) is the temperature, ``ck_t`` its counter
    keys, ``e_t`` its AR(1) errors and ``ar1[8:11]`` phi, sqrt(1 - phi^2) and sd of its
    error; else they are not read."""
    nb, nt, N = q_out.shape
    phi_p, c_p, s_p, h_p, phi_e, c_e, s_e, h_e = ar1[0], ar1[1], ar1[2], ar1[3], ar1[4], ar1[5], ar1[6], ar1[7]
    first_pair = first_day >> 1
    enkf = method == 0
    has_snow = code >= SNOW
    phi_t, c_t, sd_t = (ar1[8], ar1[9], ar1[10]) if has_snow else (0.0, 0.0, 0.0)
    zn = np.empty((8, N))
    zcp, zsp, zce, zse, zco, zso, zct, zst = zn[0], zn[1], zn[2], zn[3], zn[4], zn[5], zn[6], zn[7]
    fp = np.empty(N)
    fe = np.empty(N)
    ft = np.zeros(N)
    q = np.empty(N)
    scratch = np.empty((4, N))
    yp = np.empty(N)
    u = np.empty(N)
    d = np.empty(N)
    pinned = np.zeros(upd.size, dtype=np.bool_)
    good = True
    for b in range(nb):
        c0 = b * N
        si = 0
        pinned_rows(X, c0, N, upd, lo, hi, pinned)
        for k in range(nt):
            day = first_day + k
            jp = (day >> 1) - first_pair
            odd = day & 1
            if odd == 0 or k == 0:  # the pair's normals, cosine (even day) and sine (odd day)
                normal_row(ck_p[b], dh[jp], zcp, zsp, u)
                normal_row(ck_e[b], dh[jp], zce, zse, u)
                if enkf and (analyse[k] or (k + 1 < nt and analyse[k + 1])):
                    normal_row(ck_o[b], dh[jp], zco, zso, u)
                if has_snow:
                    normal_row(ck_t[b], dh[jp], zct, zst, u)
            zp = zsp if odd else zcp
            ze = zse if odd else zce
            z = zso if odd else zco
            zt = zst if odd else zct
            pk = prec[b, k]
            ek = pet[b, k]
            ana = analyse[k] and math.isfinite(y[b, k])
            for i in range(N):
                # assim.perturb.LognormalAR1: stationary AR(1) log error, multiplier exp(s e - s^2/2)
                ep = phi_p * e_p[b, i] + c_p * zp[i]
                ee = phi_e * e_e[b, i] + c_e * ze[i]
                e_p[b, i] = ep
                e_e[b, i] = ee
                fp[i] = math.exp(s_p * ep - h_p) * pk
                fe[i] = math.exp(s_e * ee - h_e) * ek
            if has_snow:
                tk = temp[b, k]
                for i in range(N):
                    # assim.perturb.GaussianAR1: additive error sd e, e a stationary AR(1)
                    et = phi_t * e_t[b, i] + c_t * zt[i]
                    e_t[b, i] = et
                    ft[i] = sd_t * et + tk
            step_basin(code, X, c0, N, P, kk, fp, fe, ft, scratch, q)
            for i in range(N):
                q[i] = q[i] * area[b]
                q_out[b, k, i] = q[i]
                if not math.isfinite(q[i]):
                    good = False
            if ana:
                u_, g_, inn, iv, cw = analyse_basin(
                    X, c0, N, upd, q, y[b, k], r[b, k], z, method, gamma, rtps, rtpp, gate,
                    centre, tr_kind, tr_off, tr_lam, lo, hi, yp, u, d, pinned)
                used[b, k] = u_
                gated[b, k] = g_
                innov[b, k] = inn
                ivar[b, k] = iv
                clip[b, k] = cw / N
            for i in range(N):
                qa_out[b, k, i] = q[i]
            if sd_b.shape[0]:  # the discharge spreads before and after, as engine._member_sd
                sd_b[b, k] = _spread(q_out[b, k], N)
                sd_a[b, k] = _spread(q, N) if ana else sd_b[b, k]
            for j in range(wcols.size):
                for i in range(N):
                    w_out[j, b, k, i] = X[wcols[j], c0 + i]
            if si < snap_k.size and snap_k[si] == k:  # a hindcast issue: the day's end state
                for row in range(X.shape[0]):
                    for i in range(N):
                        snap_x[si, row, c0 + i] = X[row, c0 + i]
                for i in range(N):
                    snap_e[si, 0, b, i] = e_p[b, i]
                    snap_e[si, 1, b, i] = e_e[b, i]
                    if has_snow:
                        snap_e[si, 2, b, i] = e_t[b, i]
                si += 1
        for row in range(X.shape[0]):
            for i in range(N):
                if not math.isfinite(X[row, c0 + i]):
                    good = False
    return good


def run_block(code, X, P, kk, prec, pet, first_day, dh, ck, e_prev, ar1, area, y, r, analyse,
              method, gamma, rtps, rtpp, gate, centre, transform, upd, lo, hi, wcols, spreads=False,
              snapshots=(), temperature=None):
    """Advance a chunk over a block in one compiled call (see the module docstring).

    Parameters
    ----------
    code : int, from :func:`compiled_model`
    X : (n_state, basin * member) float64, mm, C-ordered; advanced in place
    P, kk : from :func:`pack_parameters`
    prec, pet : (basin, day) float64, mm d-1, the unperturbed forcing of the block
    first_day : int, the block's first day number; dh : (pair,) uint64 hashes of the day
        pairs from ``first_day >> 1`` (``assim.perturb._day_hash``)
    ck : (3, basin, member) uint64 counter keys of the precipitation, PET and observation
        streams; e_prev : (2, basin, member) float64 AR(1) log errors of the day before,
        advanced in place to the block's last day
    ar1 : (8,) float64: phi, sqrt(1 - phi^2), sigma, sigma^2 / 2 of precipitation then PET
    area : (basin,) float64, km2 / 86.4
    y, r : (basin, day) float64, reading and error variance in the assimilation space (NaN:
        missing); analyse : (day,) bool, days on which readings are assimilated
    method : str; gamma, rtps, rtpp, gate : float (gate 0: none); centre : bool
    transform : (kind, offset, lambda); upd : (n_u,) int rows updated; lo, hi : (n_u,
        basin * member) their bounds; wcols : (n_w,) int, state rows recorded
    spreads : also return the member spreads of the discharge before and after the analysis
    snapshots : (issue,) increasing day indices of the block whose end states are kept
    temperature : with the snow routine, ``(t, ck_t, e_t, (phi, sqrt(1 - phi^2), sd))``: the
        unperturbed temperature (basin, day) degC, the counter keys (basin, member) uint64 of
        its stream, its AR(1) errors of the day before (basin, member) float64, advanced in
        place, and its error model (:class:`assim.perturb.GaussianAR1`)

    Returns
    -------
    ok : bool, False if a discharge or state went non-finite
    arrays : dict with ``discharge`` and ``discharge_analysis`` (basin, day, member),
        ``states`` (n_w, basin, day, member), ``innovation``, ``innovation_variance``,
        ``clipped_water`` (basin, day, NaN/0 where not analysed), ``used``, ``gated``
        (basin, day) bool, and with ``spreads`` ``spread_before``, ``spread_after`` (basin, day);
        ``snapshot_states`` (issue, n_state, basin * member) and ``snapshot_errors`` (issue, 2,
        basin, member; 3 with the temperature), the states and AR(1) errors at the end of the
        ``snapshots`` days
    """
    nb, nt = prec.shape
    N = X.shape[1] // max(nb, 1)
    q_out = np.empty((nb, nt, N))
    qa_out = np.empty((nb, nt, N))
    w_out = np.empty((len(wcols), nb, nt, N))
    innov = np.full((nb, nt), np.nan)
    ivar = np.full((nb, nt), np.nan)
    clip = np.zeros((nb, nt))
    used = np.zeros((nb, nt), dtype=np.bool_)
    gated = np.zeros((nb, nt), dtype=np.bool_)
    sd_b = np.empty((nb, nt) if spreads else (0, 0))
    sd_a = np.empty((nb, nt) if spreads else (0, 0))
    snap_k = np.asarray(snapshots, dtype=np.int64)
    snap_x = np.empty((snap_k.size,) + X.shape)
    snap_e = np.empty((snap_k.size, 2 if temperature is None else 3, nb, N))
    kind, offset, lam = transform
    if kind == "boxcox" and lam == 0.0:
        kind = "log"
    ar1 = np.asarray(ar1, dtype=np.float64)
    if temperature is None:
        temp, ck_t, e_t = np.empty((nb, 0)), np.empty((nb, 0), dtype=np.uint64), np.empty((nb, 0))
    else:
        temp, ck_t, e_t, err_t = temperature
        ar1 = np.concatenate([ar1, np.asarray(err_t, dtype=np.float64)])
    ok = _block(
        code, X, P, kk, prec, pet, np.int64(first_day), dh, ck[0], ck[1], ck[2], e_prev[0], e_prev[1],
        ar1, area, y, r, analyse, METHOD_CODES[method], float(gamma),
        float(rtps), float(rtpp), float(gate), bool(centre), TRANSFORM_CODES[kind], float(offset),
        float(lam), np.asarray(upd, dtype=np.int64), lo, hi, np.asarray(wcols, dtype=np.int64),
        q_out, qa_out, w_out, innov, ivar, clip, used, gated, sd_b, sd_a, snap_k, snap_x, snap_e,
        temp, ck_t, e_t,
    )
    return bool(ok), {"discharge": q_out, "discharge_analysis": qa_out, "states": w_out,
                      "innovation": innov, "innovation_variance": ivar, "clipped_water": clip,
                      "used": used, "gated": gated, "spread_before": sd_b, "spread_after": sd_a,
                      "snapshot_states": snap_x, "snapshot_errors": snap_e}
