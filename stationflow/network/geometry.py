"""Network geometry: local projection, clusters and their quality metrics.

Stations are projected with a local azimuthal equidistant projection
centred on the network (pyproj, WGS84), so distances from the centre are
exact and the scale error elsewhere grows only as about (d/R)^2/6
(Snyder 1987, *Map Projections: A Working Manual*, USGS PP 1395, ch. 25).

Clusters are groups of stations a plane is fitted through: Delaunay
triangles (scipy.spatial.Delaunay, which maximises the smallest angle), a
user file, or the k nearest stations around chosen targets.  Each cluster
carries its area, angles, shape factor ``q = 4 sqrt(3) A / sum(L^2)``
(1 for an equilateral triangle; Huntley et al. 2022 call it the scaled
aspect ratio), spread ``sqrt(lambda2/lambda1)`` of the position scatter
matrix, longest side and *noise amplification*: the standard error of the
gradient vector per unit sensor noise, ``sqrt(trace((A^T A)^-1)_slopes)``
[km-1].  Clusters that fail a test are kept with ``status = 'rejected'``
and a ``reason``.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import pandas as pd

from stationflow.config import Config
from stationflow.errors import GeometryError, IngestError

log = logging.getLogger(__name__)

CLUSTER_METHODS = ("delaunay", "file", "nearest")


@dataclass
class Network:
    """Projected stations and clusters.

    ``stations`` holds the station table plus ``x``, ``y`` [m, grid east and
    north], ``convergence`` [degree, angle from grid north to true north,
    clockwise positive] and ``role`` (``surface`` or ``upper``: a second
    sensor on a mast above a surface station).  ``clusters`` holds one row per
    cluster (see :func:`cluster_table`); ``members`` gives station positions
    (indices into ``stations``) per cluster.
    """

    stations: pd.DataFrame
    clusters: pd.DataFrame
    members: list[np.ndarray]
    crs: str

    @property
    def usable(self) -> pd.DataFrame:
        """The clusters with status 'ok'."""
        return self.clusters[self.clusters["status"] == "ok"]

    def usable_members(self) -> list[np.ndarray]:
        """Member indices of the usable clusters, in table order."""
        return [self.members[i] for i in np.flatnonzero((self.clusters["status"] == "ok").to_numpy())]


def local_crs(latitude: np.ndarray, longitude: np.ndarray) -> str:
    """PROJ string of an azimuthal equidistant projection centred on the points."""
    lat0 = float(np.mean(latitude))
    lam = np.deg2rad(np.asarray(longitude, float))
    lon0 = float(np.rad2deg(np.arctan2(np.mean(np.sin(lam)), np.mean(np.cos(lam)))))
    return f"+proj=aeqd +lat_0={lat0:.6f} +lon_0={lon0:.6f} +datum=WGS84 +units=m +no_defs"


def project(latitude: np.ndarray, longitude: np.ndarray, crs: str | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """Project to local grid metres. Returns (x, y, convergence_deg, crs).

    ``convergence`` is the angle, clockwise from grid north, at which true
    north points; winds are rotated by it into grid axes.
    """
    from pyproj import Transformer

    crs = crs or local_crs(latitude, longitude)
    tr = Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    lat = np.asarray(latitude, float)
    lon = np.asarray(longitude, float)
    x, y = tr.transform(lon, lat)
    dlat = np.where(lat > 89.99, -1e-4, 1e-4)
    xn, yn = tr.transform(lon, lat + dlat)
    gamma = np.rad2deg(np.arctan2(np.sign(dlat) * (xn - x), np.sign(dlat) * (yn - y)))
    return np.asarray(x), np.asarray(y), gamma, crs


def to_lonlat(x: np.ndarray, y: np.ndarray, crs: str) -> tuple[np.ndarray, np.ndarray]:
    """Inverse of :func:`project`: (longitude, latitude) in degrees."""
    from pyproj import Transformer

    tr = Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    lon, lat = tr.transform(np.asarray(x, float), np.asarray(y, float))
    return np.asarray(lon), np.asarray(lat)


def rotate_to_grid(u: np.ndarray, v: np.ndarray, convergence_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rotate true (east, north) wind components into grid axes.

    True north points at angle ``g`` clockwise from grid north, so the true
    north unit vector is (sin g, cos g) and true east (cos g, -sin g).
    """
    g = np.deg2rad(convergence_deg)
    c, s = np.cos(g), np.sin(g)
    return u * c + v * s, -u * s + v * c


