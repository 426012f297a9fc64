"""Figures of the products (PNG, matplotlib without a display).

Every figure carries the caution line (:data:`assim.caution.CAUTION_SHORT`) inside the image
and is written through :func:`assim.io.common.atomic_path`. Figures are named
``<kind>__<basin>[__<extra>].png`` (see :func:`figure_name`) so that the report can group
them by basin:

- ``hydrograph``: observations and ensemble median with 5-95 % and 25-75 % bands, open loop
  above assimilation, over the last :data:`HYDROGRAPH_DAYS` days of the run;
- ``plume``: one forecast issue: recent observations, members and bands, named thresholds,
  and the exceedance probability per lead in a second panel;
- ``skill``: CRPSS (against climatology, and assimilation against open loop), NSE and KGE
  against lead time for both experiments;
- ``rank-histogram``: rank histograms at lead 0, 1 and the last lead;
- ``spread-skill``: spread-skill ratio against lead time;
- ``reliability``: reliability diagram of one named threshold (extra = threshold name).
"""

from __future__ import annotations

import hashlib
import os
import re
import textwrap
import unicodedata
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr
from matplotlib import rcParams
from matplotlib.dates import AutoDateLocator, ConciseDateFormatter
from matplotlib.figure import Figure

from assim import paths
from assim.caution import CAUTION_SHORT
from assim.errors import InputError
from assim.io.common import atomic_path
from assim.io.products import background, open_product
from assim.io.skill import read_skill

EXPERIMENT_STYLE = {
    "openloop": {"color": "#d95f02", "label": "open loop"},
    "assimilation": {"color": "#1f5fa8", "label": "assimilation"},
}
Q_LABEL = "Discharge (m$^3$ s$^{-1}$)"
HYDROGRAPH_DAYS = 365
KINDS = ("hydrograph", "plume", "skill", "rank-histogram", "spread-skill", "reliability", "bulletin",
         "calibration")
_DPI = 110
# The one colour ramp of every threshold (figures, report, bulletin): pale tan for the lowest
# level of a basin to dark umber for the highest, by value, whatever the levels are named.
SEVERITY_RAMP = ("#cfae6a", "#3b1407")
FEW_EVENTS = 10  # reliability from fewer observed events than this is marked as poorly determined


# ---------------------------------------------------------------------------------- helpers


_VERBATIM = re.compile(r"[A-Za-z0-9]+(?:[._-][A-Za-z0-9]+)*")


def name_part(text: str) -> str:
    """One part of a figure's file name, unique per ``text``.

    ``text`` of at most 40 characters made only of ASCII letters and digits joined by single ``.``, ``_`` or ``-`` is
    kept as it is; anything else becomes a readable ASCII slug (accents dropped, other
    characters as ``-``) followed by ``~`` and the first 8 hex digits of the SHA-256 of the
    text. ``~`` never occurs in a kept name, so ``a/b`` (``a-b~…``) and ``a_b`` (kept) and
    ``minor!``/``minor?`` (two hashes) get different names. Text longer than 40 characters is
    shortened the same way, so that a file name stays well under the 255-byte limit."""
    text = str(text)
    if len(text) <= 40 and _VERBATIM.fullmatch(text):
        return text
    ascii_ = unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode("ascii")
    slug = re.sub(r"[^A-Za-z0-9]+", "-", ascii_).strip("-")[:40] or "x"
    return f"{slug}~{hashlib.sha256(text.encode('utf-8')).hexdigest()[:8]}"


def figure_name(kind: str, basin: str, extra: str | None = None) -> str:
    """File name of a figure: ``<kind>__<basin>[__<extra>].png``, each part through
    :func:`name_part`, so that different basin ids (or threshold names) never share a file."""
    parts = [kind, basin] + ([extra] if extra else [])
    return "__".join(name_part(p) for p in parts) + ".png"


def parse_figure_name(name: str) -> tuple[str, str, str | None] | None:
    """(kind, basin part, extra part) of a file named by :func:`figure_name`, or None.

    The parts are as written (:func:`name_part` of the id); compare them with
    ``name_part(basin_id)`` to find the basin."""
    stem = Path(name).stem
    parts = stem.split("__")
    if len(parts) < 2 or parts[0] not in KINDS:
        return None
    return parts[0], parts[1], ("__".join(parts[2:]) or None)


def severity_order(values) -> list[int]:
    """Indices of the finite threshold ``values`` from the lowest to the highest (NaN left out)."""
    values = np.asarray(values, dtype=float)
    return [int(i) for i in np.argsort(values, kind="stable") if np.isfinite(values[i])]


def severity_colors(n: int) -> list[str]:
    """``n`` colours of :data:`SEVERITY_RAMP`, lightest first (one colour per threshold rank)."""
    from matplotlib.colors import LinearSegmentedColormap, to_hex

    ramp = LinearSegmentedColormap.from_list("severity", SEVERITY_RAMP)
    positions = np.linspace(0.0, 1.0, n) if n > 1 else np.array([0.6])
    return [to_hex(ramp(x)) for x in positions]


def threshold_colors(values) -> dict[int, str]:
    """Index of each finite threshold -> its colour, ranked by value (:func:`severity_order`)."""
    order = severity_order(values)
    return dict(zip(order, severity_colors(len(order)), strict=True))


def _figure(nrows: int, ncols: int, size: tuple[float, float], **kw):
    fig = Figure(figsize=size, dpi=_DPI, layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
    return fig, axes


def _caution(fig: Figure) -> None:
    """The caution line at the foot of the figure."""
    fig.text(0.5, 0.008, CAUTION_SHORT, ha="center", va="bottom", fontsize=8, color="#8b0000",
             style="italic", bbox={"boxstyle": "round,pad=0.3", "fc": "#fff4f4", "ec": "#8b0000", "lw": 0.6})


def _save(fig: Figure, path: Path) -> Path:
    """Add the caution line at the foot of the figure (once) and write it atomically."""
    engine = fig.get_layout_engine()
    if engine is not None:
        engine.set(rect=(0, 0.045, 1, 0.955))
    if CAUTION_SHORT not in (t.get_text() for t in fig.texts):
        _caution(fig)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=_DPI)
    return Path(path)


