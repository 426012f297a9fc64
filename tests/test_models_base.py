"""Tests of the model protocol in assim.models.base (DESIGN.md "Models")."""

import numpy as np
import pytest

import assim.models as models
from assim.models import Model, Parameter, StateVariable, WaterBalance, base


def _bucket_step(state, forcing, params):
    filled = state[:, 0] + forcing["precipitation"]
    runoff = params["k"] * filled
    new = (filled - runoff)[:, None]
    return new, {"precipitation": forcing["precipitation"], "runoff": runoff}


BUCKET = Model(
    name="test_bucket",
    description="one store, no evaporation",
    reference="test fixture",
    states=(StateVariable("store", "mm", "water", 0.0, lambda p: 10.0 * p["k"], True),),
    parameters=(Parameter("k", "d-1", "outflow fraction", 0.0, 1.0, 0.5),),
    step=_bucket_step,
    initial_state=lambda params: np.zeros((np.size(params["k"]), 1)),
    balance=WaterBalance(inputs=("precipitation",), outputs=("runoff",)),
    fluxes=("precipitation", "runoff"),
)


def test_builtin_models_are_registered():
    """DESIGN.md: gr4j and linear_reservoir are built in and found by name."""
    assert {"gr4j", "linear_reservoir"} <= set(models.available())
    assert models.get("gr4j").name == "gr4j"


def test_unknown_model_names_the_known_ones():
    """A wrong name in basins.yaml must tell the user what exists (common practice)."""
    with pytest.raises(KeyError, match="gr4j.*linear_reservoir"):
        models.get("gr5x")


def test_a_user_model_registers_and_runs_through_the_protocol(monkeypatch):
    """DESIGN.md: a user model that follows the protocol works like a built-in one."""
    monkeypatch.setattr(base, "_REGISTRY", dict(base._REGISTRY))  # leave no trace
    models.register(BUCKET)
    assert "test_bucket" in models.available()
    m = models.get("test_bucket")
    params = m.prepare({"k": np.array([0.5, 0.25])})
    state = m.initial_state(params)
    state, f = m.step(state, {"precipitation": np.array([4.0, 4.0])}, params)
    assert state[:, 0].tolist() == [2.0, 3.0]
    assert f["runoff"].tolist() == [2.0, 1.0]
    lower, upper = m.bounds(params)
    assert lower.tolist() == [[0.0], [0.0]] and upper.tolist() == [[5.0], [2.5]]


def test_gr4j_declarations():
    """GR4J (Perrin et al. 2003): four parameters with the paper's median values as defaults
    (X1 350 mm, X2 0 mm/d, X3 90 mm, X4 1.7 d, recalled from memory); the filter updates
    every state by default (the two stores and the unit-hydrograph slots, the choice of
    benchmarks/study_defaults.py); unit-hydrograph slots follow the stores."""
    m = models.get("gr4j")
    assert m.parameter_names == ("x1", "x2", "x3", "x4")
    assert m.default_parameters() == {"x1": 350.0, "x2": 0.0, "x3": 90.0, "x4": 1.7}
    assert m.default_updated_states() == m.state_names
    # products write the stores; the slots are internal buffers (outputs.all_states writes them)
    assert m.reported_states(m.state_names) == ("production_store", "routing_store")
    assert models.get("gr4j+snow").reported_states(models.get("gr4j+snow").state_names) == (
        "production_store", "routing_store", "snowpack", "snow_liquid")
    assert m.state_index("routing_store") == 1
    assert m.state_names[2] == "uh1_1" and m.state_names[-1] == f"uh2_{m.n_state - 11}"
    with pytest.raises(KeyError, match="no state"):
        m.state_index("snow")
    assert m.balance.inputs == ("precipitation", "exchange")
    for p in m.parameters:
        assert p.low <= p.default <= p.high


def test_bounds_depend_on_parameters_and_ignore_prepared_extras():
    """The production store is bounded by X1 and the routing store by X3 (Perrin et al. 2003,
    appendix); unit-hydrograph slots beyond ceil(X4) - 1 (UH1) and ceil(2 X4) - 1 (UH2) hold no
    water. Prepared parameter dicts (with (batch, k) ordinates) give the same bounds."""
    m = models.get("gr4j")
    raw = {"x1": np.array([100.0, 800.0]), "x2": np.zeros(2), "x3": np.array([40.0, 60.0]),
           "x4": np.array([1.7, 10.0])}
    lower, upper = m.bounds(m.prepare(raw))
    assert lower.shape == upper.shape == (2, m.n_state)
    assert not lower.any()
    assert upper[:, 0].tolist() == [100.0, 800.0]
    assert upper[:, 1].tolist() == [40.0, 60.0]
    uh1 = upper[:, m.state_index("uh1_1"):m.state_index("uh2_1")]
    uh2 = upper[:, m.state_index("uh2_1"):]
    assert np.isinf(uh1[0, :1]).all() and not uh1[0, 1:].any()  # ceil(1.7) - 1 = 1 slot
    assert np.isinf(uh2[0, :3]).all() and not uh2[0, 3:].any()  # ceil(3.4) - 1 = 3 slots
    assert np.isinf(uh1[1]).all() and np.isinf(uh2[1]).all()


def test_linear_reservoir_declarations():
    """linear_reservoir: one updatable store, balance P = E + Q + dS."""
    m = models.get("linear_reservoir")
    assert m.state_names == ("store",) and m.default_updated_states() == ("store",)
    assert m.parameter_names == ("k", "c")
    assert m.balance.outputs == ("actual_evaporation", "runoff")
