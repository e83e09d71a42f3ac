"""Sensor offsets and gains from the network (stationflow.estimate.calibration).

Analytic truth: generated networks with offsets and gains injected at known stations; the robust
regression is checked against statsmodels' RLM (a reference library).
"""

import numpy as np
import pandas as pd
import pytest

from stationflow.estimate import calibration
from stationflow.scenarios import synthetic


def _network(n=30, seed=2):
    st = synthetic.network(n, radius_km=15.0, seed=seed)
    return st["x"].to_numpy(float), st["y"].to_numpy(float), np.zeros(n), st


def _times(n):
    return pd.date_range("2026-06-01 08:00", periods=n, freq="10min", tz="UTC")


def test_huber_location_equals_statsmodels_rlm():
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(4)
    y = 1.5 + rng.normal(0, 1.0, size=(300, 2))
    y[:12, 0] += 40.0  # outliers a mean would follow
    y[5, 1] = np.nan
    fit = calibration.huber_location(y, iterations=200)
    for j in range(2):
        ok = np.isfinite(y[:, j])
        # statsmodels RLM on a constant: Huber's T with c = 1.345 and the MAD scale (its defaults)
        ref = sm.RLM(y[ok, j], np.ones(ok.sum()), M=sm.robust.norms.HuberT()).fit(maxiter=200, tol=1e-12)
        assert fit["a"][j] == pytest.approx(ref.params[0], abs=1e-4)
        assert fit["scale"][j] == pytest.approx(ref.scale, rel=1e-3)


def test_an_injected_offset_is_recovered_and_unbiased_stations_get_none_beyond_their_error():
    x, y, z, st = _network()
    t = _times(400)
    rng = np.random.default_rng(7)
    hours = np.arange(len(t)) / 6.0
    field = 290 + 0.04e-3 * x[None, :] * np.cos(hours / 5)[:, None] + 0.03e-3 * y[None, :] + 0.3 * np.sin(hours)[:, None]
    values = field + rng.normal(0, 0.1, field.shape)
    values[:, 4] += 1.0  # one warm sensor
    use = (np.ones(len(t), bool), "every time")
    b = calibration.estimate_biases(values, t, (x, y, z), concentration=False, selection=use, sigma=0.1)
    assert abs(b.offset[4] - 1.0) < 2 * b.offset_se[4] + 0.02  # the median reference moves by about 1/n
    others = np.delete(np.arange(len(x)), 4)
    assert (np.abs(b.offset[others]) < 3 * b.offset_se[others] + 0.02).all()
    assert (b.gain == 1).all() and (b.n_periods > 50).all()


def test_injected_gains_are_recovered_within_two_standard_errors():
    x, y, z, st = _network(n=36, seed=5)
    t = _times(600)
    rng = np.random.default_rng(3)
    hours = np.arange(len(t)) / 6.0
    level = 20 + 15 * np.sin(hours / 7) ** 2  # a regional concentration that rises and falls
    field = level[:, None] * (1 + 0.01e-3 * x[None, :])
    values = field + rng.normal(0, 0.5, field.shape)
    values[:, 3] *= 1.2
    values[:, 9] *= 0.85
    use = (np.ones(len(t), bool), "every time")
    b = calibration.estimate_biases(values, t, (x, y, z), concentration=True, selection=use, sigma=0.5)
    for s, g in ((3, 1.2), (9, 0.85)):
        assert abs(b.gain[s] - g) < 2 * b.gain_se[s] + 0.01, (s, b.gain[s], b.gain_se[s])
    clean = np.setdiff1d(np.arange(len(x)), [3, 9])
    assert np.median(np.abs(b.gain[clean] - 1)) < 0.02
    corrected = b.correct(values.reshape(-1), np.tile(np.arange(len(x)), len(t))).reshape(values.shape)
    assert np.abs(corrected[:, 3] - field[:, 3]).mean() < 0.25 * np.abs(values[:, 3] - field[:, 3]).mean()


