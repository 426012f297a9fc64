"""Tests of assim.io.raw: basins.yaml, weather.csv and gauge.csv readers."""

from __future__ import annotations

import numpy as np
import pytest

from assim.errors import InputError
from assim.io import raw

YAML = """\
basins:
  - id: alpha
    name: Alpha Brook
    area_km2: 50.0
    latitude: 51.0
    longitude: -1.0
    model: gr4j
    parameters: {x1: 300.0, x2: 0.0, x3: 80.0, x4: 1.5}
    thresholds_m3s: {minor: 10.0}
    gauge:
      kind: stage
      rating: {a: 2.0, b: 1.5, h0: 0.1, stage_min_m: 0.2, stage_max_m: 3.0}
  - id: beta
    name: Beta Water
    area_km2: 120
    latitude: -33.5
    longitude: 150.0
    model: gr4j
    parameters: {x1: 500, x2: -0.5, x3: 100, x4: 2}
    thresholds_m3s: {}
    gauge: {kind: discharge}
"""


def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_bytes(text if isinstance(text, bytes) else text.encode("utf-8"))
    return p


def test_read_basins_values(tmp_path):
    """Values, the rating record and the selection order come through as written."""
    basins = raw.read_basins_yaml(write(tmp_path, "basins.yaml", YAML))
    assert [b.id for b in basins] == ["alpha", "beta"]
    a, b = basins
    assert a.gauge.kind == "stage" and a.gauge.rating == raw.Rating(2.0, 1.5, 0.1, 0.2, 3.0)
    assert b.gauge == raw.Gauge("discharge") and b.thresholds_m3s == {}
    assert b.parameters == {"x1": 500.0, "x2": -0.5, "x3": 100.0, "x4": 2.0}
    picked = raw.read_basins_yaml(tmp_path / "basins.yaml", select=["beta", "alpha"])
    assert [x.id for x in picked] == ["beta", "alpha"]


def test_parameter_range_is_inclusive(tmp_path):
    """The model's bounds are valid values (Parameter ranges are inclusive); just outside is not."""
    ok = YAML.replace("x1: 300.0", "x1: 3000.0")
    assert raw.read_basins_yaml(write(tmp_path, "basins.yaml", ok))[0].parameters["x1"] == 3000.0
    with pytest.raises(InputError, match="parameters.x1"):
        raw.read_basins_yaml(write(tmp_path, "basins.yaml", YAML.replace("x1: 300.0", "x1: 3000.1")))


@pytest.mark.parametrize("bad, variable", [
    ("area_km2: 50.0", "area_km2"),
    ("kind: stage", "gauge.kind"),
    ("b: 1.5", "gauge.rating.b"),
    ("name: Alpha Brook", "name"),
])
def test_non_numbers_and_bad_values(tmp_path, bad, variable):
    """A string where a number or name is due is an error naming the key."""
    key = bad.split(":")[0]
    replacement = {"name": "name: ''", "kind": "kind: gauge"}.get(key, f"{key}: 'many'")
    with pytest.raises(InputError) as info:
        raw.read_basins_yaml(write(tmp_path, "basins.yaml", YAML.replace(bad, replacement)))
    assert f"variable '{variable}'" in str(info.value)
    assert "basin 'alpha'" in str(info.value)


def test_boolean_is_not_a_number(tmp_path):
    """YAML ``yes`` reads as True; it must not pass as 1."""
    with pytest.raises(InputError, match="area_km2"):
        raw.read_basins_yaml(write(tmp_path, "basins.yaml", YAML.replace("area_km2: 50.0", "area_km2: yes")))


def test_utf8_bom_and_latin1(tmp_path):
    """A UTF-8 byte-order mark is accepted; Latin-1 bytes are an error with their line."""
    p = write(tmp_path, "basins.yaml", b"\xef\xbb\xbf" + YAML.encode())
    assert len(raw.read_basins_yaml(p)) == 2
    p = write(tmp_path, "basins.yaml", YAML.replace("Beta Water", "B\u00e9ta Water").encode("latin-1"))
    with pytest.raises(InputError) as info:
        raw.read_basins_yaml(p)
    assert "line 14" in str(info.value) and "UTF-8" in str(info.value)


