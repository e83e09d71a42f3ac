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
