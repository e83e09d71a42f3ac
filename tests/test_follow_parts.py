"""The parts of the follow mode on analytic cases: one-sided tendencies, the projection, the growing-file
reader, the append-only store and the critical values."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest

from stationflow.config import from_dict
from stationflow.errors import ConfigError
from stationflow.estimate.budget import BudgetSettings
from stationflow.estimate.projection import crossing
from stationflow.estimate.provisional import one_sided
from stationflow.follow import alerts, source
from stationflow.follow.state import Columns, Store


def _terms(tendency: np.ndarray, se: float = 0.1) -> dict:
    n, c = tendency.shape
    t = {k: tendency.copy() for k in ("tendency", "advection", "residual")}
    t["advection"][:] = 0.0
    for k in ("tendency", "advection", "residual"):
        t[f"{k}_se"] = np.full((n, c), se)
    t["regime"] = np.zeros((n, c), np.int8)
    return t


def test_one_sided_rows_take_the_window_ending_at_them_and_add_the_drift():
    h = 3
    # a tendency rising linearly: 0.1 per step; the centred estimates known up to n-1-h
    n = 20
    centred = np.tile((0.1 * np.arange(n))[:, None], (1, 2))
    centred[n - h:] = np.nan  # not known yet
    terms = _terms(centred)
    changed = one_sided(terms, h, BudgetSettings(half_window=h))
    assert changed.tolist() == [False] * (n - h) + [True] * h
    i = np.arange(n - h, n)
    np.testing.assert_allclose(terms["tendency"][i, 0], 0.1 * (i - h))  # the window ending at i is centred at i - h
    drift = 0.1 * h
    np.testing.assert_allclose(terms["tendency_se"][i, 0], np.hypot(0.1, drift))
    # the truth at i (0.1 i) lies within 2 se of the one-sided estimate here, as the drift term promises
    assert np.all(np.abs(terms["tendency"][i, 0] - 0.1 * i) <= 2 * terms["tendency_se"][i, 0])


def test_one_sided_without_a_measurable_drift_doubles_the_variance():
    h = 2
    centred = np.full((5, 1), 1.0)
    centred[3:] = np.nan
    terms = _terms(centred, se=0.2)
    one_sided(terms, h, BudgetSettings(half_window=h))
    # row 3 takes row 1, whose drift would need row -1: unknown
    assert terms["tendency"][3, 0] == 1.0
    assert terms["tendency_se"][3, 0] == pytest.approx(0.2 * np.sqrt(2))


def test_projection_of_a_steady_cooling_and_its_error():
    # 2 K above the critical value, cooling 1 K/h in situ: two hours; se by first-order propagation
    c = crossing(np.array([275.15]), np.array([0.1]), np.array([-1.0]), np.array([0.2]), np.array([273.15]), downward=True)
    assert c.hours[0] == pytest.approx(2.0)
    assert c.hours_se[0] == pytest.approx(np.hypot(0.1 / 1.0, 2.0 * 0.2 / 1.0))
    # warming, or a rate not distinguishable from zero: no crossing projected; below already: reached
    c = crossing(np.array([275.0, 275.0, 272.0]), np.full(3, 0.1), np.array([0.5, -0.1, -1.0]), np.full(3, 0.2),
                 np.full(3, 273.15), downward=True)
    assert np.isnan(c.hours[0]) and np.isnan(c.hours[1]) and c.past.tolist() == [False, False, True]
    # a concentration rising to its limit
    c = crossing(np.array([20.0]), np.array([1.0]), np.array([5.0]), np.array([1.0]), np.array([35.0]), downward=False)
    assert c.hours[0] == pytest.approx(3.0)


def test_projection_error_grows_with_the_rate_drift():
    base = crossing(np.array([275.15]), np.array([0.1]), np.array([-1.0]), np.array([0.1]), np.array([273.15]),
                    downward=True)
    drifting = crossing(np.array([275.15]), np.array([0.1]), np.array([-1.0]), np.array([0.1]), np.array([273.15]),
                        downward=True, drift=np.array([0.5]))
    # a rate that changes by 0.5 K/h per hour moves the crossing by about d D^2 / (2 c) = 1 h
    assert drifting.hours_se[0] == pytest.approx(np.hypot(base.hours_se[0], 0.5 * 4 / 2))


def test_growing_file_new_whole_lines_only_then_truncation_restarts(tmp_path):
    f = tmp_path / "log.csv"
    f.write_bytes(b"a,b\n1,2\n3,")
    chunks, marks, restarts = source.poll(f, {})
    assert [(c.first_line, c.body) for c in chunks] == [(2, b"1,2\n")] and restarts == 0
    assert chunks[0].header == b"a,b\n"
    with open(f, "ab") as fh:
        fh.write(b"4\n5,6\n")
    chunks, marks, _ = source.poll(f, marks)
    assert [(c.first_line, c.body) for c in chunks] == [(3, b"3,4\n5,6\n")]
    chunks, marks, _ = source.poll(f, marks)
    assert chunks == []
    f.write_bytes(b"a,b\n7,8\n")  # truncated and rewritten: read again from the start
    chunks, marks, restarts = source.poll(f, marks)
    assert restarts == 1 and [(c.first_line, c.body) for c in chunks] == [(2, b"7,8\n")]


def test_a_rotated_file_with_the_same_size_is_seen_by_its_identity(tmp_path):
    f = tmp_path / "log.csv"
    f.write_bytes(b"a,b\n1,2\n")
    _, marks, _ = source.poll(f, {})
    os.rename(f, tmp_path / "log.csv.1")
    f.write_bytes(b"a,b\n1,2\n3,4\n")  # a new file (new inode) that starts like the old one
    chunks, marks, restarts = source.poll(f, marks)
    assert restarts == 1 and chunks[0].body == b"1,2\n3,4\n"


def test_columns_cut_off_what_a_killed_call_appended_before_the_next_append(tmp_path):
    store = Store(tmp_path)
    cols = Columns(store, "final", {"x": ["<f8", 2], "k": ["|i1", 0]})
    cols.append(0, {"x": np.ones((3, 2)), "k": np.arange(3)})
    # a call appends 2 more rows, then dies before its commit: the state still says 3
    cols.append(3, {"x": np.full((2, 2), 9.0), "k": np.arange(2)})
    cols.append(3, {"x": np.full((1, 2), 5.0), "k": np.array([7])})
    got = cols.read(4)
    assert got["x"].tolist() == [[1, 1], [1, 1], [1, 1], [5, 5]] and got["k"].tolist() == [0, 1, 2, 7]


def _clusters() -> pd.DataFrame:
    return pd.DataFrame({"cluster": ["T01", "T02", "network"], "stations": ["A+B+C", "C+D+E", "all 5 stations"]})


def test_critical_values_take_units_defaults_and_the_most_demanding_member():
    cfg = from_dict({"follow": {"critical": {"default": "-2.2 degC", "D": "28 degF", "T01": "-1 degC"}}})
    crit = alerts.critical_values(cfg, "air_temperature", _clusters())
    assert crit[0] == pytest.approx(272.15)  # its own value
    assert crit[1] == pytest.approx((28 + 459.67) * 5 / 9)  # station D's, the highest of the cluster
    assert crit[2] == pytest.approx(270.95)  # the default
    # not set: the freezing point for temperatures, nothing for a concentration
    assert alerts.critical_values(from_dict({}), "air_temperature", _clusters())[0] == pytest.approx(273.15)
    assert np.isnan(alerts.critical_values(from_dict({}), "pm2_5", _clusters())).all()
    with pytest.raises(ConfigError, match="degC"):
        alerts.critical_values(from_dict({"follow": {"critical": -2.2}}), "air_temperature", _clusters())


def test_alerts_fire_when_a_condition_starts_and_not_again_while_it_holds():
    from stationflow.report.now import Display

    cfg = from_dict({"alerts": {"crossing_within": "", "advective_rate": 0.0, "silent_after": ""}})
    disp = Display.of("air_temperature", "K", None)
    firing: dict = {}

    def latest(value):
        one = np.array([value])
        nan = np.array([np.nan])
        return alerts.Latest(pd.Timestamp("2026-04-15T05:00Z"), ["T01"], one, np.array([0.1]), nan, nan, nan, nan,
                             ["in_situ"], np.array([273.15]), nan, nan)

    kw = dict(variable="air_temperature", unit="K", zone="UTC", display=disp)
    assert alerts.evaluate(latest(273.5), {}, firing, cfg, **kw) == []
    fired = alerts.evaluate(latest(273.0), {}, firing, cfg, **kw)
    assert [a["rule"] for a in fired] == ["below_critical"] and fired[0]["evidence"]["critical"] == 273.15
    assert alerts.evaluate(latest(273.2), {}, firing, cfg, **kw) == []  # back within 2 se: still the same event
    assert alerts.evaluate(latest(273.1), {}, firing, cfg, **kw) == []
    alerts.evaluate(latest(273.5), {}, firing, cfg, **kw)  # clearly back above, once: not cleared yet
    assert alerts.evaluate(latest(273.0), {}, firing, cfg, **kw) == []
    for _ in range(alerts.CLEAR_CALLS):  # clearly back above for three calls in a row: cleared
        alerts.evaluate(latest(273.5), {}, firing, cfg, **kw)
    assert len(alerts.evaluate(latest(273.0), {}, firing, cfg, **kw)) == 1


def test_batch_budget_with_a_noise_file_and_excluded_stations(tmp_path):
    # the two keys a follow run pins, used on their own: per-station reading noise from a CSV, stations left out
    from pathlib import Path

    from stationflow import api
    from stationflow.config import load

    frost = Path(__file__).resolve().parent.parent / "sample_data" / "frost"
    noise = tmp_path / "noise.csv"
    noise.write_text("station_id,variable,reading_noise\nHV01,air_temperature,0.3\nHV02,air_temperature,0.05\n",
                     encoding="utf-8")
    cfg_path = tmp_path / "config.toml"
    cfg_path.write_text((frost / "config.toml").read_text()
                        + '\n[uncertainty]\nnoise_file = "noise.csv"\n\n[network]\nexclude = ["HV04"]\n', encoding="utf-8")
    run = api.run_budget(frost / "observations.csv", frost / "stations.csv", load(cfg_path))
    assert run.choices["noise_source"].startswith("uncertainty.noise_file")
    sigma = dict(zip(run.check.data.stations["station_id"], np.broadcast_to(run.settings.sigma, (len(run.check.data.stations),))))
    assert sigma["HV01"] == 0.3 and sigma["HV02"] == 0.05 and sigma["HV05"] == pytest.approx(np.median([0.3, 0.05]))
    assert not run.table["stations"].astype(str).str.contains("HV04").any()
    bad = tmp_path / "bad.csv"
    bad.write_text("station,noise\nHV01,0.1\n", encoding="utf-8")
    cfg_path.write_text((frost / "config.toml").read_text() + '\n[uncertainty]\nnoise_file = "bad.csv"\n', encoding="utf-8")
    with pytest.raises(ConfigError, match="station_id, variable, reading_noise"):
        api.run_budget(frost / "observations.csv", frost / "stations.csv", load(cfg_path))
