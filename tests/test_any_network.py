"""Any network, any common export: sizes without limits, the usual time layouts, unit slips with their fix."""

import json

import numpy as np
import pandas as pd
import pytest

from stationflow.cli import app

from .netgen import linear_night, write_export


def _run(runner, paths, out, command="budget", config=True):
    args = [command, "--stations", str(paths["stations"]), "--obs", str(paths["obs"]), "--out", str(out), "--quiet"]
    if config:
        args += ["--config", str(paths["config"])]
    return runner.invoke(app, args)


@pytest.mark.parametrize("n", [70, 300, 2000])
def test_networks_with_elevations_of_any_size_run_with_the_default_config(runner, tmp_path, n):
    st, obs = linear_night(n, 12, seed=n)
    paths = write_export(tmp_path / "in", st, obs)
    res = _run(runner, paths, tmp_path / "out")
    assert res.exit_code == 0, res.stderr
    table = pd.read_parquet(tmp_path / "out" / "budget.parquet")
    assert table["cluster"].nunique() > n  # a Delaunay network has about two triangles per station
    acc = json.loads((tmp_path / "out" / "run.json").read_text())["accounting"]
    assert acc["rows_accepted"] == len(obs)


@pytest.mark.parametrize("layout, tz", [
    ("%m/%d/%Y %H:%M", "America/Los_Angeles"),  # a US logger export in local time
    ("%d/%m/%Y %H:%M", "Europe/Vienna"),
    ("%d.%m.%Y %H:%M:%S", "+01:00"),
    ("%m/%d/%y %I:%M %p", "America/Denver"),
    ("%Y/%m/%d %H:%M", "UTC"),
    ("%Y-%m-%d %H:%M", "Asia/Tokyo"),
])
def test_common_time_layouts_are_read_without_a_time_format(runner, tmp_path, layout, tz):
    st, obs = linear_night(8, 40, seed=3, elevation=False, missing=0.0, start="2026-04-10 20:00", tz=tz)
    paths = write_export(tmp_path / "in", st, obs, time_format=layout, tz=tz)
    res = _run(runner, paths, tmp_path / "out", command="check")
    assert res.exit_code == 0, res.stderr
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    assert run["accounting"]["rows_rejected"] == 0
    assert run["reading"]["time_layout"] in (layout, "ISO8601")
    flags = pd.read_csv(tmp_path / "out" / "qc_flags.csv")
    assert len(flags) == 0  # times read right: no step or spike fires on a smooth field


def test_month_first_is_settled_by_a_continuous_night(runner, tmp_path):
    """04/10 then 04/11 after midnight: only month-first runs on without a jump of weeks."""
    st, obs = linear_night(6, 36, seed=5, elevation=False, missing=0.0, start="2026-04-10 20:00", tz="America/Chicago")
    paths = write_export(tmp_path / "in", st, obs, time_format="%m/%d/%Y %H:%M", tz="America/Chicago")
    assert "04/10/2026 20:00" in paths["obs"].read_text()
    res = _run(runner, paths, tmp_path / "out", command="check")
    assert res.exit_code == 0, res.stderr
    assert json.loads((tmp_path / "out" / "run.json").read_text())["reading"]["time_layout"] == "%m/%d/%Y %H:%M"


def test_undecidable_day_and_month_name_both_layouts_and_the_key(runner, tmp_path):
    st, obs = linear_night(6, 12, seed=5, elevation=False, missing=0.0, start="2026-04-10 08:00")  # one morning
    paths = write_export(tmp_path / "in", st, obs, time_format="%m/%d/%Y %H:%M")
    res = _run(runner, paths, tmp_path / "out", command="check")
    assert res.exit_code == 2
    line = res.stderr.strip()
    assert line.startswith("error:") and "\n" not in line
    assert '"%m/%d/%Y %H:%M"' in line and '"%d/%m/%Y %H:%M"' in line and "observations.time_format" in line


