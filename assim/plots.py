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

import re
import textwrap
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr
from matplotlib.dates import AutoDateLocator, ConciseDateFormatter
from matplotlib.figure import Figure

from assim import paths
from assim.caution import CAUTION_SHORT
from assim.errors import InputError
from assim.io.common import atomic_path
from assim.io.products import open_product
from assim.io.skill import read_skill

EXPERIMENT_STYLE = {
    "openloop": {"color": "#d95f02", "label": "open loop"},
    "assimilation": {"color": "#1f5fa8", "label": "assimilation"},
}
Q_LABEL = "Discharge (m$^3$ s$^{-1}$)"
HYDROGRAPH_DAYS = 365
KINDS = ("hydrograph", "plume", "skill", "rank-histogram", "spread-skill", "reliability")
_DPI = 110


# ---------------------------------------------------------------------------------- helpers


def figure_name(kind: str, basin: str, extra: str | None = None) -> str:
    """File name of a figure: ``<kind>__<basin>[__<extra>].png`` with unsafe characters
    replaced by ``_``."""
    parts = [kind, basin] + ([extra] if extra else [])
    return "__".join(re.sub(r"[^A-Za-z0-9_.-]", "_", str(p)) for p in parts) + ".png"


def parse_figure_name(name: str) -> tuple[str, str, str | None] | None:
    """(kind, basin, extra) of a file named by :func:`figure_name`, or None."""
    stem = Path(name).stem
    parts = stem.split("__")
    if len(parts) < 2 or parts[0] not in KINDS:
        return None
    return parts[0], parts[1], ("__".join(parts[2:]) or None)


