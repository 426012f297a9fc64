"""What a block writes, once its members are joined: member means and quantiles."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from assim.engine.records import Settings
from assim.members import member_quantiles


def reduce_members(arrays: dict[str, np.ndarray], settings: Settings) -> dict[str, np.ndarray]:
    """What a block's member arrays become in the output: the member mean of the state-noise
    water, and quantiles instead of members when ``settings.quantiles`` is set. Applied to
    whole-member arrays only (in the lane when a chunk holds every member, else after the
    member chunks are joined); rows are made contiguous first, so both places give the same
    bits."""
    arrays = dict(arrays)
    if "state_noise_water" in arrays:
        arrays["state_noise_water"] = np.ascontiguousarray(arrays["state_noise_water"]).mean(axis=2)
    if settings.quantiles is not None and arrays:
        arrays = quantile_arrays({k: np.ascontiguousarray(v) for k, v in arrays.items()}, settings.quantiles)
    return arrays


def quantile_arrays(arrays: dict[str, np.ndarray], quantiles: Sequence[float]) -> dict[str, np.ndarray]:
    """Replace member arrays (basin, time, member) by discharge quantiles (basin, time, quantile)."""
    out = {k: v for k, v in arrays.items() if v.ndim == 2}
    for name in ("discharge", "discharge_analysis"):
        if name in arrays:
            out[name + "_quantile"] = member_quantiles(arrays[name], quantiles).astype(arrays[name].dtype)
    return out
