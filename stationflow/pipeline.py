"""The pipeline: wire the stages from a configuration and return documented results.

``check`` = ingest + QC; ``network`` = geometry; ``budget`` = ingest, QC,
alignment, geometry, plane fits and the budget.  Each returns a result
object; :mod:`stationflow.report` writes the files; :mod:`stationflow.cli`
is a thin layer over these functions.
"""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from . import align, errormodel, geometry, ingest, qc
from .budget import REGIMES, BudgetSettings, compute_budget, model_network, row_mean_var
from .gradient import fit_planes
from .config import Config
from .errors import ConfigError, GeometryError, NoUsableRows
from .summary import BudgetSummary
from .thermo import KAPPA, P_REF, standard_pressure
from .variables import CANONICAL, si_unit

log = logging.getLogger(__name__)

Progress = Callable[[str], None]


def _noop(_: str) -> None:
    pass


@dataclass
class CheckResult:
    """What ``check`` found: the ingest result, the QC flags and summaries."""

    data: ingest.IngestResult
    qc: qc.QCResult
    flags: pd.DataFrame
    periods: pd.DataFrame
    per_test: pd.DataFrame
    per_station: pd.DataFrame
    config: Config


@dataclass
class Layout:
    """The shape and labels of a budget: analysis times, clusters and what was budgeted."""

    times: pd.DatetimeIndex
    clusters: pd.DataFrame  # cluster, stations, latitude, longitude (centroid), ...
    convergence: np.ndarray  # meridian convergence at each cluster centroid [degree]
    unit: str
    variable: str
    quantity: str


@dataclass
class BudgetRun:
    """The budget of one variable: the xarray dataset, the tidy table and main periods."""

    check: CheckResult
    network: geometry.Network
    dataset: object  # xarray.Dataset; None when the budget was streamed to files
    table: pd.DataFrame | None  # None when the budget was streamed to files
    periods: list[dict]
    variable: str
    quantity: str
    unit: str
    interval: pd.Timedelta
    window: pd.Timedelta
    settings: BudgetSettings
    extras: dict = field(default_factory=dict)
    summary: BudgetSummary | None = None
    layout: Layout | None = None
    choices: dict = field(default_factory=dict)  # what the defaults resolved to (see BudgetPlan.choices)


def run_check(obs: str | Path, stations: str | Path | None, config: Config, *, progress: Progress = _noop) -> CheckResult:
    """Ingest and quality-control the observations."""
    progress("reading observations")
    data = ingest.read(obs, stations, config)
    if data.observations.empty:
        raise NoUsableRows(f"{obs}: no usable rows ({data.accounting['rows_rejected']} rejected; "
                           "see rejected_rows.csv for the line and reason of each)", data)
    slips = qc.unit_slips(data.observations, config["observations"]["units"], qc.thresholds(config)["range"])
    if slips:
        raise ConfigError(f"{obs}: {slips[0]}" + (f" (and {len(slips) - 1} more variable(s))" if len(slips) > 1 else ""))
    swapped = coordinates_look_swapped(data.stations, config["observations"]["timezone"])
    if swapped:
        log.warning(swapped)
    progress("quality control")
    result = qc.run_qc(data.observations, data.stations, config)
    flags = qc.flag_table(data.observations, result)
    periods = qc.flagged_periods(data.observations, result, table=flags)
    s = qc.summary(data.observations, result)
    return CheckResult(data, result, flags, periods, s["per_test"], s["per_station"], config)


def _zone_location(name: str) -> tuple[float, float] | None:
    """(latitude, longitude) of an IANA zone's principal place, from the tz database's zone1970.tab, or None."""
    import re

    paths = [Path("/usr/share/zoneinfo/zone1970.tab")]
    try:
        import tzdata

        paths.insert(0, Path(tzdata.__file__).parent / "zoneinfo" / "zone1970.tab")
    except ImportError:
        pass
    for path in paths:
        try:
            lines = path.read_text(encoding="utf-8").splitlines()
        except OSError:
            continue
        for line in lines:
            parts = line.split("\t")
            if len(parts) >= 3 and parts[2] == name.strip():
                m = re.fullmatch(r"([+-])(\d{2})(\d{2})(\d{2})?([+-])(\d{3})(\d{2})(\d{2})?", parts[1])
                if not m:
                    return None
                lat = (int(m[2]) + int(m[3]) / 60 + int(m[4] or 0) / 3600) * (1 if m[1] == "+" else -1)
                lon = (int(m[6]) + int(m[7]) / 60 + int(m[8] or 0) / 3600) * (1 if m[5] == "+" else -1)
                return lat, lon
        return None
    return None


