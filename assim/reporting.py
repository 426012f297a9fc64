"""The self-contained HTML report of a study: ``results/report.html``.

One file, readable without a network: the caution banner first, the run's settings and
provenance (config digest, package version, seed, input files with size and SHA-256), a
summary of skill by lead (median over basins), then one section per basin with its skill
table and its figures, embedded as base64 PNG. The report draws nothing and scores nothing
itself: it shows the skill.nc and the figures present (``assim verify``, ``assim plot``)
and says which are missing.
"""

from __future__ import annotations

import base64
import datetime as _dt
import hashlib
import html
from collections.abc import Mapping, Sequence
from pathlib import Path
from urllib.parse import quote

import numpy as np
import xarray as xr
import yaml

from assim import paths
from assim._version import __version__
from assim.caution import CAUTION
from assim.io.common import atomic_path
from assim.io.skill import read_skill
from assim.plots import KINDS, name_part, parse_figure_name, severity_order, threshold_colors

SUMMARY_METRICS = ("crpss", "crpss_openloop", "crps", "nse", "kge", "kge_modified", "spread_skill")
# Figures are embedded (base64) while their files total at most this; beyond, the report
# links them, so that it stays small however many basins were drawn.
EMBED_LIMIT_BYTES = 25_000_000
PRODUCTS = ("openloop.nc", "analysis.nc", "hindcast.nc", "skill.nc", "skill.csv")
_KIND_TITLES = {
    "hydrograph": "Hydrograph",
    "plume": "Forecast plume",
    "skill": "Skill against lead time",
    "rank-histogram": "Rank histograms",
    "spread-skill": "Spread-skill ratio",
    "reliability": "Reliability",
    "calibration": "Calibration",
}

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1150px;margin:0 auto;
padding:0 1.2em 3em;color:#1d1d1d;line-height:1.45}
.caution{background:#fff1f0;border:2px solid #8b0000;color:#5c0000;padding:.8em 1em;margin:1em 0;
border-radius:4px}
h1{margin-top:.6em}h2{border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:2em}
table{border-collapse:collapse;margin:.6em 0 1.2em;font-size:.9em}
th,td{border:1px solid #d0d0d0;padding:.25em .55em;text-align:right}
th{background:#f2f4f7}td.l,th.l{text-align:left}
code,pre{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.85em}
pre{background:#f6f8fa;padding:.8em;overflow-x:auto;border:1px solid #e1e4e8}
figure{margin:1em 0 1.8em}figure img{max-width:100%;border:1px solid #e5e5e5}
figcaption{font-size:.85em;color:#555}.note{color:#555;font-size:.9em}
nav a{margin-right:.8em}.honesty{background:#fffbe6;border:1px solid #b08d00;padding:.5em 1em}
"""


def write_report(cfg: Mapping) -> Path:
    """Write ``results/report.html`` and return its path.

    Parameters
    ----------
    cfg : a validated configuration (:func:`assim.load_config`)

    Returns
    -------
    Path of the report.

    Raises
    ------
    InputError
        when skill.nc exists but cannot be read.
    RunError
        when the report cannot be written.
    """
    path = paths.report(cfg)
    text = render_report(cfg)
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return path


def render_report(cfg: Mapping) -> str:
    """The report's HTML text (see :func:`write_report`)."""

    s_path = paths.skill(cfg, "nc")
    skill = read_skill(s_path) if s_path.is_file() else None
    figures = sorted(paths.figures(cfg).glob("*.png")) if paths.figures(cfg).is_dir() else []
    names = _basin_names(cfg)
    known = [str(b) for b in skill["basin"].values] if skill is not None else []
    ids = {name_part(b): b for b in [*names, *known]}  # file-name part -> basin id
    by_basin: dict[str, list[Path]] = {}
    other: list[Path] = []
    for f in figures:
        parsed = parse_figure_name(f.name)
        (by_basin.setdefault(ids.get(parsed[1], parsed[1]), []) if parsed else other).append(f)
    basins = [b for b in known if b in by_basin] + [b for b in by_basin if b not in known]
    unshown = [b for b in known if b not in by_basin]
    embed = sum(f.stat().st_size for f in figures) <= EMBED_LIMIT_BYTES

    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat()
    out = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        "<title>assim report: ensemble assimilation and forecast skill</title>",
        f"<style>{_CSS}</style></head><body>",
        f'<div class="caution" role="alert"><strong>Caution.</strong> {_e(CAUTION)}</div>',
        "<h1>Ensemble assimilation and forecast skill</h1>",
        f'<p class="note">Written {now} by assim {_e(__version__)} from the results folder '
        f"<code>{_e(paths.results(cfg))}</code>.</p>",
        "<nav>" + " ".join(
            f'<a href="#{a}">{t}</a>' for a, t in (("provenance", "Settings"), ("summary", "Skill summary"),
                                                   ("innovations", "Innovations"),
                                                   ("calibration", "Calibration"), ("basins", "Basins"))) + "</nav>",
    ]
    out += _provenance(cfg, __version__)
    out += _summary(skill, cfg)
    out += _innovations(cfg, names)
    out += _calibration(cfg, names)
    out.append('<h2 id="basins">Basins</h2>')
    if basins:
        out.append("<p>" + " ".join(f'<a href="#{_anchor(b)}">{_e(_name(b, names))}</a>' for b in basins) + "</p>")
    else:
        out.append('<p class="note">No basin to show: no figures (run <code>assim plot</code>).</p>')
    if not embed:
        out.append(f'<p class="note">The {len(figures)} figures exceed {EMBED_LIMIT_BYTES // 10**6} MB: each is '
                   "shown as a link to its file in the figures folder (keep report.html beside figures/).</p>")
    for b in basins:
        out += _basin_section(b, names, skill, by_basin.get(b, []), embed)
    if unshown:
        out += _unshown_table(unshown, names, skill)
    if other:
        out.append("<h2>Other figures</h2>")
        out += [_figure_html(f, embed) for f in other]
    if not figures:
        out.append('<p class="note">No figures in the figures folder (run <code>assim plot</code>).</p>')
    out.append(f'<div class="caution"><strong>Caution.</strong> {_e(CAUTION)}</div>')
    out.append("</body></html>")
    return "\n".join(out) + "\n"


# ---------------------------------------------------------------------------------- parts


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _anchor(basin: str) -> str:
    return "basin-" + name_part(basin)


def _name(basin: str, names: Mapping[str, str]) -> str:
    n = names.get(basin)
    return f"{n} ({basin})" if n and n != basin else basin


def _basin_names(cfg: Mapping) -> dict[str, str]:
    p = paths.prepared(cfg, "basins.nc")
    if not p.is_file():
        return {}
    from assim.io.prepared import read_basins

    b = read_basins(p)
    return {str(k): str(v) for k, v in zip(b["basin"].values, b["name"].values, strict=True)}


def file_record(path: Path, *, digest: bool = True) -> tuple[int, str]:
    """(size in bytes, SHA-256 hex digest or "") of a file."""
    size = path.stat().st_size
    if not digest:
        return size, ""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return size, h.hexdigest()


def _files_table(files: Sequence[Path], *, digest: bool) -> list[str]:
    rows = ['<table><tr><th class="l">file</th><th>size (bytes)</th>'
            + ('<th class="l">SHA-256</th>' if digest else '<th class="l">modified (UTC)</th>') + "</tr>"]
    for f in files:
        if not f.is_file():
            rows.append(f'<tr><td class="l"><code>{_e(f)}</code></td><td>absent</td><td></td></tr>')
            continue
        size, sha = file_record(f, digest=digest)
        last = sha if digest else _dt.datetime.fromtimestamp(f.stat().st_mtime, _dt.UTC).strftime("%Y-%m-%d %H:%M")
        rows.append(f'<tr><td class="l"><code>{_e(f)}</code></td><td>{size:,}</td>'
                    f'<td class="l"><code>{_e(last)}</code></td></tr>')
    rows.append("</table>")
    return rows


def _provenance(cfg: Mapping, version: str) -> list[str]:
    ens = cfg.get("ensemble", {})
    period = cfg.get("period", {})
    hc = cfg.get("hindcast", {})
    filt = cfg.get("filter", {})
    digest = cfg.digest() if hasattr(cfg, "digest") else ""
    settings = [
        ("config file", getattr(cfg, "source", None) or "(built in code)"),
        ("config digest (SHA-256)", digest),
        ("assim version", version),
        ("seed", ens.get("seed")),
        ("members", ens.get("members")),
        ("filter", filt.get("method")),
        ("period", f"{period.get('start') or 'start of forcing'} to {period.get('end') or 'end of forcing'}, "
                   f"spin-up {period.get('spinup_days')} days"),
        ("hindcast", f"every {hc.get('every_days')} days, leads 1..{hc.get('leads')}, forcing {hc.get('forcing')}"),
    ]
    out = ['<h2 id="provenance">Settings and provenance</h2>', "<table>"]
    out += [f'<tr><th class="l">{_e(k)}</th><td class="l"><code>{_e(v)}</code></td></tr>' for k, v in settings]
    out.append("</table>")
    raw = Path(cfg["data"]["raw"]) if "data" in cfg else None
    inputs = []
    src = getattr(cfg, "source", None)
    if src and Path(src).is_file():
        inputs.append(Path(src))
    if raw is not None:
        inputs += [raw / n for n in ("basins.yaml", "weather.csv", "gauge.csv")]
    inputs += [paths.prepared(cfg, n) for n in ("forcing.nc", "observations.nc", "basins.nc")]
    out.append("<h3>Input files</h3>")
    out += _files_table(inputs, digest=True)
    out.append("<h3>Products</h3>")
    out += _files_table([paths.results(cfg) / n for n in PRODUCTS], digest=False)
    out.append("<details><summary>Full configuration (every default filled in)</summary><pre>")
    out.append(_e(yaml.safe_dump(dict(cfg), sort_keys=False, default_flow_style=False)))
    out.append("</pre></details>")
    return out


# The plain-language reading of the innovation diagnostics (analysis.nc): the thresholds.
INNOVATION_MIN_READINGS = 30  # fewer readings used: too few to judge
CHI2_MARGIN = 0.2  # chi-square beyond its 95% interval AND more than 20% from 1
BIAS_LIMIT = 0.5  # |mean normalised innovation| above this: the background is biased
DESROZIERS_FACTOR = 1.5  # Desroziers estimate / R used beyond 1.5 or below 1 / 1.5


def innovation_reading(stats: Mapping[str, float]) -> str:
    """A plain-language reading of one basin's innovation statistics (the per-basin
    variables of analysis.nc, :data:`assim.filters.consistency.STATISTICS`).

    Rules (thresholds above): under-/over-dispersed when the chi-square statistic lies
    outside its 95% interval and more than ``CHI2_MARGIN`` from 1; biased when the mean
    normalised innovation exceeds ``BIAS_LIMIT`` in size; observation error too small/large
    when the Desroziers et al. (2005) estimate exceeds ``DESROZIERS_FACTOR`` times the
    variance used, or falls below it divided by that factor; else consistent."""
    n = int(stats["innovation_count"])
    if n < INNOVATION_MIN_READINGS:
        return f"too few readings used ({n}) to judge"
    chi2, lo, hi = (float(stats[k]) for k in ("innovation_chi2", "innovation_chi2_lower", "innovation_chi2_upper"))
    out = []
    if chi2 > max(hi, 1.0 + CHI2_MARGIN):
        out.append(f"ensemble under-dispersed: spread too small for the innovations (chi-square {chi2:.2f}, "
                   f"95% interval {lo:.2f}-{hi:.2f}); consider inflation or larger forcing errors")
    elif chi2 < min(lo, 1.0 - CHI2_MARGIN):
        out.append(f"ensemble over-dispersed: spread too large for the innovations (chi-square {chi2:.2f}, "
                   f"95% interval {lo:.2f}-{hi:.2f}); consider less inflation or smaller forcing errors")
    bias = float(stats["normalised_innovation_mean"])
    if abs(bias) > BIAS_LIMIT:
        side = "under" if bias > 0 else "over"
        out.append(f"background biased: mean normalised innovation {bias:+.2f} (the model {side}-predicts)")
    est, used = float(stats["obs_error_variance_desroziers"]), float(stats["obs_error_variance_used"])
    if used > 0 and np.isfinite(est):
        if est > DESROZIERS_FACTOR * used:
            out.append(f"observation error looks too small: Desroziers estimate {est:.3g} vs {used:.3g} used")
        elif est < used / DESROZIERS_FACTOR:
            out.append(f"observation error looks too large: Desroziers estimate {est:.3g} vs {used:.3g} used")
    return "; ".join(out) if out else "consistent"


def _innovations(cfg: Mapping, names: Mapping[str, str]) -> list[str]:
    """Per-basin innovation diagnostics from analysis.nc, with their reading."""
    out = ['<h2 id="innovations">Innovation diagnostics</h2>']
    path = paths.run_product(cfg, "assimilate")
    if not path.is_file():
        return out + ['<p class="note">No analysis.nc (run <code>assim run --mode assimilate</code>).</p>']
    from assim.filters.consistency import STATISTICS
    from assim.io.products import open_product

    with open_product(path) as ds:
        if any(k not in ds for k in STATISTICS):
            return out + ['<p class="note">analysis.nc has no innovation statistics (written by an earlier '
                          "version): run the assimilation again.</p>"]
        table = {k: ds[k].values for k in STATISTICS}
        basins = [str(b) for b in ds["basin"].values]
        infl = ds["inflation_mean"].isel(time=-1).values if "inflation_mean" in ds else None
    out.append(
        '<p class="note">Normalised innovation z = d / sqrt(HPH&#39; + R) over the days a reading was used '
        "(assimilation space). A consistent filter has mean 0, variance 1 and chi-square (mean z&sup2;) within "
        "its 95% interval; daily innovations are serially correlated, which the interval ignores, so it is a sign, "
        "not a test. Desroziers et al. (2005): E[d<sub>o-a</sub> d<sub>o-b</sub>] estimates the observation error "
        f"variance R. Readings: chi-square outside its interval and more than {CHI2_MARGIN:.0%} from 1; "
        f"|mean z| &gt; {BIAS_LIMIT}; Desroziers estimate beyond {DESROZIERS_FACTOR} times (or below 1/"
        f"{DESROZIERS_FACTOR} of) R used; fewer than {INNOVATION_MIN_READINGS} readings: not judged.</p>")
    head = ("basin", "readings", "mean z", "var z", "chi-square", "95% interval", "R Desroziers", "R used")
    head += ("inflation (last day)",) if infl is not None else ()
    out.append("<table><tr>" + "".join(f'<th class="{"l" if h == "basin" else ""}">{_e(h)}</th>' for h in head)
               + '<th class="l">reading</th></tr>')
    for i, b in enumerate(basins):
        row = {k: v[i] for k, v in table.items()}
        cells = [f"{int(row['innovation_count'])}"] + [
            f"{row[k]:.3g}" for k in ("normalised_innovation_mean", "normalised_innovation_variance", "innovation_chi2")]
        cells.append(f"{row['innovation_chi2_lower']:.2f}-{row['innovation_chi2_upper']:.2f}")
        cells += [f"{row[k]:.3g}" for k in ("obs_error_variance_desroziers", "obs_error_variance_used")]
        if infl is not None:
            cells.append(f"{infl[i]:.3g}")
        out.append(f'<tr><td class="l">{_e(_name(b, names))}</td>' + "".join(f"<td>{_e(c)}</td>" for c in cells)
                   + f'<td class="l">{_e(innovation_reading(row))}</td></tr>')
    out.append("</table>")
    return out


def _metrics(skill: xr.Dataset, basin: str | None = None) -> list[str]:
    """The metrics shown: the summary ones, then the Brier scores by threshold value (of
    ``basin``, or the median over basins)."""
    present = [str(k) for k in skill["metric"].values]
    brier = [k for k in present if k.startswith("brier_")]
    if "threshold_value" in skill and brier:
        v = skill["threshold_value"]
        v = v.sel(basin=basin) if basin is not None else v.median("basin", skipna=True)
        value = dict(zip((f"brier_{t}" for t in v["threshold"].values), v.values.astype(float), strict=True))
        brier.sort(key=lambda k: (not np.isfinite(value.get(k, np.nan)), value.get(k, np.inf)))
    return [k for k in SUMMARY_METRICS if k in present] + brier


def _skill_table(values: xr.DataArray, n: xr.DataArray, metrics: Sequence[str], units: Mapping[str, str]) -> list[str]:
    """values, n on (experiment, lead, metric) -> rows metric x experiment, columns lead."""
    leads = [int(x) for x in values["lead"].values]
    head = "".join(f"<th>{'0 (bkg)' if lead == 0 else lead}</th>" for lead in leads)
    rows = [f'<table><tr><th class="l">metric</th><th class="l">experiment</th>{head}</tr>']
    for k in metrics:
        for exp in [str(e) for e in values["experiment"].values]:
            v = values.sel(metric=k, experiment=exp).values
            c = n.sel(metric=k, experiment=exp).values
            if not (c > 0).any():
                continue
            cells = "".join(f"<td>{x:.3g}</td>" if (cn > 0 and np.isfinite(x)) else "<td>-</td>"
                            for x, cn in zip(v, c, strict=True))
            unit = units.get(k, "1")
            label = f"{k} ({unit})" if unit not in ("1", "") else k
            rows.append(f'<tr><td class="l">{_e(label)}</td><td class="l">{_e(exp)}</td>{cells}</tr>')
    rows.append("</table>")
    return rows


def _units(skill: xr.Dataset) -> dict[str, str]:
    if "metric_units" not in skill.coords:
        return {}
    return {str(k): str(u) for k, u in zip(skill["metric"].values, skill["metric_units"].values, strict=True)}


_FORCING_WORDS = {
    "observed": "observed (the recorded weather of the valid days: perfect forcing, an upper bound of what a "
                "forecast with predicted weather can reach)",
    "climatology": "climatology (past years' weather for the same dates: ensemble streamflow prediction)",
    "file": "file (a forcing-forecast file)",
}


def _forcing_note(skill: xr.Dataset, cfg: Mapping) -> str:
    """Which forcing the hindcast skill used, beside the operational forecast's."""
    used = str(skill.attrs.get("hindcast_forcing", "unknown"))
    operational = str(cfg.get("forecast", {}).get("forcing", "unknown"))
    if used == "none":
        return "No hindcast was scored: leads 1..L have no skill."
    text = (f"Hindcast skill (leads 1..L) was measured with forcing {_FORCING_WORDS.get(used, used)}. "
            f"The operational forecast uses forcing {_FORCING_WORDS.get(operational, operational)}. ")
    if used == operational:
        return text + "The same kind: the hindcast skill is what the operational forecasts can be expected to have."
    lower = " and is expected to be lower" if used == "observed" else ""
    return text + (f"These differ: the skill of forecasts with {operational} forcing is not measured here{lower}. "
                   f"To measure it, run the hindcast and verification with hindcast.forcing={operational} into "
                   "another results folder and compare the two reports.")


def _summary(skill: xr.Dataset | None, cfg: Mapping | None = None) -> list[str]:
    out = ['<h2 id="summary">Skill by lead time</h2>']
    if skill is None:
        return out + ['<p class="note">No skill.nc yet (run <code>assim verify</code>).</p>']
    out.append(f'<p class="honesty" id="skill-forcing"><strong>Forcing.</strong> {_e(_forcing_note(skill, cfg or {}))}</p>')
    metrics = _metrics(skill)
    scored = skill["skill"].where(skill["n"] > 0)
    median = scored.median("basin", skipna=True)
    total = skill["n"].sum("basin")
    out.append(f"<p>Median over {skill.sizes['basin']} basin(s) of each score; lead 0 is the background "
               "discharge of the runs (simulated before the day's reading is assimilated), leads 1..L the "
               "hindcasts. CRPSS is measured against the day-of-year climatology of the observations, "
               "crpss_openloop against the open loop (0 for the open loop). Deterministic "
               f"scores use the {_e(skill.attrs.get('deterministic_reduction', 'ensemble median'))}.</p>")
    out += _skill_table(median, total, metrics, _units(skill))
    notes = skill.attrs.get("notes", "none")
    if notes and notes != "none":
        out.append(f'<p class="note">Notes: {_e(notes)}</p>')
    return out


def _calibration(cfg: Mapping, names: Mapping[str, str]) -> list[str]:
    """The calibration section: each basin's parameters and its scores in both periods."""
    path = paths.calibration(cfg)
    if not path.is_file():
        return []
    from assim.io.calibration import read_calibration

    cal = read_calibration(path)
    params = [str(p) for p in cal["parameter"].values]
    metrics = [str(m) for m in cal["metric"].values]
    out = ['<h2 id="calibration">Calibration</h2>',
           f"<p>{_e(cal.attrs.get('method', ''))}; objective {_e(cal.attrs.get('objective', ''))}, "
           f"calibration {_e(cal.attrs.get('calibration_period', ''))}, validation "
           f"{_e(cal.attrs.get('validation_period', ''))}, warm-up {_e(cal.attrs.get('warmup_days', ''))} days "
           f"(<code>{_e(path)}</code>). The figures are in each basin's section.</p>",
           "<table><tr><th class=l>basin</th>" + "".join(f"<th>{_e(p)}</th>" for p in params)
           + "".join(f"<th>{_e(m)} cal</th><th>{_e(m)} val</th>" for m in metrics) + "<th>generations</th></tr>"]
    for j, b in enumerate(cal["basin"].values):
        score = cal["score"].values[j]
        cells = "".join(f"<td>{float(cal[p].values[j]):.4g}</td>" for p in params)
        cells += "".join(f"<td>{score[0, k]:.3f}</td><td>{score[1, k]:.3f}</td>" for k in range(len(metrics)))
        out.append(f'<tr><td class=l>{_e(_name(str(b), names))}</td>{cells}'
                   f"<td>{int(cal['generations'].values[j])}</td></tr>")
    out.append("</table>")
    return out


def _figure_html(path: Path, embed: bool = True) -> str:
    parsed = parse_figure_name(path.name)
    kind = _KIND_TITLES.get(parsed[0], parsed[0]) if parsed else path.stem
    extra = f": {parsed[2]}" if parsed and parsed[2] else ""
    if not embed:
        link = f"{path.parent.name}/{quote(path.name)}"
        return f'<p><a href="{_e(link)}">{_e(kind + extra)} ({_e(path.name)})</a></p>'
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{data}" alt="{_e(kind + extra)}">'
            f"<figcaption>{_e(kind + extra)} ({_e(path.name)})</figcaption></figure>")


def _unshown_table(basins: Sequence[str], names: Mapping[str, str], skill: xr.Dataset | None) -> list[str]:
    """One line per basin without figures (not selected by ``plots.max_basins``)."""
    out = [f'<h3 id="other-basins">Basins without figures ({len(basins)})</h3>',
           '<p class="note">Not drawn by <code>assim plot</code> (see <code>plots.max_basins</code>, '
           "<code>outputs.figures</code>); their scores are in skill.csv.</p>"]
    if skill is None or "crpss" not in skill["metric"].values:
        return out + ["<p>" + ", ".join(_e(_name(b, names)) for b in basins) + "</p>"]
    leads = [int(x) for x in skill["lead"].values]
    lead = min((x for x in leads if x > 0), default=leads[0])
    s = skill["skill"].sel(experiment="assimilation", lead=lead, metric="crpss")
    out.append(f'<table><tr><th class="l">basin</th><th>CRPSS, assimilation, lead {lead}</th></tr>')
    for b in basins:
        v = float(s.sel(basin=b)) if b in s["basin"].values else float("nan")
        out.append(f'<tr><td class="l">{_e(_name(b, names))}</td><td>{v:.3g}</td></tr>')
    out.append("</table>")
    return out


def _basin_section(basin: str, names: Mapping[str, str], skill: xr.Dataset | None,
                   figures: Sequence[Path], embed: bool = True) -> list[str]:
    out = [f'<section id="{_anchor(basin)}"><h3>{_e(_name(basin, names))}</h3>']
    rank: dict[str, int] = {}  # threshold file-name part -> rank by value
    if skill is not None and basin in skill["basin"].values:
        thr = skill["threshold_value"].sel(basin=basin) if "threshold_value" in skill else None
        if thr is not None and thr.size:
            t_names = [str(t) for t in thr["threshold"].values]
            values = thr.values.astype(float)
            colors = threshold_colors(values)
            order = severity_order(values)
            rank = {name_part(t_names[k]): i for i, k in enumerate(order)}
            if order:
                out.append("<p>Thresholds: " + ", ".join(
                    f'<span style="display:inline-block;width:.8em;height:.8em;border:1px solid #555;'
                    f'background:{colors[k]}"></span> {_e(t_names[k])} {values[k]:g} m3 s-1' for k in order)
                    + ".</p>")
        out += _skill_table(skill["skill"].sel(basin=basin), skill["n"].sel(basin=basin), _metrics(skill, basin),
                            _units(skill))
    order = {k: i for i, k in enumerate(KINDS)}

    def key(p: Path):
        parsed = parse_figure_name(p.name) or ("", "", None)
        return order.get(parsed[0], 99), rank.get(parsed[2] or "", 99), p.name

    for f in sorted(figures, key=key):
        out.append(_figure_html(f, embed))
    out.append("</section>")
    return out

