"""Tests of restart.nc: exact continuation and refusal of restarts that do not fit."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import xarray as xr

from assim import engine, models
from assim import perturb as pt
from assim.errors import RestartError
from assim.io.restart import Restart, check_restart, read_restart, write_restart

GR4J = models.get("gr4j")
IDENTITY = {"model": "gr4j", "members": "10", "seed": "4", "mode": "assimilate", "digest_perturbation": "p1",
            "digest_filter": "f1", "digest_inputs": "i1"}


class Collect:
    def __init__(self):
        self.blocks = {}

    def write_block(self, start, arrays):
        for k, v in arrays.items():
            self.blocks.setdefault(k, []).append(np.array(v))

    def result(self):
        return {k: np.concatenate(v, axis=1) for k, v in self.blocks.items()}


def _inputs(nb=3, nt=80):
    rng = np.random.default_rng(1)
    p = np.where(rng.random((nb, nt)) < 0.4, rng.gamma(0.8, 10.0, (nb, nt)), 0.0)
    ids = tuple(f"creek-{i}" for i in range(nb))
    obs = np.where(rng.random((nb, nt)) < 0.8, rng.gamma(4.0, 1.0, (nb, nt)), np.nan)
    params = {"x1": np.linspace(250, 450, nb), "x2": np.zeros(nb), "x3": np.full(nb, 90.0), "x4": np.full(nb, 1.7)}
    return engine.Inputs(ids, pt.basin_keys(ids), np.full(nb, 120.0), np.arange(nt) + 17000, p,
                         np.full((nb, nt), 2.5), obs, np.zeros((nb, nt), bool), params)


SETTINGS = engine.Settings(mode="assimilate", members=10, seed=4, spinup_days=12, time_block_days=25,
                           parameter_sd={"x1": 0.1, "x3": 0.1}, state_noise={"routing_store": 0.3},
                           update_states=("production_store", "routing_store"), estimate=("x3",),
                           write_states=("production_store", "routing_store"), scheduler="synchronous")


def _to_restart(state, inputs, settings=SETTINGS):
    from assim.engine.window import window_columns

    w = {} if state.window is None else dict(window=state.window, window_days=state.window_days,
                                             window_columns=window_columns(settings.write_states))
    return Restart(inputs.basin_ids, state.day, GR4J.state_names, state.states, state.parameters, state.ar1,
                   state.collapse_days, IDENTITY, inflation_mean=state.inflation_mean,
                   inflation_sd=state.inflation_sd, **w)


def _to_state(r):
    return engine.EnsembleState(r.valid_day, r.states, r.parameters, r.ar1, r.collapse_days, r.inflation_mean,
                                r.inflation_sd, r.window, r.window_days)


@pytest.mark.parametrize("split", [5, 12, 30, 50, 74])
def test_split_run_equals_the_uninterrupted_run(tmp_path, split):
    """A run stopped after day index ``split``, written to restart.nc, read back and
    continued, gives outputs and end state equal bit for bit to one uninterrupted run (split
    inside the spin-up, at its end, inside a time block and at a block boundary of 25 days
    plus 12 spin-up days)."""
    inputs = _inputs()
    whole = Collect()
    ref = engine.run(GR4J, inputs, SETTINGS, whole)
    first, second = Collect(), Collect()
    part = engine.run(GR4J, inputs, SETTINGS, first, until_day=int(inputs.days[split]))
    path = write_restart(tmp_path / "restart.nc", _to_restart(part.state, inputs))
    back = read_restart(path)
    assert back.valid_day == inputs.days[split]
    rest = engine.run(GR4J, inputs, SETTINGS, second, state=_to_state(back))
    a, b, c = whole.result(), first.result(), second.result()
    for k in a:
        joined = np.concatenate([x for x in (b.get(k), c.get(k)) if x is not None], axis=1)
        np.testing.assert_array_equal(a[k], joined, err_msg=k)
    np.testing.assert_array_equal(ref.state.states, rest.state.states)
    np.testing.assert_array_equal(ref.state.parameters["x3"], rest.state.parameters["x3"])


@pytest.mark.parametrize("split", [12, 30, 50])
@pytest.mark.parametrize("window", [0, 4])
def test_split_run_with_adaptive_inflation_equals_the_uninterrupted_run(tmp_path, split, window):
    """With adaptive inflation (Anderson 2009), and with the fixed-lag smoother's window of 4
    days beside it, the per-basin inflation and the window travel in the restart: a continued
    run equals the uninterrupted run bit for bit, its daily inflation trajectory, end
    inflation and end window included (common practice, no published source). A restart
    without them would restart the inflation from its initial value (and the window empty)
    and differ."""
    settings = dataclasses.replace(SETTINGS, adaptive_inflation=True, adaptive_damping=0.97,
                                   adaptive_initial_mean=1.2, adaptive_initial_sd=0.8, adaptive_min_sd=0.2,
                                   smoother_window=window)
    inputs = _inputs()
    whole = Collect()
    ref = engine.run(GR4J, inputs, settings, whole)
    first, second = Collect(), Collect()
    part = engine.run(GR4J, inputs, settings, first, until_day=int(inputs.days[split]))
    back = read_restart(write_restart(tmp_path / "restart.nc", _to_restart(part.state, inputs, settings)))
    assert back.inflation_mean is not None
    np.testing.assert_array_equal(back.inflation_mean, part.state.inflation_mean)
    assert (back.window is None) == (window == 0)
    rest = engine.run(GR4J, inputs, settings, second, state=_to_state(back))
    a, b, c = whole.result(), first.result(), second.result()
    assert "inflation_mean" in a and np.ptp(a["inflation_mean"][np.isfinite(a["inflation_mean"])]) > 0.01
    for k in a:
        joined = np.concatenate([x for x in (b.get(k), c.get(k)) if x is not None], axis=1)
        np.testing.assert_array_equal(a[k], joined, err_msg=k)
    np.testing.assert_array_equal(ref.state.states, rest.state.states)
    np.testing.assert_array_equal(ref.state.inflation_mean, rest.state.inflation_mean)
    np.testing.assert_array_equal(ref.state.inflation_sd, rest.state.inflation_sd)
    if window:
        np.testing.assert_array_equal(ref.state.window, rest.state.window)
        np.testing.assert_array_equal(ref.state.window_days, rest.state.window_days)


def test_reanalysis_with_adaptive_inflation_continues_exactly(tmp_path):
    """A reanalysis (fixed-lag smoother, W = 4) with adaptive inflation stopped on day 40,
    written to restart.nc and continued, ends in the one-shot run's states, window and
    inflation bit for bit, and writes the same smoothed days after the split (common
    practice, no published source)."""
    settings = dataclasses.replace(SETTINGS, mode="reanalysis", adaptive_inflation=True, adaptive_damping=0.97,
                                   adaptive_initial_mean=1.2, adaptive_initial_sd=0.8, smoother_window=4,
                                   estimate=(), state_noise={})
    inputs = _inputs()
    ref = engine.run(GR4J, inputs, settings, None)
    part = engine.run(GR4J, inputs, settings, None, until_day=int(inputs.days[40]))
    rest = engine.run(GR4J, inputs, settings, None,
                      state=_to_state(read_restart(write_restart(tmp_path / "r.nc", _to_restart(part.state, inputs,
                                                                                                  settings)))))
    for name in ("states", "window", "window_days", "inflation_mean", "inflation_sd"):
        np.testing.assert_array_equal(getattr(rest.state, name), getattr(ref.state, name), err_msg=name)
    assert not np.array_equal(part.state.inflation_mean, ref.state.inflation_mean)


def test_restart_file_holds_float64_states_parameters_and_ar1(tmp_path):
    inputs = _inputs()
    st = engine.initial_ensemble(GR4J, inputs, SETTINGS)
    write_restart(tmp_path / "r.nc", _to_restart(st, inputs))
    with xr.open_dataset(tmp_path / "r.nc") as ds:
        assert ds["states"].dims == ("basin", "member", "state")
        assert ds["states"].dtype == np.float64
        assert {"parameter_x1", "parameter_x3", "ar1_precipitation", "ar1_pet"} <= set(ds.data_vars)
        assert ds.attrs["model"] == "gr4j" and "caution" in ds.attrs
        assert list(ds["basin"].values) == list(inputs.basin_ids)
    back = read_restart(tmp_path / "r.nc")
    np.testing.assert_array_equal(back.states, st.states)
    np.testing.assert_array_equal(back.ar1["precipitation"], st.ar1["precipitation"])


@pytest.mark.parametrize("key, value", [("model", "linear_reservoir"), ("members", "12"), ("seed", "5")])
def test_mismatched_restart_is_refused(tmp_path, key, value):
    inputs = _inputs()
    st = engine.initial_ensemble(GR4J, inputs, SETTINGS)
    write_restart(tmp_path / "r.nc", _to_restart(st, inputs))
    r = read_restart(tmp_path / "r.nc")
    with pytest.raises(RestartError) as info:
        check_restart(r, identity={**IDENTITY, key: value}, basins=inputs.basin_ids, state_names=GR4J.state_names)
    text = str(info.value)
    assert str(tmp_path / "r.nc") in text and f"'{key}'" in text and value in text


def test_restart_with_other_basins_is_refused(tmp_path):
    inputs = _inputs()
    st = engine.initial_ensemble(GR4J, inputs, SETTINGS)
    write_restart(tmp_path / "r.nc", _to_restart(st, inputs))
    r = read_restart(tmp_path / "r.nc")
    with pytest.raises(RestartError, match="basin.*creek-9"):
        check_restart(r, identity=IDENTITY, basins=(*inputs.basin_ids[:2], "creek-9"), state_names=GR4J.state_names)
    with pytest.raises(RestartError, match="different order"):
        check_restart(r, identity=IDENTITY, basins=inputs.basin_ids[::-1], state_names=GR4J.state_names)
    # other filter settings: accepted, with a warning
    warns = check_restart(r, identity={**IDENTITY, "digest_filter": "f2"}, basins=inputs.basin_ids,
                          state_names=GR4J.state_names)
    assert len(warns) == 1 and "filter" in warns[0]


def test_missing_restart_is_a_restart_error(tmp_path):
    with pytest.raises(RestartError, match="not found"):
        read_restart(tmp_path / "nope.nc")


def test_restart_with_another_start_day_of_the_inputs():
    """A restart continues on inputs that start later (an operational forecast reads only
    the days since the restart): the numbers are the same."""
    inputs = _inputs()
    whole = Collect()
    engine.run(GR4J, inputs, dataclasses.replace(SETTINGS, spinup_days=0), whole)
    part = engine.run(GR4J, inputs, dataclasses.replace(SETTINGS, spinup_days=0), None, until_day=int(inputs.days[39]))
    late = dataclasses.replace(
        inputs, days=inputs.days[39:], precipitation=inputs.precipitation[:, 39:], pet=inputs.pet[:, 39:],
        observed=inputs.observed[:, 39:], rejected=inputs.rejected[:, 39:])
    rest = Collect()
    engine.run(GR4J, late, dataclasses.replace(SETTINGS, spinup_days=0), rest, state=part.state)
    np.testing.assert_array_equal(whole.result()["discharge"][:, 40:], rest.result()["discharge"])


# ------------------------------------------------------- checksums, modes and file sets


def _flip_bit(path, var, bit=52):
    """Flip one bit of the first value of ``var`` in place (raw bytes, attributes kept)."""
    import netCDF4

    with netCDF4.Dataset(path, "r+") as nc:
        v = nc[var]
        v.set_auto_maskandscale(False)
        a = np.array(v[:])
        flat = a.reshape(-1).view(np.uint64 if a.dtype.itemsize == 8 else np.uint32)
        flat[0] ^= type(flat[0])(1) << type(flat[0])(bit)
        v[:] = a


@pytest.mark.parametrize("var, bit", [("states", 52), ("states", 0), ("parameter_x1", 62), ("collapse_days", 3)])
def test_damaged_restart_is_refused(tmp_path, var, bit):
    """One bit flipped anywhere in a restart's arrays (an exponent bit doubles a store; the
    lowest mantissa bit changes it by 1 ulp) is refused, naming the file and the variable
    (SHA-256 of each variable, FIPS 180-4 via hashlib). Common practice, no published source."""
    inputs = _inputs()
    st = engine.initial_ensemble(GR4J, inputs, SETTINGS)
    path = write_restart(tmp_path / "r.nc", _to_restart(st, inputs))
    read_restart(path)  # whole: accepted
    _flip_bit(path, var, bit if var != "collapse_days" else 3)
    with pytest.raises(RestartError, match=f"{var}.*damaged") as info:
        read_restart(path)
    assert str(path) in str(info.value)


def test_open_loop_restart_refused_for_assimilation(tmp_path):
    """The restart's mode is part of its identity: open-loop states are never continued as
    an assimilation (or the reverse). Common practice, no published source."""
    inputs = _inputs()
    st = engine.initial_ensemble(GR4J, inputs, SETTINGS)
    r = Restart(inputs.basin_ids, st.day, GR4J.state_names, st.states, st.parameters, st.ar1, st.collapse_days,
                {**IDENTITY, "mode": "openloop"})
    write_restart(tmp_path / "restart-openloop.nc", r)
    r = read_restart(tmp_path / "restart-openloop.nc")
    with pytest.raises(RestartError, match="mode 'openloop'.*'assimilate'"):
        check_restart(r, identity=IDENTITY, basins=inputs.basin_ids, state_names=GR4J.state_names)


def test_file_set_replaced_whole_or_not_at_all(tmp_path):
    """A FileSet whose second member fails to write (the RuntimeError netCDF4 raises on a full
    disk) leaves both old files byte for byte and no temporary; a committed set stamps one
    generation in both; a restart beside a product of another write is refused. Common
    practice, no published source."""
    from assim.errors import RunError
    from assim.io.common import FileSet

    inputs = _inputs()
    st = engine.initial_ensemble(GR4J, inputs, SETTINGS)
    product, restart = tmp_path / "analysis.nc", tmp_path / "restart.nc"

    def write(fail=False):
        with FileSet([product, restart], checksummed=[restart]) as files:
            xr.Dataset({"discharge": ("time", np.arange(3.0))}).to_netcdf(files.part(product))
            if fail:
                raise RuntimeError("NetCDF: HDF error")
            write_restart(restart, _to_restart(st, inputs), commit=files)

    write()
    old = {p: p.read_bytes() for p in (product, restart)}
    with pytest.raises(RunError, match="analysis.nc.*HDF error.*kB free.*left as it was"):
        write(fail=True)
    assert {p: p.read_bytes() for p in (product, restart)} == old
    assert sorted(p.name for p in tmp_path.iterdir()) == ["analysis.nc", "restart.nc"]
    with xr.open_dataset(product) as a, xr.open_dataset(restart) as b:
        assert a.attrs["set_generation"] == b.attrs["set_generation"]
        assert a.attrs["set_members"] == "analysis.nc restart.nc"
    read_restart(restart)
    import netCDF4

    with netCDF4.Dataset(product, "r+") as nc:
        nc.set_generation = "0" * 32
    with pytest.raises(RestartError, match="analysis.nc.*different writes"):
        read_restart(restart)


def test_identity_numbers_are_stored_as_numbers(tmp_path):
    """NetCDF attributes keep their type (NetCDF User Guide, attribute data types): a restart's
    member count and seed are integers on disk, read back as the same text the checks compare."""
    import netCDF4

    from assim.io.restart import Restart, read_restart, write_restart

    r = Restart(("a",), 18262, ("s",), np.ones((1, 3, 1)), {}, {}, np.zeros(1, dtype=np.int64),
                {"model": "m", "members": 3, "seed": 12, "mode": "assimilate"})
    write_restart(tmp_path / "restart.nc", r)
    with netCDF4.Dataset(tmp_path / "restart.nc") as nc:
        assert isinstance(nc.members, np.integer) and nc.members == 3
        assert isinstance(nc.seed, np.integer) and nc.seed == 12
    assert read_restart(tmp_path / "restart.nc").identity["members"] == "3"
