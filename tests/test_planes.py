"""The plane-fit estimator: analytic truths, a reference library, published and derived check values."""

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st

from stationflow.estimate import planes as gradient
from stationflow.estimate.planes import (
    OK,
    SINGULAR,
    TOO_FEW,
    fit_planes,
    triangle_gradient,
)

from .conftest import equilateral

K_PER_100KM = 1e-5  # K m-1


def test_uniform_field_has_zero_gradient():
    rng = np.random.default_rng(0)
    x, y = rng.uniform(-1e4, 1e4, 7), rng.uniform(-1e4, 1e4, 7)
    f = fit_planes(np.full((3, 7), 281.3), x, y, [np.arange(3), np.arange(7)])
    assert np.allclose(f.grad_x, 0, atol=1e-15) and np.allclose(f.grad_y, 0, atol=1e-15)
    assert np.allclose(f.value, 281.3)


@settings(max_examples=60, deadline=None)
@given(
    n=st.integers(3, 7),
    seed=st.integers(0, 10_000),
    angle=st.floats(0, 360),
    shift=st.tuples(st.floats(-1e6, 1e6), st.floats(-1e6, 1e6)),
    gx=st.floats(-1e-3, 1e-3),
    gy=st.floats(-1e-3, 1e-3),
)
def test_linear_field_exact_for_any_shape_rotation_translation(n, seed, angle, shift, gx, gy):
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(-2e4, 2e4, n), rng.uniform(-2e4, 2e4, n)
    area = abs((x[1] - x[0]) * (y[2] - y[0]) - (x[2] - x[0]) * (y[1] - y[0]))
    if area < 1e6:  # nearly collinear draws are rejected by the estimator, not a counterexample
        return
    a = np.deg2rad(angle)
    xr, yr = x * np.cos(a) - y * np.sin(a) + shift[0], x * np.sin(a) + y * np.cos(a) + shift[1]
    t = 275.0 + gx * xr + gy * yr
    f = fit_planes(t[None, :], xr, yr, [np.arange(n)])
    assert f.reason[0, 0] == OK
    assert f.grad_x[0, 0] == pytest.approx(gx, abs=1e-12)
    assert f.grad_y[0, 0] == pytest.approx(gy, abs=1e-12)
    # units: the same field in degF has a gradient 9/5 as large
    f_f = fit_planes(((t - 273.15) * 9 / 5 + 32)[None, :], xr, yr, [np.arange(n)])
    assert f_f.grad_x[0, 0] == pytest.approx(gx * 9 / 5, abs=1e-11)


def test_triangle_fit_equals_bellamy_formula():
    # Davies-Jones (1993): for three stations the linear fit and Bellamy's formula are identical
    rng = np.random.default_rng(5)
    for _ in range(20):
        x, y, t = rng.uniform(0, 3e4, 3), rng.uniform(0, 3e4, 3), rng.normal(280, 2, 3)
        gx, gy = triangle_gradient(x, y, t)
        f = fit_planes(t[None, :], x, y, [np.arange(3)])
        assert f.grad_x[0, 0] == pytest.approx(gx, rel=1e-9)
        assert f.grad_y[0, 0] == pytest.approx(gy, rel=1e-9)


def test_against_statsmodels_wls():
    # reference library: statsmodels WLS; coefficients and standard errors to 1e-10 relative
    rng = np.random.default_rng(11)
    for _ in range(25):
        n = rng.integers(4, 9)
        x, y = rng.uniform(-3e4, 3e4, n), rng.uniform(-3e4, 3e4, n)
        sigma = rng.uniform(0.1, 0.6, n)
        vals = 283 + 2e-5 * x - 4e-5 * y + rng.normal(0, 1, (4, n)) * sigma
        vals[1, rng.integers(0, n)] = np.nan
        f = fit_planes(vals, x, y, [np.arange(n)], sigma=sigma)
        for t in range(4):
            ok = np.isfinite(vals[t])
            X = np.column_stack([np.ones(ok.sum()), x[ok] - x.mean(), y[ok] - y.mean()])
            res = sm.WLS(vals[t, ok], X, weights=1 / sigma[ok] ** 2).fit()
            ours = np.array([f.value[t, 0], f.grad_x[t, 0], f.grad_y[t, 0]])
            np.testing.assert_allclose(ours, res.params, rtol=1e-10, atol=1e-14)
            if ok.sum() > 3:
                se = np.sqrt(np.array([f.var_value[t, 0], f.var_x[t, 0], f.var_y[t, 0]]) * f.chi2[t, 0])
                np.testing.assert_allclose(se, res.bse, rtol=1e-10)


