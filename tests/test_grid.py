"""Alignment onto the analysis grid."""

import numpy as np
import pandas as pd
import pytest

from stationflow.network import grid


def _obs():
    t = pd.to_datetime(["2026-01-01T00:00Z", "2026-01-01T00:05Z", "2026-01-01T00:10Z", "2026-01-01T00:12Z",
                        "2026-01-01T00:10Z"])
    return pd.DataFrame({"station_id": ["A", "A", "A", "A", "B"], "time": t,
                         "air_temperature": [270.0, 271.0, 272.0, 280.0, 275.0],
                         "wind_speed": [5.0, 5.0, 0.2, 5.0, 3.0], "wind_from_direction": [360.0, 180.0, 90.0, 270.0, 270.0]})


def test_right_labelled_bins_and_means():
    g = grid.to_grid(_obs(), ["A", "B"], ["air_temperature"], interval=pd.Timedelta("10min"))
    assert list(g.times) == list(pd.date_range("2026-01-01T00:00Z", periods=3, freq="10min"))
    a = g.values["air_temperature"][:, 0]
    # bin 00:00 holds 00:00; bin 00:10 holds (00:00, 00:10] = 00:05 and 00:10; bin 00:20 holds 00:12
    assert a.tolist() == [270.0, 271.5, 280.0]
    assert g.counts["air_temperature"][:, 0].tolist() == [1, 2, 1]
    assert np.isnan(g.values["air_temperature"][0, 1]) and g.values["air_temperature"][1, 1] == 275.0


def test_vector_mean_winds_and_calm():
    g = grid.to_grid(_obs(), ["A", "B"], [], interval=pd.Timedelta("10min"))
    # bin 00:10 at A: 5 m/s from the south and a calm report: vector mean v = (+5 + 0) / 2
    assert g.values["u"][1, 0] == pytest.approx(0.0, abs=1e-12)
    assert g.values["v"][1, 0] == pytest.approx(2.5)
    assert g.values["u"][1, 1] == pytest.approx(3.0)  # from the west: blowing east


def test_usable_masks_drop_values():
    obs = _obs()
    use = {"air_temperature": np.array([True, False, True, True, True])}
    g = grid.to_grid(obs, ["A", "B"], ["air_temperature"], interval=pd.Timedelta("10min"), usable=use)
    assert g.values["air_temperature"][1, 0] == 272.0


def test_durations():
    assert grid.parse_duration("10min") == pd.Timedelta(minutes=10)
    assert grid.parse_duration("1.5h") == pd.Timedelta(minutes=90)
    assert grid.parse_duration("7D") == pd.Timedelta(days=7)
    for bad in ("ten minutes", "0min", "5 parsecs"):
        with pytest.raises(ValueError):
            grid.parse_duration(bad)
    assert grid.format_duration(pd.Timedelta("1h")) == "1h"
    assert grid.format_duration(pd.Timedelta("90s")) == "90s"
    assert grid.infer_interval(_obs()) == pd.Timedelta(minutes=5)


def _interval_by_groupby(obs: pd.DataFrame) -> pd.Timedelta:
    """Reference: the median over stations of each station's median positive step, with pandas group-by."""
    o = obs.sort_values(["station_id", "time"])
    steps = o.groupby("station_id", observed=True)["time"].diff().dt.total_seconds()
    per_station = steps[steps > 0].groupby(o["station_id"], observed=True).median()
    return pd.Timedelta(seconds=max(1.0, round(float(np.median(per_station)))))


@pytest.mark.parametrize("seed", range(12))
def test_inferred_interval_of_mostly_regular_networks(seed):
    """Regular series with gaps, stations at other steps and repeated times: the counted medians (most
    stations) and the sorted ones (the rest) give the group-by definition."""
    rng = np.random.default_rng(100 + seed)
    frames = []
    for k in range(int(rng.integers(3, 12))):
        step = int(rng.choice([300, 300, 300, 600, 60, 3600]))
        n = int(rng.integers(2, 60))
        off = np.cumsum(rng.choice([step, step, step, 2 * step, 7 * step, 0], n) if rng.random() < 0.5
                        else np.full(n, step))
        frames.append(pd.DataFrame({"station_id": f"S{k:02d}",
                                    "time": pd.Timestamp("2026-03-01", tz="UTC") + pd.to_timedelta(off, unit="s")}))
    obs = pd.concat(frames, ignore_index=True).sort_values("time", kind="stable").reset_index(drop=True)
    assert grid.infer_interval(obs) == _interval_by_groupby(obs)


@pytest.mark.parametrize("seed", range(40))
def test_inferred_interval_equals_the_group_by_definition(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 80))
    steps = rng.choice([60, 300, 300, 600, 601, 3600, 0], n)  # 0: a repeated time
    t = pd.Timestamp("2026-01-01", tz="UTC") + pd.to_timedelta(np.cumsum(steps), unit="s")
    ids = rng.choice(["A", "B", "C", "D"], n)
    obs = pd.DataFrame({"station_id": pd.Categorical(ids) if seed % 2 else ids, "time": t})
    if seed % 3 == 0:
        obs = obs.sample(frac=1, random_state=seed)  # not in time order
    if obs.groupby("station_id", observed=True)["time"].apply(lambda s: (s.sort_values().diff().dt.total_seconds() > 0).any()).any():
        assert grid.infer_interval(obs) == _interval_by_groupby(obs)
    # QC finds the same interval on the same rows while they are in station order (the budget then reuses it)
    from stationflow import qc

    obs["air_temperature"] = 280.0 + rng.normal(0, 0.1, len(obs))
    st = pd.DataFrame({"station_id": ["A", "B", "C", "D"], "latitude": [45.0, 45.1, 45.0, 45.1],
                       "longitude": [7.0, 7.0, 7.1, 7.1], "elevation": 100.0})
    assert qc.run_qc(obs, st).interval == grid.infer_interval(obs)