def _date_axis(ax) -> None:
    locator = AutoDateLocator(minticks=4, maxticks=9)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(locator))


def _title(basin: str, names: Mapping[str, str] | None) -> str:
    name = (names or {}).get(basin)
    return f"{name} ({basin})" if name and name != basin else basin


def _bands(values: np.ndarray) -> dict[float, np.ndarray]:
    """Quantiles 5, 25, 50, 75, 95 % over the last (member) axis."""
    qs = (0.05, 0.25, 0.5, 0.75, 0.95)
    with np.errstate(invalid="ignore"):
        out = np.nanquantile(values, qs, axis=-1) if values.shape[-1] else np.full((5,) + values.shape[:-1], np.nan)
    return dict(zip(qs, out, strict=True))


def _quantile_bands(da: xr.DataArray) -> dict[float, np.ndarray] | None:
    """The 5..95 % bands from a ``discharge_quantile`` variable (nearest written levels)."""
    levels = np.asarray(da["quantile"].values, dtype=float)
    out = {}
    for q in (0.05, 0.25, 0.5, 0.75, 0.95):
        i = int(np.argmin(np.abs(levels - q)))
        if abs(levels[i] - q) > 0.051:
            return None
        out[q] = da.isel(quantile=i).values
    return out


def _draw_ensemble(ax, x, bands, color, label) -> None:
    ax.fill_between(x, bands[0.05], bands[0.95], color=color, alpha=0.18, lw=0, label=f"{label} 5-95 %")
    ax.fill_between(x, bands[0.25], bands[0.75], color=color, alpha=0.38, lw=0, label=f"{label} 25-75 %")
    ax.plot(x, bands[0.5], color=color, lw=1.4, label=f"{label} median")


# ---------------------------------------------------------------------------------- figures


def plot_hydrograph(runs: Mapping[str, xr.Dataset], observed: xr.DataArray | None, basin: str,
                    path: str | Path, *, start=None, end=None, names: Mapping[str, str] | None = None) -> Path:
    """Hydrograph of one basin: open loop and assimilation in two panels sharing the axes.

    Parameters
    ----------
    runs : experiment ("openloop", "assimilation") -> run Dataset with ``discharge``
        (basin, time, member) or ``discharge_quantile`` (basin, time, quantile), m3 s-1
    observed : usable daily discharge (basin, time), m3 s-1, or None
    basin : basin id
    path : PNG to write
    start, end : the period shown (dates; default the last :data:`HYDROGRAPH_DAYS` days)
    names : basin id -> name, for the title

    Returns
    -------
    Path of the written figure.
    """
    exps = [e for e in EXPERIMENT_STYLE if e in runs]
    fig, axes = _figure(len(exps), 1, (10, 3.1 * len(exps) + 0.6), sharex=True, sharey=True)
    for ax, exp in zip(axes[:, 0], exps, strict=True):
        ds = runs[exp]
        time = pd.DatetimeIndex(ds["time"].values)
        t1 = pd.Timestamp(end) if end is not None else time[-1]
        t0 = pd.Timestamp(start) if start is not None else t1 - pd.Timedelta(days=HYDROGRAPH_DAYS - 1)
        sel = ds.sel(basin=basin, time=slice(t0, t1))
        x = pd.DatetimeIndex(sel["time"].values)
        if "discharge" in sel:
            bands = _bands(sel[background(sel)].transpose("time", "member").values.astype(float))
        else:
            bands = _quantile_bands(sel[background(sel, quantile=True)].transpose("quantile", "time"))
        style = EXPERIMENT_STYLE[exp]
        if bands is not None:
            _draw_ensemble(ax, x, bands, style["color"], style["label"])
        if observed is not None and basin in observed["basin"].values:
            o = observed.sel(basin=basin).reindex(time=sel["time"].values)
            ax.plot(x, o.values, ".", color="black", ms=3, label="observed (usable)")
        ax.set_ylabel(Q_LABEL)
        ax.set_title(f"{style['label']} (lead 0: before the day's reading is assimilated)", fontsize=10)
        ax.grid(alpha=0.3)
        ax.set_ylim(bottom=0)
        ax.legend(loc="upper right", fontsize=8, ncol=2, framealpha=0.85)
        _date_axis(ax)
    axes[-1, 0].set_xlabel("Date (UTC day)")
    fig.suptitle(f"{_title(basin, names)}: ensemble discharge, {x[0]:%Y-%m-%d} to {x[-1]:%Y-%m-%d}", fontsize=12)
    return _save(fig, Path(path))


ASSIMILATED_COLOR = "#2e7d6b"


def plot_plume(forecast: xr.Dataset, observed: xr.DataArray | None, basin: str, path: str | Path, *,
               history_days: int = 30, names: Mapping[str, str] | None = None,
               recent: xr.DataArray | None = None, note: str | None = None) -> Path:
    """Forecast plume of one issue and its exceedance probabilities.

    Parameters
    ----------
    forecast : a forecast Dataset: ``discharge`` (basin, lead, member) or
        ``discharge_quantile``, ``exceedance_probability`` (basin, lead, threshold),
        ``thresholds`` (basin, threshold), coordinate ``valid_time`` (lead), attrs
        ``issue_date`` and ``analysis``; m3 s-1
    observed : usable daily discharge (basin, time), m3 s-1, or None
    basin : basin id
    path : PNG to write
    history_days : days of observations (and of ``recent``) shown before the issue
    names : basin id -> name
    recent : the assimilated ensemble before the issue (discharge after each day's update),
        (basin, time, member) m3 s-1, or None; drawn as bands beside the observations
    note : a line printed under the title (e.g. how many distinct weather traces there are)

    Thresholds are drawn in the order of their values with :func:`severity_colors`.

    Returns
    -------
    Path of the written figure.
    """
    return plot_plumes(forecast, observed, {basin: path}, history_days=history_days, names=names,
                       recent=recent, note=note)[0]