def test_the_selection_prefers_well_mixed_times_and_says_so():
    t = pd.date_range("2026-06-01 00:00", periods=144, freq="10min", tz="UTC")
    wind = np.full((144, 5), 1.0)
    wind[60:110] = 4.0  # a windy afternoon (UTC, at longitude 10 E)
    use, words = calibration.select_times(t, wind, 45.0, 10.0, min_wind=2.0, min_sun=10.0)
    assert use.sum() >= calibration.MIN_TIMES and words.startswith("well mixed")
    assert not use[:50].any()
    use, words = calibration.select_times(t, np.full((144, 5), 0.5), 45.0, 10.0, min_wind=2.0, min_sun=10.0)
    assert use.all() and words.startswith("every time")


def test_humidity_correction_matches_the_published_equation():
    # Barkjohn, Gantt and Clements (2021), Atmos. Meas. Tech. 14, 4617-4637: PM2.5 = 0.524 PA - 0.0862 RH + 5.75
    # (equation from memory); check points computed by hand from it
    assert calibration.barkjohn2021(np.array([20.0]), np.array([50.0]))[0] == pytest.approx(11.92, abs=1e-9)
    assert calibration.barkjohn2021(np.array([0.0]), np.array([0.0]))[0] == pytest.approx(5.75, abs=1e-12)
    assert calibration.barkjohn2021(np.array([100.0]), np.array([80.0]))[0] == pytest.approx(51.254, abs=1e-9)
    assert np.isnan(calibration.barkjohn2021(np.array([10.0]), np.array([np.nan]))[0])


def test_humidity_comes_from_the_nearest_station_that_reports_it_at_that_time():
    x = np.array([0.0, 1000.0, 5000.0])
    y = np.zeros(3)
    codes = np.array([0, 1, 2, 0, 1, 2])
    t = np.array([0, 0, 0, 600, 600, 600]) * 10**9
    rh = np.array([np.nan, 70.0, 40.0, np.nan, np.nan, 45.0])
    got, source = calibration.nearest_humidity(rh, codes, t, x, y)
    assert got.tolist() == [70.0, 70.0, 40.0, 45.0, 45.0, 45.0]  # at 600 s station 1 is silent: the next one
    assert source.tolist() == [1, 0, 0, 1, 1, 0]


def _biased_export(tmp_path, *, apply: bool):
    from stationflow import config

    from .netgen import linear_night, write_export

    st, obs = linear_night(40, 150, seed=9, elevation=False, missing=0.0, start="2026-06-10 06:00")
    warm = st["station_id"].iloc[7]
    obs.loc[obs["station_id"] == warm, "air_temperature"] += 1.0  # one sensor 1 K warm
    paths = write_export(tmp_path / ("on" if apply else "off"), st, obs)
    data = config.load(paths["config"]).to_dict()
    data["sensors"]["apply"] = apply
    data["budget"]["regional"] = False
    return paths, config.from_dict(data), warm


def test_applying_the_estimated_offsets_removes_the_advection_they_fake(tmp_path):
    from stationflow import api

    from .test_regional import TRUE_ADV  # the linear field's true advection [K/h]

    errors = {}
    for apply in (False, True):
        paths, cfg, warm = _biased_export(tmp_path, apply=apply)
        run = api.run_budget(paths["obs"], paths["stations"], cfg)
        t = run.table
        near = t["stations"].astype(str).str.split("+").map(lambda m: warm in m)
        errors[apply] = float(np.nanmedian(np.abs(t.loc[near, "advection"] - TRUE_ADV)))
        sensors = run.sensors.set_index("station_id")
        assert run.choices["sensors"]["applied"] is apply
        assert abs(sensors.loc[warm, "offset"] - 1.0) < 2 * sensors.loc[warm, "offset_se"] + 0.05
    assert errors[False] > 0.3  # a 1 K offset at ~5 km fakes tenths of a K/h in a 3 m/s wind
    assert errors[True] < 0.25 * errors[False]


