"""Default thresholds of every test, each with its source, and the thresholds in force for a run.
"""

from __future__ import annotations

from ..config import Config

C0 = 273.15
#: plausible ranges [SI units]
DEFAULT_RANGE: dict[str, tuple[float, float, str]] = {
    "air_temperature": (C0 - 80, C0 + 60, "WMO AWS guidelines, Zahumensky 2004: -80..+60 degC (from memory)"),
    "dew_point_temperature": (C0 - 80, C0 + 35, "-80..+35 degC (from memory)"),
    "relative_humidity": (0.0, 103.0, "0-100 % plus sensor tolerance to 103 %, Shafer et al. 2000 (from memory)"),
    "air_pressure": (50000.0, 110000.0, "500-1100 hPa (from memory)"),
    "wind_speed": (0.0, 75.0, "0-75 m/s for a 2- or 10-min mean (from memory)"),
    "wind_speed_of_gust": (0.0, 150.0, "0-150 m/s (from memory)"),
    "wind_from_direction": (0.0, 360.0, "0-360 degree, EPA-454/R-99-005"),
}
#: largest plausible change over an interval [(minutes, limit in SI units)]
DEFAULT_STEP: dict[str, tuple[list[tuple[float, float]], str]] = {
    "air_temperature": ([(1, 3.0), (60, 4.0), (120, 7.0), (180, 9.0), (360, 15.0), (720, 25.0)],
                        "3 K per minute (from memory); 4/7/9/15/25 K over 1/2/3/6/12 h, WMO-No. 305 GDPS Guide (1993)"),
    "dew_point_temperature": ([(1, 2.0), (60, 4.0), (120, 6.0), (180, 8.0), (360, 12.0), (720, 20.0)],
                              "2 K per minute (from memory); 4/6/8/12/20 K over 1/2/3/6/12 h, WMO-No. 305"),
    "air_pressure": ([(1, 50.0), (60, 300.0), (120, 600.0), (180, 900.0), (360, 1800.0), (720, 3600.0)],
                     "0.5 hPa per minute (from memory); 3/6/9/18/36 hPa over 1/2/3/6/12 h, WMO-No. 305"),
    "relative_humidity": ([(1, 10.0), (60, 30.0)], "10 % per minute (from memory); 30 % per hour (common practice)"),
    "wind_speed": ([(1, 20.0), (60, 20.0)], "20 m/s between successive values (from memory)"),
}
#: (minimum range, window minutes): less variation over the window is suspect
DEFAULT_PERSISTENCE: dict[str, tuple[float, float, str]] = {
    "air_temperature": (0.1, 60.0, "< 0.1 K variation in 60 min (from memory)"),
    "dew_point_temperature": (0.1, 60.0, "< 0.1 K variation in 60 min (common practice)"),
    "relative_humidity": (1.0, 60.0, "< 1 % in 60 min (from memory); readings at 99-100 % are exempt (fog, dew)"),
    "air_pressure": (10.0, 60.0, "< 0.1 hPa in 60 min (from memory)"),
    "wind_speed": (0.1, 180.0, "< 0.1 m/s for 3 h, EPA-454/R-99-005; calm values are exempt"),
    "wind_from_direction": (1.0, 180.0, "< 1 degree for more than 3 h, EPA-454/R-99-005; calm is exempt"),
}
#: smallest spatial residual that can be flagged [SI units]
DEFAULT_SPATIAL_FLOOR = {"air_temperature": 1.5, "dew_point_temperature": 2.0}
SPATIAL_VARIABLES = ("air_temperature", "dew_point_temperature")


def thresholds(config: Config) -> dict[str, dict]:
    """The thresholds in force: defaults merged with the configuration."""
    qc = config["qc"]
    rng = {k: (lo, hi) for k, (lo, hi, _) in DEFAULT_RANGE.items()}
    rng.update({k: tuple(v) for k, v in qc["range"].items()})
    step = {k: t for k, (t, _) in DEFAULT_STEP.items()}
    step.update({k: [tuple(p) for p in v] for k, v in qc["step"].items()})
    pers = {k: (a, b) for k, (a, b, _) in DEFAULT_PERSISTENCE.items()}
    pers.update({k: tuple(v) for k, v in qc["persistence"].items()})
    floor = dict(DEFAULT_SPATIAL_FLOOR)
    floor.update(qc["spatial_floor"])
    return {"range": rng, "step": step, "persistence": pers, "spatial_floor": floor}


#: the persistence rule of a concentration without its own: any change at all within 60 min (common practice)
CONCENTRATION_PERSISTENCE = (1e-9, 60.0)


def persistence_rule(name: str, config: Config, th: dict | None = None) -> tuple[float, float] | None:
    """(minimum range, window minutes) of the persistence test of ``name``, or None when it is not tested
    (``th``: :func:`thresholds` of ``config``, when already at hand)."""
    table = (th or thresholds(config))["persistence"]
    if name in table:
        return table[name]
    return CONCENTRATION_PERSISTENCE if is_concentration(name, config) else None


def is_concentration(name: str, config: Config) -> bool:
    """True for a concentration (``observations.kinds``, see :func:`stationflow.variables.kind_of`): tested as
    non-negative, for persistence, and by the spatial test on ln(C)."""
    from ..variables import kind_of

    return kind_of(name, config["observations"]["kinds"]) == "concentration"
