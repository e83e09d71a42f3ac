"""Canonical variables, their units and the unit conversions applied at ingest.

After ingest every variable carries its CF standard name and the SI unit CF
gives it: air and dew-point temperature in K, wind speed in m s-1, wind
direction in degree (clockwise from true north, the direction the wind blows
*from*), relative humidity in %, pressure in Pa.  User scalars (for example
PM2.5) keep the unit the user declares.

Conversion factors are exact definitions:

- international knot = 1852 m / 3600 s (international nautical mile of 1852 m,
  BIPM SI Brochure, 9th ed., Table 8);
- international mile = 1609.344 m, so 1 mph = 0.44704 m s-1 (international
  yard and pound agreement, 1959);
- 1 km/h = 1/3.6 m s-1;
- degF: T[K] = (T[degF] + 459.67) * 5/9; degC: T[K] = T[degC] + 273.15
  (BIPM SI Brochure);
- inch of mercury (conventional, 0 degC) = 3386.389 Pa (NIST SP 811, B.8).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import ConfigError


@dataclass(frozen=True)
class Variable:
    """A canonical variable: name, SI unit and a short human label."""

    name: str
    unit: str
    long_name: str
    kind: str  # temperature, speed, direction, pressure, humidity, scalar


CANONICAL: dict[str, Variable] = {
    v.name: v
    for v in (
        Variable("air_temperature", "K", "air temperature", "temperature"),
        Variable("dew_point_temperature", "K", "dew point temperature", "temperature"),
        Variable("relative_humidity", "%", "relative humidity", "humidity"),
        Variable("air_pressure", "Pa", "air pressure at the station", "pressure"),
        Variable("wind_speed", "m s-1", "wind speed", "speed"),
        Variable("wind_from_direction", "degree", "direction the wind blows from", "direction"),
        Variable("wind_speed_of_gust", "m s-1", "wind gust speed", "speed"),
    )
}

#: what a variable is, for the defaults that depend on it (QC tests, error model, cautions); canonical
#: variables have theirs, a user scalar takes ``observations.kinds`` (see :func:`kind_of`)
KINDS = ("temperature", "concentration", "humidity", "pressure", "speed", "direction", "other")
#: undeclared user scalars whose names start with one of these are concentrations (particulate matter)
CONCENTRATION_PREFIXES = ("pm", "mass_concentration")


def kind_of(name: str, declared: dict[str, str] | None = None) -> str:
    """The kind of variable ``name``: ``declared`` (``observations.kinds``) first, then the canonical
    variable's own, then a concentration for names like ``pm2_5`` or ``mass_concentration_of_...``,
    else "other"."""
    if declared and name in declared:
        return declared[name]
    if name in CANONICAL:
        return CANONICAL[name].kind
    if name == "potential_temperature":
        return "temperature"
    if any(name.lower().startswith(p) for p in CONCENTRATION_PREFIXES):
        return "concentration"
    return "other"


#: columns that are not variables
ID_COLUMNS = ("station_id", "time")
STATION_COLUMNS = ("station_id", "latitude", "longitude", "elevation", "sensor_height")

#: accepted source units per kind -> (scale, offset) so that si = raw * scale + offset
_TEMPERATURE = {
    "K": (1.0, 0.0),
    "kelvin": (1.0, 0.0),
    "degC": (1.0, 273.15),
    "C": (1.0, 273.15),
    "celsius": (1.0, 273.15),
    "degF": (5.0 / 9.0, 459.67 * 5.0 / 9.0),
    "F": (5.0 / 9.0, 459.67 * 5.0 / 9.0),
    "fahrenheit": (5.0 / 9.0, 459.67 * 5.0 / 9.0),
}
_SPEED = {
    "m/s": (1.0, 0.0),
    "m s-1": (1.0, 0.0),
    "knot": (1852.0 / 3600.0, 0.0),
    "kt": (1852.0 / 3600.0, 0.0),
    "mph": (1609.344 / 3600.0, 0.0),
    "km/h": (1.0 / 3.6, 0.0),
    "kmh": (1.0 / 3.6, 0.0),
}
_PRESSURE = {
    "Pa": (1.0, 0.0),
    "hPa": (100.0, 0.0),
    "mbar": (100.0, 0.0),
    "mb": (100.0, 0.0),
    "kPa": (1000.0, 0.0),
    "inHg": (3386.389, 0.0),
}
_HUMIDITY = {"%": (1.0, 0.0), "percent": (1.0, 0.0), "1": (100.0, 0.0), "fraction": (100.0, 0.0)}
_DIRECTION = {"degree": (1.0, 0.0), "degrees": (1.0, 0.0), "deg": (1.0, 0.0), "compass": (1.0, 0.0)}

UNITS_BY_KIND: dict[str, dict[str, tuple[float, float]]] = {
    "temperature": _TEMPERATURE,
    "speed": _SPEED,
    "pressure": _PRESSURE,
    "humidity": _HUMIDITY,
    "direction": _DIRECTION,
}

#: 16-point compass names -> degrees clockwise from north (north coded 360)
COMPASS_POINTS: dict[str, float] = {
    name: (22.5 * i) or 360.0
    for i, name in enumerate(
        "N NNE NE ENE E ESE SE SSE S SSW SW WSW W WNW NW NNW".split()
    )
}
#: strings that mean "calm" in a direction column
CALM_CODES = frozenset({"C", "CALM", "CLM", "00"})
#: strings that mean "variable direction"
VARIABLE_CODES = frozenset({"VRB", "VAR", "V"})


def is_canonical(name: str) -> bool:
    """Return True if ``name`` is one of the canonical variable names."""
    return name in CANONICAL


def si_unit(name: str, declared: str | None = None) -> str:
    """Unit of ``name`` after ingest: the SI unit, or a scalar's declared unit."""
    if name in CANONICAL:
        return CANONICAL[name].unit
    return declared or "1"