# REFERENCES.md 1.3 (derived there; sigma_T = 0.2 K): gradient standard errors [K/100 km]
def _se(x, y, sigma=0.2):
    f = fit_planes(np.zeros((1, len(x))), np.asarray(x, float), np.asarray(y, float), [np.arange(len(x))], sigma=sigma)
    return np.sqrt(f.var_x[0, 0]) / K_PER_100KM, np.sqrt(f.var_y[0, 0]) / K_PER_100KM


def test_error_equilateral_30km():
    sx, sy = _se(*equilateral(30000.0))
    assert sx == pytest.approx(0.943, abs=5e-4) and sy == pytest.approx(0.943, abs=5e-4)


def test_error_thin_triangle():
    sx, sy = _se([0, 30000, 15000], [0, 0, 3000])
    assert sx == pytest.approx(0.94, abs=5e-3)
    assert sy == pytest.approx(8.16, abs=5e-3)


def test_error_square_and_hexagon():
    sx, sy = _se([0, 20000, 20000, 0], [0, 0, 20000, 20000])
    assert sx == pytest.approx(1.00, abs=5e-3) and sy == pytest.approx(1.00, abs=5e-3)
    a = np.arange(6) * np.pi / 3
    sx, sy = _se(15000 * np.cos(a), 15000 * np.sin(a))
    assert sx == pytest.approx(0.770, abs=5e-4) and sy == pytest.approx(0.770, abs=5e-4)


def test_bias_fakes_a_gradient():
    # REFERENCES.md 1.3: a 0.2 K offset between stations 10 km apart looks like 2 K/100 km
    x, y = np.array([0.0, 10000.0, 0.0]), np.array([0.0, 0.0, 10000.0])
    f = fit_planes(np.array([[0.0, 0.2, 0.0]]), x, y, [np.arange(3)])
    assert f.grad_x[0, 0] / K_PER_100KM == pytest.approx(2.0)
    assert -5.0 * f.grad_x[0, 0] * 3600 == pytest.approx(-0.36)  # 5 m/s: 0.36 K/h of spurious advection


def test_monte_carlo_coverage_of_stated_errors():
    # nominal 95 % intervals from the prior covariance cover the true gradient 93-97 % of the time
    rng = np.random.default_rng(2024)
    x, y = rng.uniform(-2e4, 2e4, 9), rng.uniform(-2e4, 2e4, 9)
    members = [np.array([0, 1, 2]), np.array([3, 4, 5, 6]), np.arange(9)]
    gx, gy = 3e-5, -1e-5
    truth = 280 + gx * x + gy * y
    n = 4000
    vals = truth[None, :] + rng.normal(0, 0.3, (n, 9))
    f = fit_planes(vals, x, y, members, sigma=0.3)
    hits = np.concatenate([np.abs(f.grad_x - gx) <= 1.96 * np.sqrt(f.var_x), np.abs(f.grad_y - gy) <= 1.96 * np.sqrt(f.var_y)])
    coverage = hits.mean(axis=0)
    assert np.all((coverage > 0.93) & (coverage < 0.97)), coverage


def test_missing_patterns_and_reasons():
    x = np.array([0.0, 1e4, 0.0, 1e4, 2e4])
    y = np.array([0.0, 0.0, 1e4, 1e4, 2e4])
    t = 280 + 1e-4 * x - 2e-4 * y
    vals = np.tile(t, (4, 1))
    vals[1, 0] = np.nan  # 4 of 5 left
    vals[2, [0, 1, 3]] = np.nan  # 2 left: too few
    vals[3, [1, 2]] = np.nan  # stations 0, 3, 4 are collinear (on y = x)
    f = fit_planes(vals, x, y, [np.arange(5)])
    assert f.reason[:, 0].tolist() == [OK, OK, TOO_FEW, SINGULAR]
    assert f.n_used[:, 0].tolist() == [5, 4, 2, 3]
    assert f.grad_x[1, 0] == pytest.approx(1e-4) and f.grad_y[1, 0] == pytest.approx(-2e-4)
    assert np.isnan(f.grad_x[2, 0]) and np.isnan(f.grad_x[3, 0])
    assert np.isinf(f.cond[2, 0]) and f.cond[3, 0] > 1e6  # two points fix no plane; three in a line barely
    # a triangle missing a station: too few, and its design is rank-deficient (no solve is attempted)
    tri = fit_planes(vals[:, :3], x[:3], y[:3], [np.arange(3)])
    assert tri.reason[:, 0].tolist() == [OK, TOO_FEW, TOO_FEW, TOO_FEW]
    assert tri.n_used[:, 0].tolist() == [3, 2, 1, 1] and np.isinf(tri.cond[1:, 0]).all()
    assert np.isnan(tri.value[1:, 0]).all() and tri.grad_x[0, 0] == pytest.approx(1e-4)


