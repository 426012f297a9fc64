"""Tests of assim.preparation: rating, QC, daily means, PET, prepare/check and bad raw inputs."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import assim.preparation as prep
from assim.config import load_config
from assim.errors import AssimError, InputError
from assim.evaporation import day_of_year, extraterrestrial_radiation, oudin
from assim.io import prepared as prep_io
from assim.io.prepared import QC_FLAGS

REPO = Path(__file__).resolve().parents[1]
F = QC_FLAGS

BASINS_YAML = """\
basins:
  - id: alpha
    name: Alpha Brook at Testford
    area_km2: 50.0
    latitude: 51.0
    longitude: -1.0
    model: gr4j
    parameters: {x1: 300.0, x2: 0.0, x3: 80.0, x4: 1.5}
    thresholds_m3s: {minor: 10.0, major: 30.0}
    gauge:
      kind: stage
      rating: {a: 2.0, b: 1.5, h0: 0.1, stage_min_m: 0.2, stage_max_m: 3.0}
  - id: beta
    name: Beta Water at Nowhere Mill
    area_km2: 120.0
    latitude: 52.5
    longitude: -2.0
    model: gr4j
    parameters: {x1: 500.0, x2: -0.5, x3: 100.0, x4: 2.0}
    thresholds_m3s: {minor: 20.0, moderate: 40.0}
    gauge: {kind: discharge}
