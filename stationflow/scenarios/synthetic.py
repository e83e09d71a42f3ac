"""Synthetic networks and fields with known truth: for tests, benchmarks and the demo.

A :class:`Field` is a function of position (x, y [m] on the local grid,
z [m] above sea level), sensor height above ground and time [s]; it also
gives the uniform wind.  Its true local tendency, horizontal gradient,
advection ``-V.grad`` and in-situ part (tendency minus advection) at any
point follow from it by central differences, so every scenario carries its
own answer.

:class:`LinearField` is the analytic workhorse: a plane whose pattern is
carried by a time-varying uniform wind, plus an in-situ source, a vertical
gradient and optional non-planar terms.  :func:`frost_valley` and
:func:`smoke_town` are the two demo scenarios (invented places).  Running
``python -m stationflow.scenarios.synthetic DIR`` writes the sample data.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from stationflow.variables import wind_direction

from ..config import to_toml
from ..estimate.thermo import KAPPA, P_REF, standard_pressure

Array = np.ndarray
Profile = Callable[[Array], Array]  # a function of time [s since start]


def constant(value: float) -> Profile:
    return lambda t: np.full(np.shape(t), float(value))


def ramp(points: list[tuple[float, float]]) -> Profile:
    """Piecewise-linear profile through (hours since start, value) points."""
    h = np.array([p[0] for p in points], float) * 3600.0
    v = np.array([p[1] for p in points], float)
    return lambda t: np.interp(np.asarray(t, float), h, v)


def smooth(points: list[tuple[float, float]], width_h: float = 0.5) -> Profile:
    """A piecewise-linear profile smoothed with a Gaussian of ``width_h`` hours."""
    base = ramp(points)
    off = np.linspace(-2.5, 2.5, 11) * width_h * 3600.0
    wts = np.exp(-0.5 * (off / (width_h * 3600.0)) ** 2)
    wts /= wts.sum()
    return lambda t: sum(w * base(np.asarray(t, float) + o) for w, o in zip(wts, off))


class Field:
    """A scalar field with a uniform wind; subclasses define :meth:`value`."""

    def value(self, x: Array, y: Array, z: Array, t: Array, height: Array | float = 2.0) -> Array:
        """Field value at position and time [field unit]."""
        raise NotImplementedError

    def wind(self, t: Array) -> tuple[Array, Array]:
        """Uniform wind (u, v) [m s-1] at time t [s]."""
        raise NotImplementedError

    # derived truth -----------------------------------------------------
    def gradient(self, x: Array, y: Array, z: Array, t: Array) -> tuple[Array, Array]:
        """Horizontal gradient at constant height [unit m-1], by central differences."""
        h = 1.0
        gx = (self.value(x + h, y, z, t) - self.value(x - h, y, z, t)) / (2 * h)
        gy = (self.value(x, y + h, z, t) - self.value(x, y - h, z, t)) / (2 * h)
        return gx, gy

    def tendency(self, x: Array, y: Array, z: Array, t: Array) -> Array:
        """Local rate of change [unit s-1]."""
        h = 1.0
        return (self.value(x, y, z, t + h) - self.value(x, y, z, t - h)) / (2 * h)

    def advection(self, x: Array, y: Array, z: Array, t: Array) -> Array:
        """Horizontal advection -V.grad [unit s-1]."""
        u, v = self.wind(t)
        gx, gy = self.gradient(x, y, z, t)
        return -(u * gx + v * gy)

    def in_situ(self, x: Array, y: Array, z: Array, t: Array) -> Array:
        """Everything that is not horizontal advection [unit s-1]."""
        return self.tendency(x, y, z, t) - self.advection(x, y, z, t)


@dataclass
class LinearField(Field):
    """``base + G(t).(r - r0(t)) + integral S dt + gamma(t) (z - z_ref) + extra``.

    ``r0(t)`` is the displacement by the uniform wind, so the plane pattern
    is carried by the wind: the horizontal advection is exactly
    ``-V.G``.  Profiles are functions of time in seconds.  ``cold_pool(t)``
    [K] adds a non-planar term ``-cold_pool(t) exp(-(z - z_floor)/depth)``,
    and ``mast_inversion(t)`` [K per m above 2 m] adds a near-surface
    inversion seen only by sensors above 2 m.
    """

    base: float = 280.0
    gx: Profile = field(default_factory=lambda: constant(0.0))
    gy: Profile = field(default_factory=lambda: constant(0.0))
    u: Profile = field(default_factory=lambda: constant(0.0))
    v: Profile = field(default_factory=lambda: constant(0.0))
    source: Profile = field(default_factory=lambda: constant(0.0))
    gamma: Profile = field(default_factory=lambda: constant(0.0))
    z_ref: float = 0.0
    cold_pool: Profile | None = None
    z_floor: float = 0.0
    pool_depth: float = 25.0
    mast_inversion: Profile | None = None
    horizon_s: float = 3 * 86400.0
    _cache: dict = field(default_factory=dict, repr=False)

    def _integrals(self):
        if "grid" not in self._cache:
            tg = np.arange(-3600.0, self.horizon_s + 3600.0, 10.0)
            u, v, s = self.u(tg), self.v(tg), self.source(tg)

            def cum(f):
                out = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]) * np.diff(tg))])
                return out - np.interp(0.0, tg, out)
            self._cache["grid"] = (tg, cum(u), cum(v), cum(s))
        return self._cache["grid"]

    def displacement(self, t: Array) -> tuple[Array, Array]:
        """Wind displacement since t = 0 [m]."""
        tg, x0, y0, _ = self._integrals()
        return np.interp(t, tg, x0), np.interp(t, tg, y0)

    def value(self, x, y, z, t, height=2.0):
        tg, x0, y0, si = self._integrals()
        t = np.asarray(t, float)
        dx = x - np.interp(t, tg, x0)
        dy = y - np.interp(t, tg, y0)
        val = self.base + self.gx(t) * dx + self.gy(t) * dy + np.interp(t, tg, si) + self.gamma(t) * (np.asarray(z) - self.z_ref)
        if self.cold_pool is not None:
            val = val - self.cold_pool(t) * np.exp(-(np.asarray(z, float) - self.z_floor) / self.pool_depth)
        if self.mast_inversion is not None:
            val = val + self.mast_inversion(t) * np.maximum(np.asarray(height, float) - 2.0, 0.0)
        return val

    def wind(self, t):
        return self.u(t), self.v(t)


@dataclass
class PlumeField(Field):
    """Background + a Gaussian band carried by the wind + a source blob (concentrations).

    ``background + peak exp(-s^2 / 2 L^2) + integral(source) * blob(x, y)`` where
    ``s`` is the distance of the point from the band's axis, which moves
    with the wind.  Units are those of the concentration (ug m-3).
    """

    background: Profile = field(default_factory=lambda: constant(8.0))
    peak: float = 60.0
    width_m: float = 8000.0
    axis_start: tuple[float, float] = (-30000.0, 0.0)
    u: Profile = field(default_factory=lambda: constant(4.0))
    v: Profile = field(default_factory=lambda: constant(0.0))
    source: Profile = field(default_factory=lambda: constant(0.0))
    blob_centre: tuple[float, float] = (0.0, 0.0)
    blob_width_m: float = 6000.0
    horizon_s: float = 2 * 86400.0
    _lin: LinearField | None = None

    def __post_init__(self):
        self._lin = LinearField(u=self.u, v=self.v, source=self.source, horizon_s=self.horizon_s)

    def value(self, x, y, z, t, height=2.0):
        t = np.asarray(t, float)
        x0, y0 = self._lin.displacement(t)
        u0, v0 = self.u(np.zeros(1))[0], self.v(np.zeros(1))[0]
        nrm = np.hypot(u0, v0) or 1.0
        ex, ey = u0 / nrm, v0 / nrm  # band moves along the initial wind
        s = (x - self.axis_start[0] - x0) * ex + (y - self.axis_start[1] - y0) * ey
        band = self.peak * np.exp(-0.5 * (s / self.width_m) ** 2)
        tg, _, _, si = self._lin._integrals()
        blob = np.exp(-0.5 * ((x - self.blob_centre[0]) ** 2 + (y - self.blob_centre[1]) ** 2) / self.blob_width_m ** 2)
        return self.background(t) + band + np.interp(t, tg, si) * blob

    def wind(self, t):
        return self.u(t), self.v(t)


def potential_temperature_field(f: Field) -> Field:
    """The potential-temperature view of a temperature field (standard-atmosphere pressure)."""

    class _Theta(Field):
        def value(self, x, y, z, t, height=2.0):
            return f.value(x, y, z, t, height) * (P_REF / standard_pressure(z)) ** KAPPA

        def wind(self, t):
            return f.wind(t)

    return _Theta()


# ---------------------------------------------------------------------------
# networks and sampling
# ---------------------------------------------------------------------------

def network(n: int, *, radius_km: float = 20.0, seed: int = 0, lat0: float = 45.0, lon0: float = 10.0,
            elevation: Callable[[Array, Array], Array] | None = None, prefix: str = "S",
            jitter: float = 0.35) -> pd.DataFrame:
    """A network of ``n`` stations on a jittered sunflower pattern inside a disc.

    Returns the station table (``station_id``, ``latitude``, ``longitude``,
    ``elevation``, ``sensor_height``) plus local ``x``, ``y`` [m] of an
    azimuthal equidistant projection centred at (lat0, lon0).
    """
    from pyproj import Transformer

    rng = np.random.default_rng(seed)
    i = np.arange(n) + 0.5
    r = np.sqrt(i / n) * radius_km * 1000.0
    phi = i * np.pi * (3 - np.sqrt(5))
    step = radius_km * 1000.0 / np.sqrt(n)
    x = r * np.cos(phi) + rng.normal(0, jitter * step, n)
    y = r * np.sin(phi) + rng.normal(0, jitter * step, n)
    crs = f"+proj=aeqd +lat_0={lat0} +lon_0={lon0} +datum=WGS84 +units=m +no_defs"
    lon, lat = Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(x, y)
    z = elevation(x, y) if elevation is not None else np.full(n, 200.0)
    width = len(str(n))
    return pd.DataFrame({"station_id": [f"{prefix}{k + 1:0{width}d}" for k in range(n)],
                         "latitude": np.round(lat, 6), "longitude": np.round(lon, 6),
                         "elevation": np.round(z, 1), "sensor_height": 2.0, "x": x, "y": y})


def local_xy(stations: pd.DataFrame, lat0: float, lon0: float) -> tuple[Array, Array]:
    """Grid coordinates [m] of the stations in the generator's projection."""
    from pyproj import Transformer

    crs = f"+proj=aeqd +lat_0={lat0} +lon_0={lon0} +datum=WGS84 +units=m +no_defs"
    x, y = Transformer.from_crs("EPSG:4326", crs, always_xy=True).transform(
        stations["longitude"].to_numpy(), stations["latitude"].to_numpy())
    return np.asarray(x), np.asarray(y)