def _figure(nrows: int, ncols: int, size: tuple[float, float], **kw):
    fig = Figure(figsize=size, dpi=_DPI, layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
    return fig, axes


def _save(fig: Figure, path: Path) -> Path:
    """Add the caution line at the foot of the figure and write it atomically."""
    fig.get_layout_engine().set(rect=(0, 0.045, 1, 0.955))
    fig.text(0.5, 0.008, CAUTION_SHORT, ha="center", va="bottom", fontsize=8, color="#8b0000",
             style="italic", bbox={"boxstyle": "round,pad=0.3", "fc": "#fff4f4", "ec": "#8b0000", "lw": 0.6})
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
            bands = _bands(sel["discharge"].transpose("time", "member").values.astype(float))
        else:
            bands = _quantile_bands(sel["discharge_quantile"].transpose("quantile", "time"))
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


def plot_plume(forecast: xr.Dataset, observed: xr.DataArray | None, basin: str, path: str | Path, *,
               history_days: int = 30, names: Mapping[str, str] | None = None) -> Path:
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
    history_days : days of observations shown before the issue
    names : basin id -> name

    Returns
    -------
    Path of the written figure.
    """
    fc = forecast.sel(basin=basin)
    issue = pd.Timestamp(str(forecast.attrs.get("issue_date", pd.Timestamp(fc["valid_time"].values[0]) - pd.Timedelta(days=1)))[:10])
    valid = pd.DatetimeIndex(fc["valid_time"].values)
    fig, axes = _figure(2, 1, (10, 7.2), sharex=True, height_ratios=[2.3, 1])
    ax, axp = axes[:, 0]
    if "discharge" in fc:
        members = fc["discharge"].transpose("lead", "member").values.astype(float)
        ax.plot(valid, members, color="#7a7a7a", lw=0.5, alpha=0.45)
        ax.plot([], [], color="#7a7a7a", lw=0.5, label=f"members ({members.shape[1]})")
        bands = _bands(members)
    else:
        bands = _quantile_bands(fc["discharge_quantile"].transpose("quantile", "lead"))
    if bands is not None:
        _draw_ensemble(ax, valid, bands, EXPERIMENT_STYLE["assimilation"]["color"], "forecast")
    if observed is not None and basin in observed["basin"].values and history_days > 0:
        hist = observed.sel(basin=basin, time=slice(issue - pd.Timedelta(days=history_days - 1), issue))
        ax.plot(pd.DatetimeIndex(hist["time"].values), hist.values, "o-", color="black", ms=3, lw=0.8,
                label=f"observed, last {history_days} days")
    ax.axvline(issue, color="black", lw=0.8, ls=":")
    ax.text(issue, 0.02, "issue ", transform=ax.get_xaxis_transform(), ha="right", va="bottom", fontsize=8)
    thr_names = [str(t) for t in fc["threshold"].values] if "threshold" in fc.dims else []
    thr = fc["thresholds"].values.astype(float) if "thresholds" in fc else np.full(len(thr_names), np.nan)
    colors = ["#e6ab02", "#e7298a", "#7570b3", "#66a61e"]
    for k, (name, value) in enumerate(zip(thr_names, thr, strict=True)):
        if np.isfinite(value):
            c = colors[k % len(colors)]
            ax.axhline(value, color=c, ls="--", lw=1.1)
            ax.text(1.0, value, f" {name} ({value:g})", transform=ax.get_yaxis_transform(), color=c,
                    va="center", fontsize=8, clip_on=False)
    ax.set_ylabel(Q_LABEL)
    top = np.nanmax([*ax.get_ylim(), *thr[np.isfinite(thr)]]) if len(thr) else ax.get_ylim()[1]
    ax.set_ylim(0, 1.3 * top)  # head room for the legend above the data and thresholds
    ax.grid(alpha=0.3)
    ax.legend(loc="upper left", fontsize=8, ncol=3, framealpha=0.9)
    analysis = textwrap.shorten(str(forecast.attrs.get("analysis", "unknown")), width=110, placeholder=" ...")
    ax.set_title(f"issued {issue:%Y-%m-%d} (end of day); analysis {analysis}", fontsize=9)
    # exceedance probability per lead, one bar group per valid day
    p = fc["exceedance_probability"].transpose("lead", "threshold").values if thr_names else np.zeros((len(valid), 0))
    shown = [k for k in range(len(thr_names)) if np.isfinite(thr[k])]
    width = 0.8 / max(1, len(shown))
    for j, k in enumerate(shown):
        offset = pd.to_timedelta((j - (len(shown) - 1) / 2) * width, unit="D")
        bars = axp.bar(valid + offset, p[:, k], width=width, color=colors[k % len(colors)], label=thr_names[k])
        if len(valid) <= 15:
            axp.bar_label(bars, labels=[f"{x:.0%}" if x > 0 else "" for x in p[:, k]], fontsize=6, padding=1)
    if not shown:
        axp.text(0.5, 0.5, "no threshold for this basin", transform=axp.transAxes, ha="center", va="center")
    elif not np.nanmax(p[:, shown], initial=0) > 0:
        axp.text(0.5, 0.5, "no member exceeds any threshold at any lead (probability 0)",
                 transform=axp.transAxes, ha="center", va="center", fontsize=9, color="0.3")
    axp.set_ylim(0, 1.12)
    axp.set_yticks(np.linspace(0, 1, 6))
    axp.set_ylabel("Exceedance\nprobability (-)")
    axp.set_xlabel("Valid date (UTC day)")
    axp.grid(alpha=0.3, axis="y")
    if shown:
        axp.legend(title="threshold", fontsize=8, title_fontsize=8, loc="upper left", ncol=len(shown),
                   framealpha=0.9)
    _date_axis(axp)
    fig.suptitle(f"{_title(basin, names)}: ensemble streamflow forecast", fontsize=12)
    return _save(fig, Path(path))


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
        for exp, style in EXPERIMENT_STYLE.items():
            sel = {"basin": basin, "experiment": exp, "lead": lead, "threshold": threshold}
            fp = skill["reliability_forecast_probability"].sel(sel).values
            of = skill["reliability_observed_frequency"].sel(sel).values
            n = skill["reliability_count"].sel(sel).values
            ok = n > 0
            if ok.any():
                ax.plot(fp[ok], of[ok], "-", color=style["color"], lw=1)
                events = int(round(float(np.sum(of[ok] * n[ok]))))
                ax.scatter(fp[ok], of[ok], s=8 + 60 * np.sqrt(n[ok] / n.max()), color=style["color"],
                           label=f"{style['label']} (n = {n.sum()}, {events} observed)", zorder=3)
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


def plot_results(cfg: Mapping, issue_date: str | None = None) -> list[Path]:
    """Draw every figure for which the products exist into ``results/figures/``.

    Basins are ``outputs.figures`` (all basins of the products when empty). The plume is the
    forecast of ``issue_date``, or the latest forecast file when ``issue_date`` is None.

    Returns
    -------
    list of Path, the PNG files written.

    Raises
    ------
    InputError
        when ``issue_date`` is given and its forecast file is missing, when a product is
        unreadable, or when there is nothing to draw.
    """
    folder = paths.figures(cfg)
    observed, names = _inputs(cfg)
    wanted = [str(b) for b in cfg.get("outputs", {}).get("figures", [])]
    written: list[Path] = []

    def basins_of(ds):
        ids = [str(b) for b in ds["basin"].values]
        return [b for b in ids if b in wanted] if wanted else ids

    runs = {}
    for exp, mode in (("openloop", "openloop"), ("assimilation", "assimilate")):
        p = paths.run_product(cfg, mode)
        if p.is_file():
            runs[exp] = open_product(p, ("basin", "time"), any_of=("discharge", "discharge_quantile"), load=True)
    try:
        if runs:
            first = next(iter(runs.values()))
            for b in basins_of(first):
                present = {e: ds for e, ds in runs.items() if b in ds["basin"].values}
                written.append(plot_hydrograph(present, observed, b, folder / figure_name("hydrograph", b),
                                               names=names))
    finally:
        for ds in runs.values():
            ds.close()

    s_path = paths.skill(cfg, "nc")
    if s_path.is_file():
        skill = read_skill(s_path)
        for b in basins_of(skill):
            written.append(plot_skill_by_lead(skill, b, folder / figure_name("skill", b), names=names))
            written.append(plot_spread_skill(skill, b, folder / figure_name("spread-skill", b), names=names))
            if "rank_histogram" in skill and skill.sizes.get("rank", 0) > 1:
                written.append(plot_rank_histograms(skill, b, folder / figure_name("rank-histogram", b),
                                                    names=names))
            if "threshold_value" in skill:
                for t in skill["threshold"].values:
                    if np.isfinite(float(skill["threshold_value"].sel(basin=b, threshold=t))):
                        written.append(plot_reliability(skill, b, str(t),
                                                        folder / figure_name("reliability", b, str(t)),
                                                        names=names))

    if issue_date is not None:
        f_path = paths.forecast(cfg, issue_date)
        if not f_path.is_file():
            raise InputError(f"no forecast for issue date {issue_date} (run `assim forecast`)", file=f_path)
    else:
        f_path = _latest_forecast(cfg)
    if f_path is not None:
        with open_product(f_path, ("exceedance_probability", "valid_time"),
                          any_of=("discharge", "discharge_quantile"), load=True) as fc:
            day = str(fc.attrs.get("issue_date", f_path.stem[len("forecast-"):]))[:10]
            history = int(cfg.get("forecast", {}).get("history_days", 30))
            for b in basins_of(fc):
                written.append(plot_plume(fc, observed, b, folder / figure_name("plume", b, day),
                                          history_days=history, names=names))
    if not written:
        raise InputError("nothing to draw: no run, skill or forecast product found "
                         "(run `assim run`, `assim verify` or `assim forecast` first)", file=paths.results(cfg))
    return written