"""
DAYS = np.arange("2015-03-01", "2015-03-11", dtype="datetime64[D]")


def weather_csv() -> str:
    rows = ["date,basin,precipitation_mm,tmin_c,tmax_c"]
    for b in ("alpha", "beta"):
        rows += [f"{d},{b},2.5,3.0,11.0" for d in DAYS]
    return "\n".join(rows) + "\n"


def gauge_csv() -> str:
    """Readings every 3 h alternating between two values: alpha stage 1.1 and 1.5 m
    (Q = 2 (1.0)^1.5 = 2 and 2 (1.4)^1.5 m3 s-1), beta 5 and 6 m3 s-1, with a spike of 60 at
    2015-03-04T12:00 and no readings from 2015-03-07T03:00 to 18:00."""
    t = DAYS[0].astype("datetime64[h]") + np.arange(0, 24 * DAYS.size, 3).astype("timedelta64[h]")
    rows = ["timestamp,basin,value"]
    text = np.datetime_as_string(t, unit="h")
    rows += [f"{s}:00Z,alpha,{'1.100' if k % 2 == 0 else '1.500'}" for k, s in enumerate(text)]
    for k, s in enumerate(text):
        if "2015-03-07T03" <= s <= "2015-03-07T18":
            continue
        value = "60.000" if s == "2015-03-04T12" else ("5.000" if k % 2 == 0 else "6.000")
        rows.append(f"{s}:00Z,beta,{value}")
    return "\n".join(rows) + "\n"


def make_raw(folder: Path, **texts) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    files = {"basins.yaml": BASINS_YAML, "weather.csv": weather_csv(), "gauge.csv": gauge_csv()}
    for key, text in texts.items():
        files[key.replace("_", ".")] = text
    for name, text in files.items():
        if text is None:
            continue
        data = text if isinstance(text, bytes) else text.encode("utf-8")
        (folder / name).write_bytes(data)
    return folder


def config(raw: Path, prepared: Path, **data):
    return load_config(None, data={"raw": str(raw), "prepared": str(prepared), **data})


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    base = tmp_path_factory.mktemp("good")
    raw = make_raw(base / "raw")
    cfg = config(raw, base / "prepared")
    return cfg, prep.prepare(cfg)


# ---------------------------------------------------------------------------------- rating


def test_rating_hand_values():
    """Q = a (h - h0)^b (power-law rating; common practice, no published source), by hand:
    a = 2, b = 1.5, h0 = 0.1: h = 1.1 -> 2.0; h = 0.35 -> 2 x 0.25^1.5 = 0.25;
    h = 0.15 -> 2 x 0.05^1.5 = 0.02236 (below the valid range: extrapolated);
    h = 0.1 and 0.05 -> no discharge, flagged below h0."""
    h = np.array([1.1, 0.35, 0.15, 0.1, 0.05, 3.5])
    q, flags = prep.rating_discharge(h, 2.0, 1.5, 0.1, 0.2, 3.0)
    np.testing.assert_allclose(q[:3], [2.0, 0.25, 2 * 0.05**1.5], rtol=1e-12)
    assert q[5] == pytest.approx(2 * 3.4**1.5)
    assert np.isnan(q[3]) and np.isnan(q[4])
    np.testing.assert_array_equal(flags, [0, 0, F["rating_extrapolated"], F["below_rating_offset"],
                                          F["below_rating_offset"], F["rating_extrapolated"]])


# ---------------------------------------------------------------------------------- QC


def _qc(values, hours=None, area=10.0, **kw):
    q = np.asarray(values, dtype=float)
    hours = np.arange(q.size) * 3.0 if hours is None else np.asarray(hours, dtype=float)
    opts = {"max_discharge_m3s": 10.0, "spike_ratio": 3.0, "flatline_hours": 24.0, **kw}
    return prep.qc_readings(np.zeros(q.size, int), hours * 3600.0, q, q, np.full(q.size, area), **opts)


def test_qc_impossible_values():
    """Negative or infinite discharge is impossible; zero is not (common practice)."""
    flags = _qc([1.0, -1.0, 0.0, np.inf, 1.0])
    assert [bool(f & F["impossible_value"]) for f in flags] == [False, True, False, True, False]


def test_qc_plausible_maximum():
    """Above max_discharge_m3s x area (10 m3 s-1 km-2 x 10 km2 = 100) is flagged, 99 is not."""
    flags = _qc([50.0, 99.0, 100.5, 60.0])
    assert [bool(f & F["above_plausible_maximum"]) for f in flags] == [False, False, True, False]


def test_qc_spikes_up_and_down_but_not_floods():
    """Spike test (rate of change against both neighbours, common practice): a reading 10x
    both neighbours or 1/20 of them is a spike; a reading 3x its neighbours (below the factor
    1 + r = 4) and a steady flood rise doubling each reading are not."""
    up = _qc([1.0, 1.1, 1.0, 10.0, 1.0, 1.1])
    assert np.flatnonzero(up & F["spike"]).tolist() == [3]
    down = _qc([10.0, 10.5, 0.5, 10.0, 10.5])
    assert np.flatnonzero(down & F["spike"]).tolist() == [2]
    assert not (_qc([1.0, 1.1, 3.0, 1.0, 1.1]) & F["spike"]).any()
    assert not (_qc([1.0, 2.0, 4.0, 8.0, 16.0, 32.0, 20.0, 12.0]) & F["spike"]).any()


def test_qc_spike_neighbours_stay_within_a_basin():
    """The last reading of one basin and the first of the next are not neighbours."""
    q = np.array([1.0, 1.1, 10.0, 1.0, 1.1, 1.0])
    basin = np.array([0, 0, 0, 1, 1, 1])
    flags = prep.qc_readings(basin, np.arange(6) * 3600.0, q, q, np.full(6, 10.0),
                             max_discharge_m3s=100.0, spike_ratio=3.0, flatline_hours=24.0)
    assert not (flags & F["spike"]).any()


def test_qc_flat_line():
    """Identical readings spanning 24 h or more are a stuck sensor; 21 h are not. A reading
    is judged by the run up to the end of its own UTC day: the run from 06 h to 30 h
    reaches 24 h on day two, so its readings of day two (24, 27, 30 h) are flagged and
    those of day one (15 h by midnight) are not."""
    stuck = _qc([2.0, 2.1] + [3.0] * 9 + [2.9])  # nine readings 3 h apart span 24 h
    assert np.flatnonzero(stuck & F["flat_line"]).tolist() == [8, 9, 10]
    assert not (_qc([2.0, 2.1] + [3.0] * 8 + [2.9]) & F["flat_line"]).any()
    within = _qc([2.0] + [3.0] * 8 + [2.0], hours=np.arange(10) * 2.0, flatline_hours=12.0)
    assert np.flatnonzero(within & F["flat_line"]).tolist() == list(range(1, 9))


def test_qc_spike_test_waits_for_no_later_day():
    """The last reading of a day is not tested against the first reading of the next day:
    a day's flags must not change when the next day's readings arrive."""
    flags = _qc([1.0, 1.1, 1.0, 1.05, 10.0, 1.0], hours=[12, 15, 18, 21, 23, 25])
    assert not (flags & F["spike"]).any()
    flags = _qc([1.0, 1.1, 1.0, 10.0, 1.0, 1.0], hours=[12, 15, 18, 21, 23, 25])
    assert np.flatnonzero(flags & F["spike"]).tolist() == [3]


# ---------------------------------------------------------------------------------- daily


def _daily(hours, values, n_days=1, gap=3.0, basin=None):
    t0 = np.datetime64("2015-03-01")
    seconds = t0.astype("datetime64[s]").astype(np.int64) + np.asarray(hours, float) * 3600.0
    basin = np.zeros(len(hours), int) if basin is None else np.asarray(basin)
    return prep.daily_means(basin, seconds, np.asarray(values, float), int(basin.max()) + 1, t0, n_days,
                            max_gap_hours=gap)


def test_daily_mean_time_weighted():
    """Hand computation of the documented rule: readings at 0 h (0), 2 h (10), 20 h (4)
    with up to 24 h on either side stand for [-24, 1], [1, 11], [11, 44] h, so the day's
    mean is (0 x 1 + 10 x 10 + 4 x 13) / 24 = 6.333 (the plain mean would be 4.667)."""
    mean, cover = _daily([0, 2, 20], [0.0, 10.0, 4.0], gap=24.0)
    assert mean[0, 0] == pytest.approx(152 / 24)
    assert cover[0, 0] == pytest.approx(1.0)


def test_daily_mean_regular_readings_and_next_day():
    """Six-hourly readings 1, 2, 3, 4 and 5 the next midnight. Day one uses its own
    readings only: they stand for [0, 3], [3, 9], [9, 15], [15, 21] h, so the mean is
    (1x3 + 2x6 + 3x6 + 4x6) / 21 = 2.714 and the coverage 21/24 (hand computation); the
    midnight reading stands for [24, 27] h of day two only."""
    mean, cover = _daily([0, 6, 12, 18, 24], [1, 2, 3, 4, 5], n_days=2)
    assert mean[0, 0] == pytest.approx(57 / 21)
    assert cover[0, 0] == pytest.approx(21 / 24)
    assert cover[0, 1] == pytest.approx(3 / 24)
    assert mean[0, 1] == pytest.approx(5.0)
    first, _ = _daily([0, 6, 12, 18], [1, 2, 3, 4], n_days=2)  # before day two's reading arrived
    assert first[0, 0] == mean[0, 0]


def test_daily_partial_coverage():
    """Hourly readings 00:00-11:00 with a 3 h cap cover [0, 14] h: 14 h of 24 = 0.583."""
    mean, cover = _daily(np.arange(12), np.full(12, 7.0))
    assert cover[0, 0] == pytest.approx(14 / 24)
    assert mean[0, 0] == pytest.approx(7.0)


def test_daily_means_basins_apart():
    """Two basins on the same days do not mix, however close their readings are."""
    hours = [0, 6, 12, 18, 0, 6, 12, 18]
    mean, cover = _daily(hours, [1, 1, 1, 1, 9, 9, 9, 9], basin=[0, 0, 0, 0, 1, 1, 1, 1])
    np.testing.assert_allclose(mean[:, 0], [1.0, 9.0])
    np.testing.assert_allclose(cover[:, 0], [21 / 24, 21 / 24])


def test_daily_means_against_brute_force():
    """The implementation against a direct reading of the rule (common practice, no
    published source): a moment of a day is covered by the nearest reading of the same day
    if that reading is at most max_gap_hours away; the mean is the average over covered
    moments, sampled every 10 s. Random irregular readings, three basins."""
    rng = np.random.default_rng(7)
    t0 = np.datetime64("2015-03-01")
    base = float(t0.astype("datetime64[s]").astype(np.int64))
    n_days, gap = 4, 2.5
    basin, seconds, values = [], [], []
    for b in range(3):
        t = np.cumsum(rng.uniform(0.2, 9.0, 40)) - 5.0  # hours, some before the first day
        t = t[t < 24 * n_days + 5]
        basin += [b] * t.size
        seconds += list(base + t * 3600.0)
        values += list(rng.uniform(0.5, 20.0, t.size))
    basin, seconds, values = np.array(basin), np.array(seconds), np.array(values)
    mean, cover = prep.daily_means(basin, seconds, values, 3, t0, n_days, max_gap_hours=gap)
    grid = base + (np.arange(n_days * 8640) + 0.5) * 10.0
    for b in range(3):
        for d in range(n_days):
            day = slice(d * 8640, (d + 1) * 8640)
            lo, hi = base + d * 86400.0, base + (d + 1) * 86400.0
            own = (basin == b) & (seconds >= lo) & (seconds < hi)
            tb, vb = seconds[own], values[own]
            if not tb.size:
                assert cover[b, d] == 0 and np.isnan(mean[b, d])
                continue
            nearest = np.abs(grid[day][:, None] - tb[None, :]).argmin(axis=1)
            c = np.abs(grid[day] - tb[nearest]) <= gap * 3600.0
            assert cover[b, d] == pytest.approx(c.mean(), abs=1e-3)
            if c.any():
                assert mean[b, d] == pytest.approx(vb[nearest][c].mean(), rel=2e-3)
            else:
                assert np.isnan(mean[b, d])


# ---------------------------------------------------------------------------------- prepare


def test_prepare_small_folder(good):
    """Hand computation of the documented coverage rule on three-hourly readings at 00, 03,
    ..., 21 h alternating between two values, each day on its own readings: the 00 h
    reading stands for [0, 1.5] h, the 21 h one for [19.5, 24] h, the others 3 h, so a day
    weighs the first value 10.5 h and the second 13.5 h. The spike at 12:00 is left out of
    its day and its neighbours, now 6 h apart, stand for 4.5 h each: (7.5 x 5 + 16.5 x 6) /
    24. The outage day is missing and flagged; PET is Oudin's."""
    cfg, ds = good
    obs = ds["observations"]
    q = obs["discharge"].values
    q1, q2 = 2.0, 2.0 * 1.4**1.5
    np.testing.assert_allclose(q[0], (10.5 * q1 + 13.5 * q2) / 24, rtol=1e-12)
    assert (obs["qc_flag"].values[0] == 0).all()
    day = {str(d)[:10]: j for j, d in enumerate(obs["time"].values)}
    j_spike, j_gap = day["2015-03-04"], day["2015-03-07"]
    assert q[1, day["2015-03-03"]] == pytest.approx((10.5 * 5 + 13.5 * 6) / 24, rel=1e-12)
    assert q[1, j_spike] == pytest.approx((7.5 * 5 + 16.5 * 6) / 24, rel=1e-12)
    assert obs["qc_flag"].values[1, j_spike] == F["spike"]
    assert obs["n_rejected"].values[1, j_spike] == 1
    assert np.isnan(q[1, j_gap])
    assert obs["qc_flag"].values[1, j_gap] & F["insufficient_coverage"]
    assert obs["coverage"].values[1, j_gap] == pytest.approx((3 + 6) / 24)  # 00 h: [0, 3], 21 h: [18, 24]
    usable = prep_io.usable_discharge(obs).values
    assert np.isnan(usable[1, j_gap]) and usable[1, j_spike] == q[1, j_spike]
    ra = extraterrestrial_radiation(np.array([[51.0], [52.5]]), day_of_year(DAYS)[None, :])
    np.testing.assert_allclose(ds["forcing"]["pet"].values, oudin(ra, 7.0))
    np.testing.assert_allclose(ds["forcing"]["precipitation"].values, 2.5)
    b = ds["basins"]
    assert b.attrs["model"] == "gr4j"
    assert b["threshold"].values.tolist() == ["minor", "major", "moderate"]
    th = b["thresholds"].values
    assert th[0, 2] != th[0, 2] and th[1, 1] != th[1, 1]  # NaN where a basin lacks a level
    assert th[1, 2] == 40.0
    for name in ("forcing.nc", "observations.nc", "basins.nc"):
        assert (Path(cfg["data"]["prepared"]) / name).is_file()