def coordinates_look_swapped(stations: pd.DataFrame, timezone: str) -> str:
    """A sentence when latitude and longitude look swapped given the data's time zone, else "".

    The time zone places the network: an IANA zone by its principal place in
    the tz database (zone1970.tab), distances by pyproj's WGS84 geodesic.
    When the stations lie more than 2,500 km from it while the swapped pair
    would lie less than half as far (and within 2,500 km), the columns were
    most likely swapped.  UTC and fixed offsets say too little to tell.
    """
    from pyproj import Geod

    from .ingest import is_utc

    if stations.empty or is_utc(timezone):
        return ""
    place = _zone_location(timezone)
    if place is None:
        return ""
    lat, lon = float(stations["latitude"].median()), float(stations["longitude"].median())
    if abs(lon) > 90.0:
        return ""  # swapped, the longitude would not be a latitude
    geod = Geod(ellps="WGS84")
    _, _, given = geod.inv(place[1], place[0], lon, lat)
    _, _, swapped = geod.inv(place[1], place[0], lat, lon)
    if given > 2.5e6 and swapped < min(0.5 * given, 2.5e6):
        return (f"latitude and longitude look swapped: the stations are at about {lat:.2f} N, {lon:.2f} E, "
                f"{given / 1000:,.0f} km from where {timezone} keeps its clocks; swapped they would be "
                f"{swapped / 1000:,.0f} km from it. Check the latitude and longitude columns "
                "(stations.columns / observations.columns)")
    return ""


def run_network(stations: pd.DataFrame, config: Config) -> geometry.Network:
    """Project the stations and form and screen the clusters."""
    return geometry.build_network(stations, config)


def declared_noise(variable: str, config: Config) -> float | None:
    """The reading noise declared for ``variable`` (``uncertainty.sensor``) [its unit], or None (learned)."""
    table = config["uncertainty"]["sensor"]
    return float(table[variable]) if variable in table else None


def offset_uncertainty(variable: str, config: Config) -> tuple[float, str]:
    """(standard uncertainty of each sensor's persistent offset [unit], where it comes from).

    ``uncertainty.offset.<variable>``, else the older ``uncertainty.calibration``
    (when non-zero), else the documented default of
    :func:`stationflow.errormodel.default_offset`.
    """
    table = config["uncertainty"]["offset"]
    if variable in table:
        return float(table[variable]), "uncertainty.offset"
    if config["uncertainty"]["calibration"] > 0:
        return float(config["uncertainty"]["calibration"]), "uncertainty.calibration"
    value, source = errormodel.default_offset(variable)
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
        return align.parse_duration(bc["interval"])
    return known if known is not None else align.infer_interval(observations)


def _window(config: Config, interval: pd.Timedelta, value_noise_var: float, min_rate: float
            ) -> tuple[pd.Timedelta, int, str]:
    """(window, half-window in steps, how it was chosen).

    ``budget.window`` when set; else the shortest window whose tendency
    error from reading noise (``value_noise_var``, the median over clusters
    of the centre value's noise variance) is at most ``min_rate``, capped
    at :data:`stationflow.errormodel.MAX_AUTO_WINDOW_S` (:func:`errormodel.window_steps`).
    """
    text = config["budget"]["window"]
    if text:
        window = align.parse_duration(text)
        h = int(round(window / interval / 2))
        if h < 1:
            raise ConfigError(f"budget.window = {text} must be at least two analysis intervals ({2 * interval})")
        return 2 * h * interval, h, "budget.window"
    h = errormodel.window_steps(value_noise_var, interval.total_seconds(), min_rate)
    return 2 * h * interval, h, (f"from the data: tendency error from reading noise at most {min_rate:g} per hour "
                                 f"(capped at {errormodel.MAX_AUTO_WINDOW_S / 60:g} min)")


def run_budget(obs: str | Path, stations: str | Path | None, config: Config, *, variable: str | None = None,
               progress: Progress = _noop, check: CheckResult | None = None) -> BudgetRun:
    """The main job: ingest, QC, align, network, fits and budget for one variable."""
    chk = check or run_check(obs, stations, config, progress=progress)
    return budget_from_check(chk, config, variable=variable, progress=progress)


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
    choices: dict = field(default_factory=dict)  # what the defaults resolved to (vertical, window, noise...): run.json

    @cached_property
    def layout(self) -> Layout:
        """Times, clusters and labels of this budget (computed once)."""
        conv = _convergence(self.clusters["latitude"].to_numpy(), self.clusters["longitude"].to_numpy(), self.network.crs)
        return Layout(self.times, self.clusters, conv, self.unit, self.variable, self.quantity)

    @property
    def halo(self) -> int:
        """Analysis steps needed on each side of a partition for identical results."""
        h = self.settings.half_window
        return 2 * h + 1 + (self.settings.model_steps if self.settings.model_error else 0)