def test_unit_slip_is_caught_with_its_fix(runner, tmp_path):
    st, obs = linear_night(10, 6, seed=2)
    paths = write_export(tmp_path / "in", st, obs)
    paths["config"].write_text("", encoding="utf-8")  # degC values, no unit declared: read as kelvin
    for command in ("check", "budget"):
        res = _run(runner, paths, tmp_path / command, command=command)
        assert res.exit_code == 2, res.stderr
        assert "observations.units.air_temperature" in res.stderr and '"degC"' in res.stderr
        assert len(res.stderr.strip().splitlines()) == 1


def test_no_usable_rows_still_writes_the_files_the_error_names(runner, tmp_path):
    st, obs = linear_night(5, 4, seed=2, elevation=False)
    paths = write_export(tmp_path / "in", st, obs, time_format="%H:%M on day %j")  # no date a reader can use
    for command in ("check", "budget"):
        out = tmp_path / command
        res = _run(runner, paths, out, command=command)
        assert res.exit_code == 2
        assert "rejected_rows.csv" in res.stderr
        rej = pd.read_csv(out / "rejected_rows.csv")
        assert len(rej) == len(obs) and rej["reason"].str.contains("cannot parse time").all()
        acc = json.loads((out / "run.json").read_text())["accounting"]
        assert acc["rows_rejected"] == acc["rows_read"] == len(obs)


def _fall_back_export(tmp_path, shuffle: bool):
    st, obs = linear_night(6, 30, seed=8, elevation=False, missing=0.0, start="2026-10-24 23:30", tz="Europe/Berlin")
    if shuffle:  # a file whose rows are out of time order within a station, across the repeated hour
        obs = obs.sample(frac=1.0, random_state=3).reset_index(drop=True)
    return write_export(tmp_path / "in", st, obs, time_format="%Y-%m-%d %H:%M", tz="Europe/Berlin")


def test_local_times_in_order_across_the_fall_back_hour_are_read(runner, tmp_path):
    res = _run(runner, _fall_back_export(tmp_path, shuffle=False), tmp_path / "out", command="check")
    assert res.exit_code == 0, res.stderr
    assert json.loads((tmp_path / "out" / "run.json").read_text())["accounting"]["rows_rejected"] == 0


def test_local_times_out_of_order_across_the_fall_back_hour_stop_with_the_fix(runner, tmp_path):
    res = _run(runner, _fall_back_export(tmp_path, shuffle=True), tmp_path / "out", command="check")
    assert res.exit_code == 2
    line = res.stderr.strip()
    assert "\n" not in line and "out of time order" in line and "UTC offset" in line and "sort" in line


def test_a_station_far_outside_the_network_is_named(runner, tmp_path, caplog):
    st, obs = linear_night(12, 6, seed=9, elevation=False)
    st.loc[3, "longitude"] = st.loc[3, "longitude"] + 160.0  # a longitude slip: thousands of km away
    paths = write_export(tmp_path / "in", st, obs)
    with caplog.at_level("WARNING", logger="stationflow"):
        res = _run(runner, paths, tmp_path / "out", command="network")
    assert res.exit_code == 0, res.stderr
    far = [r.getMessage() for r in caplog.records if "far outside the network" in r.getMessage()]
    assert len(far) == 1 and st.loc[3, "station_id"] in far[0]
    assert not any("far outside" in r.getMessage() for r in caplog.records if st.loc[4, "station_id"] in r.getMessage()
                   and st.loc[3, "station_id"] not in r.getMessage())


def test_a_mapped_column_that_is_absent_stops_with_its_name(runner, tmp_path):
    st, obs = linear_night(8, 6, seed=2, elevation=False)
    paths = write_export(tmp_path / "in", st, obs)
    paths["config"].write_text(paths["config"].read_text() + '[observations.columns]\nWindSpd = "wind_speed"\n',
                               encoding="utf-8")
    res = _run(runner, paths, tmp_path / "out", command="budget")
    assert res.exit_code == 2
    line = res.stderr.strip()
    assert "\n" not in line and "'WindSpd'" in line and "observations.columns" in line and "wind_from_direction" in line