def test_prepare_pet_methods(tmp_path):
    """pet_method given takes pet_mm as is; hargreaves differs from oudin."""
    text = weather_csv().replace("tmax_c\n", "tmax_c,pet_mm\n").replace(",11.0\n", ",11.0,1.7\n")
    raw = make_raw(tmp_path / "raw", weather_csv=text)
    ds = prep.prepare(config(raw, tmp_path / "p1", pet_method="given"))
    np.testing.assert_allclose(ds["forcing"]["pet"].values, 1.7)
    h = prep.prepare(config(raw, tmp_path / "p2", pet_method="hargreaves"))["forcing"]["pet"].values
    assert not np.allclose(h, ds["forcing"]["pet"].values)
    assert (h > 0).all()


def test_basin_selection(tmp_path):
    """data.basins keeps the named basins, in the order given."""
    raw = make_raw(tmp_path / "raw")
    ds = prep.prepare(config(raw, tmp_path / "p", basins=["beta"]))
    for d in ds.values():
        assert d["basin"].values.tolist() == ["beta"]


def test_check_summary(good):
    """check names every basin, the period, the missing days and each QC test's count."""
    cfg, _ = good
    text = prep.check(cfg)
    for part in ("alpha", "beta", "2015-03-01 to 2015-03-10", "spike 1", "flat_line 0",
                 "0 missing (longest gap 0 d)", "1 missing (longest gap 1 d)",
                 "insufficient coverage (no discharge): 1", "prepared folder", "matches the raw folder"):
        assert part in text, part


