"""TOML configuration: every key, its default, and validation.

A configuration is one TOML file; every key is optional.  :data:`SCHEMA`
lists each key with its default, the accepted type and a one-line
explanation; ``docs/configuration.md`` documents the same keys and a test
checks that the two agree.  Thresholds that come from a published source say
so in their description; the rest are marked "common practice".
"""

from __future__ import annotations

import copy
import json
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import ConfigError


@dataclass(frozen=True)
class Key:
    """One configuration key: default, accepted Python types, description."""

    default: Any
    types: tuple[type, ...]
    doc: str
    choices: tuple[str, ...] = ()
    unset: str = "per variable"  # how the documentation shows a default of None (chosen at run time)


# Per-variable QC defaults live in qc.py (DEFAULT_RANGE, ...) and are merged
# with the user's per-variable tables; here they are free-form tables.
FREE_TABLES = {
    "stations.columns",
    "observations.columns",
    "observations.units",
    "observations.kinds",
    "uncertainty.sensor",
    "uncertainty.offset",
    "qc.range",
    "qc.step",
    "qc.persistence",
    "follow.critical",
}

SCHEMA: dict[str, dict[str, Key]] = {
    "stations": {
        "delimiter": Key(",", (str,), "field separator of the stations CSV"),
        "skip_lines": Key([], (list,), "1-based line numbers to skip (for example a units row)"),
        "encoding": Key("utf-8", (str,), "text encoding of the file"),
        "columns": Key({}, (dict,), "source column -> canonical column (station_id, latitude, longitude, elevation, sensor_height)"),
    },
    "observations": {
        "format": Key("auto", (str,), "input format; auto picks by file ending (.csv, .parquet, .nc/.cdf, or a folder)",
                      ("auto", "csv", "parquet", "netcdf")),
        "layout": Key("long", (str,), "long: one row per station and time; wide: one column per station",
                      ("long", "wide")),
        "wide_variable": Key("air_temperature", (str,), "with layout = 'wide': the variable the station columns hold"),
        "delimiter": Key(",", (str,), "field separator; ';' for many European exports"),
        "skip_lines": Key([], (list,), "1-based line numbers to skip (for example a units row)"),
        "encoding": Key("utf-8", (str,), "text encoding of the file"),
        "timezone": Key("UTC", (str,), "IANA name or fixed offset like '+08:00'; applied to naive timestamps"),
        "display_timezone": Key("", (str,), "the zone every time on the report and the console is shown in, with UTC "
                                            "beside it (default: observations.timezone)"),
        "time_format": Key("", (str,), "strftime format of the time column, e.g. '%d/%m/%Y %H:%M' (default: ISO 8601)"),
        "time_columns": Key([], (list,), "instead of one time column: columns assembled in this order (year, month, day, hour[, minute[, second]])"),
        "missing_values": Key([], (list,), "strings that mean 'no value' (empty fields always do)"),
        "columns": Key({}, (dict,), "source column -> canonical name (or a user scalar's name)"),
        "units": Key({}, (dict,), "canonical name -> unit of the source values"),
        "kinds": Key({}, (dict,), "variable -> what it is: temperature, concentration, humidity, pressure, speed, direction "
                                  "or other; picks the QC tests and error-model defaults of a user scalar (default: the "
                                  "canonical variable's own; names starting pm or mass_concentration are concentrations; "
                                  "else other)"),
    },
    "uncertainty": {
        "sensor": Key({}, (dict,), "variable -> reading noise: the random error of one reading, independent from report to report, "
                                   "in the variable's SI (or declared) unit (default: learned per station from the data; see docs/method.md)"),
        "offset": Key({}, (dict,), "variable -> standard uncertainty of each sensor's persistent offset (enters values and gradients, "
                                   "cancels in tendencies) (default per variable: air_temperature 0.1 K, see docs/method.md)"),
        "wind_component": Key(None, (int, float), "reading noise of the wind components u and v [m s-1] (default: learned from "
                                                  "the data, at least 0.1; WMO-No. 8 Annex 1.E gives 0.5 m/s as achievable, from memory)",
                              unset="learned from the data"),
        "noise_file": Key("", (str,), "CSV with columns station_id, variable, reading_noise: each station's reading noise "
                                      "(the unit as uncertainty.sensor), e.g. the reading_noise.csv a follow run writes; "
                                      "stations it does not list take the median of those it does (default: learned)"),
        "calibration": Key(0.0, (int, float), "older spelling of uncertainty.offset for the budgeted variable (0 = not set) [variable unit]"),
        "gradient_error": Key("larger", (str,), "prior: from sensor uncertainty; posterior: from fit residuals where dof > 0; larger: the larger of the two",
                              ("prior", "posterior", "larger")),
    },
    "qc": {
        "enabled": Key(True, (bool,), "run the quality-control tests"),
        "use_suspect": Key(False, (bool,), "let the estimator use values flagged suspect as well as good ones"),
        "calm_speed": Key(0.5, (int, float), "wind speeds below this are calm [m s-1] (ICAO Annex 3 / METAR practice)"),
        "range": Key({}, (dict,), "variable -> [low, high] plausible range in SI units"),
        "step": Key({}, (dict,), "variable -> [[minutes, limit], ...] largest plausible change over an interval"),
        "persistence": Key({}, (dict,), "variable -> [minimum range, window in minutes]: less variation than this is suspect"),
        "dew_point_tolerance": Key(0.5, (int, float), "dew point may exceed air temperature by this much before it is bad [K] (common practice)"),
        "spatial": Key(True, (bool,), "run the spatial (buddy) test"),
        "spatial_neighbours": Key(6, (int,), "neighbours used to predict each station"),
        "spatial_max_distance_km": Key(0.0, (int, float), "ignore neighbours farther than this (0 = no limit) [km]"),
        "spatial_suspect": Key(3.0, (int, float), "suspect beyond this many robust standard deviations (common practice)"),
        "spatial_bad": Key(6.0, (int, float), "bad beyond this many robust standard deviations (common practice)"),
        "spatial_floor": Key({}, (dict,), "variable -> smallest residual that can be flagged, in SI units"),
        "spatial_light_wind": Key(2.0, (int, float), "at night below this network wind the spatial test is relaxed [m s-1] (REFERENCES 4, common practice)"),
        "spatial_relax": Key(2.0, (int, float), "factor applied to spatial thresholds at night in light wind; such values are never flagged bad"),
    },
    "network": {
        "clusters": Key("delaunay", (str,), "how stations are grouped", ("delaunay", "file", "nearest")),
        "cluster_file": Key("", (str,), "with clusters = 'file': CSV with columns cluster, station_id"),
        "targets": Key([], (list,), "with clusters = 'nearest': station ids to centre clusters on (empty = every station)"),
        "k": Key(5, (int,), "with clusters = 'nearest': stations per cluster, the target included"),
        "min_angle": Key(20.0, (int, float), "reject triangles with a smaller interior angle [degree] (common practice, REFERENCES 1.4)"),
        "max_angle": Key(155.0, (int, float), "reject triangles with a larger interior angle [degree] (Huntley et al. 2022)"),
        "min_shape": Key(0.2, (int, float), "reject clusters with a smaller shape factor 4*sqrt(3)*area/sum(L^2) (Huntley et al. 2022)"),
        "min_spread": Key(0.3, (int, float), "reject clusters of more than 3 stations with sqrt(lambda2/lambda1) below this (common practice)"),
        "max_side_km": Key(0.0, (int, float), "reject clusters with a longer side (0 = no limit) [km]"),
        "max_height_range_m": Key(1000.0, (int, float), "reject clusters whose stations span more height than this (0 = no limit) [m]: "
                                                        "one vertical gradient cannot describe a kilometre of mountainside (common practice)"),
        "exclude": Key([], (list,), "station ids left out of the budget (their values are still read and checked)"),
        "max_noise_amplification": Key(0.0, (int, float), "reject clusters whose gradient error per unit sensor noise exceeds this (0 = no limit) [km-1]"),
    },
    "sensors": {
        "estimate": Key(True, (bool,), "estimate each sensor's offset (and, for concentrations, gain) against its neighbours "
                                       "and write sensor_offsets.csv (see docs/method.md)"),
        "apply": Key(False, (bool,), "correct the values with the estimated offsets and gains before the plane fits "
                                     "(run.json records it)"),
        "min_wind": Key(2.0, (int, float), "network-median wind [m s-1] at or above which a time counts as well mixed for "
                                           "the estimate (common practice)"),
        "min_sun": Key(10.0, (int, float), "sun elevation [degree] above which a time counts as daytime for the estimate"),
        "humidity_correction": Key("none", (str,), "correction of low-cost light-scattering PM2.5 readings for humidity "
                                                   "before anything else: barkjohn2021 = the US-wide equation of Barkjohn "
                                                   "et al. (2021) with relative humidity from the same or the nearest "
                                                   "station (see docs/method.md)", ("none", "barkjohn2021")),
    },
    "budget": {
        "variable": Key("air_temperature", (str,), "the scalar to budget (air_temperature or a user scalar such as pm2_5)"),
        "vertical": Key("auto", (str,), "elevation handling for air temperature: measured = a vertical gradient fitted per time "
                                        "over the whole network is removed before the horizontal fits; auto = measured where "
                                        "station heights differ by more than 30 m, else none",
                        ("auto", "measured", "potential_temperature", "regression", "none")),
        "interval": Key("", (str,), "analysis time step, e.g. '10min' (default: inferred from the data)"),
        "regional": Key(True, (bool,), "also fit one plane through every good station of the network per time (the regional "
                                       "scale): its rows have scale = regional in the budget table; see docs/method.md"),
        "window": Key("", (str,), "centred window for tendencies and averaged terms (default: from the data, the shortest "
                                  "whose tendency error is at most budget.min_rate, capped at 60 min)"),
        "min_stations": Key(3, (int,), "fewest good stations a plane fit may use"),
        "significance": Key(2.0, (int, float), "a term counts when it exceeds this many standard errors (REFERENCES 2.1, common practice)"),
        "dominance": Key(0.67, (int, float), "share |A|/(|A|+|R|) above which the change is advective (below 1 - this: in situ) (common practice)"),
        "min_rate": Key(None, (int, float), "terms smaller than this are never significant, and the tendency error the default "
                                            "window aims at [variable unit per hour] (default per variable: 0.25 K/h for "
                                            "temperatures, 1 %/h humidity, 20 Pa/h pressure, 1 unit/h concentrations; common practice)"),
        "chunk": Key("", (str,), "process this much time at once, e.g. '7D' (default: automatic, about half a million cluster-steps per partition; results are identical)"),
    },
    "follow": {
        "learn": Key("1h", (str,), "budget --follow: data needed before the settings learned from the data (reading noise, "
                                   "interval, window, network) are pinned for the night; written to settings.toml"),
        "critical": Key({}, (dict, int, float, str), "the critical value whose crossing now.html projects: a number in the "
                                                       "variable's unit, a string with a unit ('-2.2 degC', '28 degF', "
                                                       "'35 ug/m3'), or a table with 'default' and cluster or station ids "
                                                       "(a cluster takes the most demanding value of its own and its "
                                                       "stations'). Temperatures are crossed downward, concentrations "
                                                       "upward (default: 0 degC for temperatures, the freezing point: "
                                                       "set the critical temperature of your crop and bud stage; none "
                                                       "for other variables)"),
        "page_hours": Key(3.0, (int, float), "hours of history in the sparklines of now.html"),
    },
    "alerts": {
        "below_critical": Key(True, (bool,), "alert when a cluster's latest value is past follow.critical (below it for "
                                             "temperatures, above for concentrations)"),
        "crossing_within": Key("60min", (str,), "alert when the projected crossing of follow.critical is this close "
                                                "('' = off) (common practice)"),
        "advective_rate": Key(1.0, (int, float), "alert when the regime turns advective with a change faster than this "
                                                 "[variable unit per hour]: cooling for temperatures, rising for "
                                                 "concentrations (0 = off) (common practice)"),
        "silent_after": Key("30min", (str,), "alert when a station has sent nothing for this long ('' = off) "
                                             "(common practice: a few missed reports)"),
        "command": Key("", (str,), "a command run for every alert with the alert (one JSON line) on its standard input; "
                                   "no shell is involved (arguments split as a POSIX shell would)"),
    },
}