PLUMES_PER_WORKER = 8  # figures a drawing process must have to be worth its start-up (~1.5 s)


def plot_plumes(forecast: xr.Dataset, observed: xr.DataArray | None, figures: Mapping[str, str | Path], *,
                history_days: int = 30, names: Mapping[str, str] | None = None,
                recent: xr.DataArray | None = None, note: str | None = None, workers: int = 1) -> list[Path]:
    """The plume of each basin of ``figures`` (basin id -> PNG to write), as :func:`plot_plume`
    draws it for that basin alone, at a fraction of the cost.

    The basins' arrays are taken from the Datasets once, and one figure is drawn again for
    every basin (:class:`_PlumeFigure`). With ``workers`` > 1 and at least
    :data:`PLUMES_PER_WORKER` figures per process, ``workers - 1`` spawned processes draw
    beside the calling one, each taking the next basin not yet taken (so a process that
    starts late simply draws fewer).

    Returns
    -------
    list of Path, in the order of ``figures``.
    """
    tasks = [(d, Path(figures[d["basin"]])) for d in
             _plume_data(forecast, observed, list(figures), history_days=history_days, names=names,
                         recent=recent, note=note)]
    workers = max(1, min(int(workers), len(tasks) // PLUMES_PER_WORKER))
    if workers == 1:
        figure = _PlumeFigure()
        return [figure.draw(d, p) for d, p in tasks]
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    # spawn, as plot_results: never a fork of a process holding library locks
    context = multiprocessing.get_context("spawn")
    taken = context.Value("i", 0)
    with ProcessPoolExecutor(max_workers=workers - 1, mp_context=context, initializer=_share_counter,
                             initargs=(taken,)) as pool:
        futures = [pool.submit(_draw_taken, tasks) for _ in range(workers - 1)]
        _draw_taken(tasks, taken)
        for f in futures:
            f.result()
    return [p for _, p in tasks]


_TAKEN = []  # in a drawing process: the counter of basins taken, shared with the others


def _share_counter(taken) -> None:
    _TAKEN.append(taken)


def _draw_taken(tasks, taken=None) -> None:
    """Draw the next basin no process has taken yet, until none is left."""
    taken = taken if taken is not None else _TAKEN[0]
    figure = None
    while True:
        with taken.get_lock():
            i = taken.value
            taken.value += 1
        if i >= len(tasks):
            return
        figure = figure or _PlumeFigure()
        figure.draw(*tasks[i])


def _plume_data(forecast: xr.Dataset, observed, basins: Sequence[str], *, history_days: int,
                names: Mapping[str, str] | None, recent, note: str | None) -> list[dict]:
    """What the plume of each of ``basins`` shows, as plain arrays (one dict per basin); the
    bands of every basin are computed in one call."""
    basins = [str(b) for b in basins]
    ids = [str(b) for b in forecast["basin"].values]
    idx = np.array([ids.index(b) for b in basins], dtype=int)
    valid = pd.DatetimeIndex(forecast["valid_time"].values)
    issue = pd.Timestamp(str(forecast.attrs.get("issue_date", valid[0] - pd.Timedelta(days=1)))[:10])
    start = issue - pd.Timedelta(days=max(history_days, 1) - 1)
    members, bands = None, None
    if "discharge" in forecast:
        members = forecast["discharge"].transpose("basin", "lead", "member").values[idx].astype(float)
        bands = _bands(members)
    else:
        bands = _quantile_bands(forecast["discharge_quantile"].transpose("quantile", "basin", "lead"))
        bands = None if bands is None else {q: v[idx] for q, v in bands.items()}
    thr_names = [str(t) for t in forecast["threshold"].values] if "threshold" in forecast.dims else []
    thr = (forecast["thresholds"].transpose("basin", "threshold").values[idx].astype(float)
           if "thresholds" in forecast else np.full((len(basins), len(thr_names)), np.nan))
    p = (forecast["exceedance_probability"].transpose("basin", "lead", "threshold").values[idx] if thr_names
         else np.zeros((len(basins), len(valid), 0)))
    hist = {}
    if recent is not None and history_days > 0:
        r = recent.sel(time=slice(start, issue)).transpose("basin", "time", "member")
        rows = {str(b): i for i, b in enumerate(r["basin"].values)}
        if r.sizes["time"] and any(b in rows for b in basins):
            r_bands = _bands(r.values.astype(float))
            r_time = pd.DatetimeIndex(r["time"].values)
            hist["recent"] = {b: (r_time, {q: v[rows[b]] for q, v in r_bands.items()}) for b in basins if b in rows}
    if observed is not None and history_days > 0:
        o = observed.sel(time=slice(start, issue)).transpose("basin", "time")
        rows = {str(b): i for i, b in enumerate(o["basin"].values)}
        o_time, o_values = pd.DatetimeIndex(o["time"].values), o.values
        hist["observed"] = {b: (o_time, o_values[rows[b]]) for b in basins if b in rows}
    analysis = textwrap.shorten(str(forecast.attrs.get("analysis", "unknown")), width=110, placeholder=" ...")
    title = f"issued {issue:%Y-%m-%d} (end of day); analysis {analysis}"
    if note:
        title += "\n" + textwrap.shorten(note, width=130, placeholder=" ...")
    return [{"basin": b, "issue": issue, "valid": valid, "history_days": history_days,
             "members": None if members is None else members[i],
             "bands": None if bands is None else {q: v[i] for q, v in bands.items()},
             "recent": hist.get("recent", {}).get(b), "observed": hist.get("observed", {}).get(b),
             "thr_names": thr_names, "thr": thr[i], "p": p[i], "title": title,
             "suptitle": f"{_title(b, names)}: ensemble streamflow forecast"}
            for i, b in enumerate(basins)]


class _PlumeFigure:
    """The plume's figure, made once and drawn again for each basin.

    The axes, their fixed labels, grids, date axis and the caution stay; everything that
    belongs to a basin (lines, bands, bars, texts, legends, titles) is removed before the
    next basin is drawn, and the data limits start empty again, as in a new figure. The
    margins follow the basin's own tick labels, threshold labels and titles, measured
    directly (no layout engine: the constrained layout cost as much as the drawing)."""

    SIZE = (10.0, 7.2)  # inches
    FOOT = 0.32  # inches kept for the caution at the foot
    BOTTOM = 0.5  # inches under the probability panel: date labels and the axis label
    GAP = 0.17  # inches between the two panels
    PAD = 0.06  # inches around the measured labels

    def __init__(self):
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        self.fig = Figure(figsize=self.SIZE, dpi=_DPI)
        FigureCanvasAgg(self.fig)
        axes = self.fig.subplots(2, 1, squeeze=False, sharex=True, height_ratios=[2.3, 1])
        self.ax, self.axp = axes[:, 0]
        self.ax.set_ylabel(Q_LABEL)
        self.ax.grid(alpha=0.3)
        self.axp.set_yticks(np.linspace(0, 1, 6))
        self.axp.set_ylabel("Exceedance\nprobability (-)")
        self.axp.set_xlabel("Valid date (UTC day)")
        self.axp.grid(alpha=0.3, axis="y")
        _date_axis(self.axp)
        _caution(self.fig)

    def _clear(self) -> None:
        for a in (self.ax, self.axp):
            for c in list(a.containers):
                c.remove()
            for artist in [*a.lines, *a.collections, *a.patches, *a.texts]:
                artist.remove()
            if a.legend_ is not None:
                a.legend_.remove()
            a.set_title("")
            a.ignore_existing_data_limits = True  # limits of this basin's data alone, as in new axes
            a.set_autoscale_on(True)

    def draw(self, d: Mapping, path: Path) -> Path:
        """Draw one basin (a dict of :func:`_plume_data`) and write it to ``path``."""
        from matplotlib.collections import LineCollection
        from matplotlib.dates import date2num

        self._clear()
        ax, axp = self.ax, self.axp
        valid, issue, history_days = d["valid"], d["issue"], d["history_days"]
        x = date2num(valid)
        if d["members"] is not None:
            m = d["members"]  # (lead, member)
            segments = np.stack([np.broadcast_to(x[:, None], m.shape), m], axis=-1).transpose(1, 0, 2)
            ax.add_collection(LineCollection(segments, colors="#7a7a7a", linewidths=0.5, alpha=0.45, zorder=2))
            ax.plot([], [], color="#7a7a7a", lw=0.5, label=f"members ({m.shape[1]})")
        if d["bands"] is not None:
            _draw_ensemble(ax, valid, d["bands"], EXPERIMENT_STYLE["assimilation"]["color"], "forecast")
        if d["recent"] is not None:
            _draw_ensemble(ax, d["recent"][0], d["recent"][1], ASSIMILATED_COLOR, "assimilated")
        if d["observed"] is not None:
            ax.plot(d["observed"][0], d["observed"][1], "o-", color="black", ms=3, lw=0.8,
                    label=f"observed, last {history_days} days")
        ax.axvline(issue, color="black", lw=0.8, ls=":")
        ax.text(issue, 0.02, "issue ", transform=ax.get_xaxis_transform(), ha="right", va="bottom", fontsize=8)
        thr_names, thr, p = d["thr_names"], d["thr"], d["p"]
        shown = severity_order(thr)
        colors = threshold_colors(thr)
        labels = []
        for k in shown:
            ax.axhline(thr[k], color=colors[k], ls="--", lw=1.2)
            labels.append(ax.text(1.0, thr[k], f" {thr_names[k]} ({thr[k]:g})", transform=ax.get_yaxis_transform(),
                                  color=colors[k], va="center", fontsize=8, clip_on=False))
        top = np.nanmax([*ax.get_ylim(), *thr[np.isfinite(thr)]]) if len(thr) else ax.get_ylim()[1]
        ax.set_ylim(0, 1.3 * top)  # head room for the legend above the data and thresholds
        ax.legend(loc="upper left", fontsize=8, ncol=3, framealpha=0.9)
        ax.set_title(d["title"], fontsize=9)
        # exceedance probability per lead, one bar group per valid day, thresholds by value
        width = 0.8 / max(1, len(shown))
        for j, k in enumerate(shown):
            offset = pd.to_timedelta((j - (len(shown) - 1) / 2) * width, unit="D")
            bars = axp.bar(valid + offset, p[:, k], width=width, color=colors[k], label=thr_names[k])
            if len(valid) <= 15:
                axp.bar_label(bars, labels=[f"{v:.0%}" if v > 0 else "" for v in p[:, k]], fontsize=6, padding=1)
        if not shown:
            axp.text(0.5, 0.5, "no threshold for this basin", transform=axp.transAxes, ha="center", va="center")
        elif not np.nanmax(p[:, shown], initial=0) > 0:
            axp.text(0.5, 0.5, "no member exceeds any threshold at any lead (probability 0)",
                     transform=axp.transAxes, ha="center", va="center", fontsize=9, color="0.3")
        axp.set_ylim(0, 1.12)
        if shown:
            axp.legend(title="threshold", fontsize=8, title_fontsize=8, loc="upper left", ncol=len(shown),
                       framealpha=0.9)
        self.fig.suptitle(d["suptitle"], fontsize=12, va="top", y=1 - self.PAD / self.SIZE[1])
        self._layout(labels)
        return _save(self.fig, path)

    def _layout(self, threshold_labels) -> None:
        """Margins from this basin's labels: the tick and axis labels on the left, the longest
        threshold label on the right, the titles on top (inches, then figure fractions)."""
        r = self.fig.canvas.get_renderer()
        w, h = self.SIZE
        inch = self.fig.dpi
        left = max(a.get_window_extent(r).x0 - a.yaxis.get_tightbbox(r).x0 for a in (self.ax, self.axp)) / inch
        right = max([t.get_window_extent(r).width / inch for t in threshold_labels], default=0.0)
        title = self.ax.title.get_window_extent(r).height / inch + rcParams["axes.titlepad"] / 72
        top = self.PAD + self.fig._suptitle.get_window_extent(r).height / inch + self.PAD + title
        bottom = self.FOOT + self.BOTTOM
        self.fig.subplots_adjust(left=(left + self.PAD) / w, right=1 - (right + self.PAD) / w, top=1 - top / h,
                                 bottom=bottom / h, hspace=2 * self.GAP / (h - top - bottom - self.GAP))


def _skill_values(skill: xr.Dataset, basin: str, metric: str, exp: str):
    if metric not in skill["metric"].values:
        return None
    s = skill["skill"].sel(basin=basin, experiment=exp, metric=metric)
    n = skill["n"].sel(basin=basin, experiment=exp, metric=metric)
    return np.where(n.values > 0, s.values, np.nan)


def _lead_axis(ax, leads) -> None:
    ax.set_xticks(leads)
    ax.set_xticklabels(["0\nbkg" if lead == 0 else str(lead) for lead in leads])
    ax.set_xlabel("Lead time (days; 0 = background)")


def plot_skill_by_lead(skill: xr.Dataset, basin: str, path: str | Path, *,
                       names: Mapping[str, str] | None = None) -> Path:
    """CRPSS, NSE and KGE of both experiments against lead time.

    CRPSS is against the observed day-of-year climatology; the assimilation's CRPSS against
    the open loop is drawn dotted in the same panel.

    Parameters
    ----------
    skill : the skill Dataset (:func:`assim.verification.verify_results`)
    basin : basin id
    path : PNG to write

    Returns
    -------
    Path of the written figure.
    """
    leads = skill["lead"].values.astype(int)
    panels = (("crpss", "CRPSS against climatology (-)", 0.0, "climatology"),
              ("nse", "NSE of median (-)", 0.0, "observed mean"),
              ("kge", "KGE of median (-)", 1 - np.sqrt(2), "mean-flow benchmark"))
    fig, axes = _figure(1, 3, (12, 4.0))
    for ax, (metric, label, ref, ref_label) in zip(axes[0], panels, strict=True):
        for exp, style in EXPERIMENT_STYLE.items():
            y = _skill_values(skill, basin, metric, exp)
            if y is not None and np.isfinite(y).any():
                ax.plot(leads, y, "o-", color=style["color"], label=style["label"], ms=4)
        if metric == "crpss":
            y = _skill_values(skill, basin, "crpss_openloop", "assimilation")
            if y is not None and np.isfinite(y).any():
                ax.plot(leads, y, "s:", color=EXPERIMENT_STYLE["assimilation"]["color"], ms=3, lw=1,
                        label="assimilation against open loop")
        ax.axhline(ref, color="0.4", lw=0.8, ls="--", label=ref_label)
        ax.set_ylabel(label)
        _lead_axis(ax, leads)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8)
    fig.suptitle(f"{_title(basin, names)}: skill against lead time", fontsize=12)
    return _save(fig, Path(path))


def plot_spread_skill(skill: xr.Dataset, basin: str, path: str | Path, *,
                      names: Mapping[str, str] | None = None) -> Path:
    """Spread-skill ratio (Fortin et al. 2014 correction) of both experiments by lead."""
    leads = skill["lead"].values.astype(int)
    fig, axes = _figure(1, 1, (7, 4.2))
    ax = axes[0, 0]
    for exp, style in EXPERIMENT_STYLE.items():
        y = _skill_values(skill, basin, "spread_skill", exp)
        if y is not None and np.isfinite(y).any():
            ax.plot(leads, y, "o-", color=style["color"], label=style["label"], ms=4)
    ax.axhline(1.0, color="0.3", ls="--", lw=0.9, label="calibrated")
    ax.set_ylabel("Spread / RMSE of ensemble mean (-)")
    ax.set_ylim(bottom=0)
    _lead_axis(ax, leads)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    ax.text(0.01, 0.02, "below 1: under-dispersive (too confident)", transform=ax.transAxes, fontsize=8,
            color="0.3")
    fig.suptitle(f"{_title(basin, names)}: spread-skill ratio", fontsize=12)
    return _save(fig, Path(path))


def _chosen_leads(leads: Sequence[int]) -> list[int]:
    leads = [int(x) for x in leads]
    return sorted({leads[0], *([1] if 1 in leads else []), leads[-1]})


def plot_rank_histograms(skill: xr.Dataset, basin: str, path: str | Path, *,
                         names: Mapping[str, str] | None = None) -> Path:
    """Rank histograms (relative frequency) of both experiments at lead 0, 1 and the last."""
    chosen = _chosen_leads(skill["lead"].values)
    hist = skill["rank_histogram"].sel(basin=basin)
    ranks = skill["rank"].values
    exps = [e for e in EXPERIMENT_STYLE if np.nansum(hist.sel(experiment=e).values) > 0] or list(EXPERIMENT_STYLE)
    fig, axes = _figure(len(exps), len(chosen), (max(8.0, 3.4 * len(chosen) + 0.6), 2.8 * len(exps) + 0.6),
                        sharey=True)
    for i, exp in enumerate(exps):
        style = EXPERIMENT_STYLE[exp]
        for j, lead in enumerate(chosen):
            ax = axes[i, j]
            h = hist.sel(experiment=exp, lead=lead).values.astype(float)
            total = np.nansum(h)
            if total > 0:
                ax.bar(ranks, h / total, width=0.9, color=style["color"])
                ax.axhline(1 / len(ranks), color="black", lw=0.8, ls="--")
                ax.set_title(f"{style['label']}, lead {lead} (n = {total:.0f})", fontsize=9)
            else:
                ax.text(0.5, 0.5, "not scored", transform=ax.transAxes, ha="center", va="center")
                ax.set_title(f"{style['label']}, lead {lead}", fontsize=9)
            ax.set_xlabel("Rank of observation (members below)")
            if j == 0:
                ax.set_ylabel("Relative frequency (-)")
    fig.suptitle(f"{_title(basin, names)}: rank histograms (dashed: flat, a calibrated ensemble)",
                 fontsize=11)
    return _save(fig, Path(path))


def plot_reliability(skill: xr.Dataset, basin: str, threshold: str, path: str | Path, *,
                     names: Mapping[str, str] | None = None) -> Path:
    """Reliability diagram of exceeding ``threshold`` at lead 0, 1 and the last lead."""
    chosen = _chosen_leads(skill["lead"].values)
    fig, axes = _figure(1, len(chosen), (max(8.0, 3.7 * len(chosen) + 0.6), 4.2), sharey=True)
    value = float(skill["threshold_value"].sel(basin=basin, threshold=threshold))
    for ax, lead in zip(axes[0], chosen, strict=True):
        ax.plot([0, 1], [0, 1], color="0.4", lw=0.8, ls="--", label="perfect reliability")
        fewest = None
        for exp, style in EXPERIMENT_STYLE.items():
            sel = {"basin": basin, "experiment": exp, "lead": lead, "threshold": threshold}
            fp = skill["reliability_forecast_probability"].sel(sel).values
            of = skill["reliability_observed_frequency"].sel(sel).values
            n = skill["reliability_count"].sel(sel).values
            ok = n > 0
            if ok.any():
                ax.plot(fp[ok], of[ok], "-", color=style["color"], lw=1)
                events = int(round(float(np.sum(of[ok] * n[ok]))))
                fewest = events if fewest is None else min(fewest, events)
                ax.scatter(fp[ok], of[ok], s=8 + 60 * np.sqrt(n[ok] / n.max()), color=style["color"],
                           label=f"{style['label']} (n = {n.sum()}, {events} observed)", zorder=3)
        if fewest is not None and fewest < FEW_EVENTS:
            ax.text(0.98, 0.03, f"only {fewest} observed event{'s' if fewest != 1 else ''}:\n"
                    "reliability poorly determined", transform=ax.transAxes, ha="right", va="bottom",
                    fontsize=8, color="#8b0000", bbox={"fc": "white", "ec": "#8b0000", "lw": 0.6})
        ax.set_xlim(-0.02, 1.02)
        ax.set_ylim(-0.02, 1.02)
        ax.set_aspect("equal")
        ax.set_xlabel("Forecast probability (-)")
        ax.set_title(f"lead {lead}" + (" (background)" if lead == 0 else ""), fontsize=9)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, loc="upper left")
    axes[0, 0].set_ylabel("Observed frequency (-)")
    fig.suptitle(f"{_title(basin, names)}: reliability of exceeding '{threshold}' ({value:g} m$^3$ s$^{{-1}}$); "
                 "marker area ~ number of forecasts", fontsize=10)
    return _save(fig, Path(path))


