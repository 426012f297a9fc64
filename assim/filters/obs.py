"""Observation errors and the space in which observations are assimilated.

- :func:`obs_variance`: the error variance of each reading, absolute or relative to the
  observed value with a floor.
- :class:`Transform`: assimilation in a transformed space (none, log with offset, Box-Cox
  with exponent and offset), applied to observed and predicted values alike;
  :meth:`Transform.variance` carries an observation error variance into that space.

References
----------
Box, G. E. P. & Cox, D. R. (1964). An analysis of transformations. J. R. Stat. Soc. B 26,
    211-252.

This module imports numpy only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from assim.errors import ConfigError

__all__ = ["KINDS", "TRANSFORMS", "Transform", "obs_variance"]

KINDS = ("absolute", "relative")
TRANSFORMS = ("none", "log", "boxcox")


def obs_variance(observed, kind="absolute", *, sd=None, relative=None, floor=0.0) -> np.ndarray:
    """Observation error variance of each reading.

    Parameters
    ----------
    observed : (..., n_obs) float64
        Observed values in observation units (e.g. m3 s-1); NaN = missing.
    kind : {"absolute", "relative"}
        ``absolute``: the standard deviation is ``sd``. ``relative``: it is
        ``relative * |observed|``, never less than ``floor``.
    sd : float or array broadcastable to ``observed``
        Standard deviation for ``kind="absolute"``, observation units.
    relative : float or array broadcastable to ``observed``
        Fraction of the observed value for ``kind="relative"``.
    floor : float or array broadcastable to ``observed``
        Smallest standard deviation (relative errors only), observation units.

    Returns
    -------
    (..., n_obs) float64
        Variance in squared observation units; NaN where ``observed`` is NaN.

    Raises
    ------
    ConfigError
        Unknown ``kind``, a missing or non-positive ``sd``/``relative``, a negative ``floor``.
    """
    observed = np.asarray(observed, dtype=np.float64)
    if kind == "absolute":
        if sd is None or np.any(np.asarray(sd) <= 0) or not np.all(np.isfinite(sd)):
            raise ConfigError(f"absolute errors need a finite sd > 0, got {sd!r}", variable="sd")
        std = np.broadcast_to(np.asarray(sd, dtype=np.float64), observed.shape)
    elif kind == "relative":
        if relative is None or np.any(np.asarray(relative) <= 0):
            raise ConfigError(
                f"relative errors need a fraction > 0, got {relative!r}", variable="relative"
            )
        if np.any(np.asarray(floor) < 0):
            raise ConfigError(f"floor must be >= 0, got {floor!r}", variable="floor")
        std = np.maximum(relative * np.abs(observed), floor)
    else:
        raise ConfigError(f"kind must be one of {KINDS}, got {kind!r}", variable="kind")
    return np.where(np.isnan(observed), np.nan, std * std)


@dataclass(frozen=True)
class Transform:
    """The space in which observations are assimilated.

    ``T(q) = q`` (``none``), ``log(q + offset)`` (``log``) or
    ``((q + offset)**lam - 1) / lam`` (``boxcox``; Box & Cox 1964, with ``lam = 0`` the log).
    Values with ``q + offset <= 0`` have no image and map to NaN, which the filter treats as
    an unusable prediction or reading.

    Parameters
    ----------
    kind : {"none", "log", "boxcox"}
    offset : float, >= 0
        Added before the transform, observation units (m3 s-1 for discharge).
    lam : float
        Box-Cox exponent (ignored for the other kinds).
    """

    kind: str = "none"
    offset: float = 0.0
    lam: float = 1.0

    def __post_init__(self):
        if self.kind not in TRANSFORMS:
            raise ConfigError(
                f"transform must be one of {TRANSFORMS}, got {self.kind!r}",
                variable="transform.kind",
            )
        if not (np.isfinite(self.offset) and self.offset >= 0):
            raise ConfigError(
                f"offset must be a finite number >= 0, got {self.offset!r}",
                variable="transform.offset",
            )
        if not np.isfinite(self.lam):
            raise ConfigError(
                f"lambda must be finite, got {self.lam!r}", variable="transform.lambda"
            )

    @property
    def _is_log(self) -> bool:
        return self.kind == "log" or (self.kind == "boxcox" and self.lam == 0.0)

    def forward(self, q) -> np.ndarray:
        """``T(q)``, same shape as ``q``; NaN where ``q + offset <= 0``."""
        q = np.asarray(q, dtype=np.float64)
        if self.kind == "none":
            return q.copy()
        shifted = q + self.offset
        positive = shifted > 0
        base = np.where(positive, shifted, 1.0)
        if self._is_log:
            out = np.log(base)
        else:
            out = np.expm1(self.lam * np.log(base)) / self.lam  # Box & Cox (1964), eq. 1
        return np.where(positive, out, np.nan)

    def inverse(self, z) -> np.ndarray:
        """``T^-1(z)``, same shape as ``z``; NaN where ``z`` is outside the image of ``T``."""
        z = np.asarray(z, dtype=np.float64)
        if self.kind == "none":
            return z.copy()
        if self._is_log:
            return np.exp(z) - self.offset
        base = 1.0 + self.lam * z
        inside = base > 0
        out = np.exp(np.log(np.where(inside, base, 1.0)) / self.lam) - self.offset
        return np.where(inside, out, np.nan)

    def derivative(self, q) -> np.ndarray:
        """``dT/dq`` at ``q``; NaN where ``q + offset <= 0``."""
        q = np.asarray(q, dtype=np.float64)
        if self.kind == "none":
            return np.ones_like(q)
        shifted = q + self.offset
        positive = shifted > 0
        base = np.where(positive, shifted, 1.0)
        lam = 0.0 if self._is_log else self.lam
        return np.where(positive, base ** (lam - 1.0), np.nan)

    def variance(self, observed, variance) -> np.ndarray:
        """Carry an observation error variance into the transformed space.

        First-order (delta method) propagation at the observed value,
        ``var_T = (dT/dq)^2 var`` (common practice, no published source).

        Parameters
        ----------
        observed : (..., n_obs) float64, observation units
        variance : (..., n_obs) float64, squared observation units

        Returns
        -------
        (..., n_obs) float64, squared transformed units
        """
        slope = self.derivative(observed)
        return slope * slope * np.asarray(variance, dtype=np.float64)