def _walk_defaults() -> dict[str, dict[str, Any]]:
    return {sec: {k: copy.deepcopy(key.default) for k, key in keys.items()} for sec, keys in SCHEMA.items()}


@dataclass
class Config:
    """A validated configuration: ``cfg.section['key']`` for every key."""

    data: dict[str, dict[str, Any]] = field(default_factory=_walk_defaults)
    source: str | None = None

    def __getitem__(self, section: str) -> dict[str, Any]:
        return self.data[section]

    def to_dict(self) -> dict[str, Any]:
        """Plain nested dict (for run.json)."""
        return copy.deepcopy(self.data)

    def with_values(self, **sections: dict[str, Any]) -> "Config":
        """A validated copy with some keys changed: ``cfg.with_values(budget={"variable": "pm2_5"})``."""
        data = self.to_dict()
        for section, values in sections.items():
            data[section].update(values)
        return from_dict(data, source=self.source)


def _check_type(where: str, value: Any, key: Key) -> Any:
    if value is None and key.default is None:  # "not set" (a resolved configuration read back)
        return value
    if isinstance(value, bool) and bool not in key.types:
        raise ConfigError(f"{where} must be {_type_names(key.types)}, got {value!r}")
    if not isinstance(value, key.types):
        raise ConfigError(f"{where} must be {_type_names(key.types)}, got {value!r}")
    if key.choices and value not in key.choices:
        raise ConfigError(f"{where} = {value!r} is not one of: {', '.join(key.choices)}")
    return value