WEATHER = """\
date,basin,precipitation_mm,tmin_c,tmax_c,snow_cm
2015-03-01,alpha,1.0,2.0,8.0,0
2015-03-02,alpha,0.0,1.0,7.5,0
2015-03-01,beta,3.5,10.0,20.0,0
2015-03-02,beta,0.2,11.0,21.0,0
"""


def test_read_weather(tmp_path):
    """Rows land on (basin, time) in the order asked for; extra columns are ignored."""
    w = raw.read_weather(write(tmp_path, "weather.csv", WEATHER), ["beta", "alpha"])
    assert w.dates.tolist() == [np.datetime64("2015-03-01"), np.datetime64("2015-03-02")]
    np.testing.assert_array_equal(w.precipitation, [[3.5, 0.2], [1.0, 0.0]])
    np.testing.assert_array_equal(w.tmax, [[20.0, 21.0], [8.0, 7.5]])
    assert w.pet is None


def test_read_weather_interleaved_rows(tmp_path):
    """Rows of different basins may interleave; only each basin's own order matters."""
    lines = WEATHER.splitlines()
    text = "\n".join([lines[0], lines[1], lines[3], lines[2], lines[4]]) + "\n"
    w = raw.read_weather(write(tmp_path, "weather.csv", text), ["alpha", "beta"])
    np.testing.assert_array_equal(w.precipitation, [[1.0, 0.0], [3.5, 0.2]])


def test_unselected_basins_are_dropped(tmp_path):
    """Rows of a basin of basins.yaml that is not selected are left out, not errors."""
    w = raw.read_weather(write(tmp_path, "weather.csv", WEATHER), ["alpha"], all_ids=["alpha", "beta"])
    assert w.precipitation.shape == (1, 2)
    with pytest.raises(InputError, match="unknown basin 'beta'"):
        raw.read_weather(tmp_path / "weather.csv", ["alpha"])


def test_ragged_csv(tmp_path):
    """A row with too many fields is reported with its line."""
    text = WEATHER.replace("2015-03-02,alpha,0.0,1.0,7.5,0", "2015-03-02,alpha,0.0,1.0,7.5,0,9,9")
    with pytest.raises(InputError) as info:
        raw.read_weather(write(tmp_path, "weather.csv", text), ["alpha", "beta"])
    assert "weather.csv" in str(info.value) and "line 3" in str(info.value)


GAUGE = """\
timestamp,basin,value
2015-03-01T00:00:00Z,alpha,1.2
2015-03-01T01:30+01:00,beta,5.0
2015-03-01T03:00Z,alpha,1.25
2015-03-01T02:00,beta,5.5
"""


def test_read_gauge_utc_and_sorting(tmp_path):
    """Offsets are converted to UTC (01:30+01:00 is 00:30Z), naive times are UTC, and the
    readings come sorted by basin then time."""
    r = raw.read_gauge(write(tmp_path, "gauge.csv", GAUGE), ["alpha", "beta"])
    assert r.basin.tolist() == [0, 0, 1, 1]
    assert r.time.tolist() == [np.datetime64(t, "s") for t in (
        "2015-03-01T00:00", "2015-03-01T03:00", "2015-03-01T00:30", "2015-03-01T02:00")]
    assert r.value.tolist() == [1.2, 1.25, 5.0, 5.5]
    assert r.line.tolist() == [2, 4, 3, 5]


def test_gauge_rows_in_any_order_are_sorted_in_utc(tmp_path):
    """Rows arrive as the gauges send them (common practice, no published source): a late
    reading appended at the end and an unsorted block are sorted by basin, then UTC time
    (02:30+02:00 is 00:30Z, before 01:00Z)."""
    text = ("timestamp,basin,value\n2015-03-01T01:00Z,alpha,1\n2015-03-01T02:30+02:00,alpha,2\n"
            "2015-03-01T06:00Z,alpha,4\n2015-03-01T05:00Z,alpha,3\n2015-03-01T00:10Z,beta,9\n"
            "2015-02-28T23:00Z,alpha,0\n")
    r = raw.read_gauge(write(tmp_path, "gauge.csv", text), ["alpha", "beta"])
    assert r.value.tolist() == [0, 2, 1, 3, 4, 9]
    assert r.line.tolist() == [7, 3, 2, 5, 4, 6]
    assert r.basin.tolist() == [0, 0, 0, 0, 0, 1]


