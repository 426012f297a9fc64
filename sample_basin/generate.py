"""Generate the invented demonstration basins of this folder (reproducible byte for byte).

    python sample_basin/generate.py            # (re)write the files beside this script
    python sample_basin/generate.py --out DIR  # write them into DIR
    python sample_basin/generate.py --check    # regenerate into a temporary folder and
                                               # exit 1 if a shipped file differs

Everything here is invented for demonstration: basins, rivers, places, coordinates,
weather and gauge readings. How the data are made is described in README.md (same folder).
"""

from __future__ import annotations

import argparse
import filecmp
import sys
import tempfile
from pathlib import Path

import numpy as np

from assim import models
from assim.evaporation import day_of_year, extraterrestrial_radiation, oudin
from assim.units import depth_to_discharge

SEED = 20120101
START, END = np.datetime64("2012-01-01"), np.datetime64("2023-12-31")
FILES = ("basins.yaml", "weather.csv", "gauge.csv", "truth.csv")
SPINUP_DAYS = 730  # the first two years are run once before the truth starts

# Invented basins. climate: mean wet-day amount (mm), wet-after-dry and wet-after-wet
# probabilities, mean temperature and its seasonal amplitude (degC), diurnal range (degC).
BASINS = (
    {
        "id": "velmorra", "name": "Velmorra Beck at Crannow Bridge", "area_km2": 48.5,
        "latitude": 55.214, "longitude": -4.361, "character": "quick upland catchment",
        "truth": {"x1": 180.0, "x2": -0.6, "x3": 55.0, "x4": 1.15},
        "climate": {"wet_mean": 9.5, "p01": 0.45, "p11": 0.72, "t_mean": 7.5, "t_amp": 5.5, "range": 6.5},
        "gauge": "stage", "step_hours": (1.5, 4.0),
    },
    {
        "id": "oskerrin", "name": "Oskerrin River at Fallowmede", "area_km2": 262.0,
        "latitude": 52.087, "longitude": -1.742, "character": "slow groundwater-fed catchment",
        "truth": {"x1": 950.0, "x2": 0.45, "x3": 320.0, "x4": 3.4},
        "climate": {"wet_mean": 5.5, "p01": 0.30, "p11": 0.60, "t_mean": 10.0, "t_amp": 6.5, "range": 8.5},
        "gauge": "discharge", "step_hours": (2.0, 6.0),
    },
    {
        "id": "tamblewyn", "name": "Tamblewyn River at Dorrick Ferry", "area_km2": 915.0,
        "latitude": 53.902, "longitude": -2.561, "character": "larger mixed catchment",
        "truth": {"x1": 420.0, "x2": -0.2, "x3": 130.0, "x4": 2.3},
        "climate": {"wet_mean": 6.5, "p01": 0.36, "p11": 0.66, "t_mean": 9.0, "t_amp": 6.0, "range": 7.5},
        "gauge": "discharge", "step_hours": (2.0, 6.0),
    },
)
# Prior parameters in basins.yaml: what a calibration on imperfect data might give.
PRIOR = {"x1": ("times", 1.25), "x2": ("plus", 0.4), "x3": ("times", 0.8), "x4": ("times", 1.1)}
RATING = {"a": 14.0, "b": 1.65, "h0": 0.12}  # velmorra stage gauge, Q = a (h - h0)^b

PRECIP_ERROR_CV, PRECIP_ERROR_AR1 = 0.3, 0.5  # recorded = true x lognormal AR(1) error
TEMPERATURE_ERROR_SD = 0.5  # degC, added to both tmin and tmax of a day
GAUGE_ERROR_SD = {"stage": 0.05, "discharge": 0.07}  # sd of log discharge per reading
GAMMA_SHAPE = 0.75
WEATHER_CORRELATION = 0.7  # of the standard normals driving the basins on the same day
TEMPERATURE_AR1, TEMPERATURE_SD = 0.7, 2.5

# Faults for quality control to catch.
OUTAGE = ("tamblewyn", "2016-10-03T00:00", "2016-11-14T00:00")  # no readings (6 weeks)
STUCK = ("oskerrin", "2019-07-08T00:00", "2019-07-11T12:00")  # one value repeated
SPIKES_PER_BASIN, SPIKE_FACTOR = 4, 8.0
NEGATIVE = ("oskerrin", 2, -9999.0)  # logger error code, twice
BELOW_H0 = ("velmorra", "2020-02-14T09:00", 3, 0.05)  # three stage readings of 0.05 m

