"""The real front in the ARM SGP network (2019-05-08 04 UTC; ARM met b1, doi:10.5439/1786358).

Skipped when ../shared/data is absent.  What the data show (shared/data README): the western
stations (E15, E31, E32, E37) read about 16 degC with north-north-west winds, most central and
eastern stations 20-23 degC with south-east to south winds.
"""

import numpy as np
import pytest

from stationflow import config
from stationflow import read
from stationflow.estimate.kinematics import fit_wind, kinematics
from stationflow.estimate.planes import fit_planes
from stationflow.network import geometry
from stationflow.variables import wind_components


@pytest.fixture(scope="module")
def front(tmp_path_factory):
    from .conftest import ARM, ARM_TOML, require_arm

    require_arm()
    p = tmp_path_factory.mktemp("arm") / "arm.toml"
    p.write_text(ARM_TOML)
    cfg = config.load(p)
    data = read.read(ARM / "sgp_met_1min_long.csv", None, cfg)
    net = geometry.build_network(data.stations, cfg)
    return data, net


def _first_minute(data, net, name):
    o = data.observations[data.observations["time"] == data.observations["time"].min()].set_index("station_id")
    return o.reindex(net.stations["station_id"])[name].to_numpy(float), o.reindex(net.stations["station_id"])


def test_network_gradient_points_from_cold_northwest_to_warm_southeast(front):
    data, net = front
    t, _ = _first_minute(data, net, "air_temperature")
    x, y = net.stations["x"].to_numpy(), net.stations["y"].to_numpy()
    # one plane through all 13 stations: the large-scale gradient across the front
    f = fit_planes(t[None, :], x, y, [np.arange(len(t))], sigma=0.3)
    gx, gy = f.grad_x[0, 0], f.grad_y[0, 0]
    bearing = np.degrees(np.arctan2(gx, gy)) % 360  # toward warmer air
    assert 90 < bearing < 180, bearing  # toward the east-south-east / south-east
    assert np.hypot(gx, gy) * 1e5 > 1.5  # several K per 100 km across a front


def test_wind_shift_gives_convergence(front):
    data, net = front
    _, o = _first_minute(data, net, "air_temperature")
    u, v = wind_components(o["wind_speed"].to_numpy(float), o["wind_from_direction"].to_numpy(float))
    x, y = net.stations["x"].to_numpy(), net.stations["y"].to_numpy()
    k = kinematics(fit_wind(u[None, :], v[None, :], x, y, [np.arange(len(u))], sigma=0.5))
    assert k["divergence"][0, 0] < 0  # convergence along the front
    assert k["divergence"][0, 0] < -2 * k["divergence_se"][0, 0]
    # triangles straddling the front converge more strongly than the network as a whole
    tri = net.usable_members()
    kt = kinematics(fit_wind(u[None, :], v[None, :], x, y, tri, sigma=0.5))
    assert np.nanmin(kt["divergence"][0]) < k["divergence"][0, 0]