# ---------------------------------------------------------------------------------- all


def plot_calibration(cal: xr.Dataset, basin: str, path: str | Path, *,
                     names: Mapping[str, str] | None = None) -> Path:
    """Calibration of one basin (calibration.nc): simulated against observed discharge over
    the calibration and validation periods, the scores of both periods, and each parameter
    within its searched range (the final population's spread as a bar, the value a dot).

    Returns
    -------
    the written path
    """
    fig = Figure(figsize=(11, 7.5), dpi=_DPI, layout="constrained")
    grid = fig.add_gridspec(2, 2, height_ratios=(1.3, 1))
    ax, ax_s, ax_p = fig.add_subplot(grid[0, :]), fig.add_subplot(grid[1, 0]), fig.add_subplot(grid[1, 1])
    c = cal.sel(basin=basin)
    t = cal["time"].values
    flag = cal["period_flag"].values
    colors = {1: "#1f77b4", 2: "#d62728"}
    for k, label in ((1, "calibration"), (2, "validation")):
        sel = flag == k
        if sel.any():
            ax.axvspan(t[sel][0], t[sel][-1], color=colors[k], alpha=0.06, lw=0)
            ax.plot(t, np.where(sel, c["discharge_simulated"].values, np.nan), color=colors[k], lw=1.0,
                    label=f"simulated, {label}")
    ax.plot(t, c["discharge_observed"].values, color="k", lw=0.6, alpha=0.8, label="observed")
    ax.set_ylabel("discharge (m3 s-1)")
    ax.legend(loc="upper right", fontsize=8, ncols=3)
    _date_axis(ax)
    objective = cal.attrs.get("objective", "kge")
    ax.set_title(f"{_title(basin, names)}: calibrated {cal.attrs.get('model', '')} ({objective}), "
                 f"calibration {cal.attrs.get('calibration_period', '')}, validation "
                 f"{cal.attrs.get('validation_period', '')}", fontsize=10)
    metrics = [str(m) for m in cal["metric"].values]
    x = np.arange(len(metrics))
    for k, period in enumerate(cal["period"].values):
        v = c["score"].sel(period=period).values
        bars = ax_s.bar(x + (k - 0.5) * 0.38, v, 0.38, color=colors[k + 1], label=str(period))
        ax_s.bar_label(bars, labels=[f"{y:.2f}" if np.isfinite(y) else "" for y in v], fontsize=7)
    ax_s.set_xticks(x, metrics)
    ax_s.axhline(0, color="k", lw=0.6)
    ax_s.set_ylim(min(0.0, float(np.nanmin(c["score"].values)) - 0.05) if np.isfinite(c["score"].values).any()
                  else 0.0, 1.08)
    ax_s.set_title("scores by period", fontsize=10)
    ax_s.legend(fontsize=8, loc="lower right")
    params = [str(p) for p in cal["parameter"].values]
    lo, hi = c["search_lower"].values, c["search_upper"].values
    width = np.where(hi > lo, hi - lo, 1.0)
    pop = (c["population"].values - lo) / width
    best = (np.array([float(c[p]) for p in params]) - lo) / width
    y = np.arange(len(params))
    ax_p.hlines(y, 0, 1, color="#bbbbbb", lw=6)
    ax_p.hlines(y, pop.min(axis=0), pop.max(axis=0), color="#1f77b4", lw=6, alpha=0.6, label="final population")
    ax_p.plot(best, y, "o", color="k", ms=5, label="calibrated")
    for j, p in enumerate(params):
        fixed = hi[j] <= lo[j]
        ax_p.text(1.02, j, f"{float(c[p]):.4g}" + (" (fixed)" if fixed else f"  [{lo[j]:g}, {hi[j]:g}]"),
                  va="center", fontsize=7)
    ax_p.set_yticks(y, params)
    ax_p.set_xlim(-0.02, 1.6)
    ax_p.set_xticks([0, 0.5, 1], ["low", "mid", "high"])
    ax_p.invert_yaxis()
    ax_p.set_title("parameters within the searched range", fontsize=10)
    ax_p.legend(fontsize=7, loc="lower right")
    return _save(fig, Path(path))