# Demonstration thresholds: the T-year levels of the true discharge, named after T (q2y: the
# 2-year level), i.e. after what they are rather than after any warning category.
RETURN_PERIODS = (2, 5, 10)


def _days() -> np.ndarray:
    return np.arange(START, END + np.timedelta64(1, "D"), dtype="datetime64[D]")


def _norm_cdf(z):
    from math import erf, sqrt

    return 0.5 * (1.0 + np.vectorize(erf)(z / sqrt(2.0)))


def true_weather(rng: np.random.Generator, days: np.ndarray):
    """Precipitation (mm d-1), tmin, tmax (degC) on (basin, time)."""
    nb, nt = len(BASINS), days.size
    clim = {k: np.array([b["climate"][k] for b in BASINS])[:, None] for k in BASINS[0]["climate"]}
    doy = day_of_year(days)[None, :]
    season = np.cos(2 * np.pi * (doy - 15) / 365.25)  # 1 in mid-January: wetter winters
    rho = WEATHER_CORRELATION

    def correlated_normals():
        common = rng.standard_normal((1, nt))
        own = rng.standard_normal((nb, nt))
        return rho * common + np.sqrt(1 - rho**2) * own

    u = _norm_cdf(correlated_normals())
    p01 = np.clip(clim["p01"] * (1 + 0.25 * season), 0.02, 0.98)
    p11 = np.clip(clim["p11"] * (1 + 0.10 * season), 0.02, 0.98)
    wet = np.zeros((nb, nt), dtype=bool)
    for t in range(nt):  # two-state Markov chain of wet days
        p = np.where(wet[:, t - 1], p11[:, t], p01[:, t]) if t else p01[:, 0]
        wet[:, t] = u[:, t] < p
    scale = clim["wet_mean"] * (1 + 0.3 * season) / GAMMA_SHAPE
    amount = rng.gamma(GAMMA_SHAPE, 1.0, (nb, nt)) * scale
    precipitation = np.where(wet, amount, 0.0)

    z = correlated_normals()
    anomaly = np.zeros((nb, nt))
    innov = TEMPERATURE_SD * np.sqrt(1 - TEMPERATURE_AR1**2)
    for t in range(nt):  # AR(1) temperature anomalies
        anomaly[:, t] = (TEMPERATURE_AR1 * anomaly[:, t - 1] if t else 0.0) + innov * z[:, t]
    tmean = clim["t_mean"] - clim["t_amp"] * np.cos(2 * np.pi * (doy - 20) / 365.25) + anomaly
    half_range = 0.5 * clim["range"] * np.where(wet, 0.7, 1.1) * (1 + 0.2 * -season)
    return precipitation, tmean - half_range, tmean + half_range


def ar1_lognormal(rng, shape, cv, ar1) -> np.ndarray:
    """Multiplicative errors with mean 1, coefficient of variation cv, lag-1 autocorrelation
    ar1 of the log error along the last axis."""
    sigma = np.sqrt(np.log1p(cv**2))
    z = rng.standard_normal(shape)
    x = np.empty(shape)
    x[..., 0] = z[..., 0]
    for t in range(1, shape[-1]):
        x[..., t] = ar1 * x[..., t - 1] + np.sqrt(1 - ar1**2) * z[..., t]
    return np.exp(sigma * x - 0.5 * sigma**2)


def run_truth(precipitation, pet):
    """GR4J with the true parameters from its initial state; returns runoff (mm d-1) on
    (basin, time) and the states at the end of each day (basin, time, n_state)."""
    m = models.get("gr4j")
    params = {k: np.array([b["truth"][k] for b in BASINS]) for k in ("x1", "x2", "x3", "x4")}
    state = m.initial_state(params)
    nt = precipitation.shape[1]
    runoff = np.empty_like(precipitation)
    states = np.empty(precipitation.shape + (m.n_state,))
    for t in range(nt):
        state, fl = m.step(state, {"precipitation": precipitation[:, t], "pet": pet[:, t]}, params)
        runoff[:, t] = fl["runoff"]
        states[:, t] = state
    return runoff, states


