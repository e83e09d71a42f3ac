"""Thermodynamic helpers: potential temperature and standard-atmosphere pressure.

Constants (ICAO Doc 7488 / ISO 2533 / US Standard Atmosphere 1976):
R* = 8.31432 J mol-1 K-1, M = 0.0289644 kg mol-1, g0 = 9.80665 m s-2,
T0 = 288.15 K, p0 = 101325 Pa, lapse rate 6.5 K km-1 below 11 km.
"""

from __future__ import annotations

import numpy as np

R_STAR = 8.31432  # J mol-1 K-1 (US Standard Atmosphere 1976)
M_AIR = 0.0289644  # kg mol-1 (US Standard Atmosphere 1976)
G0 = 9.80665  # m s-2 (standard gravity)
R_D = R_STAR / M_AIR  # 287.05 J kg-1 K-1
CP_D = 1004.6  # J kg-1 K-1, specific heat of dry air at constant pressure (from memory, 1004-1005)
KAPPA = R_D / CP_D  # 0.2857 (2/7 for an ideal diatomic gas)
P_REF = 100000.0  # Pa, reference pressure of potential temperature
T0_STD = 288.15  # K
P0_STD = 101325.0  # Pa
LAPSE_STD = 0.0065  # K m-1


def potential_temperature(temperature: np.ndarray, pressure: np.ndarray) -> np.ndarray:
    """Potential temperature [K] from temperature [K] and pressure [Pa].

    Poisson's equation ``theta = T (p0 / p) ** kappa`` with p0 = 1000 hPa and
    kappa = R_d / c_p (e.g. Wallace and Hobbs 2006, eq. 3.54).
    """
    return np.asarray(temperature, float) * (P_REF / np.asarray(pressure, float)) ** KAPPA


def standard_pressure(elevation: np.ndarray) -> np.ndarray:
    """Pressure [Pa] of the ICAO standard atmosphere at ``elevation`` [m], below 11 km.

    ``p = p0 (1 - L z / T0) ** (g0 M / (R* L))`` (ICAO Doc 7488; ISO 2533).
    """
    z = np.asarray(elevation, float)
    return P0_STD * (1.0 - LAPSE_STD * z / T0_STD) ** (G0 * M_AIR / (R_STAR * LAPSE_STD))


def hypsometric_thickness(p_lower: float, p_upper: float, mean_virtual_temperature: float) -> float:
    """Thickness [m] between two pressure levels, ``(R_d Tv / g0) ln(p1/p2)`` (hypsometric equation)."""
    return R_D * mean_virtual_temperature / G0 * float(np.log(p_lower / p_upper))