def plan_budget(chk: CheckResult, config: Config, *, variable: str | None = None,
                progress: Progress = _noop) -> BudgetPlan:
    """Choose the variable and quantity, build the network and the settings, mask unusable values."""
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
    has_var = obs.loc[np.isfinite(quantity_values) & mask_q, "station_id"].unique()
    st_all = data.stations.reset_index(drop=True)
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
    interval = _interval(config, obs, chk.qc.interval)
    ids = st_all["station_id"].tolist()
    x_all, y_all, conv, _ = geometry.project(st_all["latitude"].to_numpy(), st_all["longitude"].to_numpy(), net.crs)
    index = {s: i for i, s in enumerate(ids)}
    ok_rows = np.flatnonzero((net.clusters["status"] == "ok").to_numpy())
    to_full = np.array([index[sid] for sid in net.stations["station_id"]])  # network row -> full station row
    members = [to_full[net.members[i]] for i in ok_rows]
    # the error model: reading noise per station (declared or learned), offsets (declared or default)
    sid = obs["station_id"]
    if isinstance(sid.dtype, pd.CategoricalDtype):  # by the category codes: no pass over every label
        lookup = pd.Index(ids).get_indexer(sid.cat.categories.astype(str))
        codes = np.where(sid.cat.codes.to_numpy() >= 0, lookup[sid.cat.codes.to_numpy()], -1).astype(np.int64)
    else:
        codes = pd.Index(ids).get_indexer(sid.astype(str)).astype(np.int64)
    time_ns = obs["time"].to_numpy("datetime64[ns]").astype(np.int64)
    # the noise is learned from the first reports of the record (rows come in time order): enough for a robust
    # estimate per station, and bounded work on long records of large networks
    first = errormodel.noise_sample_rows(time_ns)
    sample_codes, sample_ns = codes[first], time_ns[first]
    order = errormodel.station_order(sample_codes, sample_ns)
    noise, noise_info = _reading_noise(var, quantity, config, sample_codes, sample_ns,
                                       np.where(mask_q, quantity_values, np.nan)[first], len(ids), order)
    offset, offset_source = offset_uncertainty(var, config)
    min_rate = float(bc["min_rate"]) if bc["min_rate"] is not None else errormodel.default_min_rate(var)
    total = np.sqrt(noise ** 2 + offset ** 2)
    typical = fit_planes(np.zeros((1, len(ids))), x_all, y_all, members, sigma=total, noise=noise, residuals=False)
    value_noise = float(np.nanmedian(typical.noise_part("var_value"))) if members else np.nan
    window, h, window_source = _window(config, interval, value_noise, min_rate)
    settings = BudgetSettings(
        sigma=noise, wind_sigma=float(config["uncertainty"]["wind_component"] or errormodel.WIND_FLOOR), offset=offset,
        error_model=config["uncertainty"]["gradient_error"],
        half_window=h, interval_s=interval.total_seconds(), min_stations=bc["min_stations"],
        significance=float(bc["significance"]), dominance=float(bc["dominance"]), min_rate=min_rate,
        vertical_regression=(vertical == "regression"),
    )
    if members and settings.model_error:  # once per run: every time partition uses the same
        settings.model_network = model_network(x_all, y_all, members, noise, settings)
    z = st_all["elevation"].to_numpy(float)
    if settings.vertical_regression and not np.isfinite(z[np.concatenate(members)]).all():
        raise ConfigError("budget.vertical = 'regression' needs an elevation for every station in the stations file")
    lapse_stations = None
    if vertical == "measured":
        lapse_stations = np.flatnonzero(np.isfinite(z) & np.isin(np.arange(len(ids)), np.unique(codes[mask_q])))
    qc_off = [name for name, on in (("all QC tests", config["qc"]["enabled"]), ("spatial", config["qc"]["spatial"]))
              if not on]
    choices = {"vertical": vertical, "vertical_setting": bc["vertical"], "window_source": window_source,
               "qc_tests_off": qc_off,
               "min_rate": min_rate, "offset": offset, "offset_source": offset_source, **noise_info}
    # the rows and values the estimator may use
    frame = pd.DataFrame({"station_id": obs["station_id"].array, "time": obs["time"].array})  # typed, no object copies
    frame["q"] = np.where(mask_q, quantity_values, np.nan)
    if "wind_speed" in obs and "wind_from_direction" in obs:
        from .variables import wind_components

        spd = obs["wind_speed"].to_numpy(float)
        dirn = obs["wind_from_direction"].to_numpy(float)
        calm = spd < config["qc"]["calm_speed"]
        u, v = wind_components(np.where(calm, 0.0, spd), np.where(calm, 0.0, dirn))
        ok_w = usable.get("wind_speed", np.ones(len(obs), bool)) & (usable.get("wind_from_direction", np.ones(len(obs), bool)) | calm)
        frame["u"] = np.where(ok_w, u, np.nan)
        frame["v"] = np.where(ok_w, v, np.nan)
        frame["wind_speed"] = np.where(usable.get("wind_speed", np.ones(len(obs), bool)), spd, np.nan)
        if config["uncertainty"]["wind_component"] is None:  # learned like the scalar's reading noise
            su, _, _ = errormodel.reading_noise(sample_codes, sample_ns, frame["u"].to_numpy()[first], len(ids),
                                                order=order, floor=errormodel.WIND_FLOOR, resolution=False)
            sv, _, _ = errormodel.reading_noise(sample_codes, sample_ns, frame["v"].to_numpy()[first], len(ids),
                                                order=order, floor=errormodel.WIND_FLOOR, resolution=False)
            settings.wind_sigma = float(np.median(np.sqrt(0.5 * (su ** 2 + sv ** 2))))
            choices["wind_noise_source"] = "learned from second differences of each station's wind components"
        else:
            choices["wind_noise_source"] = "uncertainty.wind_component"
    else:
        log.warning("no wind observations: advection cannot be estimated, so every row is undetermined")
        choices["wind"] = "none"
    masts = _masts(st_all, x_all, y_all)
    if masts is not None and "air_temperature" in obs:
        frame["t_air"] = np.where(usable.get("air_temperature", np.ones(len(obs), bool)),
                                  obs["air_temperature"].to_numpy(float), np.nan)
    else:
        masts = None
    if not frame["time"].is_monotonic_increasing:  # ingest leaves the rows in time order: usually no sort
        frame = frame.sort_values("time", kind="stable").reset_index(drop=True)
    t = frame["time"]
    first = pd.Timestamp(t.min()).ceil(interval)
    n_t = int(np.ceil((pd.Timestamp(t.max()).value - first.value) / interval.value)) + 1
    times = pd.date_range(first, periods=max(n_t, 1), freq=interval)
    clusters = net.clusters.iloc[ok_rows].reset_index(drop=True)
    unit = si_unit(var, data.units.get(var))
    return BudgetPlan(var, quantity, unit, net, clusters, members, ids, x_all, y_all, z, conv, masts, settings,
                      interval, window, times, frame, lapse_stations, choices)


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


