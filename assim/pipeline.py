"""Python entry points behind the CLI: files and arrays meet here.

Each function takes a validated :class:`assim.config.Config`, reads inputs through
:mod:`assim.io`, computes, writes through :mod:`assim.io`, and returns the Dataset it wrote
(with the written path in ``attrs["product_path"]``).
"""

from __future__ import annotations

from pathlib import Path

import xarray as xr

from assim.config import Config


def prep(cfg: Config) -> dict[str, xr.Dataset]:
    """Raw records -> prepared layer; returns {"forcing", "observations", "basins"} Datasets."""
    from assim import prep as _prep

    return _prep.prepare(cfg)


def check(cfg: Config) -> str:
    """Validate config and inputs; return a short summary for a person."""
    from assim import prep as _prep

    return _prep.check(cfg)


def verify(cfg: Config) -> xr.Dataset:
    """Skill of the runs and hindcasts in ``cfg['results']``; writes skill.nc and skill.csv."""
    from assim import verify as _verify

    return _verify.verify_results(cfg)


def plot(cfg: Config, issue_date: str | None = None) -> list[Path]:
    """Every figure of the results folder (PNG); returns the written paths."""
    from assim import plots

    return plots.plot_results(cfg, issue_date=issue_date)


def report(cfg: Config) -> Path:
    """The self-contained HTML report; returns its path."""
    from assim import report as _report

    return _report.write_report(cfg)
