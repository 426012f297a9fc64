"""The raw layer: ``basins.yaml``, ``weather.csv`` and ``gauge.csv``, read and validated.

Every reader checks its file completely and raises one :class:`assim.errors.InputError`
naming the file, the key or column, and the first bad place (line number, basin, date).
Line numbers are the physical lines of the file (the header is line 1; blank lines count).
The formats are documented in ``sample_basin/README.md``.
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

from assim.errors import InputError
from assim.io.common import load_yaml, yaml_problem

BASINS_FILE = "basins.yaml"
WEATHER_FILE = "weather.csv"
GAUGE_FILE = "gauge.csv"

GAUGE_KINDS = ("stage", "discharge")
_BASIN_KEYS = {
    "id", "name", "area_km2", "latitude", "longitude", "model", "parameters", "thresholds_m3s", "gauge",
}
_RATING_KEYS = ("a", "b", "h0", "stage_min_m", "stage_max_m")
WEATHER_COLUMNS = ("date", "basin", "precipitation_mm", "tmin_c", "tmax_c")
GAUGE_COLUMNS = ("timestamp", "basin", "value")


@dataclass(frozen=True)
class Rating:
    """Power-law rating ``Q = a (h - h0)^b`` (Q in m3 s-1, h in m), valid for stages in
    [stage_min_m, stage_max_m]; outside that range discharge is extrapolated."""

    a: float
    b: float
    h0: float
    stage_min_m: float
    stage_max_m: float


@dataclass(frozen=True)
class Gauge:
    """How a basin is gauged: ``kind`` "stage" (with a rating) or "discharge"."""

    kind: str
    rating: Rating | None = None


@dataclass(frozen=True)
class Basin:
    """One basin of basins.yaml, validated."""

    id: str
    name: str
    area_km2: float
    latitude: float
    longitude: float
    model: str
    parameters: dict[str, float]
    thresholds_m3s: dict[str, float]
    gauge: Gauge
    snow: dict[str, float] | None = None  # degree-day snow parameters; None: rain only


@dataclass(frozen=True)
class Weather:
    """Daily basin weather on ``(basin, time)``.

    dates : (time,) datetime64[D], consecutive days
    precipitation, tmin, tmax : (basin, time) float64, mm d-1 and degC
    pet : (basin, time) float64, mm d-1, or None when weather.csv has no pet_mm column
    """

    basins: tuple[str, ...]
    dates: np.ndarray
    precipitation: np.ndarray
    tmin: np.ndarray
    tmax: np.ndarray
    pet: np.ndarray | None = None


@dataclass(frozen=True)
class Readings:
    """Gauge readings, sorted by basin (in the order of ``basins``) then time.

    basin : (n,) int64, index into ``basins``
    time : (n,) datetime64[ms], UTC
    value : (n,) float64, stage in m or discharge in m3 s-1 as the basin's gauge says
    line : (n,) int64, line of each reading in gauge.csv
    duplicates : number of rows dropped as exact repeats of another row
    """

    basins: tuple[str, ...]
    basin: np.ndarray
    time: np.ndarray
    value: np.ndarray
    line: np.ndarray = field(repr=False)
    duplicates: int = 0


# ---------------------------------------------------------------------------------- text


def read_text(path: str | Path) -> str:
    """The whole of a text file, decoded as UTF-8 (a byte-order mark is allowed).

    Raises
    ------
    InputError
        if the file is missing, unreadable, empty, or not UTF-8 (with the line of the first
        undecodable byte).
    """
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise InputError("required file not found", file=path) from None
    except OSError as exc:
        raise InputError(f"cannot read the file ({exc.strerror})", file=path) from None
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise InputError(
            f"not UTF-8 text (byte 0x{data[exc.start]:02x}); save the file as UTF-8",
            file=path,
            place=f"line {line}",
        ) from None
    if not text.strip():
        raise InputError("the file is empty", file=path)
    return text


# ---------------------------------------------------------------------------------- basins


def _number(value, file, key, place, *, positive=False) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise InputError(f"must be a number, got {value!r}", file=file, variable=key, place=place)
    x = float(value)
    if not math.isfinite(x):
        raise InputError(f"must be finite, got {value!r}", file=file, variable=key, place=place)
    if positive and x <= 0:
        raise InputError(f"must be > 0, got {value!r}", file=file, variable=key, place=place)
    return x


def _rating(raw, file, place) -> Rating:
    if not isinstance(raw, Mapping):
        raise InputError(
            "a stage gauge needs a mapping 'rating' with keys " + ", ".join(_RATING_KEYS),
            file=file, variable="gauge.rating", place=place,
        )
    unknown = sorted(set(raw) - set(_RATING_KEYS))
    if unknown:
        raise InputError(f"unknown key {unknown[0]!r}; expected {', '.join(_RATING_KEYS)}",
                         file=file, variable="gauge.rating", place=place)
    for k in _RATING_KEYS:
        if k not in raw:
            raise InputError("missing key", file=file, variable=f"gauge.rating.{k}", place=place)
    v = {k: _number(raw[k], file, f"gauge.rating.{k}", place) for k in _RATING_KEYS}
    for k in ("a", "b"):
        if v[k] <= 0:
            raise InputError(f"must be > 0, got {v[k]}", file=file, variable=f"gauge.rating.{k}", place=place)
    if v["b"] > 10:
        raise InputError(f"exponent {v['b']} is implausible (expected 0 < b <= 10)",
                         file=file, variable="gauge.rating.b", place=place)
    if not v["h0"] <= v["stage_min_m"] < v["stage_max_m"]:
        raise InputError(
            f"the valid stage range must satisfy h0 <= stage_min_m < stage_max_m, got "
            f"h0={v['h0']}, stage_min_m={v['stage_min_m']}, stage_max_m={v['stage_max_m']}",
            file=file, variable="gauge.rating", place=place,
        )
    return Rating(**v)


def _gauge(raw, file, place) -> Gauge:
    if not isinstance(raw, Mapping) or "kind" not in raw:
        raise InputError("needs a mapping with 'kind' (stage or discharge)", file=file,
                         variable="gauge", place=place)
    kind = raw["kind"]
    if kind not in GAUGE_KINDS:
        raise InputError(f"kind must be stage or discharge, got {kind!r}", file=file,
                         variable="gauge.kind", place=place)
    unknown = sorted(set(raw) - {"kind", "rating"})
    if unknown:
        raise InputError(f"unknown key {unknown[0]!r}", file=file, variable="gauge", place=place)
    if kind == "discharge":
        if "rating" in raw:
            raise InputError("a discharge gauge takes no rating", file=file,
                             variable="gauge.rating", place=place)
        return Gauge("discharge")
    return Gauge("stage", _rating(raw.get("rating"), file, place))


def _model_parameters(model_name, raw, file, place) -> dict[str, float]:
    from assim import models

    try:
        model = models.get(model_name)
    except KeyError as exc:
        raise InputError(exc.args[0], file=file, variable="model", place=place) from None
    if not isinstance(raw, Mapping):
        raise InputError(f"must be a mapping of the {model_name} parameters "
                         f"({', '.join(model.parameter_names)})", file=file,
                         variable="parameters", place=place)
    unknown = sorted(set(raw) - set(model.parameter_names))
    if unknown:
        raise InputError(f"model {model_name} has no parameter {unknown[0]!r} (it has "
                         f"{', '.join(model.parameter_names)})", file=file,
                         variable=f"parameters.{unknown[0]}", place=place)
    out = {}
    for p in model.parameters:
        key = f"parameters.{p.name}"
        if p.name not in raw:
            raise InputError("missing parameter", file=file, variable=key, place=place)
        x = _number(raw[p.name], file, key, place)
        if not p.low <= x <= p.high:
            raise InputError(f"{x} is outside the valid range [{p.low}, {p.high}] {p.unit}",
                             file=file, variable=key, place=place)
        out[p.name] = x
    return out


def _snow_parameters(raw, file, place) -> dict[str, float]:
    """The ``snow:`` block of a basin: any of the snow routine's parameters (the others take
    their defaults); an empty block means the defaults."""
    from assim.models import snow

    spec = {p.name: p for p in snow.PARAMETERS if p.name != "snow_routine"}
    if raw is None:
        raw = {}
    if not isinstance(raw, Mapping):
        raise InputError(f"must be a mapping of snow parameters ({', '.join(spec)})", file=file,
                         variable="snow", place=place)
    unknown = sorted(set(raw) - set(spec))
    if unknown:
        raise InputError(f"the snow routine has no parameter {unknown[0]!r} (it has {', '.join(spec)})",
                         file=file, variable=f"snow.{unknown[0]}", place=place)
    out = {}
    for name, p in spec.items():
        x = _number(raw[name], file, f"snow.{name}", place) if name in raw else p.default
        if not p.low <= x <= p.high:
            raise InputError(f"{x} is outside the valid range [{p.low}, {p.high}] {p.unit}",
                             file=file, variable=f"snow.{name}", place=place)
        out[name] = x
    return out


def read_basins_yaml(path: str | Path, select: Sequence[str] = ()) -> list[Basin]:
    """Read and validate basins.yaml.

    Parameters
    ----------
    path : the file
    select : basin ids to keep, in the order given (all basins, in file order, when empty)

    Returns
    -------
    list of Basin

    Raises
    ------
    InputError
        on a YAML error, a missing or unknown key, a bad value (area <= 0, latitude outside
        [-90, 90], parameters outside the model's ranges, a bad rating), duplicated ids,
        basins with different models, or a selected id that is not in the file.
    """
    text = read_text(path)
    try:
        doc = load_yaml(text)
    except yaml.YAMLError as exc:
        message, key, place = yaml_problem(exc)
        raise InputError(message, file=path, variable=key, place=place) from None
    if not isinstance(doc, Mapping) or not isinstance(doc.get("basins"), list) or not doc["basins"]:
        raise InputError("expected a mapping with a non-empty list 'basins'", file=path, variable="basins")
    unknown = sorted(set(doc) - {"basins"})
    if unknown:
        raise InputError(f"unknown top-level key {unknown[0]!r}", file=path)
    out: list[Basin] = []
    seen: set[str] = set()
    for k, raw in enumerate(doc["basins"]):
        place = f"basins[{k}]"
        if not isinstance(raw, Mapping):
            raise InputError("each basin must be a mapping", file=path, place=place)
        bid = raw.get("id")
        if not isinstance(bid, str) or not bid.strip() or bid != bid.strip() or "," in bid:
            raise InputError(f"basin id must be a non-empty string without commas or "
                             f"surrounding spaces, got {bid!r}", file=path, variable="id", place=place)
        place = f"basin '{bid}'"
        if bid in seen:
            raise InputError("duplicated basin id", file=path, variable="id", place=place)
        seen.add(bid)
        bad = sorted(set(raw) - _BASIN_KEYS - {"snow"})
        if bad:
            raise InputError(f"unknown key {bad[0]!r}", file=path, variable=bad[0], place=place)
        for key in sorted(_BASIN_KEYS - set(raw)):
            raise InputError("missing key", file=path, variable=key, place=place)
        if not isinstance(raw["name"], str) or not raw["name"].strip():
            raise InputError("must be a non-empty string", file=path, variable="name", place=place)
        area = _number(raw["area_km2"], path, "area_km2", place, positive=True)
        lat = _number(raw["latitude"], path, "latitude", place)
        lon = _number(raw["longitude"], path, "longitude", place)
        if not -90 <= lat <= 90:
            raise InputError(f"must be within [-90, 90], got {lat}", file=path, variable="latitude", place=place)
        if not -180 <= lon <= 360:
            raise InputError(f"must be within [-180, 360], got {lon}", file=path, variable="longitude", place=place)
        model = raw["model"]
        if not isinstance(model, str):
            raise InputError(f"must be a model name, got {model!r}", file=path, variable="model", place=place)
        params = _model_parameters(model, raw["parameters"], path, place)
        th = raw["thresholds_m3s"]
        if th is None:
            th = {}
        if not isinstance(th, Mapping):
            raise InputError("must be a mapping of level name -> discharge (m3 s-1)", file=path,
                             variable="thresholds_m3s", place=place)
        thresholds = {}
        for level, value in th.items():
            if not isinstance(level, str) or not level.strip():
                raise InputError(f"level names must be strings, got {level!r}", file=path,
                                 variable="thresholds_m3s", place=place)
            thresholds[level] = _number(value, path, f"thresholds_m3s.{level}", place, positive=True)
        gauge = _gauge(raw["gauge"], path, place)
        snow = _snow_parameters(raw["snow"], path, place) if "snow" in raw else None
        out.append(Basin(bid, raw["name"].strip(), area, lat, lon, model, params, thresholds, gauge, snow))
    models_used = {b.model for b in out}
    if len(models_used) > 1:
        first = out[0]
        other = next(b for b in out if b.model != first.model)
        raise InputError(
            f"all basins of one run use the same model: '{first.id}' uses {first.model}, "
            f"'{other.id}' uses {other.model}; put them in separate raw folders and runs",
            file=path, variable="model", place=f"basin '{other.id}'",
        )
    if select:
        by_id = {b.id: b for b in out}
        missing = [s for s in select if s not in by_id]
        if missing:
            raise InputError(f"selected basin {missing[0]!r} (config data.basins) is not in the file",
                             file=path, variable="id")
        out = [by_id[s] for s in select]
    return out


# ---------------------------------------------------------------------------------- csv


_BLANKS = re.compile(r"^[ \t]+|[ \t]+$|[ \t]*,[ \t]*", re.MULTILINE)


def _read_csv(path: Path, required: Sequence[str], text: str | None = None) -> tuple[pd.DataFrame, np.ndarray]:
    """The table (every cell a string) and the physical line of each row in the file
    (blank lines are skipped but still counted). ``text``: the file's text when already read
    (a header line and the rows appended since an earlier read)."""
    if text is None:
        text = read_text(path)
    if "\r" in text:
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    if " " in text or "\t" in text:  # blanks around fields are allowed; drop them once
        text = _BLANKS.sub(lambda m: "," if "," in m.group(0) else "", text)
    try:
        df = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False)
    except pd.errors.ParserError as exc:
        msg = str(exc).strip().splitlines()[-1]
        raise InputError(f"not a valid CSV table ({msg})", file=path) from None
    except pd.errors.EmptyDataError:
        raise InputError("the file is empty", file=path) from None
    df.columns = [str(c).strip() for c in df.columns]
    for col in required:
        if col not in df.columns:
            raise InputError(f"missing column (expected columns {', '.join(required)})",
                             file=path, variable=col, place="line 1")
    if len(df) == 0:
        raise InputError("no data rows", file=path)
    dup = df.columns[df.columns.duplicated()]
    if len(dup):
        raise InputError("column appears twice", file=path, variable=dup[0], place="line 1")
    lines = np.arange(len(df), dtype=np.int64) + 2
    body = text.rstrip("\n")
    if "\n\n" in body or body.startswith("\n"):  # blank lines: count them (rare, so only then)
        filled = np.flatnonzero(np.array([bool(line) for line in body.split("\n")])) + 1
        if filled.size == len(df) + 1:
            lines = filled[1:]
    return df, lines.astype(np.int64)


def _first(mask: np.ndarray) -> int:
    return int(np.flatnonzero(mask)[0])


def _numeric(df: pd.DataFrame, col: str, path: Path, lines: np.ndarray, time_col: str) -> np.ndarray:
    text = df[col].to_numpy(dtype=object)
    values = pd.to_numeric(df[col], errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        i = _first(bad)
        what = "missing value" if text[i] == "" else f"not a finite number: {text[i]!r}"
        where = f"line {lines[i]}, basin '{df['basin'].iat[i]}', {df[time_col].iat[i]}"
        raise InputError(f"{what}; nothing is filled in, fix or remove the row", file=path,
                         variable=col, place=where)
    return values


def _basin_codes(df, path, basin_ids, lines, *, allow_other=frozenset()) -> np.ndarray:
    """Index of each row's basin in ``basin_ids`` (-1 for known but unselected basins)."""
    names = df["basin"].to_numpy(dtype=object)
    codes = pd.Index(list(basin_ids)).get_indexer(names).astype(np.int64)
    unknown = codes < 0
    if unknown.any():
        unknown &= pd.Index(list(allow_other)).get_indexer(names) < 0
    if unknown.any():
        i = _first(unknown)
        raise InputError(f"unknown basin {names[i]!r} (not in {BASINS_FILE})", file=path,
                         variable="basin", place=f"line {lines[i]}")
    return codes


def _check_order(codes, times, step, path, col, lines, basin_ids, *, regular: bool) -> None:
    """Within each basin (rows in file order), times strictly increase; for a regular
    axis by exactly ``step``."""
    order = np.argsort(codes, kind="stable")
    c, t, ln = codes[order], times[order], lines[order]
    same = c[1:] == c[:-1]
    d = t[1:] - t[:-1]
    for test, what in (
        (same & (d == np.timedelta64(0)), "duplicated {col} (also on line {prev})"),
        (same & (d < np.timedelta64(0)), "{col} goes backwards (line {prev} is later); sort the rows by time"),
        *(
            [(same & (d > step), "missing day(s) after line {prev}: the daily axis must be regular")]
            if regular else []
        ),
    ):
        if test.any():
            i = _first(test) + 1
            raise InputError(
                what.format(col=col, prev=ln[i - 1]), file=path, variable=col,
                place=f"line {ln[i]}, basin '{basin_ids[c[i]]}', {str(t[i])}",
            )


def last_weather_day(path: str | Path) -> np.datetime64 | None:
    """The last day of weather.csv, read from the end of the file only (every basin's rows
    are in date order and every basin covers the same days, so the last row carries the
    last day). None when the file is missing or its last row has no readable date; reading
    the whole file (:func:`read_weather`) then reports what is wrong."""
    try:
        with open(path, "rb") as f:
            f.seek(0, 2)
            f.seek(max(0, f.tell() - 4096))
            tail = f.read().decode("utf-8", errors="replace")
    except OSError:
        return None
    rows = [line for line in tail.replace("\r", "\n").split("\n") if line.strip()]
    if not rows:
        return None
    try:
        return np.datetime64(rows[-1].split(",")[0].strip(), "D")
    except ValueError:
        return None


def read_weather(path: str | Path, basin_ids: Sequence[str], *, need_pet: bool = False,
                 all_ids: Sequence[str] = (), text: str | None = None) -> Weather:
    """Read and validate weather.csv: ``date, basin, precipitation_mm, tmin_c, tmax_c``
    (and ``pet_mm``), one row per basin and day.

    Parameters
    ----------
    path : the file
    basin_ids : the basins wanted, in the order of the output
    need_pet : require the ``pet_mm`` column (data.pet_method = given)
    all_ids : every basin of basins.yaml (rows of known but unselected basins are dropped)
    text : the table's text instead of the file's (the header and the rows appended since
        the prepared layer was written); line numbers then count in it

    Returns
    -------
    Weather, arrays on (basin, time) in the order of ``basin_ids``.

    Raises
    ------
    InputError
        for a missing column, an unparsable date, an unknown basin, a basin without weather,
        duplicated, reversed or missing dates, different periods for different basins, a
        missing or non-numeric value, negative precipitation or PET, tmin > tmax, or a
        temperature outside [-90, 60] degC.
    """
    path = Path(path)
    required = WEATHER_COLUMNS + (("pet_mm",) if need_pet else ())
    df, lines = _read_csv(path, required, text)
    codes = _basin_codes(df, path, basin_ids, lines, allow_other=frozenset(all_ids))
    dates = pd.to_datetime(df["date"], format="%Y-%m-%d", errors="coerce").to_numpy("datetime64[D]")
    bad = np.isnat(dates)
    if bad.any():
        i = _first(bad)
        raise InputError(f"cannot read the date {df['date'].iat[i]!r} (expected YYYY-MM-DD)",
                         file=path, variable="date", place=f"line {lines[i]}")
    keep = codes >= 0
    df, codes, dates, lines = df[keep].reset_index(drop=True), codes[keep], dates[keep], lines[keep]
    absent = np.bincount(codes, minlength=len(basin_ids)) == 0
    if absent.any():
        b = basin_ids[_first(absent)]
        raise InputError(f"no weather rows for basin '{b}' of {BASINS_FILE}", file=path,
                         variable="basin", place=f"basin '{b}'")
    _check_order(codes, dates, np.timedelta64(1, "D"), path, "date", lines, basin_ids, regular=True)
    day = (dates - dates.min()).astype(np.int64)
    first_i = np.full(len(basin_ids), np.iinfo(np.int64).max)
    last_i = np.full(len(basin_ids), -1)
    np.minimum.at(first_i, codes, day)
    np.maximum.at(last_i, codes, day)
    first = dates.min() + first_i.astype("timedelta64[D]")
    last = dates.min() + last_i.astype("timedelta64[D]")
    differ = (first != first[0]) | (last != last[0])
    if differ.any():
        k = _first(differ)
        raise InputError(
            f"basin '{basin_ids[k]}' covers {first[k]} to {last[k]} but basin "
            f"'{basin_ids[0]}' covers {first[0]} to {last[0]}; all basins need the same days",
            file=path, variable="date", place=f"basin '{basin_ids[k]}'")

    prec = _numeric(df, "precipitation_mm", path, lines, "date")
    tmin = _numeric(df, "tmin_c", path, lines, "date")
    tmax = _numeric(df, "tmax_c", path, lines, "date")
    pet = _numeric(df, "pet_mm", path, lines, "date") if "pet_mm" in df.columns else None
    checks = [
        (prec < 0, "precipitation_mm", "negative precipitation"),
        (tmin > tmax, "tmin_c", "tmin_c is above tmax_c"),
        ((tmin < -90) | (tmin > 60), "tmin_c", "temperature outside [-90, 60] degC"),
        ((tmax < -90) | (tmax > 60), "tmax_c", "temperature outside [-90, 60] degC"),
    ]
    if pet is not None:
        checks.append((pet < 0, "pet_mm", "negative potential evaporation"))
    for mask, col, what in checks:
        if mask.any():
            i = _first(mask)
            raise InputError(f"{what}: {df[col].iat[i]}", file=path, variable=col,
                             place=f"line {lines[i]}, basin '{basin_ids[codes[i]]}', {dates[i]}")
    n_time = int(last_i[0] - first_i[0]) + 1
    t_index = (dates - first[0]).astype(np.int64)

    def grid(v):
        out = np.empty((len(basin_ids), n_time))
        out[codes, t_index] = v
        return out

    axis = first[0] + np.arange(n_time).astype("timedelta64[D]")
    return Weather(tuple(basin_ids), axis, grid(prec), grid(tmin), grid(tmax),
                   None if pet is None else grid(pet))


def read_gauge(path: str | Path, basin_ids: Sequence[str], *, all_ids: Sequence[str] = (),
               text: str | None = None) -> Readings:
    """Read and validate gauge.csv: ``timestamp, basin, value`` (ISO 8601, UTC).

    Timestamps without an offset are taken as UTC; other offsets are converted to UTC;
    fractions of a second are kept (to the millisecond). Rows may come in any order (a late
    reading appended at the end of the file, blocks of basins interleaved): they are sorted
    by basin, then time. A row repeating another exactly (same basin, time and value) is
    dropped; two rows of one basin at the same time with different values are an error
    naming both lines.

    Parameters
    ----------
    path : the file
    basin_ids : the basins wanted (basin index of the output)
    all_ids : every basin of basins.yaml (rows of known but unselected basins are dropped)
    text : the table's text instead of the file's (see :func:`read_weather`)

    Returns
    -------
    Readings sorted by basin then time.

    Raises
    ------
    InputError
        for a missing column, an unparsable timestamp, an unknown basin, a missing or
        non-numeric value, or conflicting readings at the same time.
    """
    path = Path(path)
    df, lines = _read_csv(path, GAUGE_COLUMNS, text)
    codes = _basin_codes(df, path, basin_ids, lines, allow_other=frozenset(all_ids))
    stamps = pd.to_datetime(df["timestamp"], utc=True, format="ISO8601", errors="coerce")
    times = stamps.dt.tz_convert(None).to_numpy("datetime64[ms]")
    bad = np.isnat(times)
    if bad.any():
        i = _first(bad)
        raise InputError(f"cannot read the timestamp {df['timestamp'].iat[i]!r} (expected ISO 8601, "
                         "e.g. 2012-01-01T06:00:00Z)", file=path, variable="timestamp",
                         place=f"line {lines[i]}")
    keep = codes >= 0
    df, codes, times, lines = df[keep].reset_index(drop=True), codes[keep], times[keep], lines[keep]
    value = _numeric(df, "value", path, lines, "timestamp")
    order = np.lexsort((lines, times, codes))
    codes, times, value, lines = codes[order], times[order], value[order], lines[order]
    same = np.r_[False, (codes[1:] == codes[:-1]) & (times[1:] == times[:-1])]
    conflict = same & np.r_[False, value[1:] != value[:-1]]
    if conflict.any():
        i = _first(conflict)
        raise InputError(
            f"two readings at the same time with different values: {value[i - 1]:g} on line "
            f"{lines[i - 1]} and {value[i]:g} on line {lines[i]}; keep the right one",
            file=path, variable="timestamp",
            place=f"line {lines[i]}, basin '{basin_ids[codes[i]]}', {np.datetime_as_string(times[i], unit='auto')}")
    keep = ~same  # an exact repeat of the row before it
    return Readings(tuple(basin_ids), codes[keep], times[keep], value[keep], lines[keep],
                    duplicates=int(same.sum()))
