"""Wind derivatives and vector means."""

import numpy as np
import pytest

from stationflow.estimate.kinematics import fit_wind, kinematics, vector_mean

from .conftest import equilateral


def _fields(x, y, fu, fv):
    return fu(x, y)[None, :], fv(x, y)[None, :]


@pytest.mark.parametrize("shape", ["equilateral", "scalene", "pentagon"])
def test_linear_wind_check_values(shape):
    # REFERENCES.md 1.5: u = 3 + 1e-4 x + 2e-4 y, v = -1 - 1e-4 x + 0.5e-4 y gives
    # divergence 1.5e-4, vorticity -3e-4, stretching 5e-5 and shearing 1e-4 s-1 from any non-degenerate cluster
    if shape == "equilateral":
        x, y = equilateral(20000.0)
    elif shape == "scalene":
        x, y = np.array([0.0, 17000.0, 4000.0]), np.array([0.0, 2500.0, 13000.0])
    else:
        a = np.linspace(0, 2 * np.pi, 6)[:-1]
        x, y = 9000 * np.cos(a) + 500, 7000 * np.sin(a) - 300
    u, v = _fields(x, y, lambda x, y: 3 + 1e-4 * x + 2e-4 * y, lambda x, y: -1 - 1e-4 * x + 0.5e-4 * y)
    k = kinematics(fit_wind(u, v, x, y, [np.arange(len(x))]))
    assert k["divergence"][0, 0] == pytest.approx(1.5e-4, abs=1e-15)
    assert k["vorticity"][0, 0] == pytest.approx(-3e-4, abs=1e-15)
    assert k["stretching_deformation"][0, 0] == pytest.approx(5e-5, abs=1e-15)
    assert k["shearing_deformation"][0, 0] == pytest.approx(1e-4, abs=1e-15)


def test_solid_body_rotation():
    # u = -omega y, v = omega x: vorticity 2 omega, no divergence or deformation (REFERENCES.md 1.5)
    omega = 1e-4
    x, y = np.array([0.0, 12000.0, 3000.0, -5000.0]), np.array([0.0, 1000.0, 9000.0, 4000.0])
    u, v = _fields(x, y, lambda x, y: -omega * y, lambda x, y: omega * x)
    k = kinematics(fit_wind(u, v, x, y, [np.arange(4)]))
    assert k["vorticity"][0, 0] == pytest.approx(2 * omega)
    for name in ("divergence", "stretching_deformation", "shearing_deformation"):
        assert k[name][0, 0] == pytest.approx(0.0, abs=1e-16)


def test_divergence_error_equilateral():
    # REFERENCES.md 1.3 (derived there): sigma_div = sigma_vort = 2 sigma_V / d for an equilateral triangle
    x, y = equilateral(30000.0)
    k = kinematics(fit_wind(np.zeros((1, 3)), np.zeros((1, 3)), x, y, [np.arange(3)], sigma=0.5))
    assert k["divergence_se"][0, 0] == pytest.approx(2 * 0.5 / 30000.0)
    assert k["vorticity_se"][0, 0] == pytest.approx(2 * 0.5 / 30000.0)


def test_vector_mean_cancels_opposite_winds():
    # 5 m/s from N half the time and from S the other half: vector mean 0, scalar mean 5 (REFERENCES.md 3)
    s, d = vector_mean(np.array([5.0, 5.0]), np.array([360.0, 180.0]))
    assert s == pytest.approx(0.0, abs=1e-12)


def test_vector_mean_direction_across_north():
    # 350 and 10 degrees at equal speed average to 360, not 180 (REFERENCES.md 3)
    s, d = vector_mean(np.array([4.0, 4.0]), np.array([350.0, 10.0]))
    assert d == pytest.approx(360.0)
    assert s == pytest.approx(4 * np.cos(np.deg2rad(10)))


def test_calm_counts_as_zero_wind():
    s, d = vector_mean(np.array([0.2, 4.0]), np.array([90.0, 270.0]))
    assert s == pytest.approx(2.0)
    assert d == pytest.approx(270.0)


def test_divergence_and_vorticity_do_not_depend_on_the_deformation_option():
    rng = np.random.default_rng(5)
    x, y = rng.uniform(-5e3, 5e3, 5), rng.uniform(-5e3, 5e3, 5)
    u = 2.0 + 1e-4 * x[None, :] - 3e-5 * y[None, :] + rng.normal(0, 0.1, (4, 5))
    v = -1.0 + 2e-5 * x[None, :] + 5e-5 * y[None, :] + rng.normal(0, 0.1, (4, 5))
    w = fit_wind(u, v, x, y, [np.arange(5)])
    full, short = kinematics(w), kinematics(w, deformation=False)
    assert set(short) == {"divergence", "divergence_se", "vorticity", "vorticity_se"}
    for k in short:
        assert np.array_equal(full[k], short[k])


def test_wind_fit_without_residuals_gives_the_same_kinematics():
    rng = np.random.default_rng(2)
    x, y = rng.uniform(0, 3e4, 5), rng.uniform(0, 3e4, 5)
    u, v = rng.normal(size=(20, 5)), rng.normal(size=(20, 5))
    u[3, 1] = v[3, 1] = np.nan
    full = fit_wind(u, v, x, y, [np.arange(5)])
    lean = fit_wind(u, v, x, y, [np.arange(5)], residuals=False)
    assert lean.u.rms is None and full.u.rms is not None
    for name, value in kinematics(full).items():
        assert np.array_equal(value, kinematics(lean)[name], equal_nan=True), name
