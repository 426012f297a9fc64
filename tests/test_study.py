"""Tests of the defaults study (benchmarks/study_defaults.py): its oracle, and a small twin
experiment on which the shipped filter defaults must beat the former ones."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from assim import engine
from assim.config import load_config
from assim.settings import settings_from_config

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
import study_defaults as sd  # noqa: E402

# The filter defaults before the study: stochastic EnKF, production and routing stores,
# no transform, no inflation.
FORMER = {"method": "enkf", "update_states": ["production_store", "routing_store"],
          "transform": {"kind": "none"}, "inflation": {"multiplicative": 1.0, "rtps": 0.0, "rtpp": 0.0}}


def test_oracle_without_forcing_error_is_the_truth():
    """In a perfect-model twin without forcing error (cv 0), forecasts started from the true
    states are the true discharge exactly, for every member and lead (common practice of twin
    experiments: GR4J is deterministic; the truth is the twin's own run with the true forcing)."""
    cfg = sd.base_config(4, 100, perturbation={"precipitation_cv": 0.0, "pet_cv": 0.0})
    tw = sd.synthetic_twin(cfg, n_basin=2, years=1)
    idx = sd.issues(tw, cfg, 30)
    fc = sd.oracle(tw, cfg, 30)
    truth = tw.truth[:, idx[:, None] + np.arange(1, sd.LEADS + 1)]  # (basin, issue, lead)
    assert fc.shape == truth.shape + (4,)
    np.testing.assert_allclose(fc, np.broadcast_to(truth[..., None], fc.shape), rtol=1e-12, atol=1e-12)


def test_forecasts_from_the_engines_state_are_its_hindcast():
    """Forecasts the study builds from given states, fed the engine's own end state of an issue
    day, are the engine's open-loop hindcast of that issue (to rounding): the oracle's members
    get the same forcing errors as every hindcast (numbers that depend only on seed, basin,
    member and day; common practice of paired forecast comparisons)."""
    cfg = sd.base_config(8, 100)
    tw = sd.synthetic_twin(cfg, n_basin=2, years=1)
    idx = sd.issues(tw, cfg, 50)[:2]
    hc = sd.hindcast(tw, cfg, "openloop", 50)[:, :2]
    st = settings_from_config(cfg, sd.GR4J, "openloop")
    states = np.stack([engine.run(sd.GR4J, tw.inputs, st, until_day=int(tw.inputs.days[t])).state.states
                       for t in idx])
    np.testing.assert_allclose(sd.forecasts_from(tw, cfg, idx, states), hc, rtol=1e-12)


@pytest.fixture(scope="module")
def small_twin():
    """The sample basins' perfect-model twin, 3 years (the first spin-up), 32 members, a
    hindcast every day."""
    cfg = sd.base_config(32, 365)
    tw = sd.sample_twin(cfg, years=3)
    idx = sd.issues(tw, cfg, 1)
    ol = sd.hindcast(tw, cfg, "openloop", 1)
    out = {}
    for name, fil in (("former", FORMER), ("shipped", {})):
        c = sd.base_config(32, 365, **fil)
        out[name] = sd.scores(tw, idx, sd.hindcast(tw, c, "assimilate", 1), ol)
    out["oracle"] = sd.scores(tw, idx, sd.oracle(tw, cfg, 1), ol)
    return out


def test_shipped_defaults_beat_the_former_ones(small_twin):
    """Hindcast CRPSS against the open loop (scored against the truth) of the shipped filter
    defaults exceeds that of the former defaults at every lead 1-5, and stays below the
    oracle's (the bound of better initial states); the criterion of the study (issue 17)."""
    new, old, orc = (small_twin[k]["crpss"][:5] for k in ("shipped", "former", "oracle"))
    assert load_config(None)["filter"] != {**load_config(None)["filter"], **FORMER}
    assert np.all(new > old), (new, old)
    assert np.all(new < orc), (new, orc)


def test_shipped_defaults_spread_matches_error(small_twin):
    """Spread/RMSE of the hindcast with the shipped defaults (Fortin et al. 2014, with the
    (N+1)/N factor) is in 0.9-1.1 at every lead 1-10 (the band of the study)."""
    r = small_twin["shipped"]["spread_rmse"]
    assert np.all((r >= 0.9) & (r <= 1.1)), r


def test_candidate_labels_name_their_filter_sections():
    """Every candidate of both grids, adaptive inflation included, is named back by label_of
    from its filter section (the table's rows are the configurations run), and each filter
    section is a valid config (the schema accepts it; adaptive inflation reaches the settings).
    Common practice, no published source."""
    for grid in ("full", "focused"):
        cands = sd.candidates(grid=grid)
        assert len({label for label, _ in cands}) == len(cands)
        for label, fil in cands:
            assert sd.label_of(fil) == label
    fil = dict(sd.candidates(grid="focused"))["etkf S+R+UH log adaptive+rtps0.3"]
    st = settings_from_config(sd.base_config(8, 10, **fil), sd.GR4J, "assimilate")
    assert st.adaptive_inflation and st.rtps == 0.3 and st.method == "etkf"
    assert st.update_states == sd.GR4J.state_names
    assert sd.label_of(sd.CURRENT) == "enkf S+R none none"
