"""Health of an assimilation run: warnings about ensemble collapse and frequent gating.

The engine returns them as :class:`~assim.engine.records.HealthWarning` records in its
:class:`~assim.engine.records.RunSummary`; it never emits a warning itself.
"""

from __future__ import annotations

from collections.abc import Sequence

from assim.conventions import iso
from assim.engine.records import HealthWarning, Settings

# code -> what the line counting the basins left out says they have
KINDS = {"ensemble_collapse": "ensemble collapse", "frequent_gating": "gated readings"}


def health_warnings(basin_ids, n_used, n_gated, first_collapse, settings: Settings) -> list[HealthWarning]:
    """Warnings about ensemble collapse and frequent gating, at most one of each per basin.

    Parameters
    ----------
    n_used, n_gated : (basin,) int, readings used and gated over the run
    first_collapse : (basin,) int, the day number the collapse limit was reached, -1 none
    """
    out = []
    if not settings.assimilate:
        return out
    for i, b in enumerate(basin_ids):
        if first_collapse[i] >= 0:
            out.append(HealthWarning(
                "ensemble_collapse", str(b),
                f"ensemble collapse: the spread of predicted discharge stayed below {settings.collapse_ratio} x "
                f"the observation error sd for {settings.collapse_days} days with readings (reached on {iso(first_collapse[i])}); "
                "consider inflation or larger perturbations"))
        n = n_used[i] + n_gated[i]
        if n and n_gated[i] / n > settings.gating_warn_fraction:
            out.append(HealthWarning(
                "frequent_gating", str(b),
                f"{n_gated[i]} of {n} readings ({n_gated[i] / n:.0%}) were gated; the ensemble may be biased or "
                "its spread too small"))
    return out


def summarise_warnings(warns: Sequence[HealthWarning], most: int = 5) -> list[str]:
    """The lines to show: at most ``most`` per kind of warning; the rest are counted."""
    out = []
    for code, kind in KINDS.items():
        lines = [str(w) for w in warns if w.code == code]
        out += lines[:most]
        if len(lines) > most:
            out.append(f"... and {len(lines) - most} more basins with {kind}")
    return out