def _inputs(cfg: Mapping):
    """(observed, names) from the prepared layer, each None when the file is absent."""
    from assim.io.prepared import read_basins, read_observations, usable_discharge

    obs_path = paths.prepared(cfg, "observations.nc")
    observed = usable_discharge(read_observations(obs_path)) if obs_path.is_file() else None
    if observed is not None:
        observed = observed.assign_coords(basin=[str(b) for b in observed["basin"].values])
    b_path = paths.prepared(cfg, "basins.nc")
    names = None
    if b_path.is_file():
        b = read_basins(b_path)
        names = {str(k): str(n) for k, n in zip(b["basin"].values, b["name"].values, strict=True)}
    return observed, names


def _latest_forecast(cfg: Mapping) -> Path | None:
    found = sorted(paths.forecasts(cfg).glob("forecast-????-??-??.nc"))
    return found[-1] if found else None


def select_basins(ids: Sequence[str], *, max_basins: int, raised: Sequence[str] = (),
                  skill: xr.Dataset | None = None) -> list[str]:
    """The basins worth drawing when there are too many: at most ``max_basins`` (0 = all).

    First the basins in ``raised`` (raised alerts, in that order), then the worst skill:
    the lowest CRPSS of the assimilation at the shortest hindcast lead (lead 0 without a
    hindcast), unscored basins last. The result keeps the order of ``ids``.
    """
    ids = [str(b) for b in ids]
    if max_basins <= 0 or len(ids) <= max_basins:
        return ids
    ranked = [b for b in dict.fromkeys(str(r) for r in raised) if b in ids]
    if skill is not None and "crpss" in skill["metric"].values:
        leads = [int(x) for x in skill["lead"].values]
        lead = min((x for x in leads if x > 0), default=leads[0])
        s = skill["skill"].sel(experiment="assimilation", lead=lead, metric="crpss")
        s = s.where(skill["n"].sel(experiment="assimilation", lead=lead, metric="crpss") > 0)
        score = dict(zip((str(b) for b in s["basin"].values), s.values.astype(float), strict=True))
        ranked += sorted((b for b in ids if np.isfinite(score.get(b, np.nan))), key=lambda b: score[b])
    ranked += ids
    chosen = set(list(dict.fromkeys(ranked))[:max_basins])
    return [b for b in ids if b in chosen]