def sample(f: Field, stations: pd.DataFrame, times: pd.DatetimeIndex, *, variable: str = "air_temperature",
           noise: float = 0.0, wind_noise: float = 0.0, direction_noise: float = 0.0, seed: int = 0,
           missing: float = 0.0, start: pd.Timestamp | None = None, wind: bool = True,
           offset: float = 0.0) -> pd.DataFrame:
    """Sample a field at the stations: tidy observations in SI units.

    ``times`` are UTC; the field's clock starts at ``start`` (default the
    first time).  Wind is reported as speed and direction from the field's
    uniform wind plus noise; ``missing`` is the fraction of rows dropped at
    random; ``offset``: each station reads high or low by a constant drawn
    from a normal distribution of this standard deviation (calibration
    offsets, as real sensors have).
    """
    rng = np.random.default_rng(seed)
    start = start or times[0]
    ts = ((times - start) / pd.Timedelta(seconds=1)).to_numpy(float)
    n_t, n_s = len(times), len(stations)
    x = np.broadcast_to(stations["x"].to_numpy(float), (n_t, n_s))
    y = np.broadcast_to(stations["y"].to_numpy(float), (n_t, n_s))
    z = np.broadcast_to(stations["elevation"].to_numpy(float), (n_t, n_s))
    h = np.broadcast_to(stations["sensor_height"].to_numpy(float), (n_t, n_s))
    tt = np.broadcast_to(ts[:, None], (n_t, n_s))
    val = f.value(x, y, z, tt, h) + rng.normal(0, noise, (n_t, n_s)) if noise else f.value(x, y, z, tt, h)
    if offset:
        val = val + np.random.default_rng(seed + 7919).normal(0, offset, n_s)[None, :]
    out = pd.DataFrame({"station_id": np.tile(stations["station_id"].to_numpy(), n_t),
                        "time": np.repeat(times, n_s), variable: np.asarray(val).reshape(-1)})
    if wind:
        u, v = f.wind(ts)
        uu = np.broadcast_to(u[:, None], (n_t, n_s)) + rng.normal(0, wind_noise, (n_t, n_s)) * (wind_noise > 0)
        vv = np.broadcast_to(v[:, None], (n_t, n_s)) + rng.normal(0, wind_noise, (n_t, n_s)) * (wind_noise > 0)
        speed = np.hypot(uu, vv)
        direction = wind_direction(uu, vv)
        if direction_noise:
            direction = (direction + rng.normal(0, direction_noise, direction.shape)) % 360.0
        direction = np.where(direction == 0, 360.0, direction)
        out["wind_speed"] = speed.reshape(-1)
        out["wind_from_direction"] = np.where(speed.reshape(-1) > 0, direction.reshape(-1), np.nan)
    if missing:
        out = out[rng.random(len(out)) >= missing]
    return out.reset_index(drop=True)


