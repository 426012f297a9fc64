"""GR4J, the four-parameter daily rainfall-runoff model of Perrin, Michel & Andréassian (2003).

Perrin, C., Michel, C. and Andréassian, V. (2003). Improvement of a parsimonious model for
streamflow simulation. Journal of Hydrology 279, 275-289. The model equations are given in
the paper's appendix; every formula below cites it where it is written.

State layout, one row per batch element, ``n_state = 2 + N_SLOT1 + N_SLOT2`` columns:

====================  =====================================================================
column                content (mm, at the end of a step)
====================  =====================================================================
``production_store``  S, in [0, X1]
``routing_store``     R, in [0, X3] (see :func:`routing_upper_bound`)
``uh1_1..uh1_9``      water in unit hydrograph 1 (90 % branch) leaving 1..9 days later
``uh2_1..uh2_19``     water in unit hydrograph 2 (10 % branch) leaving 1..19 days later
====================  =====================================================================

X4 is valid in [0.5, 10] d, so UH1 has at most ``N_UH1 = ceil(10) = 10`` ordinates and UH2
at most ``N_UH2 = ceil(20) = 20``. The first ordinate leaves on the day the water enters, so
at the end of a step a unit hydrograph holds water for the next ``N_UH - 1`` days only:
that is why there are 9 and 19 unit-hydrograph states. Slots beyond an element's own time
base (``ceil(X4) - 1`` and ``ceil(2 X4) - 1``) are always zero, and their upper bound is 0.

Parameter ranges: chosen to cover the calibrated values Perrin et al. (2003) report (80 %
intervals, recalled from memory: X1 100-1200 mm, X2 -5 to 3 mm d-1, X3 20-300 mm, X4 1.1 to
2.9 d) with a wide margin; the defaults are the paper's median values (350, 0, 90, 1.7).

Performance notes. :func:`step` is written as in-place numpy calls with positional outputs
(about 60 calls per step, each one pass over a block): at small batch the cost is the number
of calls, at large batch the memory traffic. It works through the batch in blocks of
``BLOCK`` elements so that the temporaries of a block stay in cache; this loop is over
cache-sized slices of the flat batch, not over members. The new state is Fortran-ordered
(each column contiguous); the unit-hydrograph columns are computed only as far as the
largest X4 of the batch needs, the rest is zero. :func:`prepare` precomputes the ordinates
and reciprocals once per parameter set; :func:`step` accepts raw or prepared parameters.
Only correctly rounded operations (+, -, *, /, sqrt) and one tanh are used, so an element
gives bit-identical results whatever the batch around it. ``benchmarks/bench_models.py``
measures the speed.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from assim.models.base import Model, Parameter, StateVariable, WaterBalance, register

X4_MIN = 0.5
X4_MAX = 10.0
N_UH1 = math.ceil(X4_MAX)  # ordinates of UH1 for the largest valid X4
N_UH2 = math.ceil(2 * X4_MAX)  # ordinates of UH2
N_SLOT1 = N_UH1 - 1  # UH1 water still in transit at the end of a step
N_SLOT2 = N_UH2 - 1
UH1_SHARE = 0.9  # Perrin et al. (2003), appendix: 90 % of Pr goes through UH1
BLOCK = 16384  # batch elements per block inside step (the fastest measured, see module notes)

_C1 = 2  # first UH1 column
_C2 = 2 + N_SLOT1  # first UH2 column
N_STATE = 2 + N_SLOT1 + N_SLOT2

PARAMETERS = (
    Parameter("x1", "mm", "capacity of the production store", 1.0, 3000.0, 350.0),
    Parameter("x2", "mm d-1", "groundwater exchange coefficient (negative: loss)", -10.0, 10.0, 0.0),
    Parameter("x3", "mm", "one-day-ahead capacity of the routing store", 1.0, 1000.0, 90.0),
    Parameter("x4", "d", "time base of unit hydrograph 1", X4_MIN, X4_MAX, 1.7),
)


def _x1(params):
    return np.asarray(params["x1"], dtype=np.float64)


def routing_upper_bound(params: Mapping[str, np.ndarray]) -> np.ndarray:
    """Upper bound of the routing store at the end of a step: X3.

    After the inflow the store may hold any R' >= 0, but the outflow leaves
    ``R'(1 + (R'/X3)^4)^(-1/4)``, which increases with R' and tends to X3 from below
    (Perrin et al. (2003), appendix); :func:`step` also clips the last rounding error.

    Parameters
    ----------
    params : dict of (batch,) float64

    Returns
    -------
    (batch,) float64, mm
    """
    return np.asarray(params["x3"], dtype=np.float64)


def _slot_upper(branch: int, slot: int):
    """Upper bound of unit-hydrograph slot ``slot`` (1-based): inf inside the time base, else 0."""

    def upper(params):
        x4 = np.asarray(params["x4"], dtype=np.float64)
        n = np.ceil(branch * x4)  # ordinates of this element's unit hydrograph
        return np.where(slot <= n - 1, np.inf, 0.0)

    return upper


STATES = (
    StateVariable("production_store", "mm", "production store level S", 0.0, _x1, True),
    StateVariable("routing_store", "mm", "routing store level R", 0.0, routing_upper_bound, True),
    *(
        StateVariable(f"uh1_{i}", "mm", f"UH1 water leaving {i} d after the step", 0.0,
                      _slot_upper(1, i), True, reported=False)
        for i in range(1, N_SLOT1 + 1)
    ),
    *(
        StateVariable(f"uh2_{i}", "mm", f"UH2 water leaving {i} d after the step", 0.0,
                      _slot_upper(2, i), True, reported=False)
        for i in range(1, N_SLOT2 + 1)
    ),
)

FLUXES = (
    "precipitation",
    "pet",
    "net_rainfall",
    "actual_evaporation",
    "percolation",
    "exchange",
    "routed_runoff",
    "direct_runoff",
    "runoff",
)


def _power_5_2(t: np.ndarray) -> np.ndarray:
    # t**2.5 from correctly rounded operations only, so that the result of an element does
    # not depend on the length of the array it sits in.
    return t * t * np.sqrt(t)


def s_curve_1(t: np.ndarray, x4: np.ndarray) -> np.ndarray:
    """S-curve of UH1: fraction of a unit input released by time ``t``.

    Parameters
    ----------
    t : array, d (broadcast with ``x4``)
    x4 : array, d

    Returns
    -------
    array in [0, 1]
    """
    u = np.clip(np.asarray(t, dtype=np.float64) / x4, 0.0, 1.0)
    return _power_5_2(u)  # Perrin et al. (2003), appendix: SH1(t) = (t/X4)^(5/2), t < X4


def s_curve_2(t: np.ndarray, x4: np.ndarray) -> np.ndarray:
    """S-curve of UH2 (time base 2·X4): fraction of a unit input released by time ``t``.

    Parameters
    ----------
    t : array, d (broadcast with ``x4``)
    x4 : array, d

    Returns
    -------
    array in [0, 1]
    """
    u = np.clip(np.asarray(t, dtype=np.float64) / x4, 0.0, 2.0)
    rising = 0.5 * _power_5_2(np.minimum(u, 1.0))  # Perrin et al. (2003), appendix: SH2, t <= X4
    falling = 1.0 - 0.5 * _power_5_2(2.0 - np.maximum(u, 1.0))  # same, X4 < t < 2 X4
    return np.where(u <= 1.0, rising, falling)


def uh_ordinates(x4: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Ordinates of the two unit hydrographs.

    ``uh1[..., j] = SH1(j + 1) - SH1(j)`` is the share of an input released ``j`` days after
    the day it enters (``j = 0``: the same day); ordinates beyond an element's time base are
    exactly zero. Each row sums to 1 (up to rounding).

    Parameters
    ----------
    x4 : (batch,) float64, d, in [0.5, 10]

    Returns
    -------
    uh1 : (batch, N_UH1) float64
    uh2 : (batch, N_UH2) float64
    """
    x4 = np.asarray(x4, dtype=np.float64)[..., None]
    sh1 = s_curve_1(np.arange(N_UH1 + 1, dtype=np.float64), x4)
    sh2 = s_curve_2(np.arange(N_UH2 + 1, dtype=np.float64), x4)
    return np.diff(sh1, axis=-1), np.diff(sh2, axis=-1)  # Perrin et al. (2003), appendix: UH(j) = SH(j) - SH(j-1)


