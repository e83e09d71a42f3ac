"""Projection, clusters and their metrics."""

import numpy as np
import pandas as pd
import pytest
from pyproj import Geod

from stationflow.config import from_dict
from stationflow.network import geometry

GEOD = Geod(ellps="WGS84")


def test_geodesic_check_values_pyproj():
    # REFERENCES.md 8: WGS84 geodesics computed with pyproj (an independent route: Geod.inv)
    cases = [((45, 10), (46, 10), 111141.548), ((45, 10), (45, 11), 78846.335), ((45, 10), (45.5, 10.5), 68032.955),
             ((0, 0), (0, 1), 111319.491)]
    for (la1, lo1), (la2, lo2), dist in cases:
        assert GEOD.inv(lo1, la1, lo2, la2)[2] == pytest.approx(dist, abs=1e-3)


def test_aeqd_check_point():
    # REFERENCES.md 8: in aeqd centred at (45 N, 10 E), (45.5 N, 10.5 E) maps to (39079.276, 55689.256) m
    crs = "+proj=aeqd +lat_0=45 +lon_0=10 +datum=WGS84 +units=m +no_defs"
    x, y, _, _ = geometry.project(np.array([45.5]), np.array([10.5]), crs)
    assert x[0] == pytest.approx(39079.276, abs=1e-3)
    assert y[0] == pytest.approx(55689.256, abs=1e-3)
    assert np.hypot(x[0], y[0]) == pytest.approx(68032.955, abs=1e-3)


@pytest.mark.parametrize("radius_km, tol_ppm", [(50, 12), (200, 170)])
def test_projected_distances_match_geodesics(radius_km, tol_ppm):
    # REFERENCES.md 8 table: aeqd max relative distance error 10 ppm at 50 km, 160-165 ppm at 200 km radius
    rng = np.random.default_rng(3)
    lat0, lon0 = 47.0, 8.0
    r = radius_km * 1000 * np.sqrt(rng.uniform(0, 1, 60))
    az = rng.uniform(0, 360, 60)
    lon, lat, _ = GEOD.fwd(np.full(60, lon0), np.full(60, lat0), az, r)
    x, y, _, _ = geometry.project(np.asarray(lat), np.asarray(lon))
    i, j = np.triu_indices(60, 1)
    grid = np.hypot(x[i] - x[j], y[i] - y[j])
    geo = GEOD.inv(np.asarray(lon)[i], np.asarray(lat)[i], np.asarray(lon)[j], np.asarray(lat)[j])[2]
    rel = np.abs(grid / geo - 1)
    assert rel.max() < tol_ppm * 1e-6


def test_meridian_convergence_and_wind_rotation():
    # due north of the centre true north is grid north; 200 km east it is rotated (REFERENCES.md 8: up to 1.8 deg at 45 N)
    crs = "+proj=aeqd +lat_0=45 +lon_0=10 +datum=WGS84 +units=m +no_defs"
    lon_e, lat_e, _ = GEOD.fwd(10, 45, 90, 200e3)
    _, _, g, _ = geometry.project(np.array([46.0, lat_e]), np.array([10.0, lon_e]), crs)
    assert abs(g[0]) < 1e-6
    assert 1.0 < abs(g[1]) < 2.0
    # a wind from true south (blowing to true north) must point along the projected meridian
    u, v = geometry.rotate_to_grid(np.array([0.0]), np.array([5.0]), np.array([g[1]]))
    assert np.degrees(np.arctan2(u[0], v[0])) == pytest.approx(g[1], abs=1e-9)
    assert np.hypot(u[0], v[0]) == pytest.approx(5.0)


def test_delaunay_counter_clockwise():
    rng = np.random.default_rng(1)
    x, y = rng.uniform(0, 1e4, 30), rng.uniform(0, 1e4, 30)
    for t in geometry.delaunay_clusters(x, y):
        a2 = (x[t[1]] - x[t[0]]) * (y[t[2]] - y[t[0]]) - (x[t[2]] - x[t[0]]) * (y[t[1]] - y[t[0]])
        assert a2 > 0


def test_metrics_equilateral_and_thin():
    # equilateral: angles 60, shape factor 1, noise amplification 2/d (sqrt of trace, unit sigma)
    d = 30.0
    x = np.array([0.0, d, d / 2]) * 1000
    y = np.array([0.0, 0.0, d * np.sqrt(3) / 2]) * 1000
    m = geometry.cluster_metrics(x, y, [np.arange(3)])
    assert m["min_angle"][0] == pytest.approx(60.0)
    assert m["shape"][0] == pytest.approx(1.0)
    assert m["area_km2"][0] == pytest.approx(np.sqrt(3) / 4 * d * d)
    assert m["noise_amplification"][0] == pytest.approx(2 / d)
    # the thin triangle of REFERENCES.md 1.3: 30 km base, 3 km high: angles 11.3, 11.3, 157.4, q = 0.228
    x = np.array([0.0, 30.0, 15.0]) * 1000
    y = np.array([0.0, 0.0, 3.0]) * 1000
    m = geometry.cluster_metrics(x, y, [np.arange(3)])
    assert m["min_angle"][0] == pytest.approx(11.31, abs=0.01)
    assert m["max_angle"][0] == pytest.approx(157.38, abs=0.01)
    assert m["shape"][0] == pytest.approx(0.228, abs=0.001)


def _stations(lat, lon, ids=None):
    n = len(lat)
    return pd.DataFrame({"station_id": ids or [f"S{i}" for i in range(n)], "latitude": lat, "longitude": lon,
                         "elevation": 100.0, "sensor_height": np.nan})