def assign_roles(stations: pd.DataFrame, x: np.ndarray, y: np.ndarray, *, tolerance_m: float = 5.0) -> np.ndarray:
    """``surface`` for one station per location, ``upper`` for higher mast sensors.

    Stations within ``tolerance_m`` of each other share a location (a mast);
    the one whose ``sensor_height`` is closest to 2 m (or unknown) is the
    surface station, the others are ``upper``.
    """
    key = np.round(x / tolerance_m).astype(np.int64) * 1_000_003 + np.round(y / tolerance_m).astype(np.int64)
    h = stations["sensor_height"].to_numpy(float) if "sensor_height" in stations else np.full(len(x), np.nan)
    closeness = np.where(np.isfinite(h), np.abs(h - 2.0), 0.0)
    order = np.lexsort((closeness, key))
    first = np.ones(len(x), bool)
    first[order[1:]] = key[order[1:]] != key[order[:-1]]
    role = np.where(first, "surface", "upper").astype(object)
    return role


def delaunay_clusters(x: np.ndarray, y: np.ndarray) -> list[np.ndarray]:
    """Delaunay triangles of the points, vertices counter-clockwise."""
    from scipy.spatial import Delaunay, QhullError

    pts = np.column_stack([x, y])
    if len(pts) < 3:
        raise GeometryError(f"a network needs at least 3 stations at distinct locations, got {len(pts)}")
    try:
        tri = Delaunay(pts)
    except QhullError:
        raise GeometryError("the stations are collinear: no triangle can be formed") from None
    simp = tri.simplices.copy()
    x1, y1 = pts[simp[:, 0]].T
    x2, y2 = pts[simp[:, 1]].T
    x3, y3 = pts[simp[:, 2]].T
    area2 = (x2 - x1) * (y3 - y1) - (x3 - x1) * (y2 - y1)
    cw = area2 < 0
    simp[cw] = simp[cw][:, [0, 2, 1]]
    # stable, readable order: by centroid south to north, then west to east
    cy = pts[simp].mean(axis=1)
    order = np.lexsort((cy[:, 0], np.round(cy[:, 1], -2)))
    return [s for s in simp[order]]


def nearest_clusters(x: np.ndarray, y: np.ndarray, targets: np.ndarray, k: int) -> list[np.ndarray]:
    """The ``k`` nearest stations (target included) around each target."""
    from scipy.spatial import cKDTree

    k = min(k, len(x))
    tree = cKDTree(np.column_stack([x, y]))
    _, idx = tree.query(np.column_stack([x[targets], y[targets]]), k=k)
    return [np.asarray(r).reshape(-1) for r in idx]