def test_elevation_regression_check_value():
    # REFERENCES.md 2.2: these four stations recover (10, -3e-5, 2e-5, -0.0065) exactly
    x = np.array([0.0, 20000.0, 0.0, 20000.0])
    y = np.array([0.0, 0.0, 20000.0, 20000.0])
    z = np.array([100.0, 150.0, 300.0, 120.0])
    t = 10 - 3e-5 * x + 2e-5 * y - 0.0065 * z
    f = fit_planes(t[None, :], x, y, [np.arange(4)], z=z)
    assert f.grad_x[0, 0] == pytest.approx(-3e-5, abs=1e-15)
    assert f.grad_y[0, 0] == pytest.approx(2e-5, abs=1e-15)
    assert f.grad_z[0, 0] == pytest.approx(-0.0065, abs=1e-13)
    assert f.value[0, 0] == pytest.approx(10 - 0.3 + 0.2 - 0.0065 * z.mean())


def test_elevation_on_a_plane_is_rank_deficient():
    # REFERENCES.md 2.2: elevations lying on a plane in x, y make the 4-column design rank 3
    x = np.array([0.0, 20000.0, 0.0, 20000.0])
    y = np.array([0.0, 0.0, 20000.0, 20000.0])
    z = 100 + 0.005 * x + 0.002 * y
    f = fit_planes(np.zeros((1, 4)), x, y, [np.arange(4)], z=z)
    assert f.reason[0, 0] == SINGULAR


def test_none_shows_spurious_gradient_regression_recovers_lapse():
    # stations climbing eastward in a field with no horizontal gradient and a -6.5 K/km lapse rate:
    # a plain plane sees -6.5 K/km x slope as a horizontal gradient; elevation as a regressor removes it
    rng = np.random.default_rng(8)
    x, y = rng.uniform(0, 2e4, 8), rng.uniform(0, 2e4, 8)
    z = 100 + 0.01 * x + rng.uniform(-40, 40, 8)
    t = 285 - 0.0065 * z
    plain = fit_planes(t[None, :], x, y, [np.arange(8)])
    reg = fit_planes(t[None, :], x, y, [np.arange(8)], z=z)
    zfit = fit_planes(z[None, :], x, y, [np.arange(8)])  # the terrain's own plane
    assert plain.grad_x[0, 0] == pytest.approx(-0.0065 * zfit.grad_x[0, 0], rel=1e-9)
    assert abs(plain.grad_x[0, 0]) > 3e-5  # about 6 K/100 km of spurious gradient
    assert abs(reg.grad_x[0, 0]) < 1e-12 and reg.grad_z[0, 0] == pytest.approx(-0.0065)
    # a night inversion (+15 K/km) is recovered with its sign
    inv = fit_planes((285 + 0.015 * z)[None, :], x, y, [np.arange(8)], z=z)
    assert inv.grad_z[0, 0] == pytest.approx(0.015)


def test_mixed_cluster_sizes_keep_order():
    rng = np.random.default_rng(4)
    x, y = rng.uniform(0, 1e4, 8), rng.uniform(0, 1e4, 8)
    t = 280 + 1e-4 * x
    members = [np.arange(5), np.array([0, 1, 2]), np.arange(8), np.array([3, 4, 5])]
    f = fit_planes(np.tile(t, (2, 1)), x, y, members)
    assert np.allclose(f.grad_x, 1e-4)
    assert f.n_used[0].tolist() == [5, 3, 8, 3]


def test_fit_and_cluster_means_are_time_major_in_memory():
    """The (time, cluster) arrays are C-ordered, not views of the cluster-major storage: the budget's
    arithmetic and the file writer read them in memory order (a layout guard, values are tested above)."""
    from stationflow.estimate.budget import cluster_mean, membership_matrix

    rng = np.random.default_rng(3)
    x, y = rng.uniform(0, 20e3, 9), rng.uniform(0, 20e3, 9)
    vals = 280 + 1e-4 * x[None, :] + rng.normal(0, 0.1, (40, 9))
    vals[rng.random(vals.shape) < 0.1] = np.nan
    members = [np.array([0, 1, 2]), np.array([2, 3, 4, 5]), np.array([5, 6, 7, 8])]
    f = fit_planes(vals, x, y, members)
    for a in (f.value, f.grad_x, f.grad_y, f.pattern, f.rms, f.chi2, f.var_x, f.n_used):
        assert a.shape == (40, 3) and a.flags["C_CONTIGUOUS"]
    mean, var, n = cluster_mean(vals, membership_matrix(members, 9))
    assert all(a.shape == (40, 3) and a.flags["C_CONTIGUOUS"] for a in (mean, var, n))