def _draw_basin(folder: Path, basin: str, data: Mapping) -> list[str]:
    """Every figure of one basin into ``folder`` (one task of :func:`plot_results`)."""
    names, observed, out = data["names"], data["observed"], []
    if data["runs"]:
        out.append(plot_hydrograph(data["runs"], observed, basin, folder / figure_name("hydrograph", basin),
                                   names=names))
    skill = data["skill"]
    if skill is not None:
        out.append(plot_skill_by_lead(skill, basin, folder / figure_name("skill", basin), names=names))
        out.append(plot_spread_skill(skill, basin, folder / figure_name("spread-skill", basin), names=names))
        if "rank_histogram" in skill and skill.sizes.get("rank", 0) > 1:
            out.append(plot_rank_histograms(skill, basin, folder / figure_name("rank-histogram", basin),
                                            names=names))
        if "threshold_value" in skill:
            values = skill["threshold_value"].sel(basin=basin).values.astype(float)
            for k in severity_order(values):
                t = str(skill["threshold"].values[k])
                out.append(plot_reliability(skill, basin, t, folder / figure_name("reliability", basin, t),
                                            names=names))
    cal = data.get("calibration")
    if cal is not None:
        out.append(plot_calibration(cal, basin, folder / figure_name("calibration", basin), names=names))
    fc = data["forecast"]
    if fc is not None:
        out.append(plot_plume(fc, observed, basin, folder / figure_name("plume", basin, data["day"]),
                              history_days=data["history_days"], names=names))
    return [p.name for p in out]


