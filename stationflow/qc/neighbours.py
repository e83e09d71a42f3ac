"""The spatial (buddy) test: each value against what its neighbours predict at that time.

Cold-air pools are real (Fiebrich and Crawford 2001): at night in light wind the test is relaxed
and can only make a value suspect.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..config import Config
from ..network.grid import station_columns
from .thresholds import is_concentration


def row_nanmedian(a: np.ndarray) -> np.ndarray:
    """Median of the finite values of each row of a 2-D array (NaN for a row without any).

    The same numbers as ``np.nanmedian(a, axis=1)``, by one sort of the whole
    array (NaN sort last) instead of a masked sort per row.
    """
    a = np.asarray(a, float)
    if a.shape[0] == 0 or a.shape[1] == 0:
        return np.full(a.shape[0], np.nan)
    s = np.sort(a, axis=1)
    n = np.count_nonzero(~np.isnan(a), axis=1)
    lo = np.maximum((n - 1) // 2, 0)
    hi = np.maximum(n // 2, 0)
    rows = np.arange(a.shape[0])
    out = (s[rows, lo] + s[rows, hi]) / 2.0
    return np.where(n > 0, out, np.nan)


def solar_elevation(times: pd.DatetimeIndex | np.ndarray, latitude: float, longitude: float) -> np.ndarray:
    """Approximate solar elevation [degree] (Spencer 1971 declination and equation of time).

    Accurate to a fraction of a degree: enough to tell day from night.
    """
    t = pd.DatetimeIndex(times)
    doy = t.day_of_year.to_numpy()
    hours = t.hour.to_numpy() + t.minute.to_numpy() / 60.0 + t.second.to_numpy() / 3600.0
    g = 2 * np.pi / 365.0 * (doy - 1 + (hours - 12) / 24)
    decl = (0.006918 - 0.399912 * np.cos(g) + 0.070257 * np.sin(g) - 0.006758 * np.cos(2 * g)
            + 0.000907 * np.sin(2 * g) - 0.002697 * np.cos(3 * g) + 0.00148 * np.sin(3 * g))
    eqt = 229.18 * (0.000075 + 0.001868 * np.cos(g) - 0.032077 * np.sin(g) - 0.014615 * np.cos(2 * g)
                    - 0.040849 * np.sin(2 * g))
    solar_time = hours * 60 + eqt + 4 * longitude
    ha = np.deg2rad(solar_time / 4 - 180)
    lat = np.deg2rad(latitude)
    sin_el = np.sin(lat) * np.sin(decl) + np.cos(lat) * np.cos(decl) * np.cos(ha)
    return np.rad2deg(np.arcsin(np.clip(sin_el, -1, 1)))


@dataclass(frozen=True)
class BuddyRules:
    """The spatial test's settings (``[qc]`` spatial_* keys): neighbours per prediction, the farthest a
    neighbour may be (0: any), the suspect and bad thresholds in robust standard deviations, the smallest
    residual that can fail [unit], the factor on the thresholds where relaxed, one reading's standard
    uncertainty [unit] (the fits' weights), and the passes."""

    neighbours: int = 6
    max_distance_m: float = 0.0
    suspect_z: float = 3.0
    bad_z: float = 6.0
    floor: float = 0.0
    relax: float = 2.0
    sigma: float = 1.0
    passes: int = 2


def agrees_with_neighbours(values: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray,
                           rules: BuddyRules = BuddyRules(), *, relaxed: np.ndarray | None = None,
                           predictors: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Spatial (buddy) test on a (n_times, n_stations) grid.

    Each station is predicted from its ``rules.neighbours`` nearest stations by a
    leave-one-out plane fit evaluated at the station, after adjusting all
    values to the station's height with the vertical gradient fitted over
    the whole network at that time (elevation-aware, and stable where a
    local fit with elevation would not be).  Its residual
    is studentised by the prediction's leverage (``r / sqrt(1 + h)``, h the
    prediction variance in units of one reading's, large where the station
    lies outside its neighbours) and compared with a robust spread of all
    stations' residuals at that time (1.4826 MAD): beyond ``suspect_z`` it
    fails, beyond ``bad_z`` it is bad,
    never below ``floor``.  Where ``relaxed`` (per time) is True, values
    *below* their prediction get thresholds multiplied by ``relax`` and are
    never made bad: a cold pool on a calm clear night is real.
    ``predictors`` (same shape) are the values the predictions are made
    from; default ``values`` (pass values already flagged as NaN here so a
    faulty station does not spoil its neighbours' predictions).  With
    ``passes = 2`` (default) the test is run again with the first pass's
    failures removed from the predictors.

    Returns ``(passed, bad, residual)`` arrays of shape (n_times, n_stations).
    """
    from scipy.spatial import cKDTree

    vals = np.asarray(values, float)
    n_t, n_s = vals.shape
    k = min(rules.neighbours, n_s - 1)
    if k < 3:
        return np.ones(vals.shape, bool), np.zeros(vals.shape, bool), np.full(vals.shape, np.nan)
    tree = cKDTree(np.column_stack([x, y]))
    dist, idx = tree.query(np.column_stack([x, y]), k=k + 1)
    far = dist[:, 1:].max(axis=1) > rules.max_distance_m if rules.max_distance_m > 0 else None
    hood = _Neighbourhood(np.asarray(x), np.asarray(y), np.asarray(z, float), [idx[i, 1:] for i in range(n_s)], far)
    base = vals if predictors is None else np.asarray(predictors, float)
    pred, leverage = _buddy_predictions(base, hood, rules.sigma)
    for _ in range(rules.passes - 1):
        # later passes leave out the values the previous pass failed; the fits are independent per
        # time, so only the times where a predictor changed are fitted again (the same numbers)
        first, _, _ = _judge(vals, pred, leverage, rules, relaxed)
        src = np.where(first, base, np.nan)
        rows = np.flatnonzero((np.isnan(src) != np.isnan(base)).any(axis=1))
        if rows.size:
            pred = pred.copy()
            leverage = leverage.copy()
            pred[rows], leverage[rows] = _buddy_predictions(src[rows], hood, rules.sigma)
        base = src
    return _judge(vals, pred, leverage, rules, relaxed)


def neighbour_predictions(values: np.ndarray, x: np.ndarray, y: np.ndarray, z: np.ndarray, *, neighbours: int = 6,
                          sigma: float = 1.0) -> np.ndarray:
    """Each station's value (n_times, n_stations) predicted from its ``neighbours`` nearest stations by a
    leave-one-out plane fit at the station, heights adjusted with the network's vertical gradient of each
    time: the predictor of :func:`agrees_with_neighbours`, for other uses (sensor offsets)."""
    from scipy.spatial import cKDTree

    vals = np.asarray(values, float)
    n_s = vals.shape[1]
    k = min(neighbours, n_s - 1)
    if k < 3:
        return np.full(vals.shape, np.nan)
    _, idx = cKDTree(np.column_stack([x, y])).query(np.column_stack([x, y]), k=k + 1)
    hood = _Neighbourhood(np.asarray(x), np.asarray(y), np.asarray(z, float), [idx[i, 1:] for i in range(n_s)], None)
    return _buddy_predictions(vals, hood, sigma)[0]


@dataclass
class _Neighbourhood:
    """Station positions [m], each station's neighbours, and the stations whose neighbours are too far."""

    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    members: list[np.ndarray]
    far: np.ndarray | None


def _buddy_predictions(src: np.ndarray, hood: _Neighbourhood, sigma: float) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-out predictions of every station from its neighbours, and their leverage (see above)."""
    from ..estimate.planes import fit_planes

    x, y, zz = hood.x, hood.y, hood.z
    n_t, n_s = src.shape
    centres = np.column_stack([x, y])
    # one vertical gradient per time from the whole network (stable), then a plain plane among
    # the neighbours of the lapse-adjusted values: pred_s = plane(v - g z)(s) + g z_s
    gamma = np.zeros(n_t)
    if np.isfinite(zz).all() and np.ptp(zz) > 30.0 and n_s >= 6:
        net = fit_planes(src, x, y, [np.arange(n_s)], z=zz, sigma=sigma, min_stations=5, residuals=False)
        gamma = np.nan_to_num(net.grad_z[:, 0])
    z0 = np.where(np.isfinite(zz), zz, 0.0)
    adjusted = src - gamma[:, None] * z0[None, :]
    fit = fit_planes(adjusted, x, y, hood.members, sigma=sigma, centres=centres, residuals=False)
    pred = fit.value + gamma[:, None] * z0[None, :]
    leverage = fit.var_value / sigma ** 2  # prediction variance in units of one reading's
    if hood.far is not None:
        pred[:, hood.far] = np.nan
    return pred, leverage


def _judge(vals: np.ndarray, pred: np.ndarray, leverage: np.ndarray, rules: BuddyRules,
           relaxed: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Studentised residuals against the robust spread of each time: (passed, bad, residual)."""
    r = vals - pred
    # studentise: an extrapolated prediction (station outside its neighbours) is less certain
    rs = r / np.sqrt(1.0 + leverage)
    med = row_nanmedian(rs)[:, None]
    mad = 1.4826 * row_nanmedian(np.abs(rs - med))[:, None]
    dev = rs - med
    # relaxed (night, light wind) only for values colder/lower than predicted: cold pools are real
    cold_relax = np.zeros(vals.shape, bool) if relaxed is None else (np.asarray(relaxed)[:, None] & (dev < 0))
    scale = np.where(cold_relax, rules.relax, 1.0)
    thr_s = np.fmax(rules.suspect_z * mad, rules.floor) * scale
    thr_b = np.fmax(rules.bad_z * mad, 2 * rules.floor) * scale
    fin = np.isfinite(dev)
    passed = ~(fin & (np.abs(dev) > thr_s))
    bad = fin & (np.abs(dev) > thr_b) & ~cold_relax
    return passed, bad, r


@dataclass
class SpatialTest:
    """What the buddy test of every variable shares: the surface stations, the grid, light-wind times.

    The set-up reads the rows in the order of the observations; ``order`` maps them to the (station,
    time) order the other tests use (sorted row ``i`` is row ``order[i]``).
    """

    values: dict[str, np.ndarray]
    cfg: Config
    th: dict
    names: list[str]
    surface_ids: list[str]
    sx: np.ndarray
    sy: np.ndarray
    sz: np.ndarray
    times: pd.DatetimeIndex
    inside: np.ndarray
    flat: np.ndarray
    lat0: float
    lon0: float
    light: np.ndarray | None
    order: np.ndarray
    work: dict = field(default_factory=dict)

    @classmethod
    def setup(cls, obs: pd.DataFrame, stations: pd.DataFrame, names: list[str], wind: bool, cfg: Config, th: dict,
              interval: pd.Timedelta, order: np.ndarray) -> "SpatialTest | None":
        from ..network.geometry import assign_roles, project
        from ..network.grid import bin_index, grid_times

        qcfg = cfg["qc"]
        st = stations.reset_index(drop=True)
        x, y, _, _ = project(st["latitude"].to_numpy(), st["longitude"].to_numpy())
        surface = assign_roles(st, x, y) == "surface"
        surface_ids = st["station_id"][surface].tolist()
        if len(surface_ids) < 5:
            return None
        t0 = obs["time"].min().ceil(interval)
        rows = bin_index(obs["time"], t0, interval)
        col = station_columns(obs["station_id"], surface_ids)
        times = grid_times(t0, obs["time"].max(), interval)
        inside = (col >= 0) & (rows >= 0) & (rows < len(times))
        flat = rows * len(surface_ids) + col  # each row's cell in the (time, station) grid
        # the values as arrays, taken here: the threads that test the variables share no pandas object
        values = {v: obs[v].to_numpy(float) for v in names + (["wind_speed"] if wind else [])}
        sp = cls(values, cfg, th, list(names), surface_ids, x[surface], y[surface], st["elevation"].to_numpy(float)[surface],
                 times, inside, flat,
                 float(st["latitude"].mean()), float(st["longitude"].mean()), None, order)
        if wind:
            sp.light = ~(row_nanmedian(sp.bin_means("wind_speed")) >= qcfg["spatial_light_wind"])
        return sp

    def bin_means(self, v: str, usable: np.ndarray | None = None) -> np.ndarray:
        """(time, station) bin means of the finite (and ``usable``) values of ``v``, as :func:`stationflow.network.grid.to_grid` gives."""
        from ..network.grid import cell_means

        ok = self.inside if usable is None else self.inside & usable
        return cell_means(self.values[v], ok, self.flat, (len(self.times), len(self.surface_ids)))[0]

    def grid(self, v: str, fired_v: dict[str, np.ndarray], parts: int) -> None:
        """Bin means of ``v`` at the surface stations, without the values its other tests failed, for a
        test in ``parts`` parts of the times."""
        already = np.zeros(len(self.order), bool)
        for m in fired_v.values():  # in (station, time) order
            already |= m
        usable = np.empty_like(already)
        usable[self.order] = ~already  # in the order of the observations
        data = self.bin_means(v, usable)
        night = solar_elevation(self.times, self.lat0, self.lon0) < 0
        relaxed = night & (self.light if self.light is not None else True)
        self.work[v] = (np.log(np.fmax(data, 0.5)) if is_concentration(v, self.cfg) else data, relaxed, [None] * parts)

    def test(self, v: str, part: int) -> None:
        """The buddy test of ``v`` at the times of ``part``: the test is independent per time."""
        qcfg = self.cfg["qc"]
        data, relaxed, results = self.work[v]
        a, b = (data.shape[0] * part) // len(results), (data.shape[0] * (part + 1)) // len(results)
        floor = self.th["spatial_floor"].get(v, np.log(2.0) if is_concentration(v, self.cfg) else 0.0)
        sigma = self.cfg["uncertainty"]["sensor"]
        rules = BuddyRules(neighbours=qcfg["spatial_neighbours"], max_distance_m=qcfg["spatial_max_distance_km"] * 1000.0,
                           suspect_z=qcfg["spatial_suspect"], bad_z=qcfg["spatial_bad"], floor=floor,
                           relax=qcfg["spatial_relax"], sigma=float(sigma.get(v, 1.0)))
        with np.errstate(all="ignore"):  # thread-safe, unlike warnings.catch_warnings (this runs on a thread)
            passed, bad, _ = agrees_with_neighbours(data[a:b], self.sx, self.sy, self.sz, rules, relaxed=relaxed[a:b])
        results[part] = (passed, bad)

    def finish(self, v: str, fired_v: dict[str, np.ndarray], finite: np.ndarray) -> None:
        """Map the parts' results back to the rows (``finite``: the values present, in (station, time) order)."""
        results = self.work.pop(v)[2]
        passed = np.concatenate([r[0] for r in results])
        bad = np.concatenate([r[1] for r in results])
        n = len(self.order)
        fail = np.zeros(n, bool)
        badm = np.zeros(n, bool)
        inside, flat = self.inside, self.flat
        fail[inside] = ~passed.reshape(-1)[flat[inside]]
        badm[inside] = bad.reshape(-1)[flat[inside]]
        fired_v["spatial"] = fail[self.order] & finite
        fired_v["spatial_bad"] = badm[self.order] & finite