def test_screening_reasons():
    # a thin triangle fails the largest-angle test (Huntley et al. 2022: <= 155 deg) and the smallest angle
    crs = "+proj=aeqd +lat_0=45 +lon_0=10 +datum=WGS84 +units=m +no_defs"
    from pyproj import Transformer

    lon, lat = Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform([0, 30000, 15000], [0, 0, 3000])
    net = geometry.build_network(_stations(lat, lon), from_dict({}))
    row = net.clusters.iloc[0]
    assert row["status"] == "rejected"
    assert "largest angle 157.4 deg > 155" in row["reason"]
    assert "smallest angle 11.3 deg < 20" in row["reason"]
    cfg = from_dict({"network": {"min_angle": 5.0, "max_angle": 170.0, "min_shape": 0.1, "max_side_km": 20.0}})
    row = geometry.build_network(_stations(lat, lon), cfg).clusters.iloc[0]
    assert row["reason"] == "longest side 30.0 km > 20"


def test_masts_are_not_triangulated():
    st = _stations([45.0, 45.0, 45.1, 45.05], [10.0, 10.0, 10.1, 10.2], ["M2", "M10", "B", "C"])
    st["sensor_height"] = [2.0, 10.0, 2.0, 2.0]
    net = geometry.build_network(st, from_dict({}))
    assert net.stations.set_index("station_id").loc["M10", "role"] == "upper"
    assert all("M10" not in s for s in net.clusters["stations"])


def test_nearest_and_file_clusters(tmp_path):
    rng = np.random.default_rng(2)
    st = _stations(45 + rng.uniform(0, 0.2, 10), 10 + rng.uniform(0, 0.2, 10))
    net = geometry.build_network(st, from_dict({"network": {"clusters": "nearest", "k": 4, "targets": ["S3"]}}))
    assert net.clusters["cluster"].tolist() == ["K:S3"]
    assert net.clusters["n_stations"].iloc[0] == 4
    assert "S3" in net.clusters["stations"].iloc[0].split("+")
    f = tmp_path / "clusters.csv"
    f.write_text("cluster,station_id\nwest,S0\nwest,S1\nwest,S2\nwest,S4\n", encoding="utf-8")
    net = geometry.build_network(st, from_dict({"network": {"clusters": "file", "cluster_file": str(f)}}))
    assert net.clusters["stations"].iloc[0] == "S0+S1+S2+S4"


def test_cluster_file_unknown_station(tmp_path):
    from stationflow.errors import IngestError

    f = tmp_path / "c.csv"
    f.write_text("cluster,station_id\na,S0\na,S1\na,NOPE\n", encoding="utf-8")
    st = _stations([45.0, 45.1, 45.0], [10.0, 10.0, 10.1])
    with pytest.raises(IngestError, match="line 4: station 'NOPE' is not in the stations file"):
        geometry.build_network(st, from_dict({"network": {"clusters": "file", "cluster_file": str(f)}}))


def test_collinear_network_is_a_clear_error():
    from stationflow.errors import GeometryError

    st = _stations([45.0, 45.1, 45.2], [10.0, 10.0, 10.0])
    with pytest.raises(GeometryError, match="collinear"):
        geometry.build_network(st, from_dict({}))


def test_clusters_spanning_too_much_height_are_screened_with_a_reason():
    from stationflow import config
    from stationflow.network import geometry
    from stationflow.scenarios import synthetic

    st = synthetic.network(20, radius_km=10, seed=5, elevation=lambda x, y: 500 + 0.12 * x)  # 2.4 km of relief
    net = geometry.build_network(st.drop(columns=["x", "y"]), config.load(None))
    tall = net.clusters["height_range_m"] > 1000
    assert tall.any() and (~tall).any()
    assert (net.clusters.loc[tall, "status"] == "rejected").all()
    assert net.clusters.loc[tall, "reason"].str.contains("m of height > 1000").all()


def test_map_labels_are_thinned_so_none_overlap():
    from scipy.spatial.distance import pdist

    from stationflow.report.plots import thin_labels
    from stationflow.scenarios import synthetic

    st = synthetic.network(150, radius_km=20, seed=1)
    x, y = st["x"].to_numpy() / 1000, st["y"].to_numpy() / 1000
    d = 40 / 18
    keep = thin_labels(x, y, d)
    assert 10 < len(keep) < 150
    assert pdist(np.column_stack([x[keep], y[keep]])).min() >= d  # no two labels closer than the spacing
    near = np.hypot(x[:, None] - x[keep][None, :], y[:, None] - y[keep][None, :]).min(axis=1)
    assert (near <= d).all()  # every station has a labelled one nearby


def test_map_colour_is_the_commonest_regime_including_steady_and_undetermined():
    import pandas as pd

    from stationflow.estimate.budget import REGIMES
    from stationflow.report.summary import BudgetSummary

    times = pd.date_range("2026-04-10", periods=10, freq="10min", tz="UTC")
    clusters = pd.DataFrame({"cluster": ["A", "B"], "stations": ["1+2+3", "2+3+4"], "latitude": [0.0, 0.0],
                             "longitude": [0.0, 0.0]})
    bs = BudgetSummary.allocate(times, clusters)
    code = {r: i for i, r in enumerate(REGIMES)}
    bs.regime[:, 0] = [code["undetermined"]] * 6 + [code["advective"]] * 4
    bs.regime[:, 1] = [code["steady"]] * 7 + [code["in_situ"]] * 3
    assert bs.dominant() == {"A": "undetermined", "B": "steady"}
