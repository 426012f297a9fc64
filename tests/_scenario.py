"""Small scenarios cut from the invented sample basins, shared by the CLI-level tests."""

from pathlib import Path

import numpy as np
import pandas as pd
import yaml

REPO = Path(__file__).resolve().parents[1]


def make_raw(folder: Path, ids, start: str, end: str, gauge_filter=None) -> Path:
    """A raw folder of basins ``ids`` cut from sample_basin/ to the days start..end;
    ``gauge_filter(df) -> df`` edits the gauge readings (outages, late readings)."""
    sample = REPO / "sample_basin"
    folder.mkdir(parents=True, exist_ok=True)
    doc = yaml.safe_load((sample / "basins.yaml").read_text())
    doc["basins"] = [b for b in doc["basins"] if b["id"] in ids]
    (folder / "basins.yaml").write_text(yaml.safe_dump(doc, sort_keys=False))
    w = pd.read_csv(sample / "weather.csv", dtype=str)
    w[w["basin"].isin(ids) & (w["date"] >= start) & (w["date"] <= end)].to_csv(folder / "weather.csv", index=False)
    g = pd.read_csv(sample / "gauge.csv", dtype=str)
    day = g["timestamp"].str[:10]
    g = g[g["basin"].isin(ids) & (day >= start) & (day <= end)]
    if gauge_filter is not None:
        g = gauge_filter(g)
    g.to_csv(folder / "gauge.csv", index=False)
    return folder


def write_config(root: Path, defaults: dict, **sections) -> Path:
    """``root/config.yaml`` from ``defaults`` with each section in ``sections`` merged in."""
    cfg = {k: dict(v) if isinstance(v, dict) else v for k, v in defaults.items()}
    for k, v in sections.items():
        cfg[k] = {**cfg.get(k, {}), **v} if isinstance(v, dict) else v
    path = root / "config.yaml"
    path.write_text(yaml.safe_dump(cfg, sort_keys=False))
    return path


# An invented cold basin for the snow tests only (the demo in sample_basin/ stays rain-fed):
# the weather of velmorra made 7 degC colder, a truth of gr4j+snow with the parameters below
# and readings every 3 hours of that truth's daily value with a 5 % log error each. basins.yaml holds the prior in
# COLD["prior"] (what a first calibration might give), not the truth.
COLD = {
    "id": "hrimdal", "name": "Hrimdal Water at Kelsby Fold", "area_km2": 130.0, "latitude": 56.41,
    "longitude": -4.02, "cooling_c": 7.0, "reading_log_sd": 0.05, "seed": 20261205,
    "truth": {"x1": 260.0, "x2": -0.3, "x3": 70.0, "x4": 1.4, "snow_threshold": 0.5, "snow_interval": 2.0,
              "melt_threshold": 0.0, "degree_day_factor": 3.5, "water_holding": 0.1, "refreezing": 0.05},
    "prior": {"x1": 320.0, "x2": 0.1, "x3": 55.0, "x4": 1.55},
    "prior_snow": {"degree_day_factor": 2.2, "melt_threshold": 0.8},
}


def make_cold_raw(folder: Path, start: str, end: str, with_rain_basin: bool = False):
    """A raw folder holding the cold basin ``COLD`` (with a ``snow:`` block), and velmorra
    as it ships (rain only) when ``with_rain_basin``. Returns (folder, truth): truth is the
    cold basin's true daily discharge (m3 s-1) on the days start..end, from gr4j+snow run on
    the forcing `assim prep` makes of this folder."""
    from assim import models, preparation
    from assim.config import load_config

    make_raw(folder, ["velmorra"], start, end)
    doc = yaml.safe_load((folder / "basins.yaml").read_text())
    cold = {"id": COLD["id"], "name": COLD["name"], "area_km2": COLD["area_km2"], "latitude": COLD["latitude"],
            "longitude": COLD["longitude"], "model": "gr4j", "parameters": dict(COLD["prior"]),
            "thresholds_m3s": {"q2y": 25.0}, "gauge": {"kind": "discharge"}, "snow": dict(COLD["prior_snow"])}
    doc["basins"] = (doc["basins"] if with_rain_basin else []) + [cold]
    (folder / "basins.yaml").write_text(yaml.safe_dump(doc, sort_keys=False))
    w = pd.read_csv(folder / "weather.csv", dtype=str)
    c = w.copy()
    c["basin"] = COLD["id"]
    for col in ("tmin_c", "tmax_c"):
        c[col] = (c[col].astype(float) - COLD["cooling_c"]).round(1).astype(str)
    (pd.concat([w, c]) if with_rain_basin else c).to_csv(folder / "weather.csv", index=False)
    g = pd.read_csv(folder / "gauge.csv", dtype=str)
    days = pd.date_range(start, end, freq="D")
    stamps = (days.values[:, None] + np.arange(0, 24, 3).astype("timedelta64[h]")).reshape(-1)
    placeholder = pd.DataFrame({"timestamp": pd.DatetimeIndex(stamps).strftime("%Y-%m-%dT%H:%MZ"),
                                "basin": COLD["id"], "value": "1.0"})
    (pd.concat([g, placeholder]) if with_rain_basin else placeholder).to_csv(folder / "gauge.csv", index=False)
    cfg = load_config(data={"raw": str(folder), "prepared": str(folder / "unused")})
    forcing = preparation.build(cfg, calibrated=False)[0]["forcing"].sel(basin=COLD["id"])
    model = models.get("gr4j+snow")
    params = {k: np.array([v], dtype=float) for k, v in {**model.default_parameters(), **COLD["truth"]}.items()}
    prepared = model.prepare(params)
    x = model.initial_state(params)
    q = np.empty(len(days))
    for i in range(len(days)):
        x, f = model.step(x, {n: forcing[n].values[i:i + 1] for n in model.forcings}, prepared)
        q[i] = f["runoff"][0] * COLD["area_km2"] / 86.4
    z = np.random.default_rng(COLD["seed"]).standard_normal(len(stamps))
    values = np.repeat(q, 8) * np.exp(COLD["reading_log_sd"] * z)
    readings = placeholder.assign(value=[f"{v:.4g}" for v in values])
    (pd.concat([g, readings]) if with_rain_basin else readings).to_csv(folder / "gauge.csv", index=False)
    return folder, q