def _wide_case(seed=1, n=40, n_t=50):
    rng = np.random.default_rng(seed)
    x, y = rng.uniform(-2e4, 2e4, n), rng.uniform(-2e4, 2e4, n)
    z = rng.uniform(0, 500, n)
    vals = 280 + 1e-4 * x - 2e-4 * y + 0.005 * z + rng.normal(0, 0.1, (n_t, n))
    vals[rng.random((n_t, n)) < 0.3] = np.nan
    vals[5, :] = np.nan  # nobody reports
    vals[6, 3:] = np.nan  # too few report
    return x, y, z, vals, rng.uniform(0.1, 0.3, n)


def test_many_station_clusters_match_the_pattern_solver(monkeypatch):
    """Clusters above the bit-pattern limit are solved per time step; the numbers are the same."""
    x, y, z, vals, sig = _wide_case()
    members = [np.arange(40), np.arange(10), np.arange(3, 30)]
    a = fit_planes(vals, x, y, members, z=z, sigma=sig, noise=sig / 2)
    monkeypatch.setattr(gradient, "MAX_PATTERN_BITS", 5)
    b = fit_planes(vals, x, y, members, z=z, sigma=sig, noise=sig / 2)
    for name in ("value", "grad_x", "grad_y", "grad_z", "chi2", "var_value", "var_x", "var_y", "cov_xy", "var_z",
                 "n_used", "reason"):
        np.testing.assert_allclose(getattr(b, name), getattr(a, name), rtol=1e-8, atol=1e-12, err_msg=name)
    np.testing.assert_allclose(b.rms, a.rms, rtol=1e-6, atol=1e-9)
    for name in ("var_value", "var_x", "cov_xy"):
        np.testing.assert_allclose(b.noise_part(name), a.noise_part(name), rtol=1e-8, atol=1e-14, err_msg=name)
    assert (a.reason[5] == TOO_FEW).all() and (a.reason[6] == TOO_FEW).all()


def test_a_cluster_of_two_thousand_stations_fits_a_linear_field():
    """No size limit a user can hit (issue: more than 62 stations used to fail)."""
    rng = np.random.default_rng(4)
    n = 2000
    x, y, z = rng.uniform(-6e4, 6e4, n), rng.uniform(-6e4, 6e4, n), rng.uniform(100, 900, n)
    vals = (281 + 2e-5 * x + 3e-5 * y + 0.004 * z)[None, :] * np.ones((3, 1))
    vals[1, ::7] = np.nan
    f = fit_planes(vals, x, y, [np.arange(n)], z=z)
    np.testing.assert_allclose(f.grad_x[:, 0], 2e-5, rtol=1e-9)
    np.testing.assert_allclose(f.grad_y[:, 0], 3e-5, rtol=1e-9)
    np.testing.assert_allclose(f.grad_z[:, 0], 0.004, rtol=1e-9)
    assert f.n_used[1, 0] == n - len(range(0, n, 7))


def test_noise_part_of_the_covariance():
    """With all of sigma as reading noise the noise covariance is the whole prior; with half, a quarter."""
    x, y, z, vals, sig = _wide_case(seed=2, n=12, n_t=20)
    members = [np.arange(3), np.arange(12), np.array([2, 5, 7, 9])]
    full = fit_planes(vals, x, y, members, sigma=sig, noise=sig)
    half = fit_planes(vals, x, y, members, sigma=sig, noise=sig / 2)
    for name in ("var_value", "var_x", "var_y", "cov_xy"):
        np.testing.assert_allclose(full.noise_part(name), getattr(full, name), rtol=1e-9, atol=1e-15)
        np.testing.assert_allclose(half.noise_part(name), getattr(full, name) / 4, rtol=1e-9, atol=1e-15)


def test_no_time_steps_give_empty_fits_for_clusters_of_any_size():
    # a record split into parts can leave a part without times (the QC buddy test on one time step of a large
    # network); every cluster size, the wide normal-equation route included, gives empty arrays, not an error
    from stationflow.estimate.planes import MAX_PATTERN_BITS, fit_planes

    n = MAX_PATTERN_BITS + 5
    rng = np.random.default_rng(0)
    x, y = rng.uniform(-1e4, 1e4, n), rng.uniform(-1e4, 1e4, n)
    members = [np.arange(n), np.arange(3)]
    for noise in (None, np.full(n, 0.1)):
        fit = fit_planes(np.zeros((0, n)), x, y, members, noise=noise)
        assert fit.value.shape == (0, 2) and fit.var_value.shape == (0, 2)
