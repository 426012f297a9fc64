"""Forecasts: forcing of the leads, the ensemble advanced over them, hindcast issues.

A forecast starts from the ensemble at the end of an issue day and advances every member
over leads 1..L with forcing that is the recorded weather perturbed as in the run
("observed"), past years' weather ("climatology", :func:`climatology_index`) or a forcing
forecast read from a file ("file"). Hindcasts issue such forecasts from the end states of
the days :func:`issue_indices` picks while a run goes on; :func:`forecast_issue` is one
operational issue.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from assim import perturb as pt
from assim.engine.records import (
    SECONDS_PER_DAY_OVER_1000,
    EnsembleState,
    Inputs,
    Plan,
    Settings,
)
from assim.errors import ConfigError, RunError
from assim.models.base import Model


def climatology_index(clim_days: np.ndarray, issue_days: np.ndarray, leads: int, members: np.ndarray) -> np.ndarray:
    """Index into the climatology record of the forcing of every (issue, lead, member).

    Member ``m`` takes the weather of year ``Y - 1 - (m mod n)`` counted among the record's
    years with a complete window (issue date and leads 1..L on the same calendar dates, 29
    February read as 28 February), most recent first; years after the issue year (for
    hindcasts inside the record) follow the earlier ones. The issue's own year is never used.

    Parameters
    ----------
    clim_days : (n,) int64 consecutive days of the record
    issue_days : (issue,) int64
    leads : L
    members : (member,) int

    Returns
    -------
    (issue, L, member) intp

    Raises
    ------
    RunError
        if the record holds no other year with a complete window.
    """
    d0 = int(clim_days[0])
    n = len(clim_days)
    out = np.empty((len(issue_days), leads, len(members)), dtype=np.intp)
    dt = np.datetime64("1970-01-01", "D")
    rec_years = np.arange((dt + d0).astype("datetime64[Y]").astype(int) + 1970,
                          (dt + int(clim_days[-1])).astype("datetime64[Y]").astype(int) + 1971)
    for i, iday in enumerate(issue_days):
        date = dt + int(iday)
        y = date.astype("datetime64[Y]").astype(int) + 1970
        md = str(date)[5:]
        if md == "02-29":
            md = "02-28"
        cands = []
        for yy in list(rec_years[rec_years < y][::-1]) + list(rec_years[rec_years > y]):
            start = int((np.datetime64(f"{yy:04d}-{md}") - dt).astype(int)) - d0
            if start >= 0 and start + leads < n:
                cands.append(start)
        if not cands:
            raise RunError("the forcing record holds no other year to build a climatological forecast",
                           variable="forecast.forcing", place=str(date))
        starts = np.array(cands)[np.asarray(members) % len(cands)]
        out[i] = starts[None, :] + np.arange(1, leads + 1)[:, None]
    return out


def lead_forcing(
    inputs: Inputs,
    settings: Settings,
    issue_index: np.ndarray,
    ar1: Mapping[str, np.ndarray],
    members: np.ndarray,
    leads: int,
    kind: str,
    file_forcing: Mapping[str, np.ndarray] | None = None,
) -> dict[str, np.ndarray]:
    """Forcing of every lead of every issue.

    The forcings are the names of ``ar1`` (the run's, :func:`assim.engine.records.forcing_names`),
    all from the same source: temperature, where the model takes it, comes from where
    precipitation and PET come from.

    Parameters
    ----------
    issue_index : (issue,) day indices into ``inputs.days``
    ar1 : forcing name -> (issue, basin, member) AR(1) errors at the issue day
    kind : "observed" (recorded weather, perturbed as in the run: the AR(1) errors go on),
        "climatology" (:func:`climatology_index`, unperturbed) or "file"
    file_forcing : for "file", name -> (basin, issue, lead, file_member) mm d-1 (temperature
        degC); member m takes file member ``m mod n_file``

    Returns
    -------
    dict name -> (lead, issue, basin, member) float64, mm d-1 (temperature degC)
    """
    ni, nb, nm = len(issue_index), inputs.n_basin, len(members)
    names = tuple(ar1)
    out = {}
    if kind == "observed":
        for name in names:
            model_err = getattr(settings, name)
            ck = pt.counter_keys(settings.seed, inputs.keys, members, pt.FORCING_STREAMS[name])
            e = ar1[name]
            vals = np.empty((leads, ni, nb, nm))
            src = getattr(inputs, name)
            for lead in range(1, leads + 1):
                idx = issue_index + lead
                z = pt.standard_normal(ck, inputs.days[idx])  # (issue, basin, member)
                e = model_err.step(e, z)
                vals[lead - 1] = model_err.apply(e, src[:, idx].T[:, :, None])
            out[name] = vals
    elif kind == "climatology":
        clim = inputs.climatology
        if clim is None:
            raise RunError("climatological forecasts need the forcing record", variable="forecast.forcing")
        idx = climatology_index(clim.days, inputs.days[issue_index], leads, members)  # (issue, L, member)
        for name in names:
            src = getattr(clim, name)  # (basin, n)
            out[name] = src[:, idx].transpose(2, 1, 0, 3)  # (L, issue, basin, member)
    elif kind == "file":
        if file_forcing is None:
            ff = inputs.forecast_forcing
            pos = np.searchsorted(ff["days"], inputs.days[issue_index])
            file_forcing = {n: ff[n][:, pos] for n in names}
        for name in names:
            f = np.asarray(file_forcing[name])  # (basin, issue, lead, file_member)
            sel = f[..., np.asarray(members) % f.shape[-1]]
            out[name] = sel.transpose(2, 1, 0, 3)[:leads]
    else:
        raise ConfigError(f"unknown forecast forcing {kind!r}", variable="forcing")
    return out


def forecast_leads(
    model: Model,
    states: np.ndarray,
    parameters: Mapping[str, np.ndarray],
    forcing: Mapping[str, np.ndarray],
    area_km2: np.ndarray,
    settings: Settings,
    keys: np.ndarray,
    members: np.ndarray,
    lead_days: np.ndarray,
    keep_states: tuple[int, ...] = (),
):
    """Advance the ensembles of several issue times over the leads, as one flat batch.

    Parameters
    ----------
    states : (issue, basin, member, n_state) float64, mm, at the end of each issue day
    parameters : name -> (issue, basin, member) float64
    forcing : name -> (lead, issue, basin, member) mm d-1 (temperature degC), every forcing
        the model takes
    area_km2 : (basin,)
    keys : (basin,) uint64; members : (member,) int
    lead_days : (lead, issue) int64, day numbers of every lead (for the state noise)
    keep_states : state columns whose values at the end of every lead are returned too

    Returns
    -------
    (basin, issue, lead, member) float64, m3 s-1; with ``keep_states``, also the states
    (basin, issue, lead, member, len(keep_states)) float64, mm
    """
    ni, nb, nm, ns = states.shape
    nl = forcing["precipitation"].shape[0]
    x = states.reshape(-1, ns)
    flat = {k: np.ascontiguousarray(v).reshape(-1) for k, v in parameters.items()}
    if ni > 1 and all((v == v[:1]).all() for v in parameters.values()):
        # the same parameters at every issue (none estimated): prepared once, repeated (GR4J's
        # unit hydrographs over every issue were 60 % of a 100-basin hindcast's lead time)
        prepared = _repeat_batch(model.prepare({k: np.ascontiguousarray(v[0]).reshape(-1)
                                                for k, v in parameters.items()}), ni)
    else:
        prepared = model.prepare(flat)
    noise = pt.StateNoise.from_names(settings.state_noise, list(model.state_names))
    if noise:
        lower, upper = model.bounds(flat)
        noise_keys = [pt.counter_keys(settings.seed, keys, members, k) for k in noise.streams]
    out = np.empty((nb, ni, nl, nm))
    kept = np.empty((nb, ni, nl, nm, len(keep_states))) if keep_states else None
    area = area_km2[None, :, None] / SECONDS_PER_DAY_OVER_1000
    for lead in range(nl):
        x, fl = model.step(x, {n: f[lead].reshape(-1) for n, f in forcing.items()}, prepared)
        if noise:
            z = [pt.standard_normal(kk, lead_days[lead]).reshape(-1) for kk in noise_keys]
            x, _ = pt.add_state_noise(x, noise, z, lower, upper)
        out[:, :, lead, :] = (fl["runoff"].reshape(ni, nb, nm) * area).transpose(1, 0, 2)
        if keep_states:
            kept[:, :, lead] = x[:, list(keep_states)].reshape(ni, nb, nm, -1).transpose(1, 0, 2, 3)
    return out if kept is None else (out, kept)


def _repeat_batch(prepared: Mapping[str, np.ndarray], n: int) -> dict[str, np.ndarray]:
    """Prepared parameters of one batch repeated ``n`` times along the batch (first) axis, each
    array in its own memory layout (a model's prepared values are element-wise per batch
    element, so this equals preparing the repeated batch)."""
    out = {}
    for k, v in prepared.items():
        v = np.asarray(v)
        r = np.concatenate([v] * n, axis=0) if v.ndim else v
        out[k] = np.asfortranarray(r) if v.ndim > 1 and not v.flags.c_contiguous else r
    return out


def hindcast_forecasts(model, inputs, settings, snaps, members, leads, kind):
    """Forecasts from the end states of the issue days collected in a block."""
    idx = np.array([t for t, *_ in snaps])
    states = np.stack([x for _, x, _, _ in snaps])
    params = {k: np.stack([p[k] for _, _, p, _ in snaps]) for k in snaps[0][2]}
    ar1 = {n: np.stack([a[n] for _, _, _, a in snaps]) for n in snaps[0][3]}
    forcing = lead_forcing(inputs, settings, idx, ar1, members, leads, kind)
    lead_days = inputs.days[0] + idx[None, :] + np.arange(1, leads + 1)[:, None]
    return forecast_leads(model, states, params, forcing, inputs.area_km2, settings, inputs.keys, members, lead_days)


def issue_indices(plan_: Plan, every_days: int, leads: int, n_days: int) -> np.ndarray:
    """Hindcast issue days: every K days from the first output day, with all leads inside."""
    first = max(plan_.first_output, plan_.start)
    idx = np.arange(first, plan_.stop + 1, every_days)
    return idx[idx + leads <= min(plan_.stop, n_days - 1)]


def forecast_issue(
    model: Model,
    inputs: Inputs,
    settings: Settings,
    state: EnsembleState,
    leads: int,
    kind: str,
    file_forcing: Mapping[str, np.ndarray] | None = None,
    keep_states: tuple[int, ...] = (),
):
    """Ensemble forecast from ``state`` (valid at the end of the issue day).

    ``inputs.days`` must contain the issue day (and, for "observed" forcing, the leads).

    Returns
    -------
    (basin, lead, member) float64, m3 s-1; with ``keep_states`` (state columns), also their
    values at the end of every lead, (basin, lead, member, len(keep_states)) float64, mm
    """
    members = np.arange(settings.members)
    idx = np.array([int(state.day - inputs.days[0])])
    forcing = lead_forcing(inputs, settings, idx, {n: v[None] for n, v in state.ar1.items()},
                           members, leads, kind,
                           None if file_forcing is None else {n: v[:, None] for n, v in file_forcing.items()})
    lead_days = state.day + np.arange(1, leads + 1)[:, None]
    r = forecast_leads(model, state.states[None], {k: v[None] for k, v in state.parameters.items()}, forcing,
                       inputs.area_km2, settings, inputs.keys, members, lead_days, keep_states)
    return (r[0][:, 0], r[1][:, 0]) if keep_states else r[:, 0]