def _reading_noise(variable: str, quantity: str, config: Config, codes: np.ndarray, time_ns: np.ndarray,
                   values: np.ndarray, n_stations: int, order: np.ndarray) -> tuple[np.ndarray, dict]:
    """Reading noise per station [unit]: declared, or learned (:func:`errormodel.reading_noise`); and what to record."""
    declared = declared_noise(variable, config)
    if declared is not None:
        return np.full(n_stations, declared), {"noise_source": "uncertainty.sensor"}
    noise, resolution, count = errormodel.reading_noise(codes, time_ns, values, n_stations, order=order,
                                                        floor=errormodel.noise_floor(quantity))
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


def partition_rows(plan: BudgetPlan, first: int, last: int) -> pd.DataFrame:
    """Rows of ``plan.frame`` that fall in the analysis bins ``first .. last`` (inclusive)."""
    t = plan.frame["time"].to_numpy("datetime64[ns]").astype(np.int64)
    lo = plan.times[first].value - plan.interval.value
    hi = plan.times[last].value
    a = np.searchsorted(t, lo, side="right")
    b = np.searchsorted(t, hi, side="right")
    return plan.frame.iloc[a:b]


def compute_partition(plan: BudgetPlan, rows: pd.DataFrame, first: int, last: int) -> dict[str, np.ndarray]:
    """Budget terms for the analysis bins ``first .. last`` from the rows in them.

    Pure: the same inputs give the same numbers whether run here, in a
    chunked run or on a Dask worker.
    """
    times = plan.times[first:last + 1]
    names = [c for c in ("q", "u", "v", "wind_speed", "t_air") if c in rows]
    grid = align.to_grid(rows, plan.ids, names, interval=plan.interval, start=times[0], end=times[-1])
    values = grid.values["q"]
    if "u" in grid.values:
        ug, vg = geometry.rotate_to_grid(grid.values["u"], grid.values["v"], plan.convergence[None, :])
        speed = grid.values.get("wind_speed")
    else:
        ug = vg = np.full(values.shape, np.nan)
        speed = None
    lapse = None
    if plan.lapse_stations is not None:
        values, lapse = remove_lapse(values, plan)
    terms = compute_budget(values, ug, vg, plan.x, plan.y, plan.members, plan.settings, z=plan.z, wind_speed=speed,
                           lapse=lapse)
    if plan.masts is not None and "t_air" in grid.values:
        upper, partner = plan.masts
        t = grid.values["t_air"]
        inv, _ = row_mean_var(t[:, upper] - t[:, partner])  # no warnings machinery: this may run on a thread
        terms["inversion"] = np.broadcast_to(inv[:, None], terms["value"].shape).copy()
    return terms


