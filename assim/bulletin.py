"""The daily bulletin of one forecast issue: the page a forecaster on duty reads.

:func:`write_bulletin` writes, beside ``forecast-D.nc``:

- ``bulletin-D.html``: one self-contained page (figures embedded as base64 PNG, no external
  resource, no script): the caution first, the raised alerts, how honest the probabilities
  are (distinct weather traces), how fresh the inputs are (each gauge's latest reading, the
  weather, the restart the forecast continued from), then one section per basin with its
  table of exceedance probability per threshold and lead and its figure;
- ``bulletin-D/bulletin__<basin>__D.png``: the figure of each basin (the assimilated
  ensemble of the last weeks beside the observations, then the plume, thresholds in
  :func:`assim.plots.severity_colors`, and the probabilities per lead);
- ``alerts-D.json`` and ``alerts-D.csv``: the raised alerts alone, for a scheduled job to
  mail (an empty list / a header line when nothing is raised).

A threshold is *raised* at a basin when its exceedance probability at some lead is at least
its alert level (``bulletin.alert_probability``, or ``bulletin.alert_levels[name]``).

This module takes Datasets and arrays (the pipeline reads the products) and writes through
:func:`assim.io.common.atomic_path`; it never imports the engine.
"""

from __future__ import annotations

import base64
import csv
import datetime as _dt
import html
import io
import json
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from assim.caution import CAUTION
from assim.io.common import atomic_path