def prepare(params: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Parameters with everything :func:`step` precomputes once per parameter set.

    Call it once per run (or whenever the parameters change) and pass the result to
    :func:`step` in place of the raw parameters. Keys starting with ``_`` hold the
    precomputed arrays; the raw ``x1..x4`` are kept. A dict that is already prepared is
    returned as it is.

    Parameters
    ----------
    params : dict with ``x1`` (mm), ``x2`` (mm d-1), ``x3`` (mm), ``x4`` (d), each (batch,)
        float64 (scalars broadcast)

    Raises
    ------
    ValueError
        If X1 or X3 is not positive or X4 is outside (0, 10] d (the unit-hydrograph slots of
        the state cover X4 <= 10 d only).

    Returns
    -------
    dict
        ``x1..x4`` as contiguous (batch,) float64; ``_uh1`` (batch, k1) and ``_uh2``
        (batch, k2), the Fortran-ordered ordinates already multiplied by the 0.9 and 0.1
        shares, where k1 = ceil(max X4) and k2 = ceil(2 max X4) over the batch; ``_inv_x1``
        = 1/X1, ``_perc_x1`` = 4/(9 X1), ``_inv_x3`` = 1/X3 and ``_exchange`` = X2 / X3^(7/2).
    """
    if "_uh1" in params:
        return params  # type: ignore[return-value]
    x = np.broadcast_arrays(*(np.asarray(params[p.name], dtype=np.float64) for p in PARAMETERS))
    x1, x2, x3, x4 = (np.ascontiguousarray(v, dtype=np.float64).reshape(-1) for v in x)
    # The state holds N_SLOT1 + N_SLOT2 unit-hydrograph slots: a longer X4 would lose water.
    # Inputs are validated where they enter; this guards the core against a caller's bug.
    if not ((x4 > 0) & (x4 <= X4_MAX) & (x1 > 0) & (x3 > 0)).all():
        raise ValueError(f"gr4j needs X1 > 0, X3 > 0 and 0 < X4 <= {X4_MAX} d")
    uh1, uh2 = uh_ordinates(x4)
    x4max = float(x4.max()) if x4.size else X4_MIN
    k1 = min(max(math.ceil(x4max), 1), N_UH1)
    k2 = min(max(math.ceil(2 * x4max), 1), N_UH2)
    return {
        "x1": x1,
        "x2": x2,
        "x3": x3,
        "x4": x4,
        "_uh1": np.asfortranarray(UH1_SHARE * uh1[:, :k1]),
        "_uh2": np.asfortranarray((1.0 - UH1_SHARE) * uh2[:, :k2]),
        "_inv_x1": 1.0 / x1,
        "_perc_x1": (4.0 / 9.0) / x1,
        "_inv_x3": 1.0 / x3,
        "_exchange": x2 / (x3 * x3 * x3 * np.sqrt(x3)),
    }


def initial_state(params: Mapping[str, np.ndarray]) -> np.ndarray:
    """A starting state for spin-up: S = 0.3 X1, R = 0.5 X3, empty unit hydrographs.

    Common practice, no published source; a run should spin up (``period.spinup_days``).

    Parameters
    ----------
    params : dict of (batch,) float64

    Returns
    -------
    (batch, n_state) float64, mm, Fortran-ordered
    """
    x1, x3 = np.broadcast_arrays(np.asarray(params["x1"], dtype=np.float64),
                                 np.asarray(params["x3"], dtype=np.float64))
    state = np.zeros((x1.size, N_STATE), order="F")
    state[:, 0] = 0.3 * x1.reshape(-1)
    state[:, 1] = 0.5 * x3.reshape(-1)
    return state


_PREPARED_ROWS = ("x1", "x3", "_inv_x1", "_perc_x1", "_inv_x3", "_exchange")


# ---------------------------------------------------------------- the formulas, written once
#
# production() and routing() are element-wise: every argument is a float or an array (all
# broadcast together), and they use only +, -, *, /, sqrt, minimum, maximum and tanh. The
# numpy step applies them to a block of the batch; assim.kernels compiles the same function
# objects with numba for one member at a time. Both give the same bits but for tanh (numpy's
# and the C library's may differ in the last unit).


def production(S, p, e, x1, ix1, px1):
    """The production store over one day: interception, store update, percolation.

    Parameters
    ----------
    S : start-of-day production store, mm
    p, e : precipitation and PET, mm d-1
    x1, ix1, px1 : X1 (mm), 1 / X1 and 4 / (9 X1) (from :func:`prepare`)

    Returns
    -------
    S_end, pn, ae, perc, pr : the new store (mm) and the day's net rainfall, actual
        evaporation (interception + Es), percolation and the water routed on (mm d-1)
    """
    d = p - e
    pn = np.maximum(d, 0.0)  # Perrin et al. (2003), appendix: Pn = P - E if P >= E
    ae = np.minimum(p, e)  # interception: the part of E met by P
    # tanh is odd and at most one of Pn, En is non-zero: one tanh serves both.
    u = np.tanh(d * ix1)
    ta = np.maximum(u, 0.0)  # tanh(Pn / X1)
    tb = ta - u  # tanh(En / X1), En = E - P if E > P
    s = S * ix1
    ps = (x1 - S * s) * ta / (s * ta + 1.0)  # Perrin et al. (2003), appendix: Ps = X1 (1 - (S/X1)^2) tanh(Pn/X1) / (1 + S/X1 tanh(Pn/X1))
    ps = np.minimum(ps, pn)  # Ps <= Pn holds exactly; keep it so under rounding
    c = tb - s * tb  # (1 - S/X1) tanh(En/X1)
    es = (c + tb) * S / (c + 1.0)  # Perrin et al. (2003), appendix: Es = S (2 - S/X1) tanh(En/X1) / (1 + (1 - S/X1) tanh(En/X1))
    es = np.minimum(es, S)  # Es <= S holds exactly; keep it so under rounding
    s1 = S - es + ps  # Perrin et al. (2003), appendix: S = S - Es + Ps
    t = s1 * px1
    t = t * t
    t = t * t
    S_end = s1 / np.sqrt(np.sqrt(t + 1.0))  # S (1 + (4/9 S/X1)^4)^(-1/4)
    perc = s1 - S_end  # Perrin et al. (2003), appendix: Perc = S (1 - (1 + (4/9 S/X1)^4)^(-1/4))
    pr = pn - ps + perc  # Perrin et al. (2003), appendix: Pr = Perc + (Pn - Ps)
    return S_end, pn, ae + es, perc, pr


def routing(R, q9, q1, x3, ix3, cx):
    """The routing store and the direct branch over one day.

    Parameters
    ----------
    R : start-of-day routing store, mm
    q9, q1 : the day's outputs of UH1 (0.9 branch) and UH2 (0.1 branch), mm d-1
    x3, ix3, cx : X3 (mm), 1 / X3 and X2 / X3^(7/2) (from :func:`prepare`)

    Returns
    -------
    R_end, qr, qd, exchange, q : the new store (mm), routed and direct runoff, the exchange
        actually applied to both branches and the runoff Q = Qr + Qd (mm d-1)
    """
    f = np.sqrt(R) * R * R * R * cx  # Perrin et al. (2003), appendix: F = X2 (R/X3)^(7/2)
    qd = np.maximum(q1 + f, 0.0)  # Perrin et al. (2003), appendix: Qd = max(0, Q1 + F)
    fd = qd - q1  # exchange actually applied to the direct branch
    rq = R + q9
    r1 = np.maximum(rq + f, 0.0)  # Perrin et al. (2003), appendix: R = max(0, R + Q9 + F)
    fr = r1 - rq  # exchange actually applied to the routing store
    t = r1 * ix3
    t = t * t
    t = t * t
    R_end = np.minimum(r1 / np.sqrt(np.sqrt(t + 1.0)), x3)  # R_end < X3 holds exactly; keep it so under rounding
    qr = r1 - R_end  # Perrin et al. (2003), appendix: Qr = R (1 - (1 + (R/X3)^4)^(-1/4))
    return R_end, qr, qd, fr + fd, qr + qd  # Perrin et al. (2003), appendix: Q = Qr + Qd


def _block(S, R, U1, U2, p, e, x1, x3, ix1, px1, ix3, cx, o1, o2,
           S_out, Z1, Z2, f_pn, f_ae, f_perc, f_ex, f_qr, f_qd, f_q, clear):
    """Advance one block of b elements (every argument is a view of the caller's arrays).

    S, R : (b,) start-of-day stores; U1, U2 : (b, k - 1) unit-hydrograph slots in use;
    p, e : (b,) forcing; x1 .. cx : (b,) prepared parameters; o1, o2 : (b, k) ordinates;
    S_out : (b,) and Z1, Z2 : (b, k) the new state from column 1 and from the last UH1
    column on; f_* : (b,) fluxes; clear : whether Z2[:, 0] must end as 0.
    """
    S_out[...], f_pn[...], f_ae[...], f_perc[...], pr = production(S, p, e, x1, ix1, px1)
    # Unit hydrographs: today's share leaves now, the rest moves one day closer. Z[:, 0] is
    # the day's output and Z[:, 1:] the new slots; Z1[:, 0] is the routing-store column and
    # Z2[:, 0] the last UH1 column of the new state, used as scratch until overwritten.
    np.multiply(o2, pr[:, None], out=Z2)
    if U2.shape[1]:
        np.add(Z2[:, :-1], U2, out=Z2[:, :-1])
    q1 = Z2[:, 0].copy()  # Perrin et al. (2003), appendix: Q1 = 0.1 sum_k UH2(k) Pr(t - k + 1)
    if clear:
        Z2[:, 0] = 0.0  # a UH1 slot beyond every time base of the batch
    np.multiply(o1, pr[:, None], out=Z1)
    if U1.shape[1]:
        np.add(Z1[:, :-1], U1, out=Z1[:, :-1])
    q9 = Z1[:, 0]  # Perrin et al. (2003), appendix: Q9 = 0.9 sum_k UH1(k) Pr(t - k + 1)
    Z1[:, 0], f_qr[...], f_qd[...], f_ex[...], f_q[...] = routing(R, q9, q1, x3, ix3, cx)


def step(
    state: np.ndarray, forcing: Mapping[str, np.ndarray], params: Mapping[str, np.ndarray]
) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Advance GR4J by one day for every element of the batch.

    Parameters
    ----------
    state : (batch, n_state) float64, mm
        State at the start of the day (not modified). Any memory order; Fortran order is
        fastest. Unit-hydrograph slots beyond an element's time base must be zero (they are
        whenever the state came from :func:`initial_state` or :func:`step`), and so must
        every slot beyond the time base of the largest X4 in the batch.
    forcing : dict with ``precipitation`` and ``pet``, each (batch,) float64, mm d-1, >= 0
    params : dict of (batch,) float64, raw (``x1..x4``) or from :func:`prepare` (faster)

    Returns
    -------
    state : (batch, n_state) float64, mm, Fortran-ordered, a new array
    fluxes : dict of (batch,) float64, mm d-1
        ``precipitation``, ``pet`` (the forcing, as given), ``net_rainfall`` (Pn),
        ``actual_evaporation`` (interception + Es), ``percolation``, ``exchange`` (the water
        actually gained (+) or lost (-) by both branches), ``routed_runoff`` (Qr),
        ``direct_runoff`` (Qd) and ``runoff`` (Q = Qr + Qd). The balance
        ``sum(new state) - sum(state) = precipitation + exchange - actual_evaporation -
        runoff`` holds to rounding.
    """
    q = prepare(params)
    o1, o2 = q["_uh1"], q["_uh2"]
    n = o1.shape[0]
    m1, m2 = o1.shape[1] - 1, o2.shape[1] - 1  # unit-hydrograph slots in use
    p = _as_batch(forcing["precipitation"], n)
    e = _as_batch(forcing["pet"], n)
    state = np.asarray(state, dtype=np.float64)
    out = np.empty((n, N_STATE), order="F")
    if m1 < N_SLOT1 - 1:
        out[:, _C1 + m1:_C2 - 1] = 0.0  # slots no element of this batch can fill
    if m2 < N_SLOT2:
        out[:, _C2 + m2:] = 0.0
    fl = np.empty((len(FLUXES) - 2, n))
    f_pn, f_ae, f_perc, f_ex, f_qr, f_qd, f_q = fl
    arrays = (
        state[:, 0], state[:, 1], state[:, _C1:_C1 + m1], state[:, _C2:_C2 + m2], p, e,
        *(q[k] for k in _PREPARED_ROWS), o1, o2,
        out[:, 0], out[:, 1:2 + m1], out[:, _C2 - 1:_C2 + m2],
        f_pn, f_ae, f_perc, f_ex, f_qr, f_qd, f_q,
    )
    clear = m1 < N_SLOT1
    if n <= BLOCK:
        _block(*arrays, clear)
    else:
        for i0 in range(0, n, BLOCK):
            i1 = min(i0 + BLOCK, n)
            _block(*(a[i0:i1] for a in arrays), clear)
    return out, {
        "precipitation": p,
        "pet": e,
        "net_rainfall": f_pn,
        "actual_evaporation": f_ae,
        "percolation": f_perc,
        "exchange": f_ex,
        "routed_runoff": f_qr,
        "direct_runoff": f_qd,
        "runoff": f_q,
    }


def _as_batch(x, n: int) -> np.ndarray:
    """``x`` as a (n,) float64 array, without a copy when it already is one."""
    if type(x) is np.ndarray and x.dtype == np.float64 and x.shape == (n,):
        return x
    return np.broadcast_to(np.asarray(x, dtype=np.float64), (n,))


MODEL = register(
    Model(
        name="gr4j",
        description="GR4J daily rainfall-runoff model (4 parameters, 2 stores, 2 unit hydrographs)",
        reference="Perrin, C., Michel, C., Andréassian, V. (2003). Improvement of a "
        "parsimonious model for streamflow simulation. J. Hydrol. 279, 275-289.",
        states=STATES,
        parameters=PARAMETERS,
        step=step,
        initial_state=initial_state,
        balance=WaterBalance(
            inputs=("precipitation", "exchange"), outputs=("actual_evaporation", "runoff")
        ),
        fluxes=FLUXES,
        prepare=prepare,
    )
)
