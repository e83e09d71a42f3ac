"""The budget stage: analytic truths, the textbook case, error propagation and regimes."""

import numpy as np
import pandas as pd
import pytest

from stationflow.estimate.budget import (
    REGIMES,
    BudgetSettings,
    classify,
    compute_budget,
    fill_short_gaps,
    main_periods,
    window_mean,
    window_sum_sq_weights,
)

from .conftest import equilateral


def _run(values, u, v, x, y, members, **kw):
    s = BudgetSettings(**kw)
    return compute_budget(values, u, v, x, y, members, s)


def test_holton_textbook_case():
    # Holton (2004), An Introduction to Dynamic Meteorology, 4th ed., ch. 2 exercise (number from memory;
    # REFERENCES.md 7.2): 3 K colder 50 km north, 20 m/s from the north-east, 1 K/h radiative heating:
    # advection -3.055 K/h, local change -2.05 K/h.
    x, y = equilateral(30000.0)
    dt = 600.0
    times = np.arange(13) * dt
    speed, direction = 20.0, 45.0
    u0, v0 = -speed * np.sin(np.deg2rad(direction)), -speed * np.cos(np.deg2rad(direction))
    gy = -3.0 / 50000.0
    heating = 1.0 / 3600.0
    # field carried by the wind plus in-situ heating: T = 280 + gy (y - v0 t) + heating t
    vals = 280 + gy * (y[None, :] - v0 * times[:, None]) + heating * times[:, None]
    u = np.full_like(vals, u0)
    v = np.full_like(vals, v0)
    out = _run(vals, u, v, x, y, [np.arange(3)], half_window=3, interval_s=dt, sigma=0.1)
    mid = 6
    assert u0 == pytest.approx(-14.142, abs=1e-3) and v0 == pytest.approx(-14.142, abs=1e-3)
    assert out["advection"][mid, 0] == pytest.approx(-3.055, abs=1e-3)
    assert out["residual"][mid, 0] == pytest.approx(1.0, abs=1e-9)
    assert out["tendency"][mid, 0] == pytest.approx(-2.055, abs=1e-3)
    assert REGIMES[out["regime"][mid, 0]] == "advective"  # int8 codes into REGIMES


def test_advection_error_example():
    # REFERENCES.md 1.3 example (computed there): V = (5, 0), grad T = (-2, 3) K/100 km, equilateral d = 30 km,
    # sigma_T = 0.2 K, sigma_V = 0.5 m/s -> advection +0.36 +/- 0.17 K/h
    x, y = equilateral(30000.0)
    vals = (280 - 2e-5 * x + 3e-5 * y)[None, :].repeat(3, axis=0)
    u, v = np.full_like(vals, 5.0), np.zeros_like(vals)
    out = _run(vals, u, v, x, y, [np.arange(3)], sigma=0.2, wind_sigma=0.5, interval_s=600.0)
    assert out["advection_instant"][1, 0] == pytest.approx(0.36, abs=1e-9)
    assert out["advection_instant_se"][1, 0] == pytest.approx(0.17, abs=0.005)


def test_known_time_varying_wind_and_source_every_cluster():
    # a linear field advected by a wind that turns and strengthens, with a time-varying in-situ term
    from stationflow.network.geometry import delaunay_clusters
    from stationflow.scenarios import synthetic

    st = synthetic.network(12, radius_km=15, seed=4)
    f = synthetic.LinearField(base=283.0, gx=synthetic.constant(4e-5), gy=synthetic.constant(-2e-5),
                              u=synthetic.ramp([(0, 2.0), (6, 8.0)]), v=synthetic.ramp([(0, -3.0), (6, 1.0)]),
                              source=synthetic.ramp([(0, -1.0 / 3600), (6, 0.5 / 3600)]))
    times = pd.date_range("2026-01-10", periods=6 * 6 + 1, freq="10min", tz="UTC")
    obs = synthetic.sample(f, st, times)
    x, y = st["x"].to_numpy(), st["y"].to_numpy()
    tri = delaunay_clusters(x, y)
    vals = obs.pivot(index="time", columns="station_id", values="air_temperature")[st["station_id"]].to_numpy()
    from stationflow.variables import wind_components

    su = obs.pivot(index="time", columns="station_id", values="wind_speed")[st["station_id"]].to_numpy()
    sd = obs.pivot(index="time", columns="station_id", values="wind_from_direction")[st["station_id"]].to_numpy()
    u, v = wind_components(su, sd)
    out = _run(vals, u, v, x, y, tri, half_window=1, interval_s=600.0)
    sc = synthetic.Scenario("t", st, obs, f, times[0], 45.0, 10.0, "air_temperature", pd.DataFrame(), [], {})
    cx = np.array([x[t].mean() for t in tri])
    cy = np.array([y[t].mean() for t in tri])
    truth = sc.truth_at(cx, cy, np.full(len(tri), 200.0), times)
    inner = slice(1, -1)
    # a linear field: gradients exact; window means of linearly varying terms: exact to rounding
    np.testing.assert_allclose(out["grad_x"][inner], truth["grad_x"][inner], atol=1e-9)
    np.testing.assert_allclose(out["advection"][inner], truth["advection"][inner], atol=2e-3)
    np.testing.assert_allclose(out["residual"][inner], truth["residual"][inner], atol=2e-3)
    np.testing.assert_allclose(out["tendency"][inner], truth["tendency"][inner], atol=2e-3)


