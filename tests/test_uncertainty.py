"""The error model's pieces: analytic truths for the learned noise, the resolution, the window and the model error."""

import numpy as np
import pytest

from stationflow.estimate import uncertainty as em
from stationflow.estimate.planes import fit_planes


def _series(noise, n_st=5, n_t=400, seed=0, step_s=300):
    rng = np.random.default_rng(seed)
    t = np.arange(n_t) * step_s * 1_000_000_000
    trend = 280 - 1.5 / 3600 * (t / 1e9)  # a steady cooling: zero second difference
    station = np.repeat(np.arange(n_st), n_t)
    values = np.concatenate([trend + rng.normal(0, s, n_t) for s in noise])
    return station, np.tile(t, n_st), values


def test_learned_noise_recovers_white_noise_on_a_trend():
    noise = [0.05, 0.1, 0.2, 0.4, 0.1]
    station, t, x = _series(noise)
    got, _, count = em.reading_noise(station, t, x, 5, floor=0.001)
    np.testing.assert_allclose(got, noise, rtol=0.15)  # 400 samples: a robust estimate to about 10 %
    assert (count == 398).all()


def test_learned_noise_is_floored_by_the_reporting_resolution():
    station, t, x = _series([0.0, 0.0, 0.0, 0.0, 0.0])
    q = 0.1 * 5 / 9  # values rounded to 0.1 degF, in kelvin
    x = np.round(x / q) * q
    got, res, _ = em.reading_noise(station, t, x, 5, floor=0.001)
    assert res[0] == pytest.approx(q, rel=1e-6)
    assert got.min() >= q / np.sqrt(12) - 1e-12  # GUM F.2.2.1: rounding error q / sqrt(12)
    assert em.value_resolution(np.random.default_rng(1).normal(0, 1, 1000)) == 0.0  # continuous values


def test_window_is_the_shortest_that_resolves_the_target_rate():
    # centre value noise 0.05 K (var 0.0025): the tendency error sqrt(2 var) / (2 h dt) <= 0.25 K/h
    h = em.window_steps(0.0025, 300.0, 0.25)
    se = np.sqrt(2 * 0.0025) / (2 * h * 300 / 3600)
    assert se <= 0.25 and np.sqrt(2 * 0.0025) / (2 * (h - 1) * 300 / 3600) > 0.25
    assert em.window_steps(1.0, 300.0, 0.25) == 6  # capped at one hour
    assert em.window_steps(1e-6, 3600.0, 0.25) == 1  # hourly data: one step each side


def test_model_error_is_zero_on_a_plane_and_matches_the_bias_in_a_curved_field():
    """A plane has none; a valley T = a x^2 (curved across, straight along) has a known plane bias per triangle."""
    from stationflow.network.geometry import delaunay_clusters
    from stationflow.scenarios import synthetic

    st = synthetic.network(60, radius_km=15, seed=2)
    x, y = st["x"].to_numpy(), st["y"].to_numpy()
    tri = delaunay_clusters(x, y)
    geom = em.curvature_geometry(x, y, tri, len(x))
    noise = np.full(len(x), 0.05)
    null_b2, null_s = em.null_levels(x, y, tri, geom, noise=noise, offset=0.1, steps=3)
    rng = np.random.default_rng(3)
    offsets = rng.normal(0, 0.1, len(x))
    a = 4.0 / 10000.0 ** 2  # 4 K over 10 km across the valley
    out = {}
    for name, field in (("plane", 280 + 1e-4 * x - 2e-4 * y), ("valley", 280 + a * x * x)):
        vals = (field + offsets)[None, :] + rng.normal(0, 0.05, (20, len(x)))
        f = fit_planes(vals, x, y, tri, sigma=np.hypot(0.05, 0.1))
        bx, by, s = em.curvature_bias(f.grad_x, f.grad_y, geom, 3)
        out[name] = np.sqrt(em.model_variance(bx, by, s, null_b2, null_s)[10])
        if name == "valley":  # the plane's actual error at each centroid (noise-free fit against the true gradient)
            exact = fit_planes((280 + a * x * x)[None, :], x, y, tri, sigma=1.0)
            cx = np.array([x[t].mean() for t in tri])
            true_bias = np.hypot(exact.grad_x[0] - 2 * a * cx, exact.grad_y[0])
    assert np.median(out["plane"]) == 0.0  # sensor errors alone: no model error in most clusters
    rms_true = np.sqrt(np.mean(true_bias ** 2) / 2)  # per component
    rms_est = np.sqrt(np.mean(out["valley"] ** 2))
    assert rms_true / 3 < rms_est < rms_true * 3, (rms_est, rms_true)


def test_noise_sample_is_the_leading_rows_cut_at_a_change_of_time():
    t = np.repeat(np.arange(100), 7)  # 7 stations report at each of 100 times
    assert em.noise_sample_rows(t, limit=1000) == slice(0, 700)
    cut = em.noise_sample_rows(t, limit=300)
    assert cut.stop <= 300 and cut.stop % 7 == 0 and t[cut.stop - 1] != t[cut.stop]