def gumbel_levels(discharge: np.ndarray, days: np.ndarray, periods=RETURN_PERIODS) -> np.ndarray:
    """T-year levels of a Gumbel distribution fitted by moments to the annual maxima.

    discharge : (basin, time); returns (basin, len(periods)).
    """
    years = days.astype("datetime64[Y]")
    amax = np.stack([discharge[:, years == y].max(axis=1) for y in np.unique(years)], axis=1)
    beta = amax.std(axis=1, ddof=1) * np.sqrt(6) / np.pi  # Gumbel, method of moments
    u = amax.mean(axis=1) - 0.5772156649 * beta
    p = 1 - 1 / np.asarray(periods, dtype=float)
    return u[:, None] - beta[:, None] * np.log(-np.log(p))[None, :]


def _sig3(x: float) -> float:
    return float(f"{x:.3g}")


def readings(rng, days, discharge, index: int):
    """Irregular sub-daily gauge values of one basin: (timestamps datetime64[m], value)."""
    b = BASINS[index]
    lo, hi = b["step_hours"]
    minutes = 24 * 60 * days.size
    n = int(minutes / (lo * 60)) + 10
    steps = np.round(rng.uniform(lo * 60, hi * 60, n)).astype(np.int64)
    offset = np.cumsum(steps) - steps[0] + int(rng.integers(0, 60))
    offset = offset[offset < minutes]
    t_day = (offset / 1440.0) - 0.5  # daily means placed at 12:00 UTC
    q_true = np.interp(t_day, np.arange(days.size), discharge[index])
    q = q_true * np.exp(GAUGE_ERROR_SD[b["gauge"]] * rng.standard_normal(q_true.size))
    stamps = days[0].astype("datetime64[m]") + offset.astype("timedelta64[m]")
    return stamps, q