def test_swapped_latitude_and_longitude_are_named(runner, tmp_path, caplog):
    """A network near Vienna (47.5 N, 14 E) whose columns are mapped the wrong way round (14 N, 47.5 E: Yemen)."""
    st, obs = linear_night(8, 12, seed=2, elevation=False, tz="Europe/Vienna")
    st = st.assign(latitude=47.5 + (st["latitude"] - 45.0), longitude=14.0 + (st["longitude"] - 10.0))
    swapped = st.rename(columns={"latitude": "longitude", "longitude": "latitude"})
    for folder, table, expect in (("bad", swapped, True), ("good", st, False)):
        caplog.clear()
        paths = write_export(tmp_path / folder, table, obs, time_format="%Y-%m-%d %H:%M", tz="Europe/Vienna")
        with caplog.at_level("WARNING", logger="stationflow"):
            res = _run(runner, paths, tmp_path / f"out_{folder}", command="check")
        assert res.exit_code == 0, res.stderr
        assert any("look swapped" in r.getMessage() for r in caplog.records) == expect, folder


def test_no_wind_is_named_as_the_reason(runner, tmp_path):
    st, obs = linear_night(10, 12, seed=2, elevation=False)
    paths = write_export(tmp_path / "in", st, obs.drop(columns=["wind_speed", "wind_from_direction"]))
    res = runner.invoke(app, ["budget", "--stations", str(paths["stations"]), "--obs", str(paths["obs"]), "--config",
                              str(paths["config"]), "--out", str(tmp_path / "out")])
    assert res.exit_code == 0, res.stderr
    assert "no wind observed" in res.stdout
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    assert run["wind"] == "none" and {k for k, v in run["regimes"].items() if v} == {"undetermined"}
    assert "No wind was observed" in (tmp_path / "out" / "report.html").read_text()


def test_an_alpine_network_untuned_gives_no_fake_advection(runner, tmp_path):
    """81 stations over 2 km of relief, hourly, ';' with a units row, D.M.Y local times; inversion by night.

    The air's horizontal gradient is 0.05 K/km with a 2 m/s wind: the true advection is -0.36 K/h
    everywhere (analytic truth). A fit that let height pose as distance gave tens of K/h.
    """
    from stationflow.scenarios import synthetic as s

    st = s.network(81, radius_km=60, seed=21,
                   elevation=lambda x, y: 900 + 1200 * (1 + np.sin(x / 15000) * np.cos(y / 12000)))
    lapse = s.smooth([(0, -0.0065), (8, -0.0065), (14, 0.005), (30, 0.005), (34, -0.0065), (48, -0.0065)], 1.0)
    cooling = s.smooth([(0, 0.5), (6, 0.5), (8, -1.0), (20, -0.6), (30, 0.8), (48, 0.0)], 1.0)
    f = s.LinearField(base=285.0, gx=s.constant(5e-5), u=s.constant(2.0), v=s.constant(0.5), gamma=lapse, z_ref=1500.0,
                      source=lambda t: cooling(t) / 3600.0, horizon_s=4 * 86400.0)
    times = pd.date_range("2026-04-10 06:00", periods=48, freq="1h", tz="UTC")
    obs = s.sample(f, st, times, noise=0.2, wind_noise=0.5, seed=3, offset=0.1, missing=0.03)
    paths = write_export(tmp_path / "in", st, obs, delimiter=";", units_row=True, time_format="%d.%m.%Y %H:%M",
                         tz="Europe/Zurich")
    res = _run(runner, paths, tmp_path / "out")
    assert res.exit_code == 0, res.stderr
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    assert run["vertical"]["used"] == "measured" and run["reading"]["time_layout"] == "%d.%m.%Y %H:%M"
    t = pd.read_parquet(tmp_path / "out" / "budget.parquet").dropna(subset=["advection"])
    truth = -(2.0 * 5e-5) * 3600
    assert abs(t["advection"].median() - truth) < 0.1
    assert np.percentile(np.abs(t["advection"] - truth), 95) < 1.5
    clusters = pd.read_csv(tmp_path / "out" / "clusters.csv")
    tall = clusters["height_range_m"] > 1000
    assert tall.any() and (clusters.loc[tall, "status"] == "rejected").all()
