"""Internal consistency: variables of the same station that contradict each other.
"""

from __future__ import annotations

import numpy as np


def dew_point_not_above_temperature(dew_point: np.ndarray, temperature: np.ndarray, tolerance: float = 0.5) -> np.ndarray:
    """Internal consistency: dew point may not exceed air temperature (+ tolerance) [K]."""
    td, t = np.asarray(dew_point, float), np.asarray(temperature, float)
    return ~(np.isfinite(td) & np.isfinite(t) & (td > t + tolerance))


def gust_not_below_mean(gust: np.ndarray, speed: np.ndarray) -> np.ndarray:
    """Internal consistency: a gust may not be below the mean speed."""
    g, s = np.asarray(gust, float), np.asarray(speed, float)
    return ~(np.isfinite(g) & np.isfinite(s) & (g < s))


def direction_defined_when_moving(direction: np.ndarray, speed: np.ndarray, calm_speed: float) -> np.ndarray:
    """Internal consistency: with a speed of 0 there can be no direction."""
    d, s = np.asarray(direction, float), np.asarray(speed, float)
    return ~(np.isfinite(d) & np.isfinite(s) & (s == 0) & (d != 0))
