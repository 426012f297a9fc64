"""Health of an assimilation run: warnings about ensemble collapse and frequent gating."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from assim.engine.records import Settings


def health_warnings(basin_ids, n_used, n_gated, first_collapse, settings: Settings) -> list[str]:
    """Warnings about ensemble collapse and frequent gating, one line per basin."""
    out = []
    if not settings.assimilate:
        return out
    for i, b in enumerate(basin_ids):
        if first_collapse[i] >= 0:
            day = np.datetime64("1970-01-01", "D") + int(first_collapse[i])
            out.append(f"basin {b}: ensemble collapse: the spread of predicted discharge stayed below "
                       f"{settings.collapse_ratio} x the observation error sd for {settings.collapse_days} "
                       f"days with readings (reached on {day}); consider inflation or larger perturbations")
        n = n_used[i] + n_gated[i]
        if n and n_gated[i] / n > settings.gating_warn_fraction:
            out.append(f"basin {b}: {n_gated[i]} of {n} readings ({n_gated[i] / n:.0%}) were gated; the "
                       "ensemble may be biased or its spread too small")
    return out


def summarise_warnings(warns: Sequence[str], most: int = 5) -> list[str]:
    """At most ``most`` lines per kind of warning; the rest are counted."""
    out = []
    for kind in ("ensemble collapse", "were gated"):
        lines = [w for w in warns if kind in w]
        out += lines[:most]
        if len(lines) > most:
            out.append(f"... and {len(lines) - most} more basins with {kind.removeprefix('were ')} readings"
                       if kind == "were gated" else f"... and {len(lines) - most} more basins with {kind}")
    return out