def test_check_run_period(good):
    """check refuses a run period outside the weather records and reports a good one."""
    from assim.errors import ConfigError

    cfg, _ = good
    ok = load_config(None, data=dict(cfg["data"]), period={"start": "2015-03-02", "end": "2015-03-09"})
    assert "run period 2015-03-02 to 2015-03-09" in prep.check(ok)
    bad = load_config(None, data=dict(cfg["data"]), period={"start": "2014-12-01"})
    with pytest.raises(ConfigError) as info:
        prep.check(bad)
    assert "period.start" in str(info.value) and "2015-03-01 to 2015-03-10" in str(info.value)


def test_assim_prep_is_the_entry_point(good, tmp_path):
    """``assim.prep(cfg)`` prepares, as the Python API documents."""
    import assim

    cfg, _ = good
    out = assim.prep(config(Path(cfg["data"]["raw"]), tmp_path / "p"))
    assert out.folder == tmp_path / "p"
    for ds, name in ((out.forcing, "forcing.nc"), (out.observations, "observations.nc"), (out.basins, "basins.nc")):
        assert ds.attrs["product_path"] == str(tmp_path / "p" / name)


def test_second_prep_in_one_process_takes_the_lock(good, tmp_path):
    """Common practice, no published source: every caller of ``assim.prep`` goes through
    the prepared folder's lock, so a second prep while the first holds it is refused
    (LockError) and writes nothing."""
    import assim
    from assim.errors import LockError
    from assim.io.common import output_lock

    cfg, _ = good
    prepared = tmp_path / "p"
    second = config(Path(cfg["data"]["raw"]), prepared)
    with output_lock(prepared / ".prepared.lock", "the prepared layer"):
        with pytest.raises(LockError):
            assim.prep(second)
    assert not (prepared / "forcing.nc").exists()


# ---------------------------------------------------------------------------------- bad inputs


def _lines(text):
    return text.splitlines(keepends=True)


def _edit_line(text, n, old, new):
    lines = _lines(text)
    assert old in lines[n - 1], (n, lines[n - 1])
    lines[n - 1] = lines[n - 1].replace(old, new, 1)
    return "".join(lines)


def _drop_lines(text, *numbers):
    return "".join(x for k, x in enumerate(_lines(text), 1) if k not in numbers)


def _swap(text, a, b):
    lines = _lines(text)
    lines[a - 1], lines[b - 1] = lines[b - 1], lines[a - 1]
    return "".join(lines)