def unit_factors(name: str, unit: str | None) -> tuple[float, float]:
    """Return (scale, offset) converting ``unit`` to the SI unit of ``name``.

    User scalars are not converted: (1, 0).  Raises :class:`ConfigError`
    naming the accepted units when ``unit`` is unknown.
    """
    if name not in CANONICAL:
        return 1.0, 0.0
    kind = CANONICAL[name].kind
    table = UNITS_BY_KIND[kind]
    if unit is None:
        return 1.0, 0.0
    key = unit.strip()
    aliases = {"°C": "degC", "deg C": "degC", "°F": "degF", "deg F": "degF", "ms-1": "m/s",
               "m s^-1": "m/s", "knots": "knot", "kts": "knot", "km h-1": "km/h", "kph": "km/h",
               "in Hg": "inHg", "inhg": "inHg", "hpa": "hPa", "kpa": "kPa", "pa": "Pa"}
    key = aliases.get(key, key)
    if key not in table:
        raise ConfigError(
            f"unknown unit {unit!r} for {name}; accepted units: {', '.join(sorted(table))}"
        )
    return table[key]


def convert(values: np.ndarray, name: str, unit: str | None) -> np.ndarray:
    """Convert ``values`` from ``unit`` to the SI unit of ``name`` [SI]."""
    scale, offset = unit_factors(name, unit)
    if scale == 1.0 and offset == 0.0:
        return np.asarray(values, dtype=float)
    return np.asarray(values, dtype=float) * scale + offset


def compass_to_degrees(text: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Parse compass names (N ... NNW), calm and variable codes, or numbers.

    Returns ``(degrees, calm, bad)``: direction in degrees (NaN for calm,
    variable or unparseable entries), a mask of calm codes and a mask of
    entries that could not be read.
    """
    import pandas as pd

    s = pd.Series(np.asarray(text, dtype=object)).astype("string").str.strip().str.upper()
    deg = s.map(COMPASS_POINTS).astype(float)
    calm = s.isin(CALM_CODES).fillna(False).to_numpy(bool)
    variable = s.isin(VARIABLE_CODES).fillna(False).to_numpy(bool)
    numeric = pd.to_numeric(s.where(deg.isna() & ~calm & ~variable), errors="coerce")
    out = deg.to_numpy(float).copy()
    use_num = np.isnan(out) & numeric.notna().to_numpy()
    out[use_num] = numeric.to_numpy(float)[use_num]
    present = s.notna().to_numpy() & (s.fillna("") != "").to_numpy()
    bad = present & np.isnan(out) & ~calm & ~variable
    return out, calm, bad


def wind_components(speed: np.ndarray, direction_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Eastward and northward wind [m s-1] from speed [m s-1] and direction [degree].

    Meteorological convention (WMO-No. 8, Part I, ch. 5): the direction is
    where the wind blows *from*, clockwise from true north, so
    ``u = -s sin(dir)`` and ``v = -s cos(dir)``.
    """
    rad = np.deg2rad(direction_deg)
    return -speed * np.sin(rad), -speed * np.cos(rad)


def wrap_degrees(a: np.ndarray) -> np.ndarray:
    """``a % 360`` for angles in (-360, 720) [degree], bit for bit, in two comparisons.

    numpy's float remainder is a division per element; in that range it
    reduces to adding or subtracting 360 once (exact above 360, and rounded
    the same way below 0).
    """
    a = np.asarray(a, float)
    return np.where(a < 0.0, a + 360.0, np.where(a >= 360.0, a - 360.0, a + 0.0))  # + 0.0: -0.0 -> 0.0, as %


def wind_direction(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Direction the wind blows from [degree, (0, 360]]; north is 360, calm NaN."""
    d = np.rad2deg(np.arctan2(-np.asarray(u, float), -np.asarray(v, float)))  # in [-180, 180]
    d = np.where(d <= 0.0, d + 360.0, d)  # = (d % 360, with 0 as 360) in one pass for that range
    return np.where(np.hypot(u, v) == 0.0, np.nan, d)