@dataclass
class Scenario:
    """A generated scenario: stations, observations and its known truth."""

    name: str
    stations: pd.DataFrame
    observations: pd.DataFrame
    field: Field
    start: pd.Timestamp
    lat0: float
    lon0: float
    variable: str
    faults: pd.DataFrame
    phases: list[dict]
    config: dict
    description: str = ""

    def truth_at(self, x: Array, y: Array, z: Array, times: pd.DatetimeIndex, *, quantity: Field | None = None) -> dict[str, Array]:
        """True tendency, advection, in-situ part [unit h-1] and gradient [unit km-1].

        Evaluated at grid points (x, y, z) in the generator's projection for
        each time; arrays of shape (n_times, n_points).
        """
        f = quantity or self.field
        t = ((times - self.start) / pd.Timedelta(seconds=1)).to_numpy(float)[:, None]
        X, Y, Z = (np.broadcast_to(np.asarray(a, float)[None, :], (len(times), np.size(x))) for a in (x, y, z))
        T = np.broadcast_to(t, X.shape)
        gx, gy = f.gradient(X, Y, Z, T)
        ten = f.tendency(X, Y, Z, T) * 3600
        adv = f.advection(X, Y, Z, T) * 3600
        return {"tendency": ten, "advection": adv, "residual": ten - adv, "grad_x": gx * 1000, "grad_y": gy * 1000,
                "value": f.value(X, Y, Z, T)}

    def cluster_truth(self, table: pd.DataFrame, *, half_window: int, quantity: Field | None = None) -> pd.DataFrame:
        """Known truth for a budget table, on the same terms as the estimator.

        For each cluster and time: the tendency as the centred difference of
        the member-station mean value over the window, the advection at the
        member centroid averaged over the window, and their difference.
        Returns ``time, cluster, tendency_true, advection_true, residual_true``
        for the local clusters (the regional rows' plane through a curved
        field has no truth of this kind).
        """
        if "scale" in table:
            table = table[table["scale"].astype(str) == "local"]
        st = self.stations.set_index("station_id")
        times = pd.DatetimeIndex(sorted(pd.DatetimeIndex(table["time"]).unique()))
        out = []
        h = int(half_window)
        for cluster, grp in table.groupby("cluster", sort=False):
            ids = grp["stations"].iloc[0].split("+")
            xs, ys, zs = (st.loc[ids, c].to_numpy(float) for c in ("x", "y", "elevation"))
            members = self.truth_at(xs, ys, zs, times, quantity=quantity)
            centre = self.truth_at(np.array([xs.mean()]), np.array([ys.mean()]), np.array([zs.mean()]), times,
                                   quantity=quantity)
            value = members["value"].mean(axis=1)
            dt = (times[1] - times[0]).total_seconds() if len(times) > 1 else 1.0
            ten = np.full(len(times), np.nan)
            ten[h:-h] = (value[2 * h:] - value[:-2 * h]) / (2 * h * dt) * 3600
            w = np.ones(2 * h + 1)
            w[0] = w[-1] = 0.5
            adv = np.convolve(centre["advection"][:, 0], w / w.sum(), mode="same")
            adv[:h] = np.nan
            adv[len(adv) - h:] = np.nan
            out.append(pd.DataFrame({"time": times, "cluster": cluster, "tendency_true": ten,
                                     "advection_true": adv, "residual_true": ten - adv}))
        return pd.concat(out, ignore_index=True)