W, G, Y = weather_csv(), gauge_csv(), BASINS_YAML
BETA_ROWS = tuple(range(12, 22))
BAD = {
    # name: (files to replace, file named, variable, place)
    "weather missing": ({"weather_csv": None}, "weather.csv", None, None),
    "weather column missing": ({"weather_csv": W.replace("tmax_c", "tmax", 1)}, "weather.csv", "tmax_c", "line 1"),
    "duplicated date": ({"weather_csv": _edit_line(W, 4, "2015-03-03", "2015-03-02")}, "weather.csv", "date", "line 4"),
    "reversed dates": ({"weather_csv": _swap(W, 4, 5)}, "weather.csv", "date", "line 5"),
    "missing day": ({"weather_csv": _drop_lines(W, 6)}, "weather.csv", "date", "line 6"),
    "negative rain": ({"weather_csv": _edit_line(W, 3, ",2.5,", ",-1.0,")}, "weather.csv", "precipitation_mm", "line 3"),
    "empty rain cell": ({"weather_csv": _edit_line(W, 7, ",2.5,", ",,")}, "weather.csv", "precipitation_mm", "line 7"),
    "non-numeric temperature": ({"weather_csv": _edit_line(W, 8, ",3.0,", ",warm,")}, "weather.csv", "tmin_c", "line 8"),
    "tmin above tmax": ({"weather_csv": _edit_line(W, 10, ",3.0,", ",20.0,")}, "weather.csv", "tmin_c", "line 10"),
    "bad date": ({"weather_csv": _edit_line(W, 9, "2015-03-08", "2015-03-32")}, "weather.csv", "date", "line 9"),
    "unknown basin in weather": ({"weather_csv": _edit_line(W, 12, "beta", "gamma")}, "weather.csv", "basin", "line 12"),
    "basin without weather": ({"weather_csv": _drop_lines(W, *BETA_ROWS)}, "weather.csv", "basin", "basin 'beta'"),
    "different periods": ({"weather_csv": _drop_lines(W, 21)}, "weather.csv", "date", "basin 'beta'"),
    "bad encoding": ({"weather_csv": W.encode().replace(b"alpha,2.5", b"alph\xe9,2.5", 1)}, "weather.csv", None, "line 2"),
    "empty weather": ({"weather_csv": ""}, "weather.csv", None, None),
    "gauge column missing": ({"gauge_csv": G.replace("value", "reading", 1)}, "gauge.csv", "value", "line 1"),
    "non-numeric reading": ({"gauge_csv": _edit_line(G, 3, "1.500", "abc")}, "gauge.csv", "value", "line 3"),
    "bad timestamp": ({"gauge_csv": _edit_line(G, 4, "T06:00Z", "T25:00Z")}, "gauge.csv", "timestamp", "line 4"),
    "duplicated timestamp": ({"gauge_csv": _edit_line(G, 5, "T09:00Z", "T06:00Z")}, "gauge.csv", "timestamp", "line 5"),
    "unknown basin in gauge": ({"gauge_csv": _edit_line(G, 7, "alpha", "gamma")}, "gauge.csv", "basin", "line 7"),
    "empty gauge": ({"gauge_csv": ""}, "gauge.csv", None, None),
    "header-only gauge": ({"gauge_csv": "timestamp,basin,value\n"}, "gauge.csv", None, None),
    "parameter out of range": ({"basins_yaml": Y.replace("x1: 300.0", "x1: 5000.0")}, "basins.yaml", "parameters.x1", "basin 'alpha'"),
    "parameter missing": ({"basins_yaml": Y.replace(", x4: 2.0}", "}")}, "basins.yaml", "parameters.x4", "basin 'beta'"),
    "unknown parameter": ({"basins_yaml": Y.replace("x4: 1.5}", "x4: 1.5, x5: 1.0}")}, "basins.yaml", "parameters.x5", "basin 'alpha'"),
    "zero area": ({"basins_yaml": Y.replace("area_km2: 120.0", "area_km2: 0")}, "basins.yaml", "area_km2", "basin 'beta'"),
    "missing area": ({"basins_yaml": Y.replace("    area_km2: 120.0\n", "")}, "basins.yaml", "area_km2", "basin 'beta'"),
    "latitude out of range": ({"basins_yaml": Y.replace("latitude: 51.0", "latitude: 95.0")}, "basins.yaml", "latitude", "basin 'alpha'"),
    "rating a not positive": ({"basins_yaml": Y.replace("a: 2.0", "a: -2.0")}, "basins.yaml", "gauge.rating.a", "basin 'alpha'"),
    "rating range reversed": ({"basins_yaml": Y.replace("stage_min_m: 0.2", "stage_min_m: 3.5")}, "basins.yaml", "gauge.rating", "basin 'alpha'"),
    "rating missing": ({"basins_yaml": Y.replace("      rating: {a: 2.0, b: 1.5, h0: 0.1, stage_min_m: 0.2, stage_max_m: 3.0}\n", "")}, "basins.yaml", "gauge.rating", "basin 'alpha'"),
    "gauge kind unknown": ({"basins_yaml": Y.replace("{kind: discharge}", "{kind: level}")}, "basins.yaml", "gauge.kind", "basin 'beta'"),
    "unknown model": ({"basins_yaml": Y.replace("model: gr4j", "model: gr9j", 1)}, "basins.yaml", "model", "basin 'alpha'"),
    "mixed models": ({"basins_yaml": Y.replace("model: gr4j\n    parameters: {x1: 500.0, x2: -0.5, x3: 100.0, x4: 2.0}",
                                               "model: linear_reservoir\n    parameters: {k: 0.1, c: 0.02}")},
                     "basins.yaml", "model", "basin 'beta'"),
    "duplicated basin id": ({"basins_yaml": Y.replace("id: beta", "id: alpha")}, "basins.yaml", "id", "basin 'alpha'"),
    "not yaml": ({"basins_yaml": Y.replace("    area_km2: 50.0\n", "    area_km2: [50.0\n")}, "basins.yaml", None, "line"),
}


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())} if folder.exists() else {}


def assert_one_line(exc: AssimError, file: str, variable: str | None, place: str | None) -> None:
    text = str(exc)
    assert "\n" not in text
    assert file in text, text
    if variable is not None:
        assert f"variable '{variable}'" in text, text
    if place is not None:
        assert place in text, text


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_raw_input(case, good, tmp_path):
    """Each bad input gives one InputError naming file, variable and first bad place, and
    the prepared folder is left exactly as it was (common practice, no published source)."""
    files, name, variable, place = BAD[case]
    raw = make_raw(tmp_path / "raw", **files)
    if files.get(next(iter(files))) is None:
        (raw / name).unlink(missing_ok=True)
    prepared = tmp_path / "prepared"
    shutil.copytree(good[0]["data"]["prepared"], prepared)
    before = _snapshot(prepared)
    with pytest.raises(InputError) as info:
        prep.prepare(config(raw, prepared))
    assert_one_line(info.value, name, variable, place)
    assert _snapshot(prepared) == before


