"""The plan of a budget: everything besides the observations that every time partition shares.

Takes a :class:`~.check.CheckResult` and the configuration; gives a :class:`BudgetPlan`: the variable and
the quantity fitted, the network and its clusters, the error model (reading noise learned or declared,
offsets, the model-error network), the analysis interval and window, the vertical handling, and the
rows the estimator may use.  Each default resolved from the data is recorded in ``plan.choices``.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import pandas as pd

from ..config import Config
from ..errors import ConfigError, GeometryError
from ..estimate import uncertainty
from ..estimate.budget import BudgetSettings, model_network
from ..estimate.planes import fit_planes
from ..estimate.thermo import KAPPA, P_REF, standard_pressure
from ..network import geometry, grid
from ..variables import kind_of, si_unit
from .check import CheckResult, Progress, no_progress

log = logging.getLogger(__name__)


#: the cluster id of the regional (network-scale) rows
REGIONAL_ID = "network"


@dataclass
class Layout:
    """The shape and labels of a budget: analysis times, clusters and what was budgeted."""

    times: pd.DatetimeIndex
    clusters: pd.DataFrame  # cluster, stations, latitude, longitude (centroid), ...
    convergence: np.ndarray  # meridian convergence at each cluster centroid [degree]
    unit: str
    variable: str
    quantity: str


def declared_noise(variable: str, config: Config) -> float | None:
    """The reading noise declared for ``variable`` (``uncertainty.sensor``) [its unit], or None (learned)."""
    table = config["uncertainty"]["sensor"]
    return float(table[variable]) if variable in table else None


def noise_from_file(variable: str, config: Config, ids: list[str]) -> np.ndarray | None:
    """Each station's reading noise from ``uncertainty.noise_file`` (stations it does not list: the median of those
    it does), or None when no file is set or it lists nothing for ``variable``."""
    path = config["uncertainty"]["noise_file"]
    if not path:
        return None
    try:
        table = pd.read_csv(path, dtype={"station_id": str, "variable": str})
    except (OSError, ValueError) as exc:
        raise ConfigError(f"uncertainty.noise_file = {path!r}: cannot read it ({exc})") from None
    need = {"station_id", "variable", "reading_noise"}
    if not need <= set(table.columns):
        raise ConfigError(f"uncertainty.noise_file = {path!r} needs the columns station_id, variable, reading_noise; "
                          f"it has {', '.join(map(str, table.columns))}")
    rows = table[table["variable"] == variable]
    noise = pd.to_numeric(rows["reading_noise"], errors="coerce").to_numpy(float)
    if rows.empty:
        return None
    if not (np.isfinite(noise) & (noise > 0)).all():
        raise ConfigError(f"uncertainty.noise_file = {path!r}: every reading_noise of {variable} must be a positive number")
    by_id = dict(zip(rows["station_id"].astype(str), noise))
    fill = float(np.median(noise))
    return np.array([by_id.get(s, fill) for s in ids], float)


def offset_uncertainty(variable: str, config: Config) -> tuple[float, str]:
    """(standard uncertainty of each sensor's persistent offset [unit], where it comes from).

    ``uncertainty.offset.<variable>``, else the older ``uncertainty.calibration``
    (when non-zero), else the documented default of
    :func:`stationflow.estimate.uncertainty.default_offset`.
    """
    table = config["uncertainty"]["offset"]
    if variable in table:
        return float(table[variable]), "uncertainty.offset"
    if config["uncertainty"]["calibration"] > 0:
        return float(config["uncertainty"]["calibration"]), "uncertainty.calibration"
    value, source = uncertainty.default_offset(variable, kind_of(variable, config["observations"]["kinds"]))
    return value, f"default: {source}"


def _quantity(obs: pd.DataFrame, stations: pd.DataFrame, variable: str, vertical: str, usable: dict) -> tuple[np.ndarray, str]:
    """The field to fit: the variable itself, or potential temperature."""
    x = obs[variable].to_numpy(float)
    if variable != "air_temperature" or vertical != "potential_temperature":
        return x, variable
    elev = obs["station_id"].map(stations.set_index("station_id")["elevation"]).to_numpy(float)
    p = standard_pressure(elev)
    if "air_pressure" in obs:
        obs_p = obs["air_pressure"].to_numpy(float)
        ok = np.isfinite(obs_p) & usable.get("air_pressure", np.ones(len(obs), bool))
        p = np.where(ok, obs_p, p)
    if np.any(np.isfinite(x) & ~np.isfinite(p)):
        missing = obs["station_id"][np.isfinite(x) & ~np.isfinite(p)].iloc[0]
        raise ConfigError(
            f"budget.vertical = 'potential_temperature' needs air_pressure or an elevation for every station; "
            f"station {missing!r} has neither. Add elevations to the stations file or set budget.vertical = 'none'"
        )
    return x * (P_REF / p) ** KAPPA, "potential_temperature"


def _interval(config: Config, observations: pd.DataFrame, known: pd.Timedelta | None = None) -> pd.Timedelta:
    """The analysis interval; ``known``: the reporting interval QC already found."""
    bc = config["budget"]
    if bc["interval"]:
        return grid.parse_duration(bc["interval"])
    return known if known is not None else grid.infer_interval(observations)


def _window(config: Config, interval: pd.Timedelta, value_noise_var: float, min_rate: float
            ) -> tuple[pd.Timedelta, int, str]:
    """(window, half-window in steps, how it was chosen).

    ``budget.window`` when set; else the shortest window whose tendency
    error from reading noise (``value_noise_var``, the median over clusters
    of the centre value's noise variance) is at most ``min_rate``, capped
    at :data:`stationflow.estimate.uncertainty.MAX_AUTO_WINDOW_S` (:func:`stationflow.estimate.uncertainty.window_steps`).
    """
    text = config["budget"]["window"]
    if text:
        window = grid.parse_duration(text)
        h = int(round(window / interval / 2))
        if h < 1:
            raise ConfigError(f"budget.window = {text} must be at least two analysis intervals ({2 * interval})")
        return 2 * h * interval, h, "budget.window"
    h = uncertainty.window_steps(value_noise_var, interval.total_seconds(), min_rate)
    return 2 * h * interval, h, (f"from the data: tendency error from reading noise at most {min_rate:g} per hour "
                                 f"(capped at {uncertainty.MAX_AUTO_WINDOW_S / 60:g} min)")


#: cluster-steps per automatic time partition (when budget.chunk is not set)
AUTO_CHUNK = 500_000


@dataclass
class BudgetPlan:
    """Everything the budget of one variable needs besides the observations themselves.

    Computed once from the checked data set and shared by every time
    partition (in a chunked local run or on Dask workers).  ``frame`` holds
    the rows the estimator may use, with unusable values already set to NaN:
    ``station_id``, ``time``, ``q`` (the fitted quantity), ``u``/``v`` (true
    axes, calm as zero), ``wind_speed`` and ``t_air`` (for the mast inversion).
    """

    variable: str
    quantity: str
    unit: str
    network: geometry.Network
    clusters: pd.DataFrame
    members: list[np.ndarray]
    ids: list[str]
    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    convergence: np.ndarray
    masts: tuple[np.ndarray, np.ndarray] | None
    settings: BudgetSettings
    interval: pd.Timedelta
    window: pd.Timedelta
    times: pd.DatetimeIndex
    frame: pd.DataFrame
    lapse_stations: np.ndarray | None = None  # with vertical = measured: stations of the network-wide vertical fit
    regional: np.ndarray | None = None  # with budget.regional: the stations of the network-scale fit
    sensors: pd.DataFrame | None = None  # sensor_offsets.csv: offsets and gains against the neighbours
    choices: dict = field(default_factory=dict)  # what the defaults resolved to (vertical, window, noise...): run.json

    @cached_property
    def layout(self) -> Layout:
        """Times, clusters and labels of this budget (computed once): the local clusters, then the regional row."""
        clusters = self.clusters
        if self.regional is not None:
            net = self.network.stations
            row = pd.DataFrame({"cluster": [REGIONAL_ID], "stations": [f"all {self.regional.size} stations"],
                                "latitude": [float(net["latitude"].mean())], "longitude": [float(net["longitude"].mean())]})
            clusters = pd.concat([clusters.assign(scale="local"), row.assign(scale="regional")], ignore_index=True)
        conv = _convergence(clusters["latitude"].to_numpy(), clusters["longitude"].to_numpy(), self.network.crs)
        return Layout(self.times, clusters, conv, self.unit, self.variable, self.quantity)

    @property
    def n_local(self) -> int:
        """Local clusters (the first columns of every partition; the regional row, if any, is last)."""
        return len(self.members)

    @property
    def halo(self) -> int:
        """Analysis steps needed on each side of a partition for identical results."""
        h = self.settings.half_window
        return 2 * h + 1 + (self.settings.model_steps if self.settings.model_error else 0)


def plan_budget(chk: CheckResult, config: Config, *, variable: str | None = None,
                progress: Progress = no_progress, network_stations: list[str] | None = None) -> BudgetPlan:
    """Choose the variable and quantity, build the network and the settings, mask unusable values.

    ``network_stations``: the stations the network is built from (a follow
    run pins them for the night); by default those with good values of the
    variable, less ``network.exclude``.
    """
    bc = config["budget"]
    var = variable or bc["variable"]
    data = chk.data
    if var not in data.observations:
        have = [v for v in data.variables if v not in ("wind_speed", "wind_from_direction")]
        raise ConfigError(f"variable {var!r} is not in the observations; available: {', '.join(have) or 'none'} "
                          "(choose one with --variable or budget.variable)")
    usable = chk.qc.usable(use_suspect=config["qc"]["use_suspect"])
    obs = data.observations
    progress("preparing the budget")
    vertical = _vertical_mode(bc["vertical"], var, data.stations)
    quantity_values, quantity = _quantity(obs, data.stations, var, vertical, usable)
    mask_q = usable.get(var, np.ones(len(obs), bool))
    excluded = config["network"]["exclude"]
    if excluded:  # left out of the budget altogether: the network, the vertical fit, the regional plane
        mask_q = mask_q & ~obs["station_id"].astype(str).isin(excluded).to_numpy()
    has_var = obs.loc[np.isfinite(quantity_values) & mask_q, "station_id"].unique()
    if network_stations is not None:
        has_var = np.asarray(network_stations, dtype=object)
    st = _stations(chk, config, var, vertical, has_var, progress)
    interval = _interval(config, obs, chk.qc.interval)
    sample = _NoiseSample.of(obs, st.ids)
    values = np.where(mask_q, quantity_values, np.nan)
    inputs = _Inputs(var, obs, usable, st, sample, config, interval)
    humidity = {}
    if config["sensors"]["humidity_correction"] != "none":
        values, humidity = _humidity_corrected(values, inputs)
    times = _analysis_times(obs, interval)
    sensors, calibration_info, values = _sensor_biases(values, inputs, times)
    noise, noise_info = _reading_noise(var, quantity, config, sample, values)
    settings, window, window_source = _settings(config, var, vertical, noise, st, interval)
    z = st.table["elevation"].to_numpy(float)
    if settings.vertical_regression and not np.isfinite(z[np.concatenate(st.members)]).all():
        raise ConfigError("budget.vertical = 'regression' needs an elevation for every station in the stations file")
    lapse_stations = None
    if vertical == "measured":
        lapse_stations = np.flatnonzero(np.isfinite(z) & np.isin(np.arange(len(st.ids)), np.unique(sample.codes[mask_q])))
    qc_off = [name for name, on in (("all QC tests", config["qc"]["enabled"]), ("spatial", config["qc"]["spatial"]))
              if not on]
    choices = {"vertical": vertical, "vertical_setting": bc["vertical"], "window_source": window_source,
               "qc_tests_off": qc_off, "min_rate": settings.min_rate, "offset": settings.offset,
               "offset_source": offset_uncertainty(var, config)[1], "sensors": calibration_info,
               "humidity_correction": humidity, **noise_info}
    # the rows and values the estimator may use
    frame = pd.DataFrame({"station_id": obs["station_id"].array, "time": obs["time"].array})  # typed, no object copies
    frame["q"] = values
    _add_wind(frame, inputs, settings, choices)
    masts = _masts(st.table, st.x, st.y)
    if masts is not None and "air_temperature" in obs:
        frame["t_air"] = np.where(usable.get("air_temperature", np.ones(len(obs), bool)),
                                  obs["air_temperature"].to_numpy(float), np.nan)
    else:
        masts = None
    if not frame["time"].is_monotonic_increasing:  # ingest leaves the rows in time order: usually no sort
        frame = frame.sort_values("time", kind="stable").reset_index(drop=True)
    unit = si_unit(var, data.units.get(var))
    regional = st.regional if bc["regional"] else None
    choices["regional"] = (f"one plane through the {regional.size} stations of the network per time" if regional is not None
                           else "off (budget.regional = false)")
    choices["regional_stations"] = int(regional.size) if regional is not None else 0
    return BudgetPlan(var, quantity, unit, st.network, st.clusters, st.members, st.ids, st.x, st.y, z, st.convergence,
                      masts, settings, interval, window, times, frame,
                      lapse_stations=lapse_stations, regional=regional, choices=choices, sensors=sensors)


@dataclass
class _Stations:
    """Every station of the data set (``table``, projected), and the network of those with the variable."""

    table: pd.DataFrame
    ids: list[str]
    x: np.ndarray
    y: np.ndarray
    convergence: np.ndarray
    network: geometry.Network
    clusters: pd.DataFrame  # the usable clusters
    members: list[np.ndarray]  # their member stations, as rows of ``table``
    regional: np.ndarray  # every station of the network (with the variable), as rows of ``table``


def _stations(chk: CheckResult, config: Config, var: str, vertical: str, has_var: np.ndarray,
              progress: Progress) -> _Stations:
    """Build the network of the stations that have good values of ``var`` (``has_var``), and screen it."""
    st_all = chk.data.stations.reset_index(drop=True)
    st_var = st_all[st_all["station_id"].isin(has_var)].reset_index(drop=True)
    if len(st_var) < 3:
        raise GeometryError(f"only {len(st_var)} station(s) have good {var} values; a plane needs at least 3")
    progress("building the network")
    net = geometry.build_network(st_var, config)
    if vertical == "regression" and len(net.usable) and net.usable["n_stations"].min() < 4:
        raise ConfigError("budget.vertical = 'regression' needs clusters of at least 4 stations; "
                          "set network.clusters = 'nearest' (with network.k >= 5) or use 'measured'")
    if net.usable.empty:
        raise GeometryError("no cluster passed the shape and size tests; see clusters.csv (stationflow network) "
                            "and relax [network] min_angle/min_shape/max_side_km/max_height_range_m")
    ids = st_all["station_id"].tolist()
    x_all, y_all, conv, _ = geometry.project(st_all["latitude"].to_numpy(), st_all["longitude"].to_numpy(), net.crs)
    index = {s: i for i, s in enumerate(ids)}
    ok_rows = np.flatnonzero((net.clusters["status"] == "ok").to_numpy())
    to_full = np.array([index[sid] for sid in net.stations["station_id"]])  # network row -> full station row
    members = [to_full[net.members[i]] for i in ok_rows]
    return _Stations(st_all, ids, x_all, y_all, conv, net, net.clusters.iloc[ok_rows].reset_index(drop=True), members,
                     np.sort(to_full))


@dataclass
class _NoiseSample:
    """Each row's station (as a row of the station table) and time, and the first rows of the record, on
    which the reading noise is learned (rows come in time order: enough for a robust estimate per
    station, and bounded work on long records of large networks)."""

    codes: np.ndarray
    time_ns: np.ndarray
    first: np.ndarray  # the rows of the sample
    order: np.ndarray  # the sample's rows in (station, time) order
    n_stations: int
    ids: list[str]

    @classmethod
    def of(cls, obs: pd.DataFrame, ids: list[str]) -> "_NoiseSample":
        sid = obs["station_id"]
        if isinstance(sid.dtype, pd.CategoricalDtype):  # by the category codes: no pass over every label
            lookup = pd.Index(ids).get_indexer(sid.cat.categories.astype(str))
            codes = np.where(sid.cat.codes.to_numpy() >= 0, lookup[sid.cat.codes.to_numpy()], -1).astype(np.int64)
        else:
            codes = pd.Index(ids).get_indexer(sid.astype(str)).astype(np.int64)
        time_ns = obs["time"].to_numpy("datetime64[ns]").astype(np.int64)
        first = uncertainty.noise_sample_rows(time_ns)
        return cls(codes, time_ns, first, uncertainty.station_order(codes[first], time_ns[first]), len(ids), list(ids))

    def learn(self, values: np.ndarray, **kw) -> tuple:
        """:func:`stationflow.estimate.uncertainty.reading_noise` of ``values`` (one per row) on the sample."""
        return uncertainty.reading_noise(self.codes[self.first], self.time_ns[self.first], values[self.first],
                                        self.n_stations, order=self.order, **kw)


def _settings(config: Config, var: str, vertical: str, noise: np.ndarray, st: _Stations, interval: pd.Timedelta
              ) -> tuple[BudgetSettings, pd.Timedelta, str]:
    """The budget settings (error model, window, regime thresholds), the window and how it was chosen."""
    bc = config["budget"]
    offset, _ = offset_uncertainty(var, config)
    kind = kind_of(var, config["observations"]["kinds"])
    min_rate = float(bc["min_rate"]) if bc["min_rate"] is not None else uncertainty.default_min_rate(var, kind)
    total = np.sqrt(noise ** 2 + offset ** 2)
    typical = fit_planes(np.zeros((1, len(st.ids))), st.x, st.y, st.members, sigma=total, noise=noise,
                         residuals=False)
    value_noise = float(np.nanmedian(typical.noise_part("var_value"))) if st.members else np.nan
    window, h, window_source = _window(config, interval, value_noise, min_rate)
    settings = BudgetSettings(
        sigma=noise, wind_sigma=float(config["uncertainty"]["wind_component"] or uncertainty.WIND_FLOOR), offset=offset,
        error_model=config["uncertainty"]["gradient_error"],
        half_window=h, interval_s=interval.total_seconds(), min_stations=bc["min_stations"],
        significance=float(bc["significance"]), dominance=float(bc["dominance"]), min_rate=min_rate,
        vertical_regression=(vertical == "regression"),
    )
    if st.members and settings.model_error:  # once per run: every time partition uses the same
        settings.model_network = _model_network(st.x, st.y, st.members, noise, settings)
    return settings, window, window_source


#: model-error networks of the last plans (a follow run plans every few minutes with the same network)
_MODEL_NETWORKS: dict = {}


def _model_network(x: np.ndarray, y: np.ndarray, members: list[np.ndarray], noise: np.ndarray,
                   settings: BudgetSettings) -> tuple:
    """:func:`stationflow.estimate.budget.model_network`, remembered for the same network, noise and steps (a pure
    function of them)."""
    import hashlib

    h = hashlib.sha256()
    for a in (x, y, np.asarray(noise, float), *members):
        h.update(np.ascontiguousarray(a).tobytes())
        h.update(b"|")
    h.update(repr((settings.offset, settings.model_steps, len(members))).encode())
    key = h.hexdigest()
    if key not in _MODEL_NETWORKS:
        if len(_MODEL_NETWORKS) >= 4:
            _MODEL_NETWORKS.pop(next(iter(_MODEL_NETWORKS)))
        _MODEL_NETWORKS[key] = model_network(x, y, members, noise, settings)
    return _MODEL_NETWORKS[key]


def _add_wind(frame: pd.DataFrame, inputs: "_Inputs", settings: BudgetSettings, choices: dict) -> None:
    """The wind components (true axes, calm as zero) and speed the estimator may use; the wind noise learned
    from them unless declared."""
    obs, usable, config, sample = inputs.obs, inputs.usable, inputs.config, inputs.sample
    if "wind_speed" not in obs or "wind_from_direction" not in obs:
        log.warning("no wind observations: advection cannot be estimated, so every row is undetermined")
        choices["wind"] = "none"
        return
    from ..variables import wind_components

    spd = obs["wind_speed"].to_numpy(float)
    dirn = obs["wind_from_direction"].to_numpy(float)
    calm = spd < config["qc"]["calm_speed"]
    u, v = wind_components(np.where(calm, 0.0, spd), np.where(calm, 0.0, dirn))
    everywhere = np.ones(len(obs), bool)
    ok_w = usable.get("wind_speed", everywhere) & (usable.get("wind_from_direction", everywhere) | calm)
    frame["u"] = np.where(ok_w, u, np.nan)
    frame["v"] = np.where(ok_w, v, np.nan)
    frame["wind_speed"] = np.where(usable.get("wind_speed", everywhere), spd, np.nan)
    if config["uncertainty"]["wind_component"] is None:  # learned like the scalar's reading noise
        su, _, _ = sample.learn(frame["u"].to_numpy(), floor=uncertainty.WIND_FLOOR, resolution=False)
        sv, _, _ = sample.learn(frame["v"].to_numpy(), floor=uncertainty.WIND_FLOOR, resolution=False)
        settings.wind_sigma = float(np.median(np.sqrt(0.5 * (su ** 2 + sv ** 2))))
        choices["wind_noise_source"] = "learned from second differences of each station's wind components"
    else:
        choices["wind_noise_source"] = "uncertainty.wind_component"


@dataclass
class _Inputs:
    """What the plan's steps read: the variable, the observations and their QC masks, the stations and the
    network, each row's station and time, and the configuration."""

    var: str
    obs: pd.DataFrame
    usable: dict
    st: _Stations
    sample: _NoiseSample
    config: Config
    interval: pd.Timedelta

    def good(self, name: str) -> np.ndarray:
        """The values of ``name`` QC let through, NaN elsewhere."""
        return np.where(self.usable.get(name, np.ones(len(self.obs), bool)), self.obs[name].to_numpy(float), np.nan)


#: analysis times the sensor biases are estimated on, at most (evenly spaced over the record)
MAX_CALIBRATION_TIMES = 1000


def _sensor_biases(values: np.ndarray, inputs: _Inputs, times: pd.DatetimeIndex
                   ) -> tuple[pd.DataFrame | None, dict, np.ndarray]:
    """(sensor_offsets table, what run.json records, the values, corrected when ``sensors.apply``);
    ``times``: the analysis times."""
    var, obs, st, sample, config = inputs.var, inputs.obs, inputs.st, inputs.sample, inputs.config
    from ..estimate import calibration
    from ..network.geometry import to_lonlat

    cc = config["sensors"]
    if not cc["estimate"]:
        return None, {"estimated": False, "applied": False}, values
    stride = max(1, int(np.ceil(len(times) / MAX_CALIBRATION_TIMES)))
    net = st.regional  # the network's stations, as rows of the station table
    col = np.full(len(st.ids), -1)
    col[net] = np.arange(net.size)
    cells = _StridedCells.of(sample, times, inputs.interval, stride)
    grid_v = cells.means(values, col, net.size)
    speed = None
    if "wind_speed" in obs:
        # every station's wind (anemometers may stand apart from the sensors of the variable)
        speed = cells.means(inputs.good("wind_speed"), np.arange(len(st.ids)), len(st.ids))
    cand = times[::stride]
    lon0, lat0 = (float(a[0]) for a in to_lonlat(np.array([st.x[net].mean()]), np.array([st.y[net].mean()]),
                                                  st.network.crs))
    selection = calibration.select_times(cand, speed, lat0, lon0, min_wind=float(cc["min_wind"]),
                                         min_sun=float(cc["min_sun"]))
    concentration = kind_of(var, config["observations"]["kinds"]) == "concentration"
    b = calibration.estimate_biases(grid_v, cand, (st.x[net], st.y[net], st.table["elevation"].to_numpy(float)[net]),
                                    concentration=concentration, selection=selection)
    table = pd.DataFrame({"station_id": [st.ids[i] for i in net], "variable": var, "offset": b.offset,
                          "offset_se": b.offset_se, "gain": b.gain, "gain_se": b.gain_se, "n_periods": b.n_periods,
                          "method": b.method})
    with np.errstate(invalid="ignore"):
        typical = np.nanmedian(grid_v, axis=0)
        effect = np.abs(b.offset + (b.gain - 1.0) * typical)  # the bias at the station's typical level
    table["bias_at_typical_level"] = effect
    wind = float(np.nanmedian(speed)) if speed is not None and np.isfinite(speed).any() else np.nan
    table["fake_advection"] = calibration.fake_advection(effect, st.x[net], st.y[net], _local_members(st), wind)
    with np.errstate(invalid="ignore"):
        table["beyond_two_se"] = (np.abs(b.offset) > 2 * b.offset_se) | (concentration & (np.abs(b.gain - 1) > 2 * b.gain_se))
    # ranked: biases beyond twice their error first, then by the advection they would fake
    table = table.sort_values(["beyond_two_se", "fake_advection"], ascending=False, kind="stable", na_position="last")
    table = table.reset_index(drop=True)
    info = {"estimated": True, "applied": bool(cc["apply"]), "method": b.method,
            "stations_beyond_two_se": table.loc[table["beyond_two_se"], "station_id"].tolist()}
    if cc["apply"]:  # the estimates are by network station; the rows' codes are rows of the station table
        station = np.where(sample.codes >= 0, col[np.maximum(sample.codes, 0)], -1)
        values = calibration.remove_biases(values, station, b.offset, b.gain)
    return table, info, values


def _local_members(st: _Stations) -> list[np.ndarray]:
    """The local clusters' members as positions in ``st.regional`` (the network's own order)."""
    pos = np.full(len(st.ids), -1)
    pos[st.regional] = np.arange(st.regional.size)
    return [pos[m] for m in st.members]


@dataclass
class _StridedCells:
    """Every ``stride``-th analysis time: each row's cell there (-1 for the rows in between)."""

    row: np.ndarray  # per row: the strided time of its bin, or -1
    n_times: int
    codes: np.ndarray  # per row: its station, as a row of the station table (-1 unknown)

    @classmethod
    def of(cls, sample: _NoiseSample, times: pd.DatetimeIndex, interval: pd.Timedelta, stride: int) -> "_StridedCells":
        b = grid.bin_index(sample.time_ns, times[0], interval)
        on = (b >= 0) & (b < len(times)) & (b % stride == 0)
        return cls(np.where(on, b // stride, -1), (len(times) + stride - 1) // stride, sample.codes)

    def means(self, values: np.ndarray, col: np.ndarray, n_cols: int) -> np.ndarray:
        """(strided times, ``n_cols``) bin means of ``values`` (one per row); ``col``: each station's column
        (-1: none)."""
        c = col[np.maximum(self.codes, 0)]
        ok = (self.row >= 0) & (self.codes >= 0) & (c >= 0)
        return grid.cell_means(values, ok, np.where(ok, self.row * n_cols + c, 0), (self.n_times, n_cols))[0]


def _humidity_corrected(values: np.ndarray, inputs: _Inputs) -> tuple[np.ndarray, dict]:
    """Low-cost PM2.5 readings corrected for humidity (:func:`stationflow.estimate.calibration.barkjohn2021`), the
    relative humidity from the same station, else the nearest station that reports it at that time."""
    from ..estimate import calibration

    var, obs, st, sample, config = inputs.var, inputs.obs, inputs.st, inputs.sample, inputs.config
    if kind_of(var, config["observations"]["kinds"]) != "concentration":
        raise ConfigError(f"sensors.humidity_correction is for concentrations (PM2.5); {var} is not one "
                          f"(declare its kind in [observations.kinds] if it is)")
    if "relative_humidity" not in obs:
        raise ConfigError("sensors.humidity_correction needs relative_humidity in the observations")
    rh = inputs.good("relative_humidity")
    filled, source = calibration.nearest_humidity(rh, sample.codes, sample.time_ns, st.x, st.y)
    corrected = calibration.barkjohn2021(values, filled)
    lost = int(np.sum(np.isfinite(values) & ~np.isfinite(corrected)))
    return corrected, {"equation": "Barkjohn et al. (2021): PM2.5 = 0.524 PA - 0.0862 RH + 5.75",
                       "from_nearest_station": int(np.sum(source == 1)), "without_humidity": lost}


def _analysis_times(frame: pd.DataFrame, interval: pd.Timedelta) -> pd.DatetimeIndex:
    """Every analysis time from the first to the last row, on the ``interval`` grid."""
    t = frame["time"]
    return grid.grid_times(pd.Timestamp(t.min()).ceil(interval), pd.Timestamp(t.max()), interval)


#: height range above which ``vertical = "auto"`` measures the vertical gradient [m] (the QC spatial test's own limit)
AUTO_VERTICAL_RANGE_M = 30.0


def _vertical_mode(setting: str, variable: str, stations: pd.DataFrame) -> str:
    """The elevation handling in force: ``setting``, with ``auto`` resolved from the station heights.

    Only air temperature has a vertical treatment; ``auto`` is ``measured``
    where at least 6 stations have heights spanning more than
    :data:`AUTO_VERTICAL_RANGE_M`, else ``none``.
    """
    if variable != "air_temperature":
        return "none"
    if setting != "auto":
        return setting
    z = stations["elevation"].to_numpy(float) if "elevation" in stations else np.full(len(stations), np.nan)
    z = z[np.isfinite(z)]
    return "measured" if z.size >= 6 and np.ptp(z) > AUTO_VERTICAL_RANGE_M else "none"


def _reading_noise(variable: str, quantity: str, config: Config, sample: _NoiseSample, values: np.ndarray
                   ) -> tuple[np.ndarray, dict]:
    """Reading noise per station [unit]: declared, or learned (:func:`stationflow.estimate.uncertainty.reading_noise`); and what to record."""
    declared = declared_noise(variable, config)
    if declared is not None:
        return np.full(sample.n_stations, declared), {"noise_source": "uncertainty.sensor"}
    listed = noise_from_file(variable, config, sample.ids)
    if listed is not None:
        return listed, {"noise_source": f"uncertainty.noise_file ({config['uncertainty']['noise_file']})",
                        "noise_median": float(np.median(listed)), "noise_per_station": listed}
    noise, resolution, count = sample.learn(values, floor=uncertainty.noise_floor(
        quantity, kind_of(variable, config["observations"]["kinds"])))
    return noise, {"noise_source": "learned from second differences of each station's series",
                   "noise_median": float(np.median(noise)), "noise_per_station": noise, "noise_differences": count,
                   "resolution_per_station": resolution}


def _masts(stations: pd.DataFrame, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    roles = geometry.assign_roles(stations, x, y)
    upper = np.flatnonzero(roles == "upper")
    if upper.size == 0:
        return None
    surf = np.flatnonzero(roles == "surface")
    d = np.hypot(x[upper, None] - x[None, surf], y[upper, None] - y[None, surf])
    return upper, surf[np.argmin(d, axis=1)]


def _convergence(lat: np.ndarray, lon: np.ndarray, crs: str) -> np.ndarray:
    _, _, g, _ = geometry.project(lat, lon, crs)
    return g