# ---------------------------------------------------------------------------
# faults
# ---------------------------------------------------------------------------

def inject_faults(obs: pd.DataFrame, faults: list[dict], *, seed: int = 0) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Apply sensor faults; returns (observations, fault table).

    Each fault: ``station_id``, ``variable``, ``kind`` (``spike``, ``range``,
    ``stuck``, ``bias``, ``wind_impossible``), ``start``, ``end`` (UTC) and
    ``size``.  The fault table lists every affected (station, time, variable).
    """
    rng = np.random.default_rng(seed)
    obs = obs.copy()
    rows = []
    for f in faults:
        sel = (obs["station_id"] == f["station_id"]) & (obs["time"] >= f["start"]) & (obs["time"] <= f["end"])
        idx = np.flatnonzero(sel.to_numpy())
        var = f["variable"]
        kind = f["kind"]
        if kind == "spike":
            pick = rng.choice(idx, size=min(int(f.get("count", 3)), idx.size), replace=False)
            pick = pick[np.argsort(pick)]
            obs.loc[obs.index[pick], var] += f["size"]
            idx = pick
        elif kind == "range":
            pick = rng.choice(idx, size=min(int(f.get("count", 2)), idx.size), replace=False)
            obs.loc[obs.index[pick], var] = f["size"]
            idx = pick
        elif kind == "stuck":
            obs.loc[obs.index[idx], var] = obs.loc[obs.index[idx[0]], var]
        elif kind == "bias":
            obs.loc[obs.index[idx], var] += f["size"]
        elif kind == "wind_impossible":
            pick = rng.choice(idx, size=min(int(f.get("count", 2)), idx.size), replace=False)
            obs.loc[obs.index[pick], var] = f["size"]
            idx = pick
        else:
            raise ValueError(f"unknown fault kind {kind!r}")
        rows.append(pd.DataFrame({"station_id": f["station_id"], "time": obs["time"].to_numpy()[idx],
                                  "variable": var, "kind": kind}))
    table = pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(columns=["station_id", "time", "variable", "kind"])
    return obs, table


# ---------------------------------------------------------------------------
# the demo scenarios (invented places)
# ---------------------------------------------------------------------------

FROST_TZ = "America/Los_Angeles"
TOWN_TZ = "Europe/Madrid"


def frost_valley(seed: int = 7) -> Scenario:
    """A frost night in Hollin Valley, an invented fruit-growing valley.

    14 stations on the valley floor and slopes (about 380-560 m), one mast
    (HV07) with a second sensor at 10 m.  Evening (17-21 local): a cold front
    with north-west wind of about 5 m/s carries cold air in (advective
    cooling about -1.8 K/h).  Then the wind drops, the sky clears and the air
    cools in place (radiative cooling about -1.5 K/h decaying to -0.4 K/h),
    with an inversion and a cold pool on the valley floor.  Two faulty
    sensors: HV11 sticks from 01:00 to 04:00, HV04 reads 3 K warm all night.
    """
    lat0, lon0 = 45.92, -120.61
    rng = np.random.default_rng(seed)
    # valley axis runs SW-NE; floor at 380 m, slopes rising to about 560 m
    names = [f"HV{i:02d}" for i in range(1, 15)]
    xs = np.array([-9.0, -6.5, -3.0, 0.5, 3.5, 7.0, 0.0, -5.5, 2.0, 6.0, -2.0, 9.5, -8.0, 4.5]) * 1000
    ys = np.array([-6.0, -1.5, -5.5, -8.0, -3.0, -6.5, 0.0, 4.5, 5.0, 2.0, 8.5, -1.0, 1.5, 8.0]) * 1000
    xs += rng.normal(0, 400, xs.size)
    ys += rng.normal(0, 400, ys.size)
    across = (-xs * np.sin(np.deg2rad(45)) + ys * np.cos(np.deg2rad(45)))
    elev = 380 + 180 * (np.abs(across) / 9000.0) ** 1.3 + rng.normal(0, 5, xs.size)
    from pyproj import Transformer

    crs = f"+proj=aeqd +lat_0={lat0} +lon_0={lon0} +datum=WGS84 +units=m +no_defs"
    lon, lat = Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(xs, ys)
    st = pd.DataFrame({"station_id": names, "latitude": np.round(lat, 5), "longitude": np.round(lon, 5),
                       "elevation": np.round(elev, 0), "sensor_height": 2.0})
    mast = st[st["station_id"] == "HV07"].copy()
    mast["station_id"] = "HV07U"
    mast["sensor_height"] = 10.0
    st = pd.concat([st, mast], ignore_index=True)
    st["x"], st["y"] = local_xy(st, lat0, lon0)
    z_floor = float(st["elevation"].min())
    start_local = pd.Timestamp("2026-04-14 17:00", tz=FROST_TZ)
    start = start_local.tz_convert("UTC")
    # profiles in hours since 17:00 local
    speed = smooth([(0, 5.5), (3.5, 5.0), (4.5, 2.0), (5.2, 0.3), (13.5, 0.3), (14.5, 1.5), (15, 2.0)], 0.25)
    wdir = 315.0
    u = lambda t: -speed(t) * np.sin(np.deg2rad(wdir))  # noqa: E731
    v = lambda t: -speed(t) * np.cos(np.deg2rad(wdir))  # noqa: E731
    g = constant(0.10e-3)  # K m-1 toward the south-east: the front stalls as the wind drops
    gx = lambda t: g(t) * np.sin(np.deg2rad(135))  # noqa: E731
    gy = lambda t: g(t) * np.cos(np.deg2rad(135))  # noqa: E731
    src = smooth([(0, -0.3), (3.5, -0.3), (4.5, -1.6), (6.0, -1.4), (10, -0.7), (13.3, -0.4), (13.8, 1.5), (15, 2.5)], 0.3)
    source = lambda t: src(t) / 3600.0  # noqa: E731
    gamma = smooth([(0, -0.0098), (3.8, -0.0098), (6.5, 0.012), (13.5, 0.015), (14.5, 0.0), (15, -0.005)], 0.4)
    pool = smooth([(0, 0.0), (4.5, 0.0), (7.0, 1.8), (13.3, 2.4), (14.8, 0.0), (15, 0.0)], 0.4)
    inv = smooth([(0, 0.0), (4.5, 0.0), (7.0, 0.3), (13.3, 0.35), (14.5, 0.0), (15, 0.0)], 0.4)
    f = LinearField(base=273.15 + 12.0, gx=gx, gy=gy, u=u, v=v, source=source, gamma=gamma, z_ref=460.0,
                    cold_pool=pool, z_floor=z_floor, pool_depth=20.0, mast_inversion=inv)
    times = pd.date_range(start, periods=15 * 12 + 1, freq="5min")
    obs = sample(f, st, times, noise=0.12, wind_noise=0.25, direction_noise=0.0, seed=seed, start=start, offset=0.1)
    # the upper mast sensor carries temperature only
    upper = obs["station_id"] == "HV07U"
    obs.loc[upper, ["wind_speed", "wind_from_direction"]] = np.nan
    # a few dropouts: HV09 off for 40 minutes, 1 % at random
    drop = (obs["station_id"] == "HV09") & (obs["time"] >= start + pd.Timedelta("7h")) & (obs["time"] < start + pd.Timedelta("7h40min"))
    obs = obs[~drop]
    obs = obs[rng.random(len(obs)) >= 0.01].reset_index(drop=True)
    faults = [
        {"station_id": "HV11", "variable": "air_temperature", "kind": "stuck",
         "start": start + pd.Timedelta("8h"), "end": start + pd.Timedelta("11h")},
        {"station_id": "HV04", "variable": "air_temperature", "kind": "bias", "size": 3.0,
         "start": start + pd.Timedelta("4h"), "end": start + pd.Timedelta("15h")},
    ]
    obs, fault_table = inject_faults(obs, faults, seed=seed)
    phases = [
        {"name": "front", "start": start + pd.Timedelta("0.75h"), "end": start + pd.Timedelta("3.25h"), "regime": "advective"},
        {"name": "calm night", "start": start + pd.Timedelta("6.5h"), "end": start + pd.Timedelta("12.5h"), "regime": "in_situ"},
    ]
    config = {
        "observations": {"timezone": FROST_TZ, "skip_lines": [2], "missing_values": ["-99.9", "NAN"],
                         "columns": {"Site": "station_id", "LocalTime": "time", "Temp_F": "air_temperature",
                                     "WindSpd_mph": "wind_speed", "WindDir": "wind_from_direction"},
                         "units": {"air_temperature": "degF", "wind_speed": "mph", "wind_from_direction": "degree"}},
        "budget": {"variable": "air_temperature"},
    }
    return Scenario("frost", st, obs, f, start, lat0, lon0, "air_temperature", fault_table, phases, config)


#: the town sensor with a gain error, and its gain
TOWN_GAIN_SENSOR, TOWN_GAIN = "BW12", 1.25


def smoke_town(seed: int = 11) -> Scenario:
    """An afternoon and evening in Brackwater, an invented town with 20 low-cost PM2.5 sensors.

    A regional smoke plume, a band about 8 km wide, is carried across the
    town by a 4 m/s westerly (arriving about 14:00 local, gone by 17:00):
    an advective rise and fall.  In the evening the wind drops to about 1 m/s
    under a shallow boundary layer and a local source (wood stoves, traffic)
    raises PM2.5 in place, most in the old town centre.  Three weather
    stations (BW-M1..M3) measure wind.  Sensor noise about 2 ug/m3,
    dropouts of a few percent, one sensor offline for two hours, and one
    (:data:`TOWN_GAIN_SENSOR`) reading :data:`TOWN_GAIN` times the truth (a gain error).
    """
    lat0, lon0 = 41.65, -4.72
    st = network(20, radius_km=6.0, seed=seed, lat0=lat0, lon0=lon0, prefix="BW", jitter=0.3)
    st["station_id"] = [f"BW{i:02d}" for i in range(1, 21)]
    st["elevation"] = 700.0
    met = pd.DataFrame({"station_id": ["BW-M1", "BW-M2", "BW-M3"], "x": [-3000.0, 2500.0, 500.0], "y": [-2000.0, -1500.0, 3500.0]})
    from pyproj import Transformer

    crs = f"+proj=aeqd +lat_0={lat0} +lon_0={lon0} +datum=WGS84 +units=m +no_defs"
    lon, lat = Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(met["x"].to_numpy(), met["y"].to_numpy())
    met["latitude"], met["longitude"] = np.round(lat, 6), np.round(lon, 6)
    met["elevation"], met["sensor_height"] = 700.0, 10.0
    start = pd.Timestamp("2026-08-20 12:00", tz=TOWN_TZ).tz_convert("UTC")
    speed = smooth([(0, 4.0), (6.0, 4.0), (7.0, 1.0), (12, 1.0)], 0.3)
    wdir = smooth([(0, 270.0), (6.5, 270.0), (7.5, 300.0), (12, 300.0)], 0.3)
    u = lambda t: -speed(t) * np.sin(np.deg2rad(wdir(t)))  # noqa: E731
    v = lambda t: -speed(t) * np.cos(np.deg2rad(wdir(t)))  # noqa: E731
    src = smooth([(0, 0.0), (6.8, 0.0), (7.5, 14.0), (10.0, 14.0), (10.8, 0.0), (12, 0.0)], 0.25)
    f = PlumeField(background=constant(8.0), peak=60.0, width_m=8000.0, axis_start=(-40000.0, 0.0),
                   u=u, v=v, source=lambda t: src(t) / 3600.0, blob_centre=(500.0, -500.0), blob_width_m=7000.0)
    times = pd.date_range(start, periods=12 * 12 + 1, freq="5min")
    rng = np.random.default_rng(seed)
    pm = sample(f, st, times, variable="pm2_5", noise=0.0, seed=seed, start=start, wind=False, offset=1.0)
    noise_sd = 1.5 + 0.05 * pm["pm2_5"].to_numpy()
    reading = pm["pm2_5"].to_numpy() + rng.normal(0, 1, len(pm)) * noise_sd
    reading = np.where(pm["station_id"] == TOWN_GAIN_SENSOR, reading * TOWN_GAIN, reading)  # a sensor reading high
    pm["pm2_5"] = np.round(np.maximum(reading, 0.0), 1)
    w = sample(f, met.assign(elevation=700.0), times, variable="air_temperature", noise=0.0, wind_noise=0.3,
               seed=seed + 1, start=start)
    w = w.drop(columns=["air_temperature"])
    off = (pm["station_id"] == "BW07") & (pm["time"] >= start + pd.Timedelta("8h")) & (pm["time"] < start + pd.Timedelta("10h"))
    pm = pm[~off]
    pm = pm[rng.random(len(pm)) >= 0.03]
    obs = pd.concat([pm, w], ignore_index=True).sort_values(["time", "station_id"], kind="stable").reset_index(drop=True)
    stations = pd.concat([st, met], ignore_index=True)[["station_id", "latitude", "longitude", "elevation", "sensor_height", "x", "y"]]
    phases = [
        {"name": "plume arrives", "start": start + pd.Timedelta("1.5h"), "end": start + pd.Timedelta("2.5h"), "regime": "advective"},
        {"name": "plume leaves", "start": start + pd.Timedelta("3.5h"), "end": start + pd.Timedelta("4.5h"), "regime": "advective"},
        {"name": "evening source", "start": start + pd.Timedelta("7.8h"), "end": start + pd.Timedelta("9.8h"), "regime": "in_situ"},
    ]
    config = {
        "observations": {"columns": {"sensor": "station_id", "timestamp_utc": "time", "pm25_ugm3": "pm2_5",
                                     "wind_ms": "wind_speed", "wind_dir": "wind_from_direction"},
                         "units": {"pm2_5": "ug/m3"}, "kinds": {"pm2_5": "concentration"}},
        "budget": {"variable": "pm2_5"},
    }
    return Scenario("town", stations, obs, f, start, lat0, lon0, "pm2_5", pd.DataFrame(columns=["station_id", "time", "variable", "kind"]),
                    phases, config)


# ---------------------------------------------------------------------------
# writing the sample data as a logger would export it
# ---------------------------------------------------------------------------

def write_frost(sc: Scenario, folder: Path) -> list[Path]:
    """Write the frost scenario as a logger export: local time, degF, mph, a units row."""
    folder.mkdir(parents=True, exist_ok=True)
    st = sc.stations[["station_id", "latitude", "longitude", "elevation", "sensor_height"]].copy()
    st.to_csv(folder / "stations.csv", index=False, lineterminator="\n")
    o = sc.observations.copy()
    local = pd.DatetimeIndex(o["time"]).tz_convert(FROST_TZ).tz_localize(None)
    temp_f = (o["air_temperature"].to_numpy() - 273.15) * 9 / 5 + 32
    mph = o["wind_speed"].to_numpy() / 0.44704
    out = pd.DataFrame({
        "Site": o["station_id"],
        "LocalTime": local.strftime("%Y-%m-%d %H:%M"),
        "Temp_F": np.where(np.isfinite(temp_f), np.round(temp_f, 2), -99.9),
        "WindSpd_mph": np.where(np.isfinite(mph), np.round(mph, 1), np.nan),
        "WindDir": np.where(np.isfinite(o["wind_from_direction"]), np.round(o["wind_from_direction"].to_numpy(), 0), np.nan),
    })
    out["WindSpd_mph"] = out["WindSpd_mph"].map(lambda x: "NAN" if pd.isna(x) else f"{x:.1f}")
    out["WindDir"] = out["WindDir"].map(lambda x: "NAN" if pd.isna(x) else f"{x:.0f}")
    out["Temp_F"] = out["Temp_F"].map(lambda x: f"{x:.2f}")
    p = folder / "observations.csv"
    with p.open("w", encoding="utf-8", newline="\n") as fh:
        fh.write("Site,LocalTime,Temp_F,WindSpd_mph,WindDir\n")
        fh.write("id,local,degF,mph,deg\n")
        out.to_csv(fh, index=False, header=False, lineterminator="\n")
    (folder / "config.toml").write_text(
        "# Hollin Valley frost night: configuration for the logger export in this folder.\n" + to_toml(sc.config),
        encoding="utf-8")
    return [folder / "stations.csv", p, folder / "config.toml"]


def write_town(sc: Scenario, folder: Path) -> list[Path]:
    """Write the town scenario as a sensor-platform export: UTC ISO times, ug/m3."""
    folder.mkdir(parents=True, exist_ok=True)
    sc.stations[["station_id", "latitude", "longitude", "elevation", "sensor_height"]].to_csv(
        folder / "stations.csv", index=False, lineterminator="\n")
    o = sc.observations
    out = pd.DataFrame({
        "sensor": o["station_id"],
        "timestamp_utc": pd.DatetimeIndex(o["time"]).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "pm25_ugm3": o["pm2_5"].map(lambda x: "" if pd.isna(x) else f"{x:.1f}"),
        "wind_ms": o["wind_speed"].map(lambda x: "" if pd.isna(x) else f"{x:.2f}"),
        "wind_dir": o["wind_from_direction"].map(lambda x: "" if pd.isna(x) else f"{x:.0f}"),
    })
    out.to_csv(folder / "observations.csv", index=False, lineterminator="\n")
    (folder / "config.toml").write_text(
        "# Brackwater PM2.5 sensors: configuration for the export in this folder.\n" + to_toml(sc.config),
        encoding="utf-8")
    return [folder / "stations.csv", folder / "observations.csv", folder / "config.toml"]


SCENARIOS = {"frost": (frost_valley, write_frost), "town": (smoke_town, write_town)}


def write_sample_data(folder: str | Path) -> list[Path]:
    """Regenerate ``sample_data/`` (byte for byte the same every time)."""
    root = Path(folder)
    paths = []
    for name, (make, write) in SCENARIOS.items():
        paths += write(make(), root / name)
    return paths


if __name__ == "__main__":  # pragma: no cover - exercised through make sample-data
    target = sys.argv[1] if len(sys.argv) > 1 else "sample_data"
    for path in write_sample_data(target):
        print(path)