def _slice(ds, basin: str):
    return None if ds is None or basin not in ds["basin"].values else ds.sel(basin=[basin])


def _remove_leftovers(folder: Path) -> None:
    """Temporaries of a drawing that was killed: staging folders and ``.*.png.*.part``."""
    import shutil

    if folder.is_dir():
        for f in folder.glob(".staging-*"):
            shutil.rmtree(f, ignore_errors=True)
        for f in folder.glob(".*.png.*.part"):
            f.unlink(missing_ok=True)


def plot_results(cfg: Mapping, issue_date: str | None = None) -> list[Path]:
    """Draw the figures of the products into ``results/figures/``: all of them or none.

    Basins are ``outputs.figures`` when given; otherwise at most ``plots.max_basins`` of
    them (:func:`select_basins`: raised alerts of the forecast shown, then the worst skill).
    The plume is the forecast of ``issue_date``, or the latest forecast file when
    ``issue_date`` is None. Every input is read and checked before anything is drawn; the
    figures are drawn (by ``plots.workers`` processes) into a staging folder and moved into
    place only when every one was drawn, so a failed or killed drawing leaves the earlier
    figures as they were. Temporaries of a killed drawing are removed by the next one.
    Worker processes are started fresh ("spawn"): a script calling this with
    ``plots.workers`` other than 1 needs the usual ``if __name__ == "__main__":`` guard.

    Returns
    -------
    list of Path, the PNG files written.

    Raises
    ------
    InputError
        when ``issue_date`` is given and its forecast file is missing, when a product is
        unreadable, or when there is nothing to draw.
    LockError
        while another drawing writes the same folder.
    """
    import shutil
    import tempfile

    from assim.io.common import output_lock

    folder = paths.figures(cfg)
    if issue_date is not None:
        f_path = paths.forecast(cfg, issue_date)
        if not f_path.is_file():
            raise InputError(f"no forecast for issue date {issue_date} (run `assim forecast`)", file=f_path)
    else:
        f_path = _latest_forecast(cfg)
    observed, names = _inputs(cfg)
    runs = {}
    for exp, mode in (("openloop", "openloop"), ("assimilation", "assimilate")):
        p = paths.run_product(cfg, mode)
        if p.is_file():
            ds = open_product(p, ("basin", "time"), any_of=("discharge", "discharge_quantile"), load=True)
            t1 = pd.Timestamp(ds["time"].values[-1]) if ds.sizes["time"] else None
            runs[exp] = ds if t1 is None else ds.sel(time=slice(t1 - pd.Timedelta(days=HYDROGRAPH_DAYS - 1), t1))
    s_path = paths.skill(cfg, "nc")
    skill = read_skill(s_path) if s_path.is_file() else None
    c_path = paths.calibration(cfg)
    cal = None
    if c_path.is_file():
        from assim.io.calibration import read_calibration

        cal = read_calibration(c_path)
    fc, day = None, None
    if f_path is not None:
        fc = open_product(f_path, ("exceedance_probability", "valid_time"),
                          any_of=("discharge", "discharge_quantile"), load=True)
        day = str(fc.attrs.get("issue_date", f_path.stem[len("forecast-"):]))[:10]
    if not runs and skill is None and fc is None and cal is None:
        raise InputError("nothing to draw: no run, skill, calibration or forecast product found "
                         "(run `assim run`, `assim verify`, `assim calibrate` or `assim forecast` first)",
                         file=paths.results(cfg))

    ids = list(dict.fromkeys(str(b) for ds in (*runs.values(), skill, fc, cal) if ds is not None
                             for b in ds["basin"].values))
    wanted = [str(b) for b in cfg.get("outputs", {}).get("figures", [])]
    if wanted:
        basins = [b for b in ids if b in wanted]
    else:
        from assim.bulletin import alert_levels, raised_alerts

        raised = [] if fc is None else [a["basin"] for a in raised_alerts(fc, alert_levels(cfg, fc))]
        basins = select_basins(ids, max_basins=int(cfg.get("plots", {}).get("max_basins", 0)), raised=raised,
                               skill=skill)
    if not basins:
        raise InputError("no basin of outputs.figures is in the products", file=paths.results(cfg),
                         variable="outputs.figures", place=", ".join(wanted))
    history = int(cfg.get("forecast", {}).get("history_days", 30))
    tasks = [(b, {"names": {b: names[b]} if names and b in names else None,
                  "observed": None if observed is None or b not in observed["basin"].values
                  else observed.sel(basin=[b]),
                  "runs": {e: ds.sel(basin=[b]) for e, ds in runs.items() if b in ds["basin"].values},
                  "skill": _slice(skill, b), "forecast": _slice(fc, b), "calibration": _slice(cal, b),
                  "day": day, "history_days": history})
             for b in basins]
    workers = int(cfg.get("plots", {}).get("workers", 0)) or (os.cpu_count() or 1)
    with output_lock(folder / ".figures.lock", "drawing figures"):
        _remove_leftovers(folder)
        staging = Path(tempfile.mkdtemp(prefix=".staging-", dir=folder))
        try:
            drawn = _draw_all(staging, tasks, workers)
            written = []
            for name in drawn:
                os.replace(staging / name, folder / name)
                written.append(folder / name)
        finally:
            shutil.rmtree(staging, ignore_errors=True)
    return written


def _draw_all(staging: Path, tasks, workers: int) -> list[str]:
    """Draw every basin's figures into ``staging``, in worker processes when there are
    several basins and ``workers`` > 1; returns the file names."""
    if workers <= 1 or len(tasks) <= 1:
        return [n for b, data in tasks for n in _draw_basin(staging, b, data)]
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    # spawn: a fresh interpreter per worker, never a fork of a process holding library locks
    with ProcessPoolExecutor(max_workers=min(workers, len(tasks)),
                             mp_context=multiprocessing.get_context("spawn")) as pool:
        futures = [pool.submit(_draw_basin, staging, b, data) for b, data in tasks]
        return [n for f in futures for n in f.result()]
