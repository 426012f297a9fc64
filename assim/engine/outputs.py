"""What a block writes, once its members are joined: member means and quantiles."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from assim.engine.records import Settings


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


def member_quantiles(values: np.ndarray, quantiles: Sequence[float]) -> np.ndarray:
    """Quantiles over the last (member) axis, linear between order statistics: the sample
    quantile of Hyndman & Fan (1996) definition 7, numpy's default. One sort of each row,
    then the interpolation at fixed positions (numpy.quantile's partitioning is six times
    slower on (basin, day, 128) blocks).

    values : (..., member) float; quantiles : (q,) in [0, 1] -> (..., q)
    """
    s = np.sort(values, axis=-1)
    n = s.shape[-1]
    position = (n - 1) * np.asarray(quantiles, dtype=np.float64)  # Hyndman & Fan (1996), definition 7
    lo = np.floor(position).astype(np.intp)
    hi = np.minimum(lo + 1, n - 1)
    below, above = s[..., lo], s[..., hi]
    return below + (above - below) * (position - lo)