def test_the_cli_writes_sensor_offsets_and_records_the_switch(tmp_path):
    import json

    from typer.testing import CliRunner

    from stationflow.cli import app

    paths, cfg, warm = _biased_export(tmp_path, apply=False)
    res = CliRunner().invoke(app, ["budget", "--stations", str(paths["stations"]), "--obs", str(paths["obs"]),
                                   "--config", str(paths["config"]), "--out", str(tmp_path / "out"), "--quiet"])
    assert res.exit_code == 0, res.output
    table = pd.read_csv(tmp_path / "out" / "sensor_offsets.csv")
    # the contract's columns, in order (../shared/DESIGN.md, outputs)
    assert list(table.columns[:8]) == ["station_id", "variable", "offset", "offset_se", "gain", "gain_se", "n_periods",
                                       "method"]
    assert (table["gain"] == 1).all()  # temperature: offsets only
    assert table["station_id"].iloc[0] == warm and table["beyond_two_se"].iloc[0]  # ranked first
    rec = json.loads((tmp_path / "out" / "run.json").read_text())
    assert rec["sensors"]["estimated"] is True and rec["sensors"]["applied"] is False
    assert "sensor_offsets.csv" in rec["outputs"]
    assert "Sensors that disagree" in (tmp_path / "out" / "report.html").read_text()


def test_the_town_demo_finds_its_gain_biased_sensor():
    from stationflow import api, config

    from .conftest import ROOT

    town = ROOT / "sample_data" / "town"
    run = api.run_budget(town / "observations.csv", town / "stations.csv", config.load(town / "config.toml"))
    s = run.sensors.set_index("station_id").loc[synthetic.TOWN_GAIN_SENSOR]
    assert s["gain"] - 1 > 2 * s["gain_se"]  # reads high, beyond twice its error
    assert run.sensors["station_id"].iloc[0] == synthetic.TOWN_GAIN_SENSOR


def test_the_humidity_correction_runs_before_the_budget_with_humidity_from_the_nearest_station():
    from stationflow import config
    from stationflow.read.canonical import IngestResult
    from stationflow.run.check import CheckResult
    from stationflow.run.plan import plan_budget

    st = synthetic.network(12, radius_km=5.0, seed=1)
    times = pd.date_range("2026-08-20 10:00", periods=30, freq="10min", tz="UTC")
    rows = pd.MultiIndex.from_product([times, st["station_id"]], names=["time", "station_id"]).to_frame(index=False)
    rng = np.random.default_rng(0)
    rows["pm2_5"] = 20 + rng.normal(0, 1, len(rows))
    rh_t = 60 + 5 * np.sin(np.arange(len(times)) / 4.0)  # the same at every station at a time
    rh = np.repeat(rh_t, len(st))
    rows["relative_humidity"] = np.where(rows["station_id"].isin(st["station_id"].iloc[:4]), rh, np.nan)
    rows["station_id"] = pd.Categorical(rows["station_id"])
    obs = rows[["station_id", "time", "pm2_5", "relative_humidity"]]
    cfg = config.from_dict({"sensors": {"humidity_correction": "barkjohn2021"}, "budget": {"variable": "pm2_5"},
                            "observations": {"kinds": {"pm2_5": "concentration"}}})
    from stationflow import qc

    data = IngestResult(obs, st.drop(columns=["x", "y"]), pd.DataFrame(columns=["file", "line", "reason"]), {},
                        {"pm2_5": "ug m-3"}, ["generated"])
    res = qc.run_qc(obs, data.stations, cfg)
    plan = plan_budget(CheckResult(data, res, None, None, None, None, cfg), cfg)
    want = 0.524 * obs["pm2_5"].to_numpy() - 0.0862 * rh + 5.75  # humidity at the time, from whichever station
    good = res.usable()["pm2_5"]
    np.testing.assert_allclose(plan.frame["q"].to_numpy()[good], want[good], rtol=1e-12)
    assert plan.choices["humidity_correction"]["from_nearest_station"] == int((~rows["relative_humidity"].notna()).sum())
