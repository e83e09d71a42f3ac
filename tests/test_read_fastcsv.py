"""The typed CSV fast path (stationflow.read.fastcsv) gives exactly what the general reader gives."""

import numpy as np
import pandas as pd
import pytest

from stationflow import config, read
from stationflow.read import fastcsv
from stationflow.read import observations as observations_module

from .conftest import ROOT

FROST = ROOT / "sample_data" / "frost"
TOWN = ROOT / "sample_data" / "town"


@pytest.mark.parametrize("folder", [FROST, TOWN])
def test_typed_csv_fast_path_equals_the_general_reader(folder, monkeypatch):
    cfg = config.load(folder / "config.toml")
    from stationflow.read import observations

    fast = read.read(folder / "observations.csv", folder / "stations.csv", cfg)
    with monkeypatch.context() as m:
        m.setattr(observations, "read_typed_csv", lambda *a, **k: None)
        slow = read.read(folder / "observations.csv", folder / "stations.csv", cfg)
    pd.testing.assert_frame_equal(fast.observations, slow.observations)
    pd.testing.assert_frame_equal(fast.rejected, slow.rejected)
    assert fast.accounting == slow.accounting
    assert fast.ignored_columns == slow.ignored_columns and fast.units == slow.units


def _write(path, text):
    path.write_text(text, encoding="utf-8")
    return path


STATIONS = "station_id,latitude,longitude,elevation\nA,47.0,11.0,500\nB,47.1,11.0,510\nC,47.0,11.1,505\n"


@pytest.mark.parametrize("body, fast", [
    # clean: taken by the fast path; duplicates collapse identically on both paths
    ("A,2026-01-01T00:00:00Z,1.5,x\nB,2026-01-01T00:00:00Z,2.5,y\nA,2026-01-01T00:00:00Z,1.5,x\n", True),
    # conflicting duplicates: rejected with their line numbers by both paths
    ("A,2026-01-01T00:00:00Z,1.5,x\nA,2026-01-01T00:00:00Z,1.7,x\nB,2026-01-01T00:10:00Z,2.5,y\n", True),
    # naive times in UTC, a missing value: fast path
    ("A,2026-01-01 00:00:00,,x\nB,2026-01-01 00:10:00,2.5,y\n", True),
    # a number that is not one, an unknown station, a blank line: general reader
    ("A,2026-01-01T00:00:00Z,warm,x\nZ,2026-01-01T00:00:00Z,1.0,x\n\nB,2026-01-01T00:10:00Z,2.5,y\n", False),
    # infinite value: general reader explains it
    ("A,2026-01-01T00:00:00Z,inf,x\nB,2026-01-01T00:10:00Z,2.5,y\n", False),
    # only a blank line (between rows, or at the end): general reader, which numbers the lines after it right
    ("A,2026-01-01T00:00:00Z,1.5,x\n\nZ,2026-01-01T00:10:00Z,2.5,y\n", False),
    ("A,2026-01-01T00:00:00Z,1.5,x\nZ,2026-01-01T00:10:00Z,2.5,y\n\n", False),
    # Windows line ends, a quoted station id: general reader
    ("A,2026-01-01T00:00:00Z,1.5,x\r\nZ,2026-01-01T00:10:00Z,2.5,y\r\n", False),
    ('"A",2026-01-01T00:00:00Z,1.5,x\nZ,2026-01-01T00:10:00Z,2.5,y\n', False),
    # no newline after the last row: fast path
    ("A,2026-01-01T00:00:00Z,1.5,x\nB,2026-01-01T00:10:00Z,2.5,y", True),
])
def test_fast_path_choice_and_equal_results(tmp_path, monkeypatch, body, fast):
    """Which files the fast path takes, and that both readers then give the same frames and rejections."""
    st = _write(tmp_path / "stations.csv", STATIONS)
    obs = tmp_path / "obs.csv"
    obs.write_bytes(("station_id,time,air_temperature,note\n" + body).encode("utf-8"))  # line ends as given
    cfg = config.Config()
    taken = fastcsv.read_typed_csv(obs, cfg, read.read_stations(st, cfg)) is not None
    assert taken == fast
    a = read.read(obs, st, cfg)
    with monkeypatch.context() as m:
        m.setattr(observations_module, "read_typed_csv", lambda *a, **k: None)
        b = read.read(obs, st, cfg)
    pd.testing.assert_frame_equal(a.observations, b.observations)
    pd.testing.assert_frame_equal(a.rejected, b.rejected)
    assert a.accounting == b.accounting and a.ignored_columns == b.ignored_columns == ["note"]


def test_fast_path_byte_order_mark_and_fixed_offset(tmp_path, monkeypatch):
    """A UTF-8 byte-order mark and naive times at a fixed offset: the fast path reads them as the general
    reader does (times 08:00 at +08:00 are 00:00 UTC)."""
    st = _write(tmp_path / "stations.csv", STATIONS)
    obs = tmp_path / "obs.csv"
    obs.write_bytes(b"\xef\xbb\xbfstation_id,time,air_temperature\n"
                    b"A,2026-01-01 08:00:00,1.5\nB,2026-01-01 08:10:00,2.5\n")
    cfg = config.Config()
    cfg["observations"]["timezone"] = "+08:00"
    assert fastcsv.read_typed_csv(obs, cfg, read.read_stations(st, cfg)) is not None
    a = read.read(obs, st, cfg)
    with monkeypatch.context() as m:
        m.setattr(observations_module, "read_typed_csv", lambda *a, **k: None)
        b = read.read(obs, st, cfg)
    pd.testing.assert_frame_equal(a.observations, b.observations)
    assert list(a.observations["time"]) == list(pd.to_datetime(["2026-01-01T00:00Z", "2026-01-01T00:10Z"]))


@pytest.mark.parametrize("fast", [True, False])
def test_direction_zero_is_calm_or_north(tmp_path, monkeypatch, fast):
    """A direction of exactly 0: calm (no direction) under qc.calm_speed, north (360) otherwise or when
    the speed is missing; without a speed column every 0 is calm. Same on both readers."""
    st = _write(tmp_path / "stations.csv", STATIONS)
    with_speed = _write(tmp_path / "a.csv", "station_id,time,wind_speed,wind_from_direction\n"
                        "A,2026-01-01T00:00:00Z,0.1,0\nB,2026-01-01T00:00:00Z,4.0,0\n"
                        "C,2026-01-01T00:00:00Z,,0\nA,2026-01-01T00:10:00Z,3.0,90\n")
    no_speed = _write(tmp_path / "b.csv", "station_id,time,wind_from_direction\n"
                      "A,2026-01-01T00:00:00Z,0\nB,2026-01-01T00:00:00Z,180\n")
    cfg = config.Config()
    if not fast:
        monkeypatch.setattr(observations_module, "read_typed_csv", lambda *a, **k: None)
    else:
        assert fastcsv.read_typed_csv(with_speed, cfg, read.read_stations(st, cfg)) is not None
    a = read.read(with_speed, st, cfg).observations["wind_from_direction"].to_numpy()
    b = read.read(no_speed, st, cfg).observations["wind_from_direction"].to_numpy()
    # rows come back in (time, station) order: A, B, C at 00:00, then A at 00:10
    assert np.isnan(a[0]) and a[1] == 360.0 and a[2] == 360.0 and a[3] == 90.0
    assert np.isnan(b[0]) and b[1] == 180.0
