"""Units, compass names and wind components against their definitions."""

import numpy as np
import pytest

from stationflow import variables as V
from stationflow.errors import ConfigError


# Exact definitions (BIPM SI Brochure 9th ed. Table 8 for the nautical mile; the 1959
# international yard and pound agreement for the mile; NIST SP 811 B.8 for inHg).
@pytest.mark.parametrize("unit, raw, expected", [
    ("knot", 1.0, 1852.0 / 3600.0),
    ("mph", 1.0, 1609.344 / 3600.0),
    ("km/h", 36.0, 10.0),
    ("m/s", 3.5, 3.5),
])
def test_speed_units_exact(unit, raw, expected):
    assert V.convert(np.array([raw]), "wind_speed", unit)[0] == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize("unit, raw, expected", [
    ("degC", 0.0, 273.15),
    ("degC", -40.0, 233.15),
    ("degF", 32.0, 273.15),
    ("degF", -40.0, 233.15),  # -40 is the same in both scales (definition of degF)
    ("degF", 212.0, 373.15),
    ("K", 280.0, 280.0),
])
def test_temperature_units(unit, raw, expected):
    assert V.convert(np.array([raw]), "air_temperature", unit)[0] == pytest.approx(expected, abs=1e-12)


@pytest.mark.parametrize("unit, raw, expected", [
    ("hPa", 1013.25, 101325.0),
    ("kPa", 97.03, 97030.0),
    ("inHg", 29.92, 29.92 * 3386.389),  # NIST SP 811: 1 inHg (0 degC) = 3386.389 Pa
    ("Pa", 90000.0, 90000.0),
])
def test_pressure_units(unit, raw, expected):
    assert V.convert(np.array([raw]), "air_pressure", unit)[0] == pytest.approx(expected, rel=1e-12)


def test_user_scalar_keeps_its_unit():
    x = np.array([12.5])
    assert V.convert(x, "pm2_5", "ug/m3")[0] == 12.5
    assert V.si_unit("pm2_5", "ug/m3") == "ug/m3"


def test_unknown_unit_names_the_accepted_ones():
    with pytest.raises(ConfigError, match="unknown unit 'furlong/fortnight'.*knot"):
        V.unit_factors("wind_speed", "furlong/fortnight")


def test_compass_points_and_calm():
    deg, calm, bad = V.compass_to_degrees(np.array(["N", "NNE", "e", "SSW", "NW", "CALM", "VRB", "xyz", "270", None], dtype=object))
    assert deg[:5].tolist() == [360.0, 22.5, 90.0, 202.5, 315.0]
    assert calm.tolist() == [False] * 5 + [True] + [False] * 4
    assert np.isnan(deg[6]) and not bad[6]  # variable: no direction, not an error
    assert bad[7] and not bad[9]
    assert deg[8] == 270.0


# REFERENCES.md section 3 table (computed check values, s = 10 m/s), which follows the
# meteorological convention of WMO-No. 8 Part I ch. 5: direction the wind blows from.
@pytest.mark.parametrize("direction, u, v", [
    (360, 0.0, -10.0), (0, 0.0, -10.0), (45, -7.071, -7.071), (90, -10.0, 0.0),
    (180, 0.0, 10.0), (225, 7.071, 7.071), (270, 10.0, 0.0),
])
def test_wind_components_table(direction, u, v):
    uu, vv = V.wind_components(np.array([10.0]), np.array([float(direction)]))
    assert uu[0] == pytest.approx(u, abs=5e-4)
    assert vv[0] == pytest.approx(v, abs=5e-4)


def test_wind_direction_inverse_returns_360_for_north_and_nan_for_calm():
    d = V.wind_direction(np.array([0.0, 10.0, 0.0, -1.0]), np.array([-10.0, 0.0, 0.0, -1.0]))
    assert d[0] == 360.0
    assert d[1] == 270.0
    assert np.isnan(d[2])
    assert d[3] == pytest.approx(45.0)


def test_round_trip_components():
    rng = np.random.default_rng(0)
    s = rng.uniform(0.5, 30, 100)
    d = rng.uniform(0.5, 360, 100)
    u, v = V.wind_components(s, d)
    assert np.allclose(V.wind_direction(u, v), d)
    assert np.allclose(np.hypot(u, v), s)


def test_wrap_degrees_equals_the_remainder_bit_for_bit():
    from stationflow.variables import wrap_degrees

    rng = np.random.default_rng(11)
    a = np.concatenate([rng.uniform(-359.999, 719.999, 100_000), [-0.0, 0.0, -1e-14, -5e-324, 360.0, 360 - 1e-13,
                                                                    719.9999999999999, -359.9999999999999, np.nan]])
    ref = a % 360.0
    out = wrap_degrees(a)
    assert np.array_equal(out, ref, equal_nan=True)
    assert np.array_equal(np.signbit(out), np.signbit(ref))


def test_kind_of_follows_the_configuration_then_the_canonical_table_then_the_name():
    from stationflow.variables import kind_of

    assert kind_of("air_temperature") == "temperature"
    assert kind_of("relative_humidity") == "humidity"
    assert kind_of("pm2_5") == "concentration"  # the documented fallback for undeclared particulate names
    assert kind_of("soot") == "other"
    assert kind_of("soot", {"soot": "concentration"}) == "concentration"
    assert kind_of("pm2_5", {"pm2_5": "other"}) == "other"  # a declared kind wins over the name


def test_a_declared_kind_picks_the_qc_tests_and_the_error_model_defaults():
    import numpy as np
    import pandas as pd

    from stationflow import config, qc
    from stationflow.estimate import uncertainty

    cfg = config.from_dict({"observations": {"kinds": {"soot": "concentration", "leaf_temp": "temperature"}}})
    t = pd.date_range("2026-01-01", periods=6, freq="10min", tz="UTC")
    obs = pd.DataFrame({"station_id": pd.Categorical(["A"] * 6), "time": t,
                        "soot": [5.0, -3.0, 6.0, 5.5, 6.1, 5.8], "leaf_temp": 280.0 + np.arange(6) * 0.1})
    st = pd.DataFrame({"station_id": ["A"], "latitude": [45.0], "longitude": [10.0], "elevation": [100.0],
                       "sensor_height": [np.nan]})
    res = qc.run_qc(obs, st, cfg)
    assert res.tests["soot"][1] & qc.TEST_BITS["range"]  # a negative concentration fails the range test
    plain = qc.run_qc(obs, st, config.from_dict({}))
    assert not plain.tests["soot"][1] & qc.TEST_BITS["range"]  # undeclared, "soot" is another scalar
    assert uncertainty.default_offset("leaf_temp", "temperature") == uncertainty.default_offset("air_temperature")
    assert uncertainty.default_min_rate("leaf_temp", "temperature") == 0.25


def test_an_unknown_kind_is_a_config_error():
    import pytest

    from stationflow import config
    from stationflow.errors import ConfigError

    with pytest.raises(ConfigError, match="observations.kinds.x = 'gas' is not one of"):
        config.from_dict({"observations": {"kinds": {"x": "gas"}}})
