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

import numpy as np
import xarray as xr
import yaml

from assim import paths
from assim._version import __version__
from assim.caution import CAUTION
from assim.io.common import atomic_path
from assim.io.skill import read_skill
from assim.plots import KINDS, parse_figure_name

SUMMARY_METRICS = ("crpss", "crpss_openloop", "crps", "nse", "kge", "kge_modified", "spread_skill")
PRODUCTS = ("openloop.nc", "analysis.nc", "hindcast.nc", "skill.nc", "skill.csv")
_KIND_TITLES = {
    "hydrograph": "Hydrograph",
    "plume": "Forecast plume",
    "skill": "Skill against lead time",
    "rank-histogram": "Rank histograms",
    "spread-skill": "Spread-skill ratio",
    "reliability": "Reliability",
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
nav a{margin-right:.8em}
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
    by_basin: dict[str, list[Path]] = {}
    other: list[Path] = []
    for f in figures:
        parsed = parse_figure_name(f.name)
        (by_basin.setdefault(parsed[1], []) if parsed else other).append(f)
    basins = [str(b) for b in skill["basin"].values] if skill is not None else []
    basins += [b for b in by_basin if b not in basins]
    names = _basin_names(cfg)

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
                                                   ("basins", "Basins"))) + "</nav>",
    ]
    out += _provenance(cfg, __version__)
    out += _summary(skill)
    out.append('<h2 id="basins">Basins</h2>')
    if basins:
        out.append("<p>" + " ".join(f'<a href="#{_anchor(b)}">{_e(_name(b, names))}</a>' for b in basins) + "</p>")
    else:
        out.append('<p class="note">No basin to show: no skill.nc and no figures.</p>')
    for b in basins:
        out += _basin_section(b, names, skill, by_basin.get(b, []))
    if other:
        out.append("<h2>Other figures</h2>")
        out += [_figure_html(f) for f in other]
    if not figures:
        out.append('<p class="note">No figures in the figures folder (run <code>assim plot</code>).</p>')
    out.append(f'<div class="caution"><strong>Caution.</strong> {_e(CAUTION)}</div>')
    out.append("</body></html>")
    return "\n".join(out) + "\n"


# ---------------------------------------------------------------------------------- parts


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _anchor(basin: str) -> str:
    return "basin-" + "".join(c if c.isalnum() or c in "-_" else "_" for c in basin)


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


def _metrics(skill: xr.Dataset) -> list[str]:
    present = [str(k) for k in skill["metric"].values]
    return [k for k in SUMMARY_METRICS if k in present] + [k for k in present if k.startswith("brier_")]


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


def _summary(skill: xr.Dataset | None) -> list[str]:
    out = ['<h2 id="summary">Skill by lead time</h2>']
    if skill is None:
        return out + ['<p class="note">No skill.nc yet (run <code>assim verify</code>).</p>']
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


def _figure_html(path: Path) -> str:
    parsed = parse_figure_name(path.name)
    kind = _KIND_TITLES.get(parsed[0], parsed[0]) if parsed else path.stem
    extra = f": {parsed[2]}" if parsed and parsed[2] else ""
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{data}" alt="{_e(kind + extra)}">'
            f"<figcaption>{_e(kind + extra)} ({_e(path.name)})</figcaption></figure>")


def _basin_section(basin: str, names: Mapping[str, str], skill: xr.Dataset | None,
                   figures: Sequence[Path]) -> list[str]:
    out = [f'<section id="{_anchor(basin)}"><h3>{_e(_name(basin, names))}</h3>']
    if skill is not None and basin in skill["basin"].values:
        thr = skill["threshold_value"].sel(basin=basin) if "threshold_value" in skill else None
        if thr is not None and thr.size:
            levels = ", ".join(f"{t} {float(x):g} m3 s-1" for t, x in zip(thr["threshold"].values, thr.values,
                                                                            strict=True) if np.isfinite(x))
            if levels:
                out.append(f"<p>Thresholds: {_e(levels)}.</p>")
        out += _skill_table(skill["skill"].sel(basin=basin), skill["n"].sel(basin=basin), _metrics(skill),
                            _units(skill))
    order = {k: i for i, k in enumerate(KINDS)}
    for f in sorted(figures, key=lambda p: (order.get((parse_figure_name(p.name) or ("",))[0], 99), p.name)):
        out.append(_figure_html(f))
    out.append("</section>")
    return out