def make(out: Path) -> None:
    rng = np.random.default_rng(SEED)
    days = _days()
    lat = np.array([b["latitude"] for b in BASINS])
    area = np.array([b["area_km2"] for b in BASINS])

    p_spin, tn_spin, tx_spin = true_weather(rng, days[:SPINUP_DAYS])
    p_true, tmin_true, tmax_true = true_weather(rng, days)
    pet_true = oudin(extraterrestrial_radiation(lat[:, None], day_of_year(days)[None, :]),
                     0.5 * (tmin_true + tmax_true))
    pet_spin = oudin(extraterrestrial_radiation(lat[:, None], day_of_year(days[:SPINUP_DAYS])[None, :]),
                     0.5 * (tn_spin + tx_spin))
    runoff, states = run_truth(np.concatenate([p_spin, p_true], axis=1),
                               np.concatenate([pet_spin, pet_true], axis=1))
    # the spin-up years are left out of the truth
    runoff, states = runoff[:, SPINUP_DAYS:], states[:, SPINUP_DAYS:]
    q_true = depth_to_discharge(runoff, area[:, None])

    p_rec = p_true * ar1_lognormal(rng, p_true.shape, PRECIP_ERROR_CV, PRECIP_ERROR_AR1)
    t_err = TEMPERATURE_ERROR_SD * rng.standard_normal(p_true.shape)
    tmin_rec, tmax_rec = tmin_true + t_err, tmax_true + t_err

    levels = gumbel_levels(q_true, days)

    # gauge readings
    rows = []
    ratings = {}
    for k, b in enumerate(BASINS):
        stamps, q = readings(rng, days, q_true, k)
        keep = np.ones(stamps.size, dtype=bool)
        if b["id"] == OUTAGE[0]:
            keep &= ~((stamps >= np.datetime64(OUTAGE[1])) & (stamps < np.datetime64(OUTAGE[2])))
        stamps, q = stamps[keep], q[keep]
        spikes = np.sort(rng.choice(np.arange(10, stamps.size - 10), SPIKES_PER_BASIN, replace=False))
        if b["gauge"] == "stage":
            a, bb, h0 = RATING["a"], RATING["b"], RATING["h0"]
            value = np.round(h0 + (q / a) ** (1 / bb), 3)
            spiked = np.round(h0 + (q[spikes] * SPIKE_FACTOR / a) ** (1 / bb), 3)
            value[spikes] = spiked
            qs = np.quantile(q_true[k], [0.02, 0.995])
            ratings[b["id"]] = {
                "a": a, "b": bb, "h0": h0,
                "stage_min_m": round(float(h0 + (qs[0] / a) ** (1 / bb)), 2),
                "stage_max_m": round(float(h0 + (qs[1] / a) ** (1 / bb)), 2),
            }
            if b["id"] == BELOW_H0[0]:
                i0 = int(np.searchsorted(stamps, np.datetime64(BELOW_H0[1])))
                value[i0: i0 + BELOW_H0[2]] = BELOW_H0[3]
        else:
            value = np.round(q, 3)
            value[spikes] = np.round(q[spikes] * SPIKE_FACTOR, 3)
        if b["id"] == STUCK[0]:
            w = np.flatnonzero((stamps >= np.datetime64(STUCK[1])) & (stamps < np.datetime64(STUCK[2])))
            value[w] = value[w[0]]
        if b["id"] == NEGATIVE[0]:
            bad = rng.choice(np.arange(stamps.size), NEGATIVE[1], replace=False)
            value[bad] = NEGATIVE[2]
        text = np.datetime_as_string(stamps, unit="m")
        rows.extend(f"{s}Z,{b['id']},{v:.3f}" for s, v in zip(text, value, strict=True))

    _write(out / "gauge.csv", "timestamp,basin,value\n" + "\n".join(rows) + "\n")

    date_text = np.datetime_as_string(days, unit="D")
    lines = ["date,basin,precipitation_mm,tmin_c,tmax_c"]
    for k, b in enumerate(BASINS):
        lines.extend(
            f"{d},{b['id']},{p:.1f},{tn:.1f},{tx:.1f}"
            for d, p, tn, tx in zip(date_text, p_rec[k], tmin_rec[k], tmax_rec[k], strict=True)
        )
    _write(out / "weather.csv", "\n".join(lines) + "\n")

    m = models.get("gr4j")
    uh = [j for j, n in enumerate(m.state_names) if n.startswith("uh")]
    lines = ["date,basin,discharge_m3s,production_store_mm,routing_store_mm,unit_hydrograph_mm,"
             "precipitation_mm,pet_mm"]
    for k, b in enumerate(BASINS):
        s = states[k]
        lines.extend(
            f"{d},{b['id']},{q:.4f},{s1:.3f},{s2:.3f},{s3:.3f},{p:.3f},{e:.3f}"
            for d, q, s1, s2, s3, p, e in zip(
                date_text, q_true[k], s[:, 0], s[:, 1], s[:, uh].sum(axis=1), p_true[k], pet_true[k],
                strict=True)
        )
    _write(out / "truth.csv", "\n".join(lines) + "\n")

    y = ["# Invented basins for demonstration only (see README.md). Written by generate.py.", "basins:"]
    for k, b in enumerate(BASINS):
        prior = {}
        for name, (how, amount) in PRIOR.items():
            x = b["truth"][name]
            prior[name] = round(x * amount if how == "times" else x + amount, 2)
        y += [
            f"  - id: {b['id']}",
            f"    name: {b['name']}",
            f"    # {b['character']}",
            f"    area_km2: {b['area_km2']}",
            f"    latitude: {b['latitude']}",
            f"    longitude: {b['longitude']}",
            "    model: gr4j",
            "    parameters: {" + ", ".join(f"{n}: {v}" for n, v in prior.items()) + "}",
            "    thresholds_m3s: {" + ", ".join(
                f"q{t}y: {_sig3(v)}" for t, v in zip(RETURN_PERIODS, levels[k], strict=True)) + "}",
        ]
        if b["gauge"] == "stage":
            r = ratings[b["id"]]
            y += ["    gauge:", "      kind: stage",
                  "      rating: {" + ", ".join(f"{n}: {v}" for n, v in r.items()) + "}"]
        else:
            y += ["    gauge: {kind: discharge}"]
    _write(out / "basins.yaml", "\n".join(y) + "\n")


def _write(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.part")
    tmp.write_text(text, encoding="utf-8", newline="\n")
    tmp.replace(path)


def main(argv=None) -> int:
    here = Path(__file__).resolve().parent
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=here, help="folder to write (default: this folder)")
    ap.add_argument("--check", action="store_true", help="exit 1 if the shipped files differ from a fresh generation")
    args = ap.parse_args(argv)
    if not args.check:
        make(args.out)
        print(f"wrote {', '.join(FILES)} to {args.out}")
        return 0
    with tempfile.TemporaryDirectory() as tmp:
        make(Path(tmp))
        differ = [f for f in FILES if not (here / f).is_file()
                  or not filecmp.cmp(Path(tmp) / f, here / f, shallow=False)]
    if differ:
        print(f"sample_basin: these files differ from a fresh generation: {', '.join(differ)}; "
              "run `python sample_basin/generate.py`", file=sys.stderr)
        return 1
    print(f"sample_basin: {', '.join(FILES)} are reproduced byte for byte")
    return 0


if __name__ == "__main__":
    sys.exit(main())