def _type_names(types: tuple[type, ...]) -> str:
    names = {bool: "true or false", int: "a number", float: "a number", str: "a string",
             list: "a list", dict: "a table"}
    return " or ".join(dict.fromkeys(names.get(t, t.__name__) for t in types))


def from_dict(raw: dict[str, Any], *, source: str | None = None) -> Config:
    """Validate a nested dict against :data:`SCHEMA` and fill defaults."""
    where0 = f"{source}: " if source else ""
    cfg = Config(source=source)
    for section, table in raw.items():
        if section not in SCHEMA:
            raise ConfigError(
                f"{where0}unknown section [{section}]; known sections: {', '.join(SCHEMA)}"
            )
        if not isinstance(table, dict):
            raise ConfigError(f"{where0}[{section}] must be a table")
        for key, value in table.items():
            if key not in SCHEMA[section]:
                raise ConfigError(
                    f"{where0}unknown key {section}.{key}; known keys in [{section}]: "
                    f"{', '.join(SCHEMA[section])}"
                )
            cfg.data[section][key] = _check_type(f"{where0}{section}.{key}", value, SCHEMA[section][key])
    _validate_values(cfg, where0)
    return cfg


def _validate_values(cfg: Config, where0: str) -> None:
    for sec in ("stations", "observations"):
        d = cfg[sec]["delimiter"]
        if len(d) != 1:
            raise ConfigError(f"{where0}{sec}.delimiter must be one character, got {d!r}")
        for n in cfg[sec]["skip_lines"]:
            if not isinstance(n, int) or isinstance(n, bool) or n < 1:
                raise ConfigError(f"{where0}{sec}.skip_lines must hold 1-based line numbers, got {n!r}")
        for k, v in cfg[sec]["columns"].items():
            if not isinstance(v, str):
                raise ConfigError(f"{where0}{sec}.columns.{k} must be a string")
    for k, v in cfg["observations"]["units"].items():
        if not isinstance(v, str):
            raise ConfigError(f"{where0}observations.units.{k} must be a string, got {v!r}")
    from .variables import KINDS

    for k, v in cfg["observations"]["kinds"].items():
        if v not in KINDS:
            raise ConfigError(f"{where0}observations.kinds.{k} = {v!r} is not one of {', '.join(KINDS)}")
    for table in ("sensor", "offset"):
        for k, v in cfg["uncertainty"][table].items():
            if isinstance(v, bool) or not isinstance(v, (int, float)) or v < 0 or (table == "sensor" and v == 0):
                raise ConfigError(f"{where0}uncertainty.{table}.{k} must be a {'positive' if table == 'sensor' else 'non-negative'} "
                                  f"number, got {v!r}")
    if cfg["budget"]["min_rate"] is not None and cfg["budget"]["min_rate"] < 0:
        raise ConfigError(f"{where0}budget.min_rate must not be negative")
    for k, v in cfg["qc"]["range"].items():
        if not (isinstance(v, list) and len(v) == 2 and all(isinstance(x, (int, float)) for x in v) and v[0] < v[1]):
            raise ConfigError(f"{where0}qc.range.{k} must be [low, high] with low < high, got {v!r}")
    for k, v in cfg["qc"]["step"].items():
        ok = isinstance(v, list) and len(v) >= 1 and all(
            isinstance(p, list) and len(p) == 2 and all(isinstance(x, (int, float)) and x > 0 for x in p) for p in v)
        if not ok:
            raise ConfigError(f"{where0}qc.step.{k} must be a list of [minutes, limit] pairs, got {v!r}")
    for k, v in cfg["qc"]["persistence"].items():
        if not (isinstance(v, list) and len(v) == 2 and all(isinstance(x, (int, float)) and x >= 0 for x in v)):
            raise ConfigError(f"{where0}qc.persistence.{k} must be [minimum range, window minutes], got {v!r}")
    for name in ("min_stations",):
        if cfg["budget"][name] < 3:
            raise ConfigError(f"{where0}budget.{name} must be at least 3")
    if cfg["network"]["k"] < 3:
        raise ConfigError(f"{where0}network.k must be at least 3")
    if cfg["network"]["clusters"] == "file" and not cfg["network"]["cluster_file"]:
        raise ConfigError(f"{where0}network.clusters = 'file' needs network.cluster_file")
    if not 0.5 <= cfg["budget"]["dominance"] < 1.0:
        raise ConfigError(f"{where0}budget.dominance must be in [0.5, 1)")
    from .network.grid import parse_duration

    for section, name in (("follow", "learn"), ("alerts", "crossing_within"), ("alerts", "silent_after")):
        text = cfg[section][name]
        if text:
            try:
                parse_duration(text)
            except ValueError:
                raise ConfigError(f"{where0}{section}.{name} = {text!r} is not a duration like '30min' or '1h'") from None
    for name in ("exclude",):
        if not all(isinstance(v, str) for v in cfg["network"][name]):
            raise ConfigError(f"{where0}network.{name} must be a list of station ids (strings)")
    for name in ("interval", "window", "chunk"):
        text = cfg["budget"][name]
        if text:
            try:
                parse_duration(text)
            except ValueError:
                raise ConfigError(f"{where0}budget.{name} = {text!r} is not a duration like '10min', '1h' or '7D'") from None