def remove_lapse(values: np.ndarray, plan: BudgetPlan
                 ) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray, np.ndarray, float]]:
    """Take the measured vertical gradient out of ``values`` (n_times, n_stations) before the horizontal fits.

    One plane with height as a regressor is fitted per time through every
    station with a height (:func:`gradient.fit_planes`, the same estimator;
    networks of any size), its vertical coefficient gamma(t) [unit m-1]
    with the larger of its prior and posterior variance (the whole network
    is rarely a plane) and the variance from reading noise alone (what a
    tendency sees: the misfit of the network plane persists in time), and
    ``values - gamma (z - z_ref)`` returned with ``(gamma, variance,
    noise variance, z_ref)``; z_ref is the mean height of those stations.
    Times with no vertical fit keep gamma = 0 with variance 0 (their
    horizontal fits lack stations too).
    """
    idx = plan.lapse_stations
    s = plan.settings
    noise = np.broadcast_to(np.asarray(s.sigma, float), (len(plan.ids),))[idx]
    net = fit_planes(values[:, idx], plan.x[idx], plan.y[idx], [np.arange(idx.size)], z=plan.z[idx],
                     sigma=np.sqrt(noise ** 2 + s.offset ** 2), noise=noise, min_stations=6, residuals=True)
    gamma = net.grad_z[:, 0]
    var = net.var_z[:, 0] * net.error_scale("larger")[:, 0]
    var_noise = net.noise_part("var_z")[:, 0]
    fine = np.isfinite(gamma) & np.isfinite(var) & np.isfinite(var_noise)
    gamma, var, var_noise = (np.where(fine, a, 0.0) for a in (gamma, var, var_noise))
    z_ref = float(np.mean(plan.z[idx]))
    dz = np.where(np.isfinite(plan.z), plan.z - z_ref, np.nan)
    return values - gamma[:, None] * dz[None, :], (gamma, var, var_noise, z_ref)


def partitions(n_times: int, steps: int) -> list[tuple[int, int]]:
    """(first, last) bin index of consecutive partitions of ``steps`` bins."""
    steps = max(1, steps)
    return [(a, min(n_times, a + steps) - 1) for a in range(0, n_times, steps)]


def run_partition(plan: BudgetPlan, first: int, last: int, rows: pd.DataFrame | None = None) -> dict[str, np.ndarray]:
    """Terms for bins ``first .. last``, computed with a halo so edges match an unpartitioned run."""
    n = len(plan.times)
    a = max(0, first - plan.halo)
    b = min(n - 1, last + plan.halo)
    if rows is None:
        rows = partition_rows(plan, a, b)
    terms = compute_partition(plan, rows, a, b)
    core = slice(first - a, last - a + 1)
    return {k: v[core] for k, v in terms.items()}


class MemorySink:
    """Collects the derived partitions in memory (for :func:`finish`; the Python API's default)."""

    def __init__(self) -> None:
        self.pieces: list[dict[str, np.ndarray]] = []

    def add(self, first: int, block: dict[str, np.ndarray]) -> None:
        self.pieces.append(block)