TWIN_IDS = ["alder-creek", "birch-river"]


def twin_arrays(start: str, end: str, *, seed: int, x4, rain_cv: float = 0.0, missing: float = 0.1) -> dict:
    """Two invented basins whose truth is GR4J driven by the true rain (the prepared-layer tests).

    The prepared rain carries lognormal errors of coefficient of variation ``rain_cv`` (none when
    0), the readings 10 % errors, and a fraction ``missing`` of days has no reading. Random draws
    come in a fixed order from ``numpy.random.default_rng(seed)``, so a seed gives the same layer.
    """
    from assim import models
    from assim.io import prepared as prep_io

    dates = pd.date_range(start, end, freq="D")
    nt = len(dates)
    rng = np.random.default_rng(seed)
    p = np.where(rng.random((2, nt)) < 0.35, rng.gamma(0.8, 9.0, (2, nt)), 0.0)
    e = np.clip(2.5 + 2.0 * np.sin(2 * np.pi * (np.arange(nt) - 100) / 365.25), 0.3, None)[None].repeat(2, 0)
    params = {"x1": np.array([300.0, 450.0]), "x2": np.array([0.0, -0.5]), "x3": np.array([80.0, 110.0]),
              "x4": np.asarray(x4, dtype=float)}
    area = np.array([180.0, 420.0])
    m = models.get("gr4j")
    x = m.initial_state(params)
    truth = np.empty((2, nt))
    for i in range(nt):
        x, f = m.step(x, {"precipitation": p[:, i], "pet": e[:, i]}, params)
        truth[:, i] = f["runoff"] * area / 86.4
    if rain_cv > 0:
        s = np.sqrt(np.log1p(rain_cv**2))
        p = p * np.exp(s * rng.standard_normal((2, nt)) - s * s / 2)
    obs = truth * (1 + 0.1 * rng.standard_normal((2, nt)))
    obs[:, rng.random(nt) < missing] = np.nan
    flags = np.where(np.isnan(obs), prep_io.QC_FLAGS["insufficient_coverage"], 0)
    return {"dates": dates, "precipitation": p, "pet": e, "truth": truth, "obs": obs, "flags": flags,
            "params": params, "area": area}


def write_twin_layer(folder: Path, twin: dict) -> Path:
    """Write :func:`twin_arrays`' basins as a prepared layer (forcing, observations, basins) in ``folder``."""
    from assim.io import prepared as prep_io

    obs, nt = twin["obs"], len(twin["dates"])
    lat, lon = np.array([45.0, 46.0]), np.array([5.0, 6.0])
    prep_io.write_forcing(prep_io.forcing_dataset(TWIN_IDS, twin["dates"].values, twin["precipitation"], twin["pet"],
                                                  lat, lon), folder / "forcing.nc")
    prep_io.write_observations(
        prep_io.observations_dataset(TWIN_IDS, twin["dates"].values, obs, twin["flags"],
                                     np.where(np.isnan(obs), 0.0, 1.0), np.full((2, nt), 24), np.zeros((2, nt)),
                                     lat, lon), folder / "observations.nc")
    prep_io.write_basins(
        prep_io.basins_dataset(TWIN_IDS, ["Alder Creek", "Birch River"], twin["area"], lat, lon, "gr4j",
                               twin["params"], np.array([[20.0, 40.0], [30.0, np.nan]]), ["minor", "major"],
                               ["discharge", "discharge"]), folder / "basins.nc")
    return folder