def test_monte_carlo_coverage_of_budget_errors():
    # over many noisy realisations the nominal 95 % intervals cover the known truth about 95 % of the time
    rng = np.random.default_rng(99)
    x, y = np.array([0.0, 12000.0, 5000.0, 16000.0, -4000.0]), np.array([0.0, 1000.0, 10000.0, 12000.0, 9000.0])
    members = [np.array([0, 1, 2]), np.array([1, 3, 2]), np.array([0, 2, 4])]
    n_t, dt = 6000, 300.0
    t = np.arange(n_t) * dt
    gx, gy, u0, v0, src = 5e-5, -3e-5, 4.0, 2.0, -0.8 / 3600
    truth_field = 280 + gx * (x[None, :] - u0 * t[:, None]) + gy * (y[None, :] - v0 * t[:, None]) + src * t[:, None]
    sig, wsig = 0.15, 0.5
    vals = truth_field + rng.normal(0, sig, truth_field.shape)
    u = u0 + rng.normal(0, wsig, truth_field.shape)
    v = v0 + rng.normal(0, wsig, truth_field.shape)
    # the first-order propagation of reading noise alone (the model-error term is checked by the coverage suite)
    out = _run(vals, u, v, x, y, members, sigma=sig, wind_sigma=wsig, half_window=3, interval_s=dt, model_error=False)
    truth = {"advection": -(u0 * gx + v0 * gy) * 3600, "residual": src * 3600, "tendency": (-(u0 * gx + v0 * gy) + src) * 3600}
    sl = slice(10, -10, 7)  # thin out overlapping windows
    for name, value in truth.items():
        err = np.abs(out[name][sl] - value) / out[f"{name}_se"][sl]
        cover = np.mean(err <= 1.96)
        assert 0.93 <= cover <= 0.97, (name, cover)


def test_classify_edges():
    a = np.array([2.0, 0.1, 1.0, 0.05, np.nan, 0.3, 1.0])
    r = np.array([0.1, -2.0, -1.0, 0.05, 1.0, -1.0, 0.0])
    se = np.full(7, 0.1)
    reg = classify(a + r, a, r, se, se, significance=2.0, dominance=0.67)
    assert reg.tolist() == ["advective", "in_situ", "mixed", "steady", "undetermined", "in_situ", "advective"]
    # min_rate: small but precisely known terms are not significant
    assert classify(np.array([0.05]), np.array([0.05]), np.array([0.0]), np.array([1e-4]), np.array([1e-4]),
                    min_rate=0.1)[0] == "steady"
    # one significant term that is smaller than an uncertain other term: mixed, not a confident label
    assert classify(np.array([-0.7]), np.array([0.3]), np.array([-1.0]), np.array([0.1]), np.array([0.6]))[0] == "mixed"


def test_window_helpers():
    a = np.arange(10, dtype=float)[:, None]
    m = window_mean(a, 2)
    assert m[5, 0] == pytest.approx(5.0)
    assert np.isnan(m[0, 0])  # not enough of the window inside the record
    var = np.ones((10, 1))
    # trapezoid weights 0.5, 1, 1, 1, 0.5: sum w^2 / (sum w)^2 = 3.5 / 16
    assert window_sum_sq_weights(var, 2)[5, 0] == pytest.approx(3.5 / 16)
    g = np.array([1.0, np.nan, 3.0, np.nan, np.nan, np.nan, 7.0])[:, None]
    f = fill_short_gaps(g, 1)
    assert f[1, 0] == pytest.approx(2.0) and np.isnan(f[3, 0])


def test_main_periods_and_description():
    from stationflow.report.text import describe_period

    times = pd.date_range("2026-04-15 04:40", periods=6, freq="10min", tz="UTC")
    t = pd.DataFrame({"time": times, "cluster": "T03", "regime": ["steady"] + ["advective"] * 4 + ["in_situ"],
                      "tendency": -1.9, "advection": -1.9, "residual": 0.0, "tendency_se": 0.2,
                      "advection_se": 0.2, "residual_se": 0.2})
    p = main_periods(t, unit="K h-1")
    assert len(p) == 1 and p[0]["steps"] == 4
    assert describe_period(p[0], variable="air_temperature") == \
        "cluster T03, 2026-04-15 04:50-05:20 UTC: advective cooling -1.90 +/- 0.20 K/h"