def test_bad_config_inputs(tmp_path):
    """pet_method given without a pet_mm column, and a selected basin not in basins.yaml."""
    raw = make_raw(tmp_path / "raw")
    with pytest.raises(InputError) as info:
        prep.prepare(config(raw, tmp_path / "p", pet_method="given"))
    assert_one_line(info.value, "weather.csv", "pet_mm", "line 1")
    with pytest.raises(InputError) as info:
        prep.prepare(config(raw, tmp_path / "p", basins=["gamma"]))
    assert_one_line(info.value, "basins.yaml", "id", None)
    assert "gamma" in str(info.value)
    assert not (tmp_path / "p").exists()


def test_missing_raw_folder(tmp_path):
    with pytest.raises(InputError) as info:
        prep.prepare(config(tmp_path / "nowhere", tmp_path / "p"))
    assert "nowhere" in str(info.value)


CLI_CASES = ("negative rain", "parameter out of range", "bad encoding", "duplicated timestamp")


def test_cli_bad_inputs(tmp_path):
    """``python -m assim prep`` on bad inputs: exit status 2, one line on stderr naming the
    file, variable and place, no traceback, nothing written."""
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    for k, case in enumerate(CLI_CASES):
        files, name, variable, place = BAD[case]
        raw = make_raw(tmp_path / f"raw{k}", **files)
        prepared = tmp_path / f"prepared{k}"
        cfg = tmp_path / f"config{k}.yaml"
        cfg.write_text(f"data:\n  raw: {raw}\n  prepared: {prepared}\n", encoding="utf-8")
        res = subprocess.run([sys.executable, "-m", "assim", "prep", "--config", str(cfg)],
                             capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120)
        assert res.returncode == 2, res.stderr
        err = res.stderr.strip().splitlines()
        assert len(err) == 1 and "Traceback" not in res.stderr, res.stderr
        assert name in err[0] and place in err[0] and (variable is None or variable in err[0]), err[0]
        assert not prepared.exists()


def test_cli_prep_and_check_good(tmp_path):
    """``assim prep`` then ``assim check`` succeed on a good folder (exit 0)."""
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    raw = make_raw(tmp_path / "raw")
    cfg = tmp_path / "config.yaml"
    cfg.write_text(f"data:\n  raw: {raw}\n  prepared: {tmp_path / 'prepared'}\n", encoding="utf-8")
    for cmd in ("prep", "check"):
        res = subprocess.run([sys.executable, "-m", "assim", cmd, "--config", str(cfg)],
                             capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120)
        assert res.returncode == 0, res.stderr
    assert "alpha" in res.stdout and "matches the raw folder" in res.stdout


# ---------------------------------------------------------------------------------- sample