ALERT_FIELDS = ("issue_date", "basin", "name", "threshold", "threshold_m3s", "alert_probability",
                "max_probability", "first_lead", "first_valid_date", "peak_lead")

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;margin:0 auto;
padding:0 1.2em 3em;color:#1d1d1d;line-height:1.45}
.caution{background:#fff1f0;border:2px solid #8b0000;color:#5c0000;padding:.8em 1em;margin:1em 0;
border-radius:4px;font-size:1.05em}
.raised{background:#fbf6ec;border:2px solid #3b1407;padding:.5em 1em;margin:1em 0;border-radius:4px}
.quiet{background:#f3f6f3;border:1px solid #9aa89a;padding:.5em 1em;margin:1em 0;border-radius:4px}
.honesty{background:#fffbe6;border:1px solid #b08d00;padding:.5em 1em;margin:1em 0}
h1{margin:.5em 0 .2em}h2{border-bottom:1px solid #ccc;padding-bottom:.2em;margin-top:1.8em}
table{border-collapse:collapse;margin:.5em 0 1em;font-size:.9em}
th,td{border:1px solid #d0d0d0;padding:.25em .5em;text-align:right}
th{background:#f2f4f7}td.l,th.l{text-align:left}td.up{font-weight:bold;outline:2px solid #3b1407}
.sw{display:inline-block;width:.9em;height:.9em;border:1px solid #555;vertical-align:middle;margin-right:.3em}
figure{margin:.8em 0 1.6em}figure img{max-width:100%;border:1px solid #e5e5e5}
.note{color:#555;font-size:.9em}code{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.9em}
"""


# ---------------------------------------------------------------------------------- alerts


def alert_levels(cfg: Mapping, forecast: xr.Dataset) -> dict[str, float]:
    """Threshold name -> alert probability, from ``bulletin.alert_probability`` and the
    per-threshold ``bulletin.alert_levels``, for every threshold of ``forecast``."""
    section = cfg.get("bulletin", {})
    default = float(section.get("alert_probability", 0.5))
    own = {str(k): float(v) for k, v in (section.get("alert_levels") or {}).items()}
    names = [str(t) for t in forecast["threshold"].values] if "threshold" in forecast.dims else []
    return {n: own.get(n, default) for n in names}


def raised_alerts(forecast: xr.Dataset, levels: Mapping[str, float],
                  names: Mapping[str, str] | None = None) -> list[dict]:
    """The raised thresholds of a forecast, one record per (basin, threshold).

    Parameters
    ----------
    forecast : ``exceedance_probability`` (basin, lead, threshold), ``thresholds`` (basin,
        threshold) m3 s-1, ``valid_time`` (lead), attribute ``issue_date``
    levels : threshold name -> alert probability (a threshold not named is never raised)
    names : basin id -> name

    Returns
    -------
    list of dict with :data:`ALERT_FIELDS`, basins in the forecast's order, a basin's
    thresholds from the lowest value to the highest. ``first_lead`` is the first lead whose
    probability reaches the level, ``peak_lead`` the first lead of the highest probability.
    """
    if "threshold" not in forecast.dims or not forecast.sizes["threshold"]:
        return []
    p = forecast["exceedance_probability"].transpose("basin", "lead", "threshold").values.astype(float)
    thr = forecast["thresholds"].transpose("basin", "threshold").values.astype(float)
    t_names = [str(t) for t in forecast["threshold"].values]
    level = np.array([levels.get(n, np.inf) for n in t_names], dtype=float)
    leads = forecast["lead"].values.astype(int)
    valid = pd.DatetimeIndex(forecast["valid_time"].values)
    issue = str(forecast.attrs.get("issue_date", ""))[:10]
    out = []
    for i, b in enumerate(str(x) for x in forecast["basin"].values):
        for k in _by_value(thr[i]):
            reached = np.flatnonzero(p[i, :, k] >= level[k])
            if not reached.size:
                continue
            peak = int(np.nanargmax(p[i, :, k]))
            out.append({
                "issue_date": issue, "basin": b, "name": (names or {}).get(b, b), "threshold": t_names[k],
                "threshold_m3s": float(thr[i, k]), "alert_probability": float(level[k]),
                "max_probability": float(p[i, peak, k]), "first_lead": int(leads[reached[0]]),
                "first_valid_date": f"{valid[reached[0]]:%Y-%m-%d}", "peak_lead": int(leads[peak]),
            })
    return out


def _by_value(values) -> list[int]:
    from assim.plots import severity_order

    return severity_order(values)


def write_alerts(alerts: Sequence[Mapping], json_path, csv_path, *, issue_date: str) -> tuple[Path, Path]:
    """The raised alerts as JSON (with the issue date, the caution and the list) and as CSV
    (columns :data:`ALERT_FIELDS`, a header line alone when nothing is raised)."""
    doc = {"issue_date": issue_date, "caution": CAUTION, "raised": len(alerts), "alerts": list(alerts)}
    with atomic_path(json_path) as tmp:
        tmp.write_text(json.dumps(doc, indent=1) + "\n", encoding="utf-8")
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=ALERT_FIELDS, lineterminator="\n")
    w.writeheader()
    w.writerows(alerts)
    with atomic_path(csv_path) as tmp:
        tmp.write_text(buf.getvalue(), encoding="utf-8")
    return Path(json_path), Path(csv_path)


# ---------------------------------------------------------------------------------- page


def write_bulletin(forecast: xr.Dataset, *, html_path, figure_folder, alerts_json, alerts_csv,
                   levels: Mapping[str, float], observed: xr.DataArray | None = None,
                   recent: xr.DataArray | None = None, latest_reading: Mapping[str, object] | None = None,
                   weather_through=None, names: Mapping[str, str] | None = None, history_days: int = 30,
                   max_figures: int = 0, figures: bool = True, workers: int = 1) -> list[Path]:
    """Write the bulletin of one forecast issue (see the module docstring).

    Parameters
    ----------
    forecast : the forecast Dataset (:func:`assim.io.products.write_forecast`), loaded
    html_path, figure_folder, alerts_json, alerts_csv : where to write
    levels : threshold name -> alert probability (:func:`alert_levels`)
    observed : usable daily discharge (basin, time) m3 s-1, or None
    recent : assimilated ensemble before the issue (basin, time, member) m3 s-1, or None
    latest_reading : basin id -> day of its latest gauge reading (None: no reading at all)
    weather_through : last day of the weather record
    names : basin id -> name
    history_days : days shown before the issue
    max_figures : draw figures of at most this many basins (0 = every basin): the raised
        ones first, then by highest exceedance probability; every basin keeps its table
    figures : False draws no figure at all (the page keeps its tables)
    workers : processes drawing the figures (:func:`assim.plots.plot_plumes`)

    Returns
    -------
    list of Path: the PNGs, the alert files and the page (written last).
    """
    from assim.plots import figure_name, plot_plumes

    issue = str(forecast.attrs.get("issue_date", ""))[:10]
    alerts = raised_alerts(forecast, levels, names)
    basins = [str(b) for b in forecast["basin"].values]
    drawn = _figure_basins(forecast, basins, alerts, max_figures) if figures else []
    pngs = {b: Path(figure_folder) / figure_name("bulletin", b, issue) for b in drawn}
    written = plot_plumes(forecast, observed, pngs, history_days=history_days, names=names, recent=recent,
                          note=_traces_note(forecast), workers=workers) if pngs else []
    written += write_alerts(alerts, alerts_json, alerts_csv, issue_date=issue)
    text = render_bulletin(forecast, alerts=alerts, levels=levels, figures=pngs, latest_reading=latest_reading,
                           weather_through=weather_through, names=names, alert_files=(alerts_json, alerts_csv))
    with atomic_path(html_path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return [*written, Path(html_path)]


def _figure_basins(forecast, basins, alerts, max_figures) -> list[str]:
    if max_figures <= 0 or len(basins) <= max_figures:
        return basins
    p = forecast["exceedance_probability"]
    top = p.max(dim=[d for d in p.dims if d != "basin"], skipna=True).fillna(-1).values
    ranked = list(dict.fromkeys([a["basin"] for a in alerts] + [basins[i] for i in np.argsort(-top, kind="stable")]))
    chosen = set(ranked[:max_figures])
    return [b for b in basins if b in chosen]


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _traces_note(forecast: xr.Dataset) -> str | None:
    note = forecast.attrs.get("forcing_note")
    return str(note) if note and note != "none" else None


def _day(value) -> pd.Timestamp | None:
    if value is None:
        return None
    try:
        t = pd.Timestamp(value)
    except (TypeError, ValueError):
        return None
    return None if pd.isna(t) else t.normalize()


def _age(day, issue: pd.Timestamp) -> str:
    d = _day(day)
    if d is None:
        return "none on record"
    n = int((issue - d) / pd.Timedelta(days=1))
    if n < 0:
        return f"{d:%Y-%m-%d} ({-n} day{'s' if n != -1 else ''} after the issue)"
    return f"{d:%Y-%m-%d} ({n} day{'s' if n != 1 else ''} before the issue)"


def render_bulletin(forecast: xr.Dataset, *, alerts: Sequence[Mapping], levels: Mapping[str, float],
                    figures: Mapping[str, Path], latest_reading: Mapping[str, object] | None = None,
                    weather_through=None, names: Mapping[str, str] | None = None,
                    alert_files: Sequence = ()) -> str:
    """The bulletin's HTML text (see :func:`write_bulletin`)."""
    from assim import __version__
    from assim.plots import severity_order, threshold_colors

    names = names or {}
    issue = pd.Timestamp(str(forecast.attrs.get("issue_date", ""))[:10])
    basins = [str(b) for b in forecast["basin"].values]
    leads = forecast["lead"].values.astype(int)
    valid = pd.DatetimeIndex(forecast["valid_time"].values)
    t_names = [str(t) for t in forecast["threshold"].values] if "threshold" in forecast.dims else []
    p = (forecast["exceedance_probability"].transpose("basin", "lead", "threshold").values.astype(float)
         if t_names else np.zeros((len(basins), len(leads), 0)))
    thr = (forecast["thresholds"].transpose("basin", "threshold").values.astype(float)
           if t_names else np.zeros((len(basins), 0)))
    members = forecast.sizes.get("member")
    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat()

    def label(b):
        n = names.get(b)
        return f"{n} ({b})" if n and n != b else b

    out = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>assim bulletin {issue:%Y-%m-%d}</title>",
        f"<style>{_CSS}</style></head><body>",
        f'<div class="caution" id="caution" role="alert"><strong>Caution.</strong> {_e(CAUTION)}</div>',
        f"<h1>Streamflow forecast bulletin, issued {issue:%Y-%m-%d} (end of day, UTC)</h1>",
        f'<p class="note">Leads {leads[0]}..{leads[-1]} days ({valid[0]:%Y-%m-%d} to {valid[-1]:%Y-%m-%d}); '
        f"{members or 'quantile'} members; forcing of the forecast period: "
        f"<code>{_e(forecast.attrs.get('forcing', 'unknown'))}</code>. Written {now} by assim {_e(__version__)}.</p>",
    ]
    level_text = ", ".join(f"{_e(n)} at {levels[n]:.0%}" for n in t_names if n in levels)
    if alerts:
        out.append(f'<div class="raised" id="alerts"><h2 style="margin-top:.3em">Raised: {len(alerts)} '
                   f"threshold{'s' if len(alerts) != 1 else ''} at "
                   f"{len({a['basin'] for a in alerts})} basin(s)</h2>")
        out.append('<table id="alert-table"><tr><th class="l">basin</th><th class="l">threshold</th>'
                   "<th>m3 s-1</th><th>alert level</th><th>highest probability</th><th>first day at or above "
                   "the level (lead)</th><th>lead of the highest</th></tr>")
        for a in alerts:
            out.append(f'<tr><td class="l"><a href="#{_anchor(a["basin"])}">{_e(label(a["basin"]))}</a></td>'
                       f'<td class="l">{_e(a["threshold"])}</td><td>{a["threshold_m3s"]:g}</td>'
                       f'<td>{a["alert_probability"]:.0%}</td><td>{a["max_probability"]:.0%}</td>'
                       f'<td>{a["first_valid_date"]} ({a["first_lead"]})</td><td>{a["peak_lead"]}</td></tr>')
        out.append("</table>")
    else:
        out.append('<div class="quiet" id="alerts"><h2 style="margin-top:.3em">No threshold raised</h2>')
        out.append('<table id="alert-table"><tr><th class="l">basin</th><th class="l">threshold</th>'
                   '<th>highest probability</th></tr><tr><td class="l" colspan="3">none</td></tr></table>')
    out.append(f'<p class="note">A threshold is raised when its exceedance probability reaches its alert '
               f"level at some lead: {level_text or 'no threshold'}. "
               + (f"The same list for a scheduled job: {', '.join(f'<code>{_e(Path(f).name)}</code>' for f in alert_files)}."
                  if alert_files else "") + "</p></div>")

    note = _traces_note(forecast)
    honesty = [note] if note else []
    if str(forecast.attrs.get("warnings", "none")) not in ("none", ""):
        honesty.append(f"Warnings of the forecast run: {forecast.attrs['warnings']}")
    if honesty:
        out.append('<div class="honesty" id="honesty">' + "".join(f"<p>{_e(h)}</p>" for h in honesty) + "</div>")

    out.append('<h2 id="inputs">Inputs behind this forecast</h2><table>')
    out.append(f'<tr><th class="l">restart continued from</th><td class="l"><code>'
               f'{_e(forecast.attrs.get("restart", "unknown"))}</code></td></tr>')
    out.append(f'<tr><th class="l">analysis</th><td class="l">{_e(forecast.attrs.get("analysis", "unknown"))}</td></tr>')
    out.append(f'<tr><th class="l">weather on record through</th><td class="l">{_e(_age(weather_through, issue))}'
               "</td></tr></table>")
    out.append('<table id="gauge-ages"><tr><th class="l">basin</th><th class="l">latest gauge reading (UTC day)</th></tr>')
    for b in basins:
        day = (latest_reading or {}).get(b)
        out.append(f'<tr><td class="l">{_e(label(b))}</td><td class="l">{_e(_age(day, issue))}</td></tr>')
    out.append("</table>")

    out.append('<h2 id="basins">Exceedance probability by basin</h2>')
    head = "".join(f"<th>{lead}<br>{v:%m-%d}</th>" for lead, v in zip(leads, valid, strict=True))
    for i, b in enumerate(basins):
        out.append(f'<section id="{_anchor(b)}"><h3>{_e(label(b))}</h3>')
        order = severity_order(thr[i])
        colors = threshold_colors(thr[i])
        if order:
            out.append(f'<table class="probability"><tr><th class="l">threshold (m3 s-1)</th>'
                       f"<th>alert level</th>{head}</tr>")
            for k in order:
                lvl = levels.get(t_names[k], np.inf)
                cells = "".join(
                    f'<td class="up">{x:.0%}</td>' if x >= lvl else f"<td>{x:.0%}</td>" for x in p[i, :, k])
                out.append(f'<tr><td class="l"><span class="sw" style="background:{colors[k]}"></span>'
                           f"{_e(t_names[k])} ({thr[i, k]:g})</td><td>{lvl:.0%}</td>{cells}</tr>")
            out.append("</table>")
        else:
            out.append('<p class="note">No threshold for this basin.</p>')
        if b in figures:
            data = base64.b64encode(Path(figures[b]).read_bytes()).decode("ascii")
            out.append(f'<figure><img src="data:image/png;base64,{data}" alt="forecast of {_e(label(b))}">'
                       f"<figcaption class=\"note\">{_e(Path(figures[b]).name)}</figcaption></figure>")
        else:
            out.append('<p class="note">Figure not drawn for this basin (bulletin.max_figures, bulletin.figures).</p>')
        out.append("</section>")
    out.append(f'<div class="caution"><strong>Caution.</strong> {_e(CAUTION)}</div>')
    out.append("</body></html>")
    return "\n".join(out) + "\n"


def _anchor(basin: str) -> str:
    from assim.plots import name_part

    return "basin-" + name_part(basin).replace("~", "-")