def test_window_sums_on_records_shorter_than_the_window():
    # analytic: with every sample present, the weights are 1 inside the window and 1/2 at its ends
    from stationflow.estimate import budget

    acc, wsum, total = budget._window_sums(np.ones((2, 3)), 3, 1)
    assert total == 6.0
    assert np.array_equal(wsum, np.full((2, 3), 2.0)) and np.array_equal(acc, wsum)
    acc, wsum, _ = budget._window_sums(np.ones((7, 1)), 3, 1)
    assert wsum[3, 0] == 6.0 and wsum[0, 0] == 3.5  # centre: full window; first step: offsets 0..3


def test_shared_work_gives_the_same_numbers():
    # the budget shares gap positions, window weights and counts between arrays missing in the same
    # places; the results equal the one-array functions bit for bit (and arrays with other gaps still work)
    from stationflow.estimate.budget import (
        cluster_mean,
        fill_short_gaps_like,
        membership_matrix,
        window_mean_and_variance,
    )

    rng = np.random.default_rng(4)
    a = rng.normal(size=(300, 9))
    a[rng.random(a.shape) < 0.2] = np.nan
    b = np.where(np.isnan(a), np.nan, rng.random(a.shape))  # same gaps
    c = rng.normal(size=a.shape)
    c[rng.random(c.shape) < 0.3] = np.nan  # other gaps
    for got, ref in zip(fill_short_gaps_like([a, b, c], 2), [fill_short_gaps(x, 2) for x in (a, b, c)]):
        assert np.array_equal(got, ref, equal_nan=True)
    for var in (b, c):
        m, v = window_mean_and_variance(a, var, 3)
        assert np.array_equal(m, window_mean(a, 3), equal_nan=True)
        assert np.array_equal(v, window_sum_sq_weights(var, 3), equal_nan=True)
    memb = membership_matrix([np.array([0, 1, 2]), np.array([2, 3, 4]), np.array([5, 6, 7, 8])], 9)
    mean_a, _, n_a = cluster_mean(a, memb)
    for other in (b, c):
        ref = cluster_mean(other, memb)
        got = cluster_mean(other, memb, counts=(np.isfinite(a), n_a))
        for x, y in zip(got, ref):
            assert np.array_equal(x, y, equal_nan=True)
    mean, var, n = cluster_mean(a, memb, variance=False)
    assert var is None and np.array_equal(mean, mean_a, equal_nan=True) and np.array_equal(n, n_a)


def test_implausible_splits_are_flagged_and_never_a_regime():
    # advection +50.3 and in situ -50.3 against a change of 0.01 K/h (an alpine cluster spanning 2 km of height)
    from stationflow.estimate.budget import implausible

    t, a, r = np.array([0.01, -1.4, 0.5]), np.array([50.32, -0.1, 3.0]), np.array([-50.31, -1.3, -2.5])
    assert implausible(t, a, r, min_rate=0.25).tolist() == [True, False, False]


def test_implausible_rows_are_undetermined_in_the_budget():
    x, y = equilateral(10000.0)
    n = 13
    vals = np.tile(280 + np.array([0.0, 40.0, -40.0]), (n, 1))  # a 40 K step between stations: no plane is like it
    u, v = np.full_like(vals, 5.0), np.zeros_like(vals)
    out = _run(vals, u, v, x, y, [np.arange(3)], interval_s=600.0, sigma=0.1, min_rate=0.25)
    # a steady field: no change, but a huge gradient in a 5 m/s wind gives an advection that the residual cancels
    mid = out["implausible"][3:-3, 0]
    assert mid.all()
    assert (out["regime"][3:-3, 0] == REGIMES.index("undetermined")).all()


def test_row_mean_var_equals_numpy_nan_functions():
    from stationflow.estimate.budget import row_mean_var

    rng = np.random.default_rng(5)
    x = rng.normal(size=(200, 7))
    x[rng.random(x.shape) < 0.4] = np.nan
    x[3] = np.nan  # an empty row
    x[4, 1:] = np.nan  # one value: no variance
    mean, var = row_mean_var(x)
    with np.errstate(invalid="ignore", divide="ignore"), pytest.warns(RuntimeWarning):
        ref_mean, ref_var = np.nanmean(x, axis=1), np.nanvar(x, axis=1, ddof=1)
    np.testing.assert_allclose(mean, ref_mean, rtol=1e-13, equal_nan=True)
    np.testing.assert_allclose(var, ref_var, rtol=1e-12, equal_nan=True)