def derive(terms: dict[str, np.ndarray], convergence: np.ndarray) -> dict[str, np.ndarray]:
    """The output variables of a partition: the terms (regime as int8 codes) plus true-north directions.

    ``convergence`` is the meridian convergence at each cluster centroid; grid
    bearings minus it are true bearings.
    """
    from .variables import wind_direction, wrap_degrees

    out = dict(terms)
    conv = np.asarray(convergence)[None, :]  # |convergence| < 180 degrees: the differences stay in (-360, 540)
    out["wind_from_direction"] = wrap_degrees(wind_direction(terms["u"], terms["v"]) - conv)
    with np.errstate(invalid="ignore"):
        bearing = np.rad2deg(np.arctan2(terms["grad_x"], terms["grad_y"]))
    out["gradient_bearing"] = wrap_degrees(bearing - conv)
    return out


def run_partitions(plan: BudgetPlan, sink, config: Config, *, progress: Progress = _noop) -> BudgetSummary:
    """Compute every time partition of ``plan`` in order and hand it to ``sink.add(first, derived)``.

    Partitions are ``budget.chunk`` long, or about :data:`AUTO_CHUNK`
    cluster-steps when it is not set; results do not depend on the choice.
    Returns the summary the report needs.
    """
    chunk = config["budget"]["chunk"]
    n = len(plan.times)
    if chunk:
        steps = int(align.parse_duration(chunk) / plan.interval)
    else:  # automatic: partitions of about AUTO_CHUNK cluster-steps bound the intermediates (same results)
        steps = max(4 * plan.halo, AUTO_CHUNK // max(1, len(plan.members)))
    layout = plan.layout
    summary = BudgetSummary.allocate(plan.times, plan.clusters)
    parts = partitions(n, steps)
    if len(parts) > 1:  # the last write cannot overlap a computation: end with small partitions
        a, b = parts.pop()
        parts += [(a + f, a + length) for f, length in partitions(b - a + 1, max(plan.halo, (b - a + 1) // 4))]

    def job(first: int, last: int) -> dict[str, np.ndarray]:
        return derive(run_partition(plan, first, last), layout.convergence)

    threads = min(PARTITION_THREADS, os.cpu_count() or 1, len(parts))
    for i, (first, block) in enumerate(_in_order(job, parts, threads)):
        summary.add(first, block)
        sink.add(first, block)
        if len(parts) > 1:
            progress(f"partition {i + 1} of {len(parts)}")
    return summary


#: partitions computed at once on threads (numpy releases the interpreter lock in its array operations)
PARTITION_THREADS = 2


def _in_order(job: Callable[[int, int], dict], parts: list[tuple[int, int]], threads: int):
    """Yield ``(first, job(first, last))`` for ``parts`` in order, computing up to ``threads`` ahead."""
    if threads <= 1:
        for first, last in parts:
            yield first, job(first, last)
        return
    from collections import deque
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=threads, thread_name_prefix="stationflow-budget") as pool:
        queue: deque = deque()
        try:
            for first, last in parts:
                queue.append((first, pool.submit(job, first, last)))
                if len(queue) >= threads:
                    done_first, fut = queue.popleft()
                    yield done_first, fut.result()
            while queue:
                done_first, fut = queue.popleft()
                yield done_first, fut.result()
        finally:
            for _, fut in queue:  # an error or an abandoned loop: start nothing more
                fut.cancel()


def finish(plan: BudgetPlan, chk: CheckResult, summary: BudgetSummary, pieces: list[dict[str, np.ndarray]] | None
           ) -> BudgetRun:
    """The :class:`BudgetRun`: with the dataset and table when ``pieces`` (all partitions) are given."""
    layout = plan.layout
    ds = table = None
    if pieces is not None:
        keys = list(pieces[0].keys())
        terms = {}
        for k in keys:  # join one variable at a time and free the pieces as we go
            terms[k] = np.concatenate([p.pop(k) for p in pieces], axis=0) if len(pieces) > 1 else pieces[0].pop(k)
        ds = to_dataset(terms, layout)
        table = to_table(ds)
    extras = {"inversion": summary.inversion.copy()} if summary.inversion is not None else {}
    periods = summary.periods(f"{plan.unit} h-1")
    return BudgetRun(chk, plan.network, ds, table, periods, plan.variable, plan.quantity, plan.unit, plan.interval,
                     plan.window, plan.settings, extras, summary, layout, plan.choices)


def budget_from_check(chk: CheckResult, config: Config, *, variable: str | None = None,
                      progress: Progress = _noop) -> BudgetRun:
    """The budget stages on an already checked data set, in memory (``run.dataset``, ``run.table``).

    Computed one time partition at a time and joined at the end; for long
    records use :func:`budget_to_files`, which keeps memory bounded.
    """
    plan = plan_budget(chk, config, variable=variable, progress=progress)
    progress("fitting planes and computing the budget")
    sink = MemorySink()
    summary = run_partitions(plan, sink, config, progress=progress)
    return finish(plan, chk, summary, sink.pieces)


def budget_to_files(chk: CheckResult, config: Config, out: str | Path, *, variable: str | None = None,
                    csv: bool = False, progress: Progress = _noop,
                    on_summary: Callable[[BudgetRun], None] | None = None) -> BudgetRun:
    """The budget written partition by partition to ``out``/budget.parquet, budget.nc (and budget.csv).

    Memory is bounded by one partition (plus the one being written); the
    returned run has ``summary`` but no ``dataset`` or ``table``.  Use
    :func:`stationflow.report.outputs.write_budget` with
    ``tables_written=True`` for the report and figures.  ``on_summary(run)``
    is called as soon as the last partition is computed, while the files are
    still being finished (to start the figures).
    """
    from .report.stream import BudgetFiles

    plan = plan_budget(chk, config, variable=variable, progress=progress)
    progress("fitting planes and computing the budget")
    with BudgetFiles(out, plan.layout, csv=csv) as sink:
        summary = run_partitions(plan, sink, config, progress=progress)
        run = finish(plan, chk, summary, None)
        if on_summary is not None:
            on_summary(run)
    return run


def _convergence(lat: np.ndarray, lon: np.ndarray, crs: str) -> np.ndarray:
    _, _, g, _ = geometry.project(lat, lon, crs)
    return g


LONG_NAMES = {
    "value": "fitted value at the cluster centre",
    "value_se": "standard error of value",
    "tendency": "local rate of change (centred difference over the window)",
    "tendency_se": "standard error of tendency",
    "advection": "horizontal advection -V.grad, mean over the window",
    "advection_se": "standard error of advection",
    "residual": "in-situ part: tendency minus advection",
    "residual_se": "standard error of residual",
    "advection_instant": "horizontal advection at the analysis time",
    "advection_instant_se": "standard error of advection_instant",
    "grad_x": "eastward (grid) component of the horizontal gradient",
    "grad_y": "northward (grid) component of the horizontal gradient",
    "grad_x_se": "standard error of grad_x",
    "grad_y_se": "standard error of grad_y",
    "u": "eastward (grid) wind, cluster mean",
    "v": "northward (grid) wind, cluster mean",
    "u_se": "standard error of u",
    "v_se": "standard error of v",
    "n_used": "stations used in the plane fit",
    "n_wind": "member stations with wind (0: network-mean wind used)",
    "dof": "residual degrees of freedom of the plane fit",
    "rms": "residual RMS of the plane fit",
    "cond": "condition number of the scaled design",
    "vertical_gradient": "fitted vertical gradient (positive: inversion)",
    "model_error": "standard error of each gradient component from the departure of the field from a plane",
    "vertical_gradient_se": "standard error of vertical_gradient",
    "wind_speed": "cluster mean of station wind speeds (scalar mean)",
    "wind_from_direction": "direction the cluster-mean wind blows from (true north)",
    "gradient_bearing": "bearing toward higher values (true north)",
    "inversion": "mast temperature difference, upper minus surface sensor (network mean)",
    "regime": "advective, in_situ, mixed, steady or undetermined",
    "implausible": "advected and in-situ parts each far larger than the change and cancelling (labelled undetermined)",
    "gap_filled": "value interpolated across a short gap (no fit at this time)",
    "divergence": "horizontal divergence of the wind (plane fits of u and v)",
    "divergence_se": "standard error of divergence",
    "vorticity": "vertical vorticity of the wind (plane fits of u and v)",
    "vorticity_se": "standard error of vorticity",
}


def _units(unit: str) -> dict[str, str]:
    rate = f"{unit} h-1"
    grad = f"{unit} km-1"
    return {
        "value": unit, "value_se": unit, "tendency": rate, "tendency_se": rate, "advection": rate,
        "advection_se": rate, "residual": rate, "residual_se": rate, "advection_instant": rate,
        "advection_instant_se": rate, "grad_x": grad, "grad_y": grad, "grad_x_se": grad, "grad_y_se": grad,
        "u": "m s-1", "v": "m s-1", "u_se": "m s-1", "v_se": "m s-1", "n_used": "1", "n_wind": "1", "dof": "1",
        "rms": unit, "cond": "1", "vertical_gradient": f"{unit} (100 m)-1", "vertical_gradient_se": f"{unit} (100 m)-1",
        "model_error": grad,
        "wind_speed": "m s-1", "wind_from_direction": "degree", "gradient_bearing": "degree", "inversion": "K",
        "regime": "1", "gap_filled": "1", "implausible": "1",
        "divergence": "s-1", "divergence_se": "s-1", "vorticity": "s-1", "vorticity_se": "s-1",
    }


def variable_attrs(name: str, layout: Layout) -> dict:
    """CF attributes of one output variable (``long_name``, ``units``, flags, ``standard_name``)."""
    units = _units(layout.unit)
    attrs: dict = {"long_name": LONG_NAMES.get(name, name)}
    if name in units:
        attrs["units"] = units[name]
    if name == "regime":  # CF flags: small integer codes with flag_values / flag_meanings
        attrs["flag_values"] = np.arange(len(REGIMES), dtype=np.int8)
        attrs["flag_meanings"] = " ".join(REGIMES)
    if name == "value":
        if layout.quantity == "potential_temperature":
            attrs["long_name"] = "potential temperature at the cluster centre"
            attrs["standard_name"] = "air_potential_temperature"
        elif layout.variable in CANONICAL:
            attrs["standard_name"] = layout.variable
    return attrs


TIME_ATTRS = {"long_name": "end of the analysis interval (UTC)", "standard_name": "time"}
COORD_ATTRS = {
    "cluster": {"long_name": "cluster id"},
    "stations": {"long_name": "member station ids joined by +"},
    "latitude": {"units": "degrees_north", "standard_name": "latitude", "long_name": "cluster centroid latitude"},
    "longitude": {"units": "degrees_east", "standard_name": "longitude", "long_name": "cluster centroid longitude"},
}


def global_attrs(layout: Layout) -> dict:
    """Global attributes of the NetCDF output."""
    return {"Conventions": "CF-1.8", "title": f"stationflow budget of {layout.variable}", "variable": layout.variable,
            "quantity": layout.quantity, "source": "stationflow"}


def to_dataset(terms: dict, layout: Layout):
    """The budget as a CF-style ``xarray.Dataset`` with dims (time, cluster); ``terms`` from :func:`derive`."""
    import xarray as xr

    clusters = layout.clusters
    data_vars = {}
    for name, arr in terms.items():
        arr = np.asarray(arr, dtype=np.int8) if name == "regime" else np.asarray(arr)
        data_vars[name] = (("time", "cluster"), arr, variable_attrs(name, layout))
    coords = {"time": ("time", pd.DatetimeIndex(layout.times).tz_convert("UTC").tz_localize(None).to_numpy("datetime64[ns]"),
                       TIME_ATTRS)}
    for name in ("cluster", "stations"):
        coords[name] = ("cluster", clusters[name].astype(str).to_numpy(), COORD_ATTRS[name])
    for name in ("latitude", "longitude"):
        coords[name] = ("cluster", clusters[name].to_numpy(float), COORD_ATTRS[name])
    return xr.Dataset(data_vars, coords=coords, attrs=global_attrs(layout))


TABLE_COLUMNS = ["time", "cluster", "stations", "n_used", "latitude", "longitude", "value", "tendency", "advection",
                 "residual", "tendency_se", "advection_se", "residual_se", "grad_x", "grad_y", "u", "v", "regime"]


def to_table(ds) -> pd.DataFrame:
    """Tidy table, one row per cluster and time: the contract columns first, then the extras."""
    n_t, n_c = ds.sizes["time"], ds.sizes["cluster"]
    code = np.tile(np.arange(n_c, dtype=np.int32), n_t)
    cols: dict[str, object] = {
        "time": pd.DatetimeIndex(ds["time"].values).tz_localize("UTC").repeat(n_c),
        "cluster": pd.Categorical.from_codes(code, categories=pd.Index(ds["cluster"].values.astype(str))),
        "stations": pd.Categorical.from_codes(code, categories=pd.Index(ds["stations"].values.astype(str))),
        "latitude": np.tile(ds["latitude"].values, n_t),
        "longitude": np.tile(ds["longitude"].values, n_t),
    }
    for name in ds.data_vars:
        if name == "regime":
            cols[name] = pd.Categorical.from_codes(ds[name].values.reshape(-1), categories=list(REGIMES))
        else:
            cols[name] = ds[name].values.reshape(-1)
    t = pd.DataFrame(cols, copy=False)
    extra = [c for c in t.columns if c not in TABLE_COLUMNS]
    return t[TABLE_COLUMNS + extra]
