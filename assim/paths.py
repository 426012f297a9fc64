"""Where every product lives, given a config: one place, so that writers, readers, the
workflow and the report agree.

All paths are relative to the working directory unless the config gives absolute ones.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path


def prepared(cfg: Mapping, name: str) -> Path:
    """``forcing.nc``, ``observations.nc`` or ``basins.nc`` of the prepared layer."""
    return Path(cfg["data"]["prepared"]) / name


def results(cfg: Mapping) -> Path:
    return Path(cfg["results"])


_PRODUCTS = {"openloop": "openloop.nc", "assimilate": "analysis.nc", "reanalysis": "reanalysis.nc"}


def run_product(cfg: Mapping, mode: str) -> Path:
    """``openloop.nc`` (mode "openloop"), ``analysis.nc`` ("assimilate") or
    ``reanalysis.nc`` ("reanalysis")."""
    return results(cfg) / _PRODUCTS.get(mode, "analysis.nc")


def restart(cfg: Mapping, mode: str = "assimilate") -> Path:
    """The restart written at the end of a run (``restart.nc``; ``restart-openloop.nc``,
    ``restart-reanalysis.nc``)."""
    return results(cfg) / ("restart.nc" if mode == "assimilate" else f"restart-{mode}.nc")


def calibration(cfg: Mapping) -> Path:
    """``calibration.nc``, written by ``assim calibrate``."""
    return results(cfg) / "calibration.nc"


def hindcast(cfg: Mapping) -> Path:
    return results(cfg) / "hindcast.nc"


def forecasts(cfg: Mapping) -> Path:
    """Folder of the operational forecasts and their restarts."""
    return results(cfg) / "forecasts"


def forecast(cfg: Mapping, issue_date: str) -> Path:
    return forecasts(cfg) / f"forecast-{issue_date}.nc"


def forecast_restart(cfg: Mapping, issue_date: str) -> Path:
    return forecasts(cfg) / f"restart-{issue_date}.nc"


def bulletin(cfg: Mapping, issue_date: str) -> Path:
    """The bulletin page of one issue; its PNGs are in :func:`bulletin_figures`."""
    return forecasts(cfg) / f"bulletin-{issue_date}.html"


def bulletin_figures(cfg: Mapping, issue_date: str) -> Path:
    return forecasts(cfg) / f"bulletin-{issue_date}"


def alerts(cfg: Mapping, issue_date: str, suffix: str = "json") -> Path:
    """The raised alerts of one issue (``json`` or ``csv``)."""
    return forecasts(cfg) / f"alerts-{issue_date}.{suffix}"


def skill(cfg: Mapping, suffix: str = "nc") -> Path:
    return results(cfg) / f"skill.{suffix}"


def figures(cfg: Mapping) -> Path:
    return results(cfg) / "figures"


def report(cfg: Mapping) -> Path:
    return results(cfg) / "report.html"


def logs(cfg: Mapping) -> Path:
    return results(cfg) / "logs"
