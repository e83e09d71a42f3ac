"""The ingester: formats, units, time zones, the station table and the accounting."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stationflow import config
from stationflow import read
from stationflow.errors import ConfigError, IngestError
from stationflow.read.stations import station_labels

from .conftest import utc, write_csv

MESSY = """Site;Timestamp;Temp_F;Wind_kt;Dir;Press_inHg;Note
id;local;F;kt;compass;inHg;text
A;2026-03-07 23:50;50.0;10;NW;29.92;ok
B;2026-03-07 23:50;-99.9;5;CALM;29.90;sensor fault
C;2026-03-07 23:50;48.2;M;SSE;29.91;
broken line without enough fields
D;2026-03-07 23:50;abc;4;E;29.90;typo

A;2026-03-08 00:00;49.5;12;N;29.92;
"""

MESSY_TOML = """
[observations]
delimiter = ";"
skip_lines = [2]
timezone = "America/Denver"
missing_values = ["-99.9", "M"]
[observations.columns]
Site = "station_id"
Timestamp = "time"
Temp_F = "air_temperature"
Wind_kt = "wind_speed"
Dir = "wind_from_direction"
Press_inHg = "air_pressure"
[observations.units]
air_temperature = "degF"
wind_speed = "knot"
wind_from_direction = "compass"
air_pressure = "inHg"
"""


def _cfg(tmp_path: Path, text: str) -> config.Config:
    p = tmp_path / "c.toml"
    p.write_text(text, encoding="utf-8")
    return config.load(p)


def test_messy_export(tmp_path, stations_file):
    obs = write_csv(tmp_path / "obs.csv", MESSY)
    r = read.read(obs, stations_file, _cfg(tmp_path, MESSY_TOML))
    assert r.accounting == {"rows_read": 6, "rows_accepted": 4, "rows_rejected": 2, "duplicates_collapsed": 0}
    assert r.rejected["line"].tolist() == [6, 7]
    assert "expected 7 fields, found 1" in r.rejected["reason"].iloc[0]
    assert r.rejected["reason"].iloc[1] == "air_temperature: cannot read 'abc' as a number"
    o = r.observations.set_index(["station_id", "time"])
    # America/Denver is UTC-7 in winter (MST)
    a = o.loc[("A", utc("2026-03-08 06:50"))]
    assert a["air_temperature"] == pytest.approx((50 + 459.67) * 5 / 9)
    assert a["wind_speed"] == pytest.approx(10 * 1852 / 3600)
    assert a["wind_from_direction"] == 315.0
    assert a["air_pressure"] == pytest.approx(29.92 * 3386.389)
    b = o.loc[("B", utc("2026-03-08 06:50"))]
    assert np.isnan(b["air_temperature"]) and np.isnan(b["wind_from_direction"])  # sentinel; calm
    assert np.isnan(o.loc[("C", utc("2026-03-08 06:50")), "wind_speed"])  # "M" is missing, not an error
    assert r.ignored_columns == ["Note"]
    assert list(r.observations.columns[:2]) == ["station_id", "time"]
    assert str(r.observations["time"].dt.tz) == "UTC"


def _dst_obs(tmp_path, rows):
    text = "station_id,time,air_temperature\n" + "\n".join(rows) + "\n"
    return write_csv(tmp_path / "dst.csv", text)


def test_spring_forward_gap_rejected(tmp_path, stations_file):
    # 2026-03-08 02:30 does not exist in America/Denver (clocks jump from 02:00 to 03:00)
    obs = _dst_obs(tmp_path, ["A,2026-03-08 01:30,1", "A,2026-03-08 02:30,2", "A,2026-03-08 03:30,3"])
    cfg = config.from_dict({"observations": {"timezone": "America/Denver"}})
    r = read.read(obs, stations_file, cfg)
    assert r.rejected["line"].tolist() == [3]
    assert "does not exist in America/Denver" in r.rejected["reason"].iloc[0]
    t = r.observations["time"].tolist()
    assert t == [utc("2026-03-08 08:30"), utc("2026-03-08 09:30")]  # MST then MDT


def test_fall_back_resolved_from_station_order(tmp_path, stations_file):
    # 2026-11-01 01:00-01:59 happens twice in America/Denver: first MDT (UTC-6), then MST (UTC-7)
    rows = ["A,2026-11-01 00:30,1", "A,2026-11-01 01:00,2", "A,2026-11-01 01:30,3", "A,2026-11-01 01:00,4",
            "A,2026-11-01 01:30,5", "A,2026-11-01 02:00,6", "B,2026-11-01 01:30,7"]
    obs = _dst_obs(tmp_path, rows)
    cfg = config.from_dict({"observations": {"timezone": "America/Denver"}})
    r = read.read(obs, stations_file, cfg)
    a = r.observations[r.observations["station_id"] == "A"].sort_values("time")
    assert a["air_temperature"].tolist() == [1, 2, 3, 4, 5, 6]
    assert a["time"].tolist() == [utc("2026-11-01 06:30"), utc("2026-11-01 07:00"), utc("2026-11-01 07:30"),
                                  utc("2026-11-01 08:00"), utc("2026-11-01 08:30"), utc("2026-11-01 09:00")]
    # B reports once at the ambiguous time with nothing around it: cannot tell, so rejected with the reason
    assert r.rejected["line"].tolist() == [8]
    assert "occurs twice at the daylight-saving change" in r.rejected["reason"].iloc[0]


def test_fixed_offset_and_explicit_offsets(tmp_path, stations_file):
    obs = _dst_obs(tmp_path, ["A,2026-05-01 08:00,1", "B,2026-05-01T00:00:00Z,2", "C,2026-05-01T09:00:00+09:00,3"])
    cfg = config.from_dict({"observations": {"timezone": "+08:00"}})
    r = read.read(obs, stations_file, cfg)
    assert r.observations["time"].tolist() == [utc("2026-05-01 00:00")] * 3


def test_time_columns_assembled(tmp_path, stations_file):
    text = "station_id,year,month,day,hour,air_temperature\nA,2026,1,2,3,270\nA,2026,1,2,24,271\nA,2026,13,2,3,272\n"
    obs = write_csv(tmp_path / "o.csv", text)
    cfg = config.from_dict({"observations": {"time_columns": ["year", "month", "day", "hour"]}})
    r = read.read(obs, stations_file, cfg)
    assert r.observations["time"].tolist() == [utc("2026-01-02 03:00"), utc("2026-01-03 00:00")]
    assert r.rejected["line"].tolist() == [4]
    assert "cannot build a time from year/month/day/hour = 2026/13/2/3" in r.rejected["reason"].iloc[0]


def test_wide_layout(tmp_path, stations_file):
    text = "time,A,B,C\n2026-01-01T00:00Z,1.0,2.0,\n2026-01-01T00:10Z,1.5,x,3.0\n2026-01-01T00:20Z,2.0,2.5,3.5\n"
    obs = write_csv(tmp_path / "w.csv", text)
    cfg = config.from_dict({"observations": {"layout": "wide", "wide_variable": "air_temperature",
                                             "units": {"air_temperature": "degC"}}})
    r = read.read(obs, stations_file, cfg)
    assert r.accounting["rows_read"] == 3 and r.accounting["rows_rejected"] == 1
    assert r.rejected["line"].tolist() == [3]
    assert len(r.observations) == 6  # 3 + 3 values from lines 2 and 4 (the empty C cell is missing, kept as NaN)
    assert r.observations["air_temperature"].min() == pytest.approx(274.15)


def test_parquet_input(tmp_path, stations_file):
    df = pd.DataFrame({"station_id": ["A", "B"], "time": pd.to_datetime(["2026-01-01T00:00Z", "2026-01-01T00:00Z"]),
                       "air_temperature": [270.0, np.inf]})
    p = tmp_path / "o.parquet"
    df.to_parquet(p)
    r = read.read(p, stations_file, config.Config())
    assert r.accounting == {"rows_read": 2, "rows_accepted": 1, "rows_rejected": 1, "duplicates_collapsed": 0}
    assert r.rejected["line"].tolist() == [2]


def test_stations_from_observation_rows(tmp_path):
    text = ("station_id,time,latitude,longitude,elevation,air_temperature\n"
            "A,2026-01-01T00:00Z,45.0,10.0,100,270\nB,2026-01-01T00:00Z,45.1,10.0,120,271\n"
            "A,2026-01-01T00:10Z,45.0,10.0,100,270.5\n")
    r = read.read(write_csv(tmp_path / "o.csv", text), None, config.Config())
    assert r.stations["station_id"].tolist() == ["A", "B"]
    assert r.stations["elevation"].tolist() == [100.0, 120.0]
    moved = text + "B,2026-01-01T00:10Z,45.2,10.0,120,271\n"
    with pytest.raises(IngestError, match="station 'B' changes coordinates between lines 3 and 5"):
        read.read(write_csv(tmp_path / "o2.csv", moved), None, config.Config())


def test_duplicates_collapsed_and_conflicts_rejected(tmp_path, stations_file):
    text = ("station_id,time,air_temperature\nA,2026-01-01T00:00Z,270\nA,2026-01-01T00:00Z,270\n"
            "B,2026-01-01T00:00Z,271\nB,2026-01-01T00:00Z,275\nC,2026-01-01T00:00Z,272\n")
    r = read.read(write_csv(tmp_path / "o.csv", text), stations_file, config.Config())
    assert r.accounting == {"rows_read": 5, "rows_accepted": 3, "rows_rejected": 2, "duplicates_collapsed": 1}
    assert r.rejected["line"].tolist() == [4, 5]
    assert r.rejected["reason"].iloc[0] == "conflicts with line 5 (same station and time, different values)"
    assert sorted(r.observations["station_id"]) == ["A", "C"]


@pytest.mark.parametrize("extra", ["", "B,2026-01-01T00:10Z,272.0\n", "X,2026-01-01T00:10Z,1\n"])
def test_row_order_does_not_change_the_result(tmp_path, stations_file, extra):
    # time order takes the shortcut past the duplicate search and the sort; other orders do not: same frame.
    # extra: an exact repeat (collapsed), or a row of an unknown station (rejected)
    rows = [f"{s},2026-01-01T00:{m:02d}Z,{270 + i + m / 10:.1f}" for m in (0, 10, 20) for i, s in enumerate("ABCD")]
    rng = np.random.default_rng(3)
    results = []
    for order in (rows, sorted(rows), [rows[i] for i in rng.permutation(len(rows))]):
        text = "station_id,time,air_temperature\n" + "\n".join(order) + "\n" + extra
        results.append(read.read(write_csv(tmp_path / "o.csv", text), stations_file, config.Config()))
    for r in results:
        pd.testing.assert_frame_equal(r.observations, results[0].observations)
        assert r.accounting == results[0].accounting
    obs = results[0].observations
    assert obs["station_id"].cat.categories.tolist() == ["A", "B", "C", "D"]
    assert obs["time"].is_monotonic_increasing and len(obs) == 12
    assert isinstance(obs.index, pd.RangeIndex)
    assert results[0].accounting["rows_rejected"] == (1 if extra.startswith("X") else 0)
    assert results[0].accounting["duplicates_collapsed"] == (1 if extra.startswith("B") else 0)


def test_real_netcdf_station_files(arm_dir, arm_config):
    # ARM SGP met b1 files (doi:10.5439/1786358): coordinates from lat/lon/alt, units from attributes
    cfg = config.load(arm_config)
    r = read.read(arm_dir, None, cfg)
    assert len(r.stations) == 13
    e9 = r.stations.set_index("station_id").loc["E9"]
    assert e9["latitude"] == pytest.approx(37.133, abs=1e-3)
    assert e9["longitude"] == pytest.approx(-97.266, abs=1e-3)
    assert e9["elevation"] == pytest.approx(386.0)
    assert r.units["air_temperature"] == "K" and r.units["air_pressure"] == "Pa"
    assert r.accounting["rows_read"] == 78 and r.accounting["rows_rejected"] == 0
    # the same values as the long CSV export of the same files
    c = read.read(arm_dir / "sgp_met_1min_long.csv", None, cfg)
    m = r.observations.merge(c.observations, on=["station_id", "time"], suffixes=("_nc", "_csv"))
    assert len(m) == 78
    np.testing.assert_allclose(m["air_temperature_nc"], m["air_temperature_csv"], atol=1e-4)
    np.testing.assert_allclose(m["air_pressure_nc"], m["air_pressure_csv"], atol=0.01)
    # temp_mean is degC in the files: about 16-23 degC that night (shared/data README)
    assert 285 < r.observations["air_temperature"].min() < r.observations["air_temperature"].max() < 297


def test_unknown_timezone_is_a_config_error(tmp_path, stations_file):
    obs = _dst_obs(tmp_path, ["A,2026-05-01 08:00,1"])
    with pytest.raises(ConfigError, match="not an IANA time zone"):
        read.read(obs, stations_file, config.from_dict({"observations": {"timezone": "Mars/Olympus"}}))


@pytest.mark.parametrize("unused", [False, True])
def test_station_labels_of_a_categorical_equal_those_of_plain_text(unused):
    # the typed reader hands over coded labels: they must give exactly what the labels as text give
    values = [" B2", "A1", None, "C3 ", "A1", " B2"]
    cats = ["C3 ", " B2", "A1"] + (["Z9"] if unused else [])
    coded = pd.Series(pd.Categorical(values, categories=cats))
    got, want = station_labels(coded), station_labels(pd.Series(values, dtype=object))
    assert got.tolist() == want.tolist() == ["B2", "A1", "", "C3", "A1", "B2"]
    assert list(got.cat.categories) == list(want.cat.categories) == ["", "A1", "B2", "C3"]