def cluster_metrics(x: np.ndarray, y: np.ndarray, members: list[np.ndarray], *, scale_m: float = 1000.0) -> pd.DataFrame:
    """Area, angles, sides, shape, spread and noise amplification per cluster.

    Vectorised over clusters of equal size.  Units: area [km2], angles
    [degree], longest side [km], noise amplification [km-1].
    """
    n = len(members)
    res = {k: np.full(n, np.nan) for k in ("area_km2", "min_angle", "max_angle", "shape", "spread",
                                            "longest_side_km", "noise_amplification", "centroid_x", "centroid_y")}
    sizes = np.array([len(m) for m in members])
    for k in np.unique(sizes):
        sel = np.flatnonzero(sizes == k)
        M = np.stack([members[i] for i in sel])
        px, py = x[M], y[M]
        cx, cy = px.mean(axis=1), py.mean(axis=1)
        res["centroid_x"][sel], res["centroid_y"][sel] = cx, cy
        dx, dy = (px - cx[:, None]) / scale_m, (py - cy[:, None]) / scale_m
        # pairwise distances
        d = np.hypot(px[:, :, None] - px[:, None, :], py[:, :, None] - py[:, None, :]) / scale_m
        res["longest_side_km"][sel] = d.reshape(len(sel), -1).max(axis=1)
        sxx, syy, sxy = (dx * dx).sum(1), (dy * dy).sum(1), (dx * dy).sum(1)
        tr, det = sxx + syy, sxx * syy - sxy ** 2
        disc = np.sqrt(np.maximum(tr ** 2 / 4 - det, 0))
        l1, l2 = tr / 2 + disc, np.maximum(tr / 2 - disc, 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            res["spread"][sel] = np.sqrt(l2 / l1)
            # (A^T A)^-1 slope block for a centred design: [[syy, -sxy], [-sxy, sxx]] / det
            res["noise_amplification"][sel] = np.where(det > 1e-12 * tr ** 2, np.sqrt(tr / det), np.inf)
        if k == 3:
            a = d[:, 1, 2]
            b = d[:, 0, 2]
            c = d[:, 0, 1]
            area = 0.5 * np.abs((px[:, 1] - px[:, 0]) * (py[:, 2] - py[:, 0]) - (px[:, 2] - px[:, 0]) * (py[:, 1] - py[:, 0])) / scale_m ** 2
            with np.errstate(invalid="ignore", divide="ignore"):
                ang = np.degrees(np.stack([
                    np.arccos(np.clip((b ** 2 + c ** 2 - a ** 2) / (2 * b * c), -1, 1)),
                    np.arccos(np.clip((a ** 2 + c ** 2 - b ** 2) / (2 * a * c), -1, 1)),
                    np.arccos(np.clip((a ** 2 + b ** 2 - c ** 2) / (2 * a * b), -1, 1)),
                ], axis=1))
                res["shape"][sel] = 4 * np.sqrt(3) * area / (a ** 2 + b ** 2 + c ** 2)
            res["area_km2"][sel] = area
            res["min_angle"][sel] = ang.min(axis=1)
            res["max_angle"][sel] = ang.max(axis=1)
        else:
            from scipy.spatial import ConvexHull, QhullError

            for j, i in enumerate(sel):  # per cluster: only at set-up, never per time step
                try:
                    res["area_km2"][i] = ConvexHull(np.column_stack([dx[j], dy[j]])).volume
                except QhullError:
                    res["area_km2"][i] = 0.0
    return pd.DataFrame(res)


def screen_clusters(metrics: pd.DataFrame, sizes: np.ndarray, config: Config) -> tuple[np.ndarray, list[str]]:
    """Apply the shape and size tests. Returns (ok mask, reason per cluster)."""
    nc = config["network"]
    reasons: list[list[str]] = [[] for _ in range(len(metrics))]

    def test(mask: np.ndarray, fmt: str, col: str) -> None:
        for i in np.flatnonzero(mask):
            reasons[i].append(fmt.format(metrics[col].iloc[i]))

    tri = sizes == 3
    noise = metrics["noise_amplification"].to_numpy()
    collinear = ~np.isfinite(noise)
    for i in np.flatnonzero(collinear):
        reasons[i].append("stations are (nearly) collinear")
    ok_geom = ~collinear
    test(ok_geom & tri & (metrics["min_angle"] < nc["min_angle"]).to_numpy(),
         "smallest angle {:.1f} deg < " + f"{nc['min_angle']:g}", "min_angle")
    test(ok_geom & tri & (metrics["max_angle"] > nc["max_angle"]).to_numpy(),
         "largest angle {:.1f} deg > " + f"{nc['max_angle']:g}", "max_angle")
    test(ok_geom & tri & (metrics["shape"] < nc["min_shape"]).to_numpy(),
         "shape factor {:.2f} < " + f"{nc['min_shape']:g}", "shape")
    test(ok_geom & ~tri & (metrics["spread"] < nc["min_spread"]).to_numpy(),
         "spread {:.2f} < " + f"{nc['min_spread']:g}", "spread")
    if nc["max_side_km"] > 0:
        test((metrics["longest_side_km"] > nc["max_side_km"]).to_numpy(),
             "longest side {:.1f} km > " + f"{nc['max_side_km']:g}", "longest_side_km")
    if nc["max_height_range_m"] > 0 and "height_range_m" in metrics:
        test((metrics["height_range_m"] > nc["max_height_range_m"]).to_numpy(),
             "stations span {:.0f} m of height > " + f"{nc['max_height_range_m']:g}", "height_range_m")
    if nc["max_noise_amplification"] > 0:
        test(ok_geom & (metrics["noise_amplification"] > nc["max_noise_amplification"]).to_numpy(),
             "noise amplification {:.3g} km-1 > " + f"{nc['max_noise_amplification']:g}", "noise_amplification")
    ok = np.array([not r for r in reasons])
    return ok, ["; ".join(r) for r in reasons]


def read_cluster_file(path: str, station_ids: list[str]) -> tuple[list[str], list[np.ndarray]]:
    """Read user clusters: a CSV with columns ``cluster`` and ``station_id``."""
    from ..read.text import read_text_table

    table = read_text_table(path, section="network")
    if table.rejected:
        f, line, reason = table.rejected[0]
        raise IngestError(f"{f}: line {line}: {reason}")
    for col in ("cluster", "station_id"):
        if col not in table.cells:
            raise IngestError(f"{path}: no column {col!r}; a cluster file has columns cluster, station_id")
    index = {s: i for i, s in enumerate(station_ids)}
    names: list[str] = []
    members: list[np.ndarray] = []
    cells = table.cells.astype(str)
    for i, sid in enumerate(cells["station_id"].str.strip()):
        if sid not in index:
            raise IngestError(f"{path}: line {table.lines[i]}: station {sid!r} is not in the stations file")
    for name, grp in cells.groupby(cells["cluster"].str.strip(), sort=False):
        ids = grp["station_id"].str.strip().tolist()
        if len(set(ids)) < 3:
            raise IngestError(f"{path}: cluster {name!r} has {len(set(ids))} distinct stations; a plane needs at least 3")
        names.append(str(name))
        members.append(np.array([index[s] for s in dict.fromkeys(ids)]))
    return names, members


#: a station whose nearest neighbour is this many times the network's median spacing away is implausible
FAR_FACTOR = 10.0


def far_stations(x: np.ndarray, y: np.ndarray, *, factor: float = FAR_FACTOR) -> tuple[np.ndarray, np.ndarray, float]:
    """Stations far outside the network's footprint: (indices, their nearest-neighbour distance [m], median spacing [m]).

    The spacing of a station is the distance to the nearest station at
    another place; a station whose spacing exceeds ``factor`` times the
    median spacing (and that is not one of only two places) is far.
    """
    from scipy.spatial import cKDTree

    pts = np.column_stack([x, y])
    uniq, inverse = np.unique(np.round(pts, 1), axis=0, return_inverse=True)
    if len(uniq) < 3:
        return np.zeros(0, int), np.zeros(0), np.nan
    d, _ = cKDTree(uniq).query(uniq, k=2)
    nn = d[:, 1]
    median = float(np.median(nn))
    far_places = np.flatnonzero(nn > factor * median)
    idx = np.flatnonzero(np.isin(inverse.ravel(), far_places))
    return idx, nn[inverse.ravel()[idx]], median


def build_network(stations: pd.DataFrame, config: Config | None = None) -> Network:
    """Project the stations, form clusters, measure and screen them."""
    cfg = config or Config()
    nc = cfg["network"]
    st = stations.reset_index(drop=True).copy()
    x, y, gamma, crs = project(st["latitude"].to_numpy(), st["longitude"].to_numpy())
    far, dist, spacing = far_stations(x, y)
    if far.size:
        named = ", ".join(f"{st['station_id'].iloc[i]} ({dist[k] / 1000:,.0f} km)" for k, i in enumerate(far[:5]))
        log.warning("station(s) far outside the network (nearest other station; the median spacing is %.1f km): %s%s; "
                    "check their coordinates (a longitude of 200 meant as -160, swapped latitude and longitude?)",
                    spacing / 1000, named, f" and {far.size - 5} more" if far.size > 5 else "")
    st["x"], st["y"], st["convergence"] = x, y, gamma
    st["role"] = assign_roles(st, x, y)
    surface = np.flatnonzero((st["role"] == "surface").to_numpy())
    ids = st["station_id"].tolist()
    method = nc["clusters"]
    if method == "delaunay":
        tris = delaunay_clusters(x[surface], y[surface])
        members = [surface[t] for t in tris]
        width = len(str(len(members)))
        names = [f"T{i + 1:0{width}d}" for i in range(len(members))]
    elif method == "nearest":
        targets = nc["targets"] or [ids[i] for i in surface]
        unknown = [t for t in targets if t not in ids]
        if unknown:
            raise GeometryError(f"network.targets: {unknown[0]!r} is not a station in the stations file")
        position = {ids[j]: k for k, j in enumerate(surface)}  # station id -> index among surface stations
        tidx = np.array([position.get(t, -1) for t in targets])
        if np.any(tidx < 0):
            raise GeometryError("network.targets must be surface stations (not upper mast sensors)")
        if len(surface) < 3:
            raise GeometryError(f"a network needs at least 3 stations at distinct locations, got {len(surface)}")
        near = nearest_clusters(x[surface], y[surface], tidx, nc["k"])
        members = [surface[m] for m in near]
        names = [f"K:{t}" for t in targets]
    else:
        names, members = read_cluster_file(nc["cluster_file"], ids)
    metrics = cluster_metrics(x, y, members)
    z = st["elevation"].to_numpy(float) if "elevation" in st else np.full(len(st), np.nan)
    metrics["height_range_m"] = [float(np.ptp(z[m])) if np.isfinite(z[m]).all() else np.nan for m in members]  # per cluster
    sizes = np.array([len(m) for m in members])
    ok, reasons = screen_clusters(metrics, sizes, cfg)
    lon, lat = to_lonlat(metrics["centroid_x"].to_numpy(), metrics["centroid_y"].to_numpy(), crs)
    table = pd.DataFrame({
        "cluster": names,
        "stations": ["+".join(ids[i] for i in m) for m in members],
        "n_stations": sizes,
        "latitude": lat,
        "longitude": lon,
    })
    table = pd.concat([table, metrics], axis=1)
    table["status"] = np.where(ok, "ok", "rejected")
    table["reason"] = reasons
    if not ok.any():
        log.warning("no cluster passed the shape and size tests")
    return Network(st, table, members, crs)


def cluster_table(network: Network) -> pd.DataFrame:
    """The clusters.csv table: id, members, centroid, area, angles, metrics, status, reason."""
    cols = ["cluster", "stations", "n_stations", "latitude", "longitude", "area_km2", "min_angle", "max_angle",
            "shape", "spread", "longest_side_km", "height_range_m", "noise_amplification", "status", "reason"]
    return network.clusters[cols].copy()