def test_gauge_exact_duplicates_dropped_conflicts_refused(tmp_path):
    """A row sent twice (same basin, time and value, however written) is one reading; two
    values at one time are an error naming both physical lines (common practice, no
    published source)."""
    text = ("timestamp,basin,value\n2015-03-01T01:00Z,alpha,1.5\n2015-03-01T02:00Z,alpha,2\n"
            "2015-03-01T01:00:00+00:00,alpha,1.50\n")
    r = raw.read_gauge(write(tmp_path, "gauge.csv", text), ["alpha"])
    assert r.value.tolist() == [1.5, 2.0] and r.line.tolist() == [2, 3] and r.duplicates == 1
    text = ("timestamp,basin,value\n2015-03-01T01:00Z,alpha,1.5\n\n2015-03-01T02:00Z,alpha,2\n"
            "2015-03-01T01:00Z,alpha,1.6\n")
    with pytest.raises(InputError) as info:
        raw.read_gauge(write(tmp_path, "gauge.csv", text), ["alpha"])
    msg = str(info.value)
    assert "line 2" in msg and "line 5" in msg and "1.5" in msg and "1.6" in msg and "'timestamp'" in msg


def test_gauge_sub_second_timestamps_are_distinct(tmp_path):
    """Readings 0.5 s apart (…00:27:00.200Z and …00:27:00.700Z) are two readings, not a
    duplicated timestamp; their times keep the milliseconds."""
    text = "timestamp,basin,value\n2015-03-01T00:27:00.200Z,alpha,1\n2015-03-01T00:27:00.700Z,alpha,2\n"
    r = raw.read_gauge(write(tmp_path, "gauge.csv", text), ["alpha"])
    assert r.value.tolist() == [1.0, 2.0]
    assert (r.time[1] - r.time[0]) == np.timedelta64(500, "ms")


@pytest.mark.parametrize("name", ["weather.csv", "gauge.csv"])
def test_blank_lines_do_not_shift_reported_lines(tmp_path, name):
    """A bad value on physical line 6, after two blank lines, is reported at line 6."""
    if name == "weather.csv":
        text = ("date,basin,precipitation_mm,tmin_c,tmax_c\n2015-03-01,alpha,1,2,8\n\n"
                "2015-03-02,alpha,1,2,8\n\n2015-03-03,alpha,x,2,8\n")
        call = lambda p: raw.read_weather(p, ["alpha"])  # noqa: E731
    else:
        text = ("timestamp,basin,value\n2015-03-01T01:00Z,alpha,1\n\n2015-03-01T02:00Z,alpha,1\n"
                "   \n2015-03-01T03:00Z,alpha,x\n")
        call = lambda p: raw.read_gauge(p, ["alpha"])  # noqa: E731
    with pytest.raises(InputError) as info:
        call(write(tmp_path, name, text))
    assert "line 6" in str(info.value), str(info.value)


def test_inf_and_nan_values_are_errors(tmp_path):
    """Non-finite numbers are not readings (nothing is filled in)."""
    for bad in ("nan", "inf", "1e999"):
        text = f"timestamp,basin,value\n2015-03-01T01:00Z,alpha,{bad}\n"
        with pytest.raises(InputError) as info:
            raw.read_gauge(write(tmp_path, "gauge.csv", text), ["alpha"])
        assert "variable 'value'" in str(info.value) and "line 2" in str(info.value)


def test_blanks_and_windows_line_ends(tmp_path):
    """Blanks around fields and CRLF line ends are accepted (common spreadsheet exports)."""
    text = WEATHER.replace(",", " , ").replace("\n", " \r\n")
    w = raw.read_weather(write(tmp_path, "weather.csv", text), ["alpha", "beta"])
    np.testing.assert_array_equal(w.precipitation, [[1.0, 0.0], [3.5, 0.2]])
    g = GAUGE.replace(",", "\t,").replace("\n", "\r\n")
    assert raw.read_gauge(write(tmp_path, "gauge.csv", g), ["alpha", "beta"]).value.tolist() == [1.2, 1.25, 5.0, 5.5]