def test_sample_basin_reproduces():
    """``generate.py --check`` regenerates the shipped files byte for byte (exit 0)."""
    res = subprocess.run([sys.executable, str(REPO / "sample_basin" / "generate.py"), "--check"],
                         capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert "byte for byte" in res.stdout


def test_sample_basin_prepares_with_expected_faults(tmp_path):
    """The sample folder prepares; QC finds the faults README.md documents (four spikes per
    basin, the stuck sensor, two negative readings, three readings below h0, the six-week
    outage) and the daily means follow the truth within the gauge error. One of the twelve
    spikes is the last reading of its UTC day, which the spike test leaves untested (a day's
    flags never wait for the next day), so eleven are found."""
    cfg = config(REPO / "sample_basin", tmp_path / "p")
    ds, stats = prep.build(cfg)
    flags = stats["flags"]
    assert flags["spike"] == 11
    assert flags["impossible_value"] == 2
    assert flags["below_rating_offset"] == 3
    assert flags["flat_line"] >= 10
    obs = ds["observations"]
    assert obs.sizes == {"basin": 3, "time": 4383, "nv": 2}
    tam = obs.sel(basin="tamblewyn")
    gap = tam["discharge"].sel(time=slice("2016-10-04", "2016-11-12")).values
    assert np.isnan(gap).all()
    summary = prep.check(cfg)
    assert "tamblewyn: Tamblewyn River at Dorrick Ferry, 915 km2, discharge gauge" in summary
    assert "missing (longest gap 42 d)" in summary and "not written yet" in summary
    truth = np.genfromtxt(REPO / "sample_basin" / "truth.csv", delimiter=",", skip_header=1,
                          usecols=2).reshape(3, -1)
    ratio = obs["discharge"].values / truth
    assert np.nanmedian(np.abs(ratio - 1)) < 0.06


def test_appending_a_day_changes_no_earlier_day_and_repeats_are_counted(tmp_path):
    """The daily chain's premise (common practice, no published source): preparing the
    folder with one more day of records (appended unsorted, with one row sent twice) leaves
    every earlier day's discharge, flags, coverage and counts bit for bit as they were, and
    check reports the repeated row."""
    days = DAYS[:-1]
    w, g = weather_csv().splitlines(), gauge_csv().splitlines()
    last = str(DAYS[-1])
    w_head = [w[0]] + [r for r in w[1:] if not r.startswith(last)]
    g_head = [g[0]] + [r for r in g[1:] if not r.startswith(last)]
    g_tail = [r for r in g[1:] if r.startswith(last)]
    raw = make_raw(tmp_path / "raw", weather_csv="\n".join(w_head) + "\n", gauge_csv="\n".join(g_head) + "\n")
    cfg = config(raw, tmp_path / "p")
    before = prep.prepare(cfg)["observations"]
    with open(raw / "weather.csv", "a") as f:
        f.write("\n".join(r for r in w[1:] if r.startswith(last)) + "\n")
    with open(raw / "gauge.csv", "a") as f:
        f.write("\n".join(g_tail[::-1] + g_tail[:1]) + "\n")
    after = prep.prepare(cfg)["observations"]
    assert after.sizes["time"] == days.size + 1
    for v in ("discharge", "qc_flag", "coverage", "n_readings", "n_rejected"):
        np.testing.assert_array_equal(after[v].values[:, :-1], before[v].values, err_msg=v)
    assert "gauge rows repeating another exactly (dropped): 1" in prep.check(cfg)
# ---------------------------------------------------------------------------------- snow


def test_snow_block_brings_temperature_and_the_wrapped_model(tmp_path):
    """A basin with a `snow:` block makes the run's model `gr4j+snow`: forcing.nc gets the
    daily mean temperature (tmin + tmax) / 2 in degC, the snow basin its parameters (the
    others their defaults) with snow_routine 1, the rain-only basin snow_routine 0; without
    any block nothing changes (no temperature, model gr4j)."""
    text = BASINS_YAML.replace("    gauge: {kind: discharge}\n",
                               "    gauge: {kind: discharge}\n    snow: {degree_day_factor: 4.5}\n")
    raw = make_raw(tmp_path / "raw", basins_yaml=text)
    out = prep.prepare(config(raw, tmp_path / "prepared"))
    f, b = out["forcing"], out["basins"]
    assert b.attrs["model"] == "gr4j+snow"
    np.testing.assert_array_equal(f["temperature"].values, np.full((2, DAYS.size), 7.0))
    assert f["temperature"].attrs["units"] == "degC"
    assert list(b["snow_routine"].values) == [0.0, 1.0]
    assert list(b["degree_day_factor"].values) == [3.0, 4.5]
    back = prep_io.read_forcing(tmp_path / "prepared" / "forcing.nc")
    np.testing.assert_array_equal(back["temperature"].values, f["temperature"].values)
    plain = prep.prepare(config(make_raw(tmp_path / "raw2"), tmp_path / "prepared2"))
    assert "temperature" not in plain["forcing"] and plain["basins"].attrs["model"] == "gr4j"


@pytest.mark.parametrize("block, variable", [("{melt_rate: 3}", "snow.melt_rate"),
                                             ("{degree_day_factor: 40}", "snow.degree_day_factor"),
                                             ("[1, 2]", "snow")])
def test_bad_snow_block(tmp_path, block, variable):
    text = BASINS_YAML.replace("    gauge: {kind: discharge}\n", f"    gauge: {{kind: discharge}}\n    snow: {block}\n")
    raw = make_raw(tmp_path / "raw", basins_yaml=text)
    with pytest.raises(InputError) as info:
        prep.prepare(config(raw, tmp_path / "prepared"))
    assert info.value.variable == variable and info.value.place == "basin 'beta'"
    assert not (tmp_path / "prepared").exists()


# ---------------------------------------------------------------------------------- appended days


def _daily_rows(rng, days):
    """Weather and gauge rows of each day (lists of CSV lines): a few readings a day at
    random times; alpha (stage) now and then below its rating's offset or above its valid
    range, beta (discharge) with spikes, a negative reading and a stuck sensor holding 5.0
    across two midnights (the flat-line test), some days silent."""
    weather, gauge = {}, {}
    for i, d in enumerate(days):
        weather[d] = [f"{d},{b},{rng.gamma(0.7, 4):.1f},{rng.normal(4, 2):.1f},{rng.normal(13, 2):.1f}"
                      for b in ("alpha", "beta")]
        rows = []
        for b in ("alpha", "beta"):
            n = 0 if (i % 5 == 3 and b == "beta") else int(rng.integers(3, 9))
            minutes = np.sort(rng.choice(24 * 60, n, replace=False))
            for m in minutes:
                stamp = f"{d}T{m // 60:02d}:{m % 60:02d}:00Z"
                if b == "alpha":
                    v = rng.choice([0.05, 3.4, *np.round(rng.uniform(0.3, 2.5, 8), 3)])
                elif 4 <= i <= 6:
                    v = 5.0
                else:
                    v = rng.choice([-1.0, 60.0, *np.round(rng.uniform(4, 9, 10), 3)])
                rows.append(f"{stamp},{b},{v:g}")
        if i in (9, 10):  # a spike on the first reading of a day, its previous plausible neighbour
            # before the midnight and an impossible reading between them
            rows = [r for r in rows if not r.endswith((",beta,-1", ",beta,60"))]
            rows += ([f"{d}T20:00:00Z,beta,6", f"{d}T23:00:00Z,beta,-1"] if i == 9 else
                     [f"{d}T00:10:00Z,beta,60", f"{d}T00:20:00Z,beta,6.5"])
            rows = [r for r in rows if not (r.split(",")[1] == "beta" and (
                (i == 9 and r[11:16] > "20:00" and not r.endswith("-1")) or (i == 10 and r[11:16] < "00:10")))]
            rows.sort()
        gauge[d] = rows
    return weather, gauge


def _same_layer(a: Path, b: Path):
    import xarray as xr

    for name in (prep_io.FORCING_FILE, prep_io.OBSERVATIONS_FILE, prep_io.BASINS_FILE):
        with xr.open_dataset(a / name) as x, xr.open_dataset(b / name) as y:
            xr.testing.assert_identical(x.drop_attrs(), y.drop_attrs())
            assert x.attrs["sha256_variables"] == y.attrs["sha256_variables"], name
            assert x.attrs["raw_sha256"] == y.attrs["raw_sha256"], name


def test_appended_days_update_the_layer_as_preparing_the_whole_record_does(tmp_path):
    """The daily chain's cost (common practice, no published source, for the outcome: an
    update must equal a rebuild): preparing a raw folder that only grew by appended days
    reads only the new rows, and the layer is then variable by variable (and checksum by
    checksum) the one preparing the whole record from scratch gives. Checked day after day
    over readings that exercise every QC test across midnights (a flat line over three
    days, spikes, stage below the rating's offset), readings arriving before their day's
    weather, a weather day without any reading, unsorted and repeated rows; a late reading
    for an earlier day and a corrected reading inside the old rows are noticed and the
    whole record prepared again."""
    rng = np.random.default_rng(11)
    days = [str(d) for d in np.arange("2015-03-01", "2015-03-17", dtype="datetime64[D]")]
    weather, gauge = _daily_rows(rng, days)
    head_w, head_g = "date,basin,precipitation_mm,tmin_c,tmax_c", "timestamp,basin,value"
    n0 = 3
    raw = make_raw(tmp_path / "raw",
                   weather_csv="\n".join([head_w] + sum((weather[d] for d in days[:n0]), [])) + "\n",
                   gauge_csv="\n".join([head_g] + sum((gauge[d] for d in days[:n0]), [])) + "\n")
    cfg = config(raw, tmp_path / "layer")
    assert prep.prepare(cfg)["forcing"].attrs["prepared"].startswith("prepared the whole record")

    def append(name, rows):
        with open(raw / name, "a") as f:
            f.write("".join(r + "\n" for r in rows))

    hows = []
    for i, d in enumerate(days[n0:], start=n0):
        if i == 6:  # the next day's readings arrive before its weather
            append("gauge.csv", gauge[d] + gauge[days[i + 1]])
        elif i == 7:
            pass
        elif i == 9:  # unsorted, one row sent twice
            append("gauge.csv", gauge[d][::-1] + gauge[d][:1])
        elif i == 11:  # a late reading for an earlier day, appended at the end
            append("gauge.csv", gauge[d] + [f"{days[2]}T23:50:00Z,beta,7.25"])
        elif i == 13:  # a reading corrected inside the old rows
            text = (raw / "gauge.csv").read_text()
            old = gauge[days[5]][1]
            (raw / "gauge.csv").write_text(text.replace(old + "\n", old.rsplit(",", 1)[0] + ",4.321\n"))
            append("gauge.csv", gauge[d])
        elif i != 12:  # day 12: a weather day without any reading of either gauge
            append("gauge.csv", gauge[d])
        append("weather.csv", weather[d])
        how = prep.prepare(cfg)["forcing"].attrs["prepared"]
        hows.append(how)
        ref = config(raw, tmp_path / f"ref-{i}")
        prep.prepare(ref)
        _same_layer(tmp_path / "layer", tmp_path / f"ref-{i}")
    whole = [i for i, h in zip(range(n0, len(days)), hows, strict=True) if not h.startswith("appended")]
    assert whole == [11, 13], hows
    assert "late or corrected" in hows[11 - n0] and "gauge.csv changed" in hows[13 - n0]
    observations = prep_io.read_observations(tmp_path / "layer" / prep_io.OBSERVATIONS_FILE)
    flags = observations["qc_flag"].values
    for name in ("flat_line", "spike", "below_rating_offset", "impossible_value"):  # the QC tests were exercised
        assert ((flags & F[name]) != 0).any(), name
    assert flags[1, 10] & F["spike"] and flags[1, 9] & F["impossible_value"]


def test_a_record_of_another_write_or_changed_settings_prepare_the_whole_record(tmp_path):
    """The record beside the layer is trusted only when it belongs to the layer's write
    (its set_generation) and to the same data settings (common practice, no published
    source): otherwise the whole record is prepared again, and the layer equals a rebuild."""
    import json

    raw = make_raw(tmp_path / "raw")
    cfg = config(raw, tmp_path / "layer")
    prep.prepare(cfg)
    assert prep.prepare(cfg)["forcing"].attrs["prepared"].startswith("appended 0 day")
    record = tmp_path / "layer" / prep_io.RECORD_FILE
    d = json.loads(record.read_text())
    d["set_generation"] = "0" * 32  # e.g. a kill between the renames of two writes
    record.write_text(json.dumps(d))
    assert "not the layer's" in prep.prepare(cfg)["forcing"].attrs["prepared"]
    other = config(raw, tmp_path / "layer", daily_coverage=0.5)
    assert "other data settings" in prep.prepare(other)["forcing"].attrs["prepared"]
    prep.prepare(config(raw, tmp_path / "ref", daily_coverage=0.5))
    _same_layer(tmp_path / "layer", tmp_path / "ref")
