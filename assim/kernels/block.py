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

from assim.kernels.normals import normal_pair
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
def _gr4j_member(X, col, P, k1, k2, p, e):
    """One GR4J day of batch element ``col``, in place; returns the runoff (mm d-1)."""
    S_end, pn, ae, perc, pr = _production(X[0, col], p, e, P[0, col], P[2, col], P[3, col])
    c2 = 2 + gr4j.N_SLOT1
    q1 = 0.0
    for j in range(k2):  # UH2: today's share leaves, the rest moves one day closer
        z = P[_P0 + k1 + j, col] * pr
        if j < k2 - 1:
            z += X[c2 + j, col]
        if j == 0:
            q1 = z
        else:
            X[c2 + j - 1, col] = z
    q9 = 0.0
    for j in range(k1):  # UH1
        z = P[_P0 + j, col] * pr
        if j < k1 - 1:
            z += X[2 + j, col]
        if j == 0:
            q9 = z
        else:
            X[1 + j, col] = z
    R_end, qr, qd, ex, q = _routing(X[1, col], q9, q1, P[1, col], P[4, col], P[5, col])
    X[0, col] = S_end
    X[1, col] = R_end
    return q


@numba.njit(**_JIT)
def _step_member(code, X, col, P, kk, p, e):
    if code == GR4J:
        return _gr4j_member(X, col, P, kk[0], kk[1], p, e)
    new, ev, runoff = _store(X[0, col], p, e, P[0, col], P[1, col])
    X[0, col] = new
    return runoff


@numba.njit(**_JIT)
def _member(code, X, col, P, kk, p, e, t):
    """One day of batch element ``col``, in place, behind the snow routine when ``code`` says
    so (temperature ``t``, degC); returns the runoff (mm d-1)."""
    if code >= SNOW:
        r, s = kk[2], kk[3]
        pack, liquid, rain, snowfall, melt, refreeze, outflow = _snow_day(
            X[s, col], X[s + 1, col], p, t, P[r, col], P[r + 1, col], P[r + 2, col], P[r + 3, col],
            P[r + 4, col], P[r + 5, col])
        X[s, col] = pack
        X[s + 1, col] = liquid
        return _step_member(code - SNOW, X, col, P, kk, outflow, e)
    return _step_member(code, X, col, P, kk, p, e)


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
                  tr_kind, tr_off, tr_lam, lo, hi, yp, u, d):
    """The one-observation analysis of one basin, in place.

    X : (n_state, batch) states, the basin's members in columns c0 .. c0 + N - 1;
    upd : (n_u,) int, the updated state rows; q : (N,) discharge, the last column of the
    analysis vector (updated in place); y, r : the reading and its error variance in the
    assimilation space (NaN: missing); z : (N,) observation normals (enkf); lo, hi :
    (n_u, batch) bounds of the updated states (discharge is bounded below by 0);
    yp, u, d : (N,) scratch.

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
    for j in range(nu + 1):
        row = upd[j] if j < nu else -1
        xbar = 0.0
        for i in range(N):
            xbar += X[row, c0 + i] if j < nu else q[i]
        xbar /= N
        ct = 0.0
        for i in range(N):
            xi = X[row, c0 + i] if j < nu else q[i]
            ct += (xi - xbar) * yp[i]
        ct /= N - 1
        K = f * ct
        if rtps > 0.0:
            # Whitaker & Hamill (2012): the analysis perturbations scaled towards the prior spread
            vb = 0.0
            va = 0.0
            for i in range(N):
                xi = X[row, c0 + i] if j < nu else q[i]
                dev = xi - xbar
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
                d[i] = u[i] * K + (X[row, c0 + i] if j < nu else q[i])
        else:
            # Anderson & Anderson (1999): (X + u K / g) g + (1 - g) xbar
            kg = K / gamma
            cg = (1.0 - gamma) * xbar
            for i in range(N):
                d[i] = (u[i] * kg + (X[row, c0 + i] if j < nu else q[i])) * gamma + cg
        for i in range(N):
            v = d[i]
            if j < nu:
                fixed = min(max(v, lo[j, c0 + i]), hi[j, c0 + i])
                clipped += fixed - v
                X[row, c0 + i] = fixed
            else:
                q[i] = max(v, 0.0)
    return True, False, innovation, iv, clipped


@numba.njit(**_JIT)
def _normal_row(ck, dh, zc, zs):
    """The normal pairs of the counters ``ck (N,)`` on one day pair (a loop of its own, so
    that the compiler pipelines it)."""
    for i in range(ck.size):
        zc[i], zs[i] = normal_pair(ck[i], dh)


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
           temp, ck_t, e_t):
    """Every basin of the chunk over the block's days; returns False if a discharge or a
    state went non-finite (the caller then runs the block on the numpy path, which names
    the first bad day). With the snow routine (``code >= SNOW``), ``temp`` (basin, day) is
    the temperature, ``ck_t`` its counter keys, ``e_t`` its AR(1) errors and ``ar1[8:11]``
    phi, sqrt(1 - phi^2) and sd of its error; else they are not read."""
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
    yp = np.empty(N)
    u = np.empty(N)
    d = np.empty(N)
    good = True
    for b in range(nb):
        c0 = b * N
        for k in range(nt):
            day = first_day + k
            jp = (day >> 1) - first_pair
            odd = day & 1
            if odd == 0 or k == 0:  # the pair's normals, cosine (even day) and sine (odd day)
                _normal_row(ck_p[b], dh[jp], zcp, zsp)
                _normal_row(ck_e[b], dh[jp], zce, zse)
                if enkf and (analyse[k] or (k + 1 < nt and analyse[k + 1])):
                    _normal_row(ck_o[b], dh[jp], zco, zso)
                if has_snow:
                    _normal_row(ck_t[b], dh[jp], zct, zst)
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
            for i in range(N):
                runoff = _member(code, X, c0 + i, P, kk, fp[i], fe[i], ft[i])
                q[i] = runoff * area[b]
                q_out[b, k, i] = q[i]
                if not math.isfinite(q[i]):
                    good = False
            if ana:
                u_, g_, inn, iv, cw = analyse_basin(
                    X, c0, N, upd, q, y[b, k], r[b, k], z, method, gamma, rtps, rtpp, gate,
                    centre, tr_kind, tr_off, tr_lam, lo, hi, yp, u, d)
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
        for row in range(X.shape[0]):
            for i in range(N):
                if not math.isfinite(X[row, c0 + i]):
                    good = False
    return good


def run_block(code, X, P, kk, prec, pet, first_day, dh, ck, e_prev, ar1, area, y, r, analyse,
              method, gamma, rtps, rtpp, gate, centre, transform, upd, lo, hi, wcols, spreads=False,
              temperature=None):
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
        (basin, day) bool, and with ``spreads`` ``spread_before``, ``spread_after`` (basin, day)
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
        q_out, qa_out, w_out, innov, ivar, clip, used, gated, sd_b, sd_a, temp, ck_t, e_t,
    )
    return bool(ok), {"discharge": q_out, "discharge_analysis": qa_out, "states": w_out,
                      "innovation": innov, "innovation_variance": ivar, "clipped_water": clip,
                      "used": used, "gated": gated, "spread_before": sd_b, "spread_after": sd_a}