def load(path: str | Path | None) -> Config:
    """Read and validate a TOML file; ``None`` gives the defaults."""
    if path is None:
        return Config()
    p = Path(path)
    try:
        text = p.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{p}: configuration file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{p}: cannot read configuration ({exc})") from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{p}: not valid TOML ({exc})") from None
    cfg = from_dict(raw, source=str(p))
    base = p.parent
    for section, key in (("network", "cluster_file"), ("uncertainty", "noise_file")):
        f = cfg[section][key]
        if f and not Path(f).is_absolute():
            cfg.data[section][key] = str(base / f)
    return cfg


def to_toml(d: dict, prefix: str = "") -> str:
    """A nested dict of strings, numbers, booleans and lists as TOML text (``None`` values are left out: unset)."""
    lines: list[str] = []
    scalars = {k: v for k, v in d.items() if not isinstance(v, dict) and v is not None}
    tables = {k: v for k, v in d.items() if isinstance(v, dict)}
    if prefix and scalars:
        lines.append(f"[{prefix}]")
    for k, v in scalars.items():
        lines.append(f"{_toml_key(k)} = {json.dumps(v)}")
    for k, v in tables.items():
        sub = f"{prefix}.{_toml_key(k)}" if prefix else _toml_key(k)
        if not any(isinstance(x, dict) for x in v.values()):
            lines.append("")
            lines.append(f"[{sub}]")
            for kk, vv in v.items():
                if vv is not None:
                    lines.append(f"{_toml_key(kk)} = {json.dumps(vv)}")
        else:
            lines.append("")
            lines.append(to_toml(v, sub))
    return "\n".join(lines).strip() + "\n"


def _toml_key(k: str) -> str:
    return k if k.replace("_", "").replace("-", "").isalnum() else json.dumps(k)
