"""Potential evaporation from daily air temperature, vectorised over basins and days.

- :func:`extraterrestrial_radiation`: FAO-56 (Allen et al. 1998, Irrigation and Drainage
  Paper 56), eqs. 21-25.
- :func:`oudin`: Oudin et al. (2005, J. Hydrol. 303, 290-306), the temperature-based
  formula selected for rainfall-runoff modelling.
- :func:`hargreaves`: Hargreaves-Samani, FAO-56 eq. 52.

numpy only; every argument broadcasts (e.g. latitude (basin, 1) against day of year (time,)).
"""

from __future__ import annotations

import numpy as np

SOLAR_CONSTANT = 0.0820  # MJ m-2 min-1, FAO-56 eq. 21
LATENT_HEAT = 2.45  # MJ kg-1, Oudin et al. (2005)
WATER_DENSITY = 1000.0  # kg m-3
MJ_TO_MM = 0.408  # mm d-1 per MJ m-2 d-1 (1 / 2.45), FAO-56 eq. 20


def day_of_year(dates) -> np.ndarray:
    """Day of the year J (1 on 1 January, up to 366), as FAO-56 uses it.

    Parameters
    ----------
    dates : array_like of numpy datetime64 (any resolution)

    Returns
    -------
    ndarray int64, same shape
    """
    d = np.asarray(dates).astype("datetime64[D]")
    return (d - d.astype("datetime64[Y]")).astype(np.int64) + 1


def extraterrestrial_radiation(latitude_deg, doy) -> np.ndarray:
    """Daily extraterrestrial radiation Ra.

    Parameters
    ----------
    latitude_deg : array_like float64, degrees north (negative south)
    doy : array_like int, day of the year 1..366, broadcastable against latitude

    Returns
    -------
    ndarray float64, MJ m-2 d-1

    Notes
    -----
    Beyond the polar circles ``-tan(phi) tan(delta)`` leaves [-1, 1]; it is clipped, which
    gives the polar night (Ra = 0) and the polar day (sun up for 24 h).
    """
    phi = np.pi / 180.0 * np.asarray(latitude_deg, dtype=float)  # FAO-56 eq. 22
    j = np.asarray(doy, dtype=float)
    dr = 1.0 + 0.033 * np.cos(2.0 * np.pi / 365.0 * j)  # FAO-56 eq. 23
    delta = 0.409 * np.sin(2.0 * np.pi / 365.0 * j - 1.39)  # FAO-56 eq. 24
    ws = np.arccos(np.clip(-np.tan(phi) * np.tan(delta), -1.0, 1.0))  # FAO-56 eq. 25
    ra = (24.0 * 60.0 / np.pi) * SOLAR_CONSTANT * dr * (
        ws * np.sin(phi) * np.sin(delta) + np.cos(phi) * np.cos(delta) * np.sin(ws)
    )  # FAO-56 eq. 21
    return np.maximum(ra, 0.0)


def oudin(radiation, tmean_c) -> np.ndarray:
    """Potential evaporation of Oudin et al. (2005).

    Parameters
    ----------
    radiation : array_like float64, MJ m-2 d-1 (extraterrestrial radiation)
    tmean_c : array_like float64, degC (daily mean air temperature)

    Returns
    -------
    ndarray float64, mm d-1; zero where ``tmean_c + 5 <= 0``.
    """
    re_ = np.asarray(radiation, dtype=float)
    t5 = np.asarray(tmean_c, dtype=float) + 5.0
    pe = re_ / (LATENT_HEAT * WATER_DENSITY) * t5 / 100.0  # Oudin et al. (2005), eq. 3 (m d-1)
    return np.where(t5 > 0.0, pe * 1000.0, 0.0)


def hargreaves(radiation, tmin_c, tmax_c) -> np.ndarray:
    """Reference evapotranspiration of Hargreaves and Samani (FAO-56 eq. 52).

    Parameters
    ----------
    radiation : array_like float64, MJ m-2 d-1 (extraterrestrial radiation)
    tmin_c, tmax_c : array_like float64, degC (daily minimum and maximum)

    Returns
    -------
    ndarray float64, mm d-1; negative values (mean below -17.8 degC) are set to zero.
    """
    tmin = np.asarray(tmin_c, dtype=float)
    tmax = np.asarray(tmax_c, dtype=float)
    tmean = 0.5 * (tmin + tmax)
    ra_mm = MJ_TO_MM * np.asarray(radiation, dtype=float)
    et0 = 0.0023 * (tmean + 17.8) * np.sqrt(np.maximum(tmax - tmin, 0.0)) * ra_mm  # FAO-56 eq. 52
    return np.maximum(et0, 0.0)
